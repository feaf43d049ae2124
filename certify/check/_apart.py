"""Leaves that a cell's image sets miss: the checker's own test (docs/design.md, section 5).

A leaf that meets a cell's image box but is not among its successors is still allowed
when it misses one of the cell's sets ``m + A [r]`` at the horizon, as recomputed by the
checker: with ``B`` an enclosure of ``A^-1`` (``ar.inverse``), the coordinates
``B (L - m)`` of the leaf ``L`` lie outside ``[r]`` along some axis. The test runs in
the float pass's arithmetic (arb balls where the process does not round to nearest).
"""

from __future__ import annotations

import numpy as np

from ._arith import ARITHMETICS
from ._cells import _matvec, _true

__all__ = ["sets_miss"]


def sets_miss(m, A, r_lo, r_hi, leaf_lo, leaf_hi, which=None):
    """Per pair: the box ``[leaf_lo, leaf_hi]`` misses one of the sets ``m + A_k [r_k]``.

    Parameters
    ----------
    m : ndarray, shape (P, n)
        Float centres (NaN rows: no set known, never a miss).
    A : ndarray, shape (P, K, n, n)
        Float frames (NaN where set ``k`` is not known).
    r_lo, r_hi : ndarray, shape (P, K, n)
        Float bounds of the coordinates, rounded outward.
    leaf_lo, leaf_hi : ndarray of Fraction, shape (Q, n)
        Exact sides of the leaves.
    which : ndarray of int, shape (P,), optional
        The leaf of each pair (default: pair ``i`` has leaf ``i``).

    Returns
    -------
    ndarray of bool, shape (P,)
        True only where the miss is proven.
    """
    P, K, n = r_lo.shape
    miss = np.zeros(P, bool)
    if P == 0:
        return miss
    ar = ARITHMETICS["float"]()
    ar.enter()
    which = np.arange(P) if which is None else which
    # overflow and inf - inf give infinite and NaN ends, which never prove a miss
    with np.errstate(all="ignore"):
        offset = [ar.sub(ar.take(ar.rationals(leaf_lo[:, i], leaf_hi[:, i]), which),
                         ar.exact(m[:, i])) for i in range(n)]
        for k in range(K):
            coordinates = _matvec(ar, ar.inverse(A[:, k]), offset)
            for i, c in enumerate(coordinates):
                # a NaN end (no set, no inverse) makes both comparisons False
                miss |= _true(ar.upper(c) < r_lo[:, k, i]) | _true(ar.lower(c) > r_hi[:, k, i])
    return miss
