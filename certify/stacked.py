"""Interval kernels on stacked bounds, for compiled programs (:mod:`certify.program`).

An interval array is one ndarray whose first axis holds the bounds: length 2 for
``[lo, hi]``, length 1 for a point (``lo = hi``, e.g. a parameter with one value or an
exact constant). Numpy broadcasting then pairs the bounds of two operands in one
operation, so a kernel makes a handful of numpy calls where the kernels of
:mod:`certify.interval` on separate ``lo``, ``hi`` arrays make about twice as many; the
results are the same floats (the same products, sums and outward steps, folded in the
same order; tests/test_stacked.py compares them). Kernels without a stacked form here
run the :mod:`certify.interval` kernel on the two bounds (:func:`lifted`).

Every array has at least one axis after the bound axis.
"""

from __future__ import annotations

import numpy as np

from . import interval as iv

__all__ = ["stack", "bounds", "add", "sub", "neg", "mul", "div", "lifted", "KERNELS"]


def stack(lo, hi):
    """The interval array of bounds `lo`, `hi` (one array for both: a point)."""
    if lo is hi:
        return np.asarray(lo, float)[None]
    lo, hi = np.asarray(lo, float), np.asarray(hi, float)
    if lo.shape != hi.shape:
        lo, hi = np.broadcast_arrays(lo, hi)
    return np.stack((lo, hi))


def bounds(a):
    """``(lo, hi)`` of an interval array (the same view twice for a point)."""
    return a[0], a[-1]


def add(a, b):
    """``[a] + [b]``: each bound's float sum, moved one ulp outward only where TwoSum
    shows the exact sum beyond it (exact sums stay exact)."""
    s, err = iv.sum_error(a, b)
    if len(s) == 1:
        s, err = np.concatenate((s, s)), np.concatenate((err, err))
    # exact or below the exact sum where err >= 0 (lower bound), above where err <= 0
    np.negative(err[1], out=err[1])
    exact_side = err >= 0
    moved = np.abs(s)
    moved *= iv._ULP
    moved += iv._TINY
    np.subtract(s[0], moved[0], out=moved[0])
    np.add(s[1], moved[1], out=moved[1])
    np.copyto(moved, s, where=exact_side)
    return moved


def neg(a):
    """``-[a]`` (exact)."""
    return -a[::-1]


def sub(a, b):
    """``[a] - [b] = [a] + (-[b])``."""
    return add(a, -b[::-1])


def _extremes(p):
    """``[min; max]`` of the endpoint results ``p[i, j]`` (bound ``i`` of the first
    operand with bound ``j`` of the second) over ``i, j``.

    :func:`certify.interval.mul` folds them in another order; the results differ at
    most in the sign of a zero, which the outward step that follows turns into the
    same bound (``-0`` and ``0`` both round to ``-2**-1074`` or stay ``0``).
    """
    flat = p.reshape((p.shape[0] * p.shape[1],) + p.shape[2:])
    pair = np.empty((2,) + p.shape[2:])
    np.minimum.reduce(flat, axis=0, out=pair[0])
    np.maximum.reduce(flat, axis=0, out=pair[1])
    return pair


def mul(a, b):
    """``[a] * [b]`` (``0 * inf`` gives NaN, hence unusable); see
    :func:`certify.interval.mul`."""
    pair = _extremes(a[:, None] * b[None, :])
    alo, ahi, blo, bhi = a[0], a[-1], b[0], b[-1]
    iv.outward_pair(pair,
                    lambda: ((alo < 0) & (bhi > 0)) | ((ahi > 0) & (blo < 0)),
                    lambda: ((alo < 0) & (blo < 0)) | ((ahi > 0) & (bhi > 0)))
    return pair


def div(a, b):
    """``[a] / [b]``; NaN where the divisor contains 0 (see :func:`certify.interval.div`)."""
    alo, ahi, blo, bhi = a[0], a[-1], b[0], b[-1]
    bad = (blo <= 0) & (bhi >= 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        pair = _extremes(a[:, None] / b[None, :])
    # the divisor has one strict sign where it is usable
    iv.outward_pair(pair,
                    lambda: ((alo < 0) & (blo > 0)) | ((ahi > 0) & (bhi < 0)),
                    lambda: ((alo < 0) & (bhi < 0)) | ((ahi > 0) & (blo > 0)))
    np.copyto(pair, np.nan, where=bad)
    return pair


def lifted(kernel, operands=1):
    """The stacked form of a :mod:`certify.interval` kernel whose first `operands`
    arguments are intervals (each as ``lo, hi``) and the rest plain values."""

    def on_stacked(*args):
        flat = [bound for arg in args[:operands] for bound in bounds(arg)]
        return stack(*kernel(*flat, *args[operands:]))

    on_stacked.__name__ = kernel.__name__
    return on_stacked


#: The kernel of every operation of a compiled program (certify.program).
KERNELS = {"add": add, "sub": sub, "neg": neg, "mul": mul, "div": div,
           "imin": lifted(iv.imin, 2), "imax": lifted(iv.imax, 2),
           **{name: lifted(getattr(iv, name))
              for name in ("exp", "log", "sin", "cos", "tan", "atan", "tanh", "sinh",
                           "cosh", "iabs", "sqrt", "pow_int", "pow_real")}}
