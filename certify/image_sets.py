"""Successors that a cell's image sets miss (docs/design.md, section 5).

A cell's flow ends with sets ``m + A_k [r_k]``, one per frame of the rule, each enclosing
the cell's image at the horizon; the image box in which successors are looked up is the
hull of their intersection (cut further by the drift bound and the window). With a
rotated or sheared set a leaf may meet the box and miss a set: no trajectory of the cell
is in that leaf at the horizon, so the leaf is not needed as a successor. A leaf ``L``
misses the set when the coordinates of its points, ``B (L - m)`` with ``B`` an interval
enclosure of ``A^-1``, lie outside ``[r]`` along some axis.

Only undecided cells gain from fewer successors (a safe or doomed cell is so with all of
them), and labels never leave ``safe`` or ``doomed`` once given (only undecided leaves
are split), so the prover keeps the sets of undecided cells alone (:class:`ImageSetStore`).
The checker tests the leaves it finds missing from a list the same way with its own
sets (certify/check/_apart.py).
"""

from __future__ import annotations

import numpy as np

from . import interval as iv
from .flow import imatmul, interval_inverse

__all__ = ["ImageSetStore", "sets_miss"]

#: Pairs tested at once (bounds the memory of the gathered inverse matrices).
BLOCK = 1 << 17


def sets_miss(m, A, r_lo, r_hi, box_lo, box_hi):
    """Whether a box misses one of the sets ``m + A_k [r_k]`` (a proof when True).

    Parameters
    ----------
    m : ndarray, shape (P, n)
    A : ndarray, shape (P, K, n, n)
        Invertible float frames (rows with a NaN count as meeting).
    r_lo, r_hi : ndarray, shape (P, K, n)
    box_lo, box_hi : ndarray, shape (P, n)

    Returns
    -------
    ndarray of bool, shape (P,)
    """
    return _miss(m, _inverses(A), r_lo, r_hi, box_lo, box_hi)


def _inverses(A):
    """Per set ``k``: interval enclosures ``(B_lo, B_hi)`` of ``A[:, k]^-1``, NaN rows
    where a frame is not finite or its inverse is not enclosed."""
    out = []
    usable = np.all(np.isfinite(A), axis=(1, 2, 3))
    for k in range(A.shape[1]):
        Blo = np.full(A.shape[:1] + A.shape[2:], np.nan)
        Bhi = Blo.copy()
        rows = np.flatnonzero(usable)
        if len(rows):
            lo, hi, ok = interval_inverse(A[rows, k])
            Blo[rows[ok]], Bhi[rows[ok]] = lo[ok], hi[ok]
        out.append((Blo, Bhi))
    return out


def _miss(m, inverses, r_lo, r_hi, box_lo, box_hi):
    """:func:`sets_miss` with the inverses of the frames given (:func:`_inverses`)."""
    miss = np.zeros(len(m), bool)
    dlo, dhi = iv.sub(box_lo, box_hi, m, m)
    for k, (Blo, Bhi) in enumerate(inverses):
        plo, phi = imatmul(Blo, Bhi, dlo[..., None], dhi[..., None])
        plo, phi = plo[..., 0], phi[..., 0]
        # a NaN (no set, no inverse) makes its comparisons False
        miss |= np.any((phi < r_lo[:, k]) | (plo > r_hi[:, k]), axis=1)
    return miss


class ImageSetStore:
    """The image sets of the cells that may still need them, by tree node.

    Parameters
    ----------
    n, K : int
        States, and sets per cell (frames of the rule).
    """

    def __init__(self, n, K):
        self.n, self.K = n, K
        self.row = np.full(0, -1)
        self._arrays = self._empty(0)

    def _empty(self, count):
        n, K = self.n, self.K
        return {"m": np.full((count, n), np.nan), "A": np.full((count, K, n, n), np.nan),
                "r_lo": np.full((count, K, n), np.nan), "r_hi": np.full((count, K, n), np.nan)}

    def put(self, nodes, sets):
        """Store `sets` (a dict of the arrays ``m, A, r_lo, r_hi``, rows as `nodes`)."""
        top = int(nodes.max(initial=-1)) + 1
        if top > len(self.row):
            self.row = np.concatenate([self.row, np.full(top - len(self.row), -1)])
        first = len(self._arrays["m"])
        for key, value in sets.items():
            self._arrays[key] = np.concatenate([self._arrays[key], value])
        self.row[nodes] = first + np.arange(len(nodes))

    def take(self, nodes):
        """The sets of `nodes` (NaN rows where none is stored)."""
        rows = np.full(len(nodes), -1)
        known = nodes < len(self.row)
        rows[known] = self.row[nodes[known]]
        out = self._empty(len(nodes))
        have = rows >= 0
        for key in out:
            out[key][have] = self._arrays[key][rows[have]]
        return out

    def keep_only(self, nodes):
        """Forget the sets of every node but `nodes`."""
        kept = self.take(nodes)
        have = np.all(np.isfinite(kept["m"]), axis=1)
        self.row[:] = -1
        self._arrays = self._empty(0)
        self.put(nodes[have], {k: v[have] for k, v in kept.items()})

    def missed(self, src, box_lo, box_hi):
        """Per pair ``i``: the image sets of node ``src[i]`` miss the box ``i``."""
        nodes, which = np.unique(src, return_inverse=True)
        sets = self.take(nodes)
        inverses = _inverses(sets["A"])
        out = np.zeros(len(src), bool)
        for first in range(0, len(src), BLOCK):
            part = which[first:first + BLOCK]
            out[first:first + BLOCK] = _miss(
                sets["m"][part], [(lo[part], hi[part]) for lo, hi in inverses],
                sets["r_lo"][part], sets["r_hi"][part], box_lo[first:first + BLOCK],
                box_hi[first:first + BLOCK])
        return out
