"""Evaluating compiled programs on boxes with the model's parameter enclosures."""

from __future__ import annotations

import numpy as np

from . import interval as iv

__all__ = ["parameter_enclosures", "evaluate_boxes", "evaluate_limits"]

#: Most boxes evaluated at once: a program's intermediate values take some hundreds of
#: bytes a box, and a round's steps can number millions.
BLOCK = 1 << 16


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
    if n_rows > BLOCK:
        out = None
        for first in range(0, n_rows, BLOCK):
            rows = slice(first, first + BLOCK)
            box_lo = lo[rows]
            part_lo, part_hi = evaluate_boxes(program, box_lo,
                                              box_lo if hi is lo else hi[rows], params)
            if out is None:
                out = tuple(np.empty((n_rows,) + p.shape[1:]) for p in (part_lo, part_hi))
            out[0][rows], out[1][rows] = part_lo, part_hi
        return out
    # the state columns as interval arrays (certify.stacked) in one copy; a box of width
    # 0 and a parameter with one value are points, which the kernels multiply with
    # half the products, and a parameter enters with one row for every box
    states = lo[None] if hi is lo else np.stack((lo, hi))
    inputs = [states[..., k] for k in range(lo.shape[1])] + [
        np.array(p[:1] if p[0] == p[1] else p, float).reshape(-1, 1) for p in params]
    out = program.stacked(inputs)
    if not out:
        return np.zeros((n_rows, 0)), np.zeros((n_rows, 0))
    both = np.stack([np.broadcast_to(o, (2, n_rows)) for o in out], -1)
    return both[0], both[1]


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
