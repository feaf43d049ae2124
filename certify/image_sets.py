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
from .flow import interval_inverse

__all__ = ["ImageSetStore", "sets_miss"]

#: Pairs tested at once (bounds the memory of the gathered inverse matrices).
BLOCK = 1 << 17
#: The unit roundoff of float64 and its smallest subnormal.
_U, _ETA = 2.0 ** -53, 2.0 ** -1074


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
    """Per set ``k``: a float centre and a radius (rounded up) of an interval enclosure of
    ``A[:, k]^-1`` (:func:`_mid_rad`), NaN rows where a frame is not finite or its
    inverse is not enclosed."""
    out = []
    usable = np.all(np.isfinite(A), axis=(1, 2, 3))
    for k in range(A.shape[1]):
        Blo = np.full(A.shape[:1] + A.shape[2:], np.nan)
        Bhi = Blo.copy()
        rows = np.flatnonzero(usable)
        if len(rows):
            lo, hi, ok = interval_inverse(A[rows, k])
            Blo[rows[ok]], Bhi[rows[ok]] = lo[ok], hi[ok]
        out.append(_mid_rad(Blo, Bhi))
    return out


def _mid_rad(lo, hi):
    """A float centre ``c`` and a radius ``r`` rounded up, with ``[lo, hi]`` in ``c +- r``
    (NaN where a bound is not finite)."""
    mid = 0.5 * lo + 0.5 * hi
    return mid, iv.round_up(np.maximum(hi - mid, mid - lo))


def _miss(m, inverses, r_lo, r_hi, box_lo, box_hi):
    """:func:`sets_miss` with the inverses of the frames given (:func:`_inverses`).

    The coordinates ``M x`` for ``M`` in ``B = Bc +- Br`` and ``x`` in the box minus
    ``m`` (``x = xc +- xr``) lie within ``|Bc| xr + Br (|xc| + xr)`` of ``Bc xc``. The
    float products and sums are bounded as in Higham 2002, section 3.1 (mem): a float
    inner product of length ``k`` errs by at most ``gamma_k`` times the sum of the
    magnitudes of its terms, ``gamma_k = k u / (1 - k u)``, plus ``k eta`` for products
    that underflow (``u = 2^-53``, ``eta = 2^-1074``), whatever the order of the sum.
    ``GAMMA = (4 n + 8) u`` exceeds ``gamma_{2n+1}`` with room for the few float
    operations that form the radius, which is then rounded up. Four float matrix-vector
    products per set and pair: the interval products of :func:`imatmul` cost about 30
    times as much.
    """
    miss = np.zeros(len(m), bool)
    n = m.shape[1]
    gamma = (4 * n + 8) * _U
    dlo, dhi = iv.sub(box_lo, box_hi, m, m)
    xc, xr = _mid_rad(dlo, dhi)
    size_x = np.abs(xc) + xr
    for k, (Bc, Br) in enumerate(inverses):
        centre = np.einsum("pij,pj->pi", Bc, xc)
        magnitude = np.abs(Bc)
        spread = np.einsum("pij,pj->pi", magnitude, xr) + np.einsum("pij,pj->pi", Br, size_x)
        terms = np.einsum("pij,pj->pi", magnitude, np.abs(xc))
        radius = iv.round_up((gamma * terms + spread + 4 * n * _ETA) * (1 + 2 * gamma))
        low, high = iv.round_down(centre - radius), iv.round_up(centre + radius)
        # a NaN (no set, no inverse, an overflow) makes its comparisons False
        miss |= np.any((high < r_lo[:, k]) | (low > r_hi[:, k]), axis=1)
    return miss


