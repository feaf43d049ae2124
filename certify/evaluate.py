"""Evaluating compiled programs on boxes with the model's parameter enclosures."""

from __future__ import annotations

import numpy as np

from . import interval as iv

__all__ = ["parameter_enclosures", "evaluate_boxes", "evaluate_limits"]


def parameter_enclosures(model):
    """Float intervals enclosing each parameter's exact box, in model order.

    Parameters
    ----------
    model : certify.model.Model

    Returns
    -------
    list of (float, float)
    """
    out = []
    for p in model.parameters:
        lo, _ = iv.enclose_fraction(p.lo)
        _, hi = iv.enclose_fraction(p.hi)
        out.append((lo, hi))
    return out


def evaluate_boxes(program, lo, hi, params):
    """Evaluate a program whose inputs are the states, then the parameters.

    Parameters
    ----------
    program : certify.program.Program
    lo, hi : ndarray, shape (N, n)
        State boxes.
    params : sequence of (float, float)
        Parameter intervals (see :func:`parameter_enclosures`).

    Returns
    -------
    lo, hi : ndarray, shape (N, n_outputs)
        Outward-rounded enclosures; NaN marks unusable rows.
    """
    n_rows = len(lo)
    # a point (a box of width 0, a parameter with one value) is passed as one array for
    # both bounds: the kernels then skip the products that would repeat (interval.mul)
    cols_lo = list(lo.T) + [np.full(n_rows, p[0]) for p in params]
    cols_hi = (cols_lo[:len(lo.T)] if hi is lo else list(hi.T)) + [
        cols_lo[len(lo.T) + k] if p[0] == p[1] else np.full(n_rows, p[1])
        for k, p in enumerate(params)]
    out = program.interval_columns(cols_lo, cols_hi)
    if not out:
        return np.zeros((n_rows, 0)), np.zeros((n_rows, 0))
    return np.stack([o[0] for o in out], -1), np.stack([o[1] for o in out], -1)


def evaluate_limits(programs, lo, hi, params, rates=False):
    """The limits ``g_j`` (or their rates ``grad g_j . f`` with `rates`) on boxes.

    Parameters
    ----------
    programs : certify.taylor.FlowPrograms
    lo, hi : ndarray, shape (N, n)
    params : sequence of (float, float)
    rates : bool

    Returns
    -------
    lo, hi : ndarray, shape (N, n_limits)
    """
    program = programs.limit_rates if rates else programs.limits
    return evaluate_boxes(program, lo, hi, params)