class ImageSetStore:
    """The image sets of the cells that may still need them, by tree node, with what a
    longer tube from the cell needs to go on from there.

    Parameters
    ----------
    n, K : int
        States, and sets per cell (frames of the rule).
    """

    def __init__(self, n, K):
        self.n, self.K = n, K
        self.row = np.full(0, -1)
        self._arrays = self._empty(0)
        self._count = 0
        self._pending = []  # sets put since the arrays were last joined

    def _empty(self, count):
        n, K = self.n, self.K
        return {"m": np.full((count, n), np.nan), "A": np.full((count, K, n, n), np.nan),
                "r_lo": np.full((count, K, n), np.nan), "r_hi": np.full((count, K, n), np.nan),
                "x_lo": np.full((count, n), np.nan), "x_hi": np.full((count, n), np.nan),
                "next_h": np.full(count, np.nan)}

    def put(self, nodes, sets):
        """Store `sets` (a dict of the arrays ``m, A, r_lo, r_hi``, and ``x_lo, x_hi,
        next_h``: the box at the tube's end and the size its next step would have, where
        a longer tube goes on, :class:`certify.flow.FlowStart`; rows as `nodes`)."""
        top = int(nodes.max(initial=-1)) + 1
        if top > len(self.row):
            self.row = np.concatenate([self.row, np.full(top - len(self.row), -1)])
        self.row[nodes] = self._count + np.arange(len(nodes))
        self._count += len(nodes)
        # joined when next read: a round puts its flows piece by piece
        self._pending.append(sets)

    def _joined(self):
        if self._pending:
            self._arrays = {key: np.concatenate([value] + [p[key] for p in self._pending])
                            for key, value in self._arrays.items()}
            self._pending = []
        return self._arrays

    def take(self, nodes, keys=None):
        """The sets of `nodes` (NaN rows where none is stored); only the arrays `keys`
        when given."""
        rows = np.full(len(nodes), -1)
        known = nodes < len(self.row)
        rows[known] = self.row[nodes[known]]
        out = self._empty(len(nodes))
        if keys is not None:
            out = {key: out[key] for key in keys}
        have = rows >= 0
        arrays = self._joined()
        for key in out:
            out[key][have] = arrays[key][rows[have]]
        return out

    def keep_only(self, nodes):
        """Forget the sets of every node but `nodes`."""
        kept = self.take(nodes)
        have = np.all(np.isfinite(kept["m"]), axis=1)
        self.row[:] = -1
        self._arrays, self._count = self._empty(0), 0
        self.put(nodes[have], {k: v[have] for k, v in kept.items()})

    def misses_that_help(self, src, dst, lo, hi, holds):
        """The pairs whose leaf the source's image sets miss, among the pairs that hold
        their source back, tested nearest first until one is met.

        Parameters
        ----------
        src, dst : ndarray of int, shape (P,)
            Tree nodes of each pair's cell and leaf.
        lo, hi : ndarray, shape (nodes, n)
            The boxes of the tree's nodes.
        holds : ndarray of bool, shape (P, H)
            Pair ``i`` keeps its source from label ``h`` (say safe or doomed) unless it
            is dropped.

        Returns
        -------
        ndarray of bool, shape (P,)
            True for pairs proven missed (False for pairs not tested).

        Notes
        -----
        A source can get label ``h`` only if every pair holding it back from ``h`` is
        dropped, so its pairs are tested in order of the leaf's distance from the sets'
        centre ``m`` and the search for ``h`` stops at the first leaf that is met. Most
        undecided cells are held back by a leaf their image does meet, and cost a test or
        two (or none: the caller leaves out cells whose centre ``m`` lies in such a leaf).
        """
        missed = np.zeros(len(src), bool)
        if len(src) == 0:
            return missed
        nodes, which = np.unique(src, return_inverse=True)
        which = which.reshape(-1)
        sets = _Sets(self.take(nodes))
        hoping = np.zeros((len(nodes), holds.shape[1]), bool)
        for h in range(holds.shape[1]):
            hoping[which[holds[:, h]], h] = True
        # axis by axis: the pairs can be millions, boxes of them 64 bytes a pair in 4D
        far = np.full(len(src), -np.inf)
        for k in range(lo.shape[1]):
            box_lo, box_hi, point = lo[dst, k], hi[dst, k], sets.values["m"][which, k]
            far = np.maximum(far, np.abs(0.5 * (box_lo + box_hi) - point) / (box_hi - box_lo))
        # the pairs grouped by rank: each cell's nearest pair first, then its second, ...
        pairs = np.lexsort((far, which))
        group = which[pairs]
        rank = np.arange(len(pairs)) - np.searchsorted(group, group)
        pairs = pairs[np.argsort(rank, kind="stable")]
        starts = np.searchsorted(np.sort(rank), np.arange(rank.max() + 2))
        for j in range(len(starts) - 1):
            now = pairs[starts[j]:starts[j + 1]]
            now = now[np.any(holds[now] & hoping[which[now]], axis=1)]
            if len(now) == 0:
                continue
            miss = sets.missed(which[now], dst[now], lo, hi)
            missed[now[miss]] = True
            met = now[~miss]
            for h in range(holds.shape[1]):
                hoping[which[met[holds[met, h]]], h] = False
        return missed


class _Sets:
    """The image sets of some nodes with the enclosures of their frames' inverses."""

    def __init__(self, values):
        self.values = values
        self.inverses = _inverses(values["A"])

    def missed(self, which, dst, lo, hi):
        """Per pair ``i``: the sets of node number ``which[i]`` miss the box of tree node
        ``dst[i]``."""
        v = self.values
        out = np.zeros(len(which), bool)
        for first in range(0, len(which), BLOCK):
            part = which[first:first + BLOCK]
            boxes = dst[first:first + BLOCK]
            out[first:first + BLOCK] = _miss(
                v["m"][part], [(c[part], r[part]) for c, r in self.inverses],
                v["r_lo"][part], v["r_hi"][part], lo[boxes], hi[boxes])
        return out
