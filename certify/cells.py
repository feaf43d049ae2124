"""Dyadic cells of the analysis window with exact integer addresses.

A cell is addressed by its depth ``d`` and an integer index vector ``i``; along axis
``k`` it is ``[w_k + (i_k / 2^d) L_k, w_k + ((i_k + 1) / 2^d) L_k]`` where
``[w_k, w_k + L_k]`` is the window side. Splitting a cell makes ``2^n`` children of
depth ``d + 1``. The leaves of the tree tile the window exactly.

Float boxes of cells enclose the exact cells (each boundary is rounded outward, and is
exact whenever it is representable), so lookups may report a few extra neighbours but
never miss one.
"""

from __future__ import annotations

from fractions import Fraction
from itertools import product

import numpy as np

from .interval import enclose_fraction

__all__ = ["CellTree", "index_dtype"]

#: Pairs (query, node) tried at once by :meth:`CellTree.leaves_meeting`, roughly.
FRONTIER = 1 << 19
#: Most states for which the children a box meets are looked up in a table of
#: ``4^n x 2^n`` bytes (:meth:`CellTree._children_meeting`).
MEET_TABLE_STATES = 6


def index_dtype(size):
    """The narrowest of int32 and int64 that numbers `size` things (halves edge lists)."""
    return np.int32 if size < 2 ** 31 else np.int64


class CellTree:
    """A tree of dyadic cells over a window.

    Parameters
    ----------
    window : sequence of (Fraction, Fraction)
        Exact window sides, ``lo < hi``.

    Attributes
    ----------
    n : int
    depth : ndarray of int, shape (M,)
    index : ndarray of int64, shape (M, n)
    first_child : ndarray of int, shape (M,)
        Id of the first of ``2^n`` consecutive children, or -1 for a leaf.
    lo, hi : ndarray, shape (M, n)
        Float boxes enclosing the exact cells.
    """

    def __init__(self, window):
        self.window = tuple((Fraction(a), Fraction(b)) for a, b in window)
        self.n = len(self.window)
        self._tables = {}
        self.depth = np.zeros(1, int)
        self.index = np.zeros((1, self.n), np.int64)
        self.first_child = np.full(1, -1)
        self.lo, self.hi = self._geometry(self.depth, self.index)
        self._offsets = np.array(list(product((0, 1), repeat=self.n)), np.int64)
        self._meet_table = None  # :meth:`_children_meeting`

    def __len__(self):
        return len(self.depth)

    def _boundaries(self, d):
        """Float enclosures ``(lo, hi)`` of the boundaries ``j / 2^d`` along each axis."""
        if d not in self._tables:
            lo = np.empty((self.n, 2 ** d + 1))
            hi = np.empty_like(lo)
            for k, (a, b) in enumerate(self.window):
                for j in range(2 ** d + 1):
                    lo[k, j], hi[k, j] = enclose_fraction(a + (b - a) * Fraction(j, 2 ** d))
            self._tables[d] = (lo, hi)
        return self._tables[d]

    def _geometry(self, depth, index):
        lo = np.empty(index.shape)
        hi = np.empty(index.shape)
        for d in np.unique(depth):
            sel = depth == d
            blo, bhi = self._boundaries(int(d))
            for k in range(self.n):
                lo[sel, k] = blo[k, index[sel, k]]
                hi[sel, k] = bhi[k, index[sel, k] + 1]
        return lo, hi

    def window_bounds(self):
        """Float enclosures of the window's lower and upper sides.

        Returns
        -------
        lo_lo, lo_hi, hi_lo, hi_hi : ndarray, shape (n,)
            The exact lower side lies in ``[lo_lo, lo_hi]``, the upper in ``[hi_lo, hi_hi]``.
        """
        blo, bhi = self._boundaries(0)
        return blo[:, 0], bhi[:, 0], blo[:, 1], bhi[:, 1]

    def exact_box(self, cell):
        """Exact sides of a cell as Fractions, shape (n, 2)."""
        d = int(self.depth[cell])
        out = []
        for k, (a, b) in enumerate(self.window):
            i = int(self.index[cell, k])
            out.append((a + (b - a) * Fraction(i, 2 ** d), a + (b - a) * Fraction(i + 1, 2 ** d)))
        return out

    def leaves(self):
        """Ids of the current leaves."""
        return np.flatnonzero(self.first_child < 0)

    def leaf_numbers(self, leaves):
        """Per node of the tree, its position in `leaves` (-1 for nodes not in it), in
        the narrowest integer type that holds the positions."""
        number = np.full(len(self), -1, index_dtype(len(leaves)))
        number[leaves] = np.arange(len(leaves))
        return number

    def split(self, cells):
        """Split leaves into ``2^n`` children each.

        Parameters
        ----------
        cells : array_like of int
            Leaf ids.

        Returns
        -------
        ndarray of int
            Ids of the new children, ``2^n`` consecutive per parent in parent order.
        """
        cells = np.asarray(cells, int)
        if np.any(self.first_child[cells] >= 0):
            raise ValueError("only leaves can be split")
        k = len(self._offsets)
        start = len(self.depth)
        new_depth = np.repeat(self.depth[cells] + 1, k)
        new_index = (2 * self.index[cells][:, None, :] + self._offsets[None]).reshape(-1, self.n)
        lo, hi = self._geometry(new_depth, new_index)
        self.first_child[cells] = start + k * np.arange(len(cells))
        self.depth = np.concatenate([self.depth, new_depth])
        self.index = np.concatenate([self.index, new_index])
        self.first_child = np.concatenate([self.first_child, np.full(len(new_depth), -1)])
        self.lo = np.concatenate([self.lo, lo])
        self.hi = np.concatenate([self.hi, hi])
        return np.arange(start, len(self.depth))

    def leaves_meeting(self, qlo, qhi, strict=None):
        """All (query, leaf) pairs where the closed query box meets the leaf.

        Parameters
        ----------
        qlo, qhi : ndarray, shape (Q, n)
            Query boxes (rows with NaN meet nothing; handle them before calling).
        strict : ndarray of bool, shape (Q, n), optional
            Along the marked axes a leaf must overlap the open range ``(qlo, qhi)``
            instead of the closed one (neighbours that only touch the box there are left
            out).

        Returns
        -------
        query, leaf : ndarray of int (int32 when the tree is small enough)
            Pairs, sorted by query.

        Notes
        -----
        The leaves whose interiors meet a box's interior cover the box when the box is
        thick (``qlo < qhi``) along every axis and lies in the window: each interior
        point of the box lies in some leaf, that leaf then overlaps the interior, and the
        union of those leaves is closed. Marking only the thick axes keeps this true for
        flat boxes, within the hyperplane they lie in.
        """
        strict = np.zeros(qlo.shape, bool) if strict is None else strict
        # queries are taken in blocks sized so that the pairs tried at one level stay
        # near FRONTIER: wide boxes meet thousands of leaves, and all their pairs at
        # once would take gigabytes (each query's pairs do not depend on the others)
        dtype = index_dtype(max(len(qlo), len(self.depth)))
        out_q, out_leaf = [np.zeros(0, dtype)], [np.zeros(0, dtype)]
        first, size = 0, min(1024, FRONTIER)
        while first < len(qlo):
            block = np.arange(first, min(first + size, len(qlo)))
            query, leaf, widest = self._meeting_block(block, qlo, qhi, strict)
            out_q.append(query.astype(dtype))
            out_leaf.append(leaf.astype(dtype))
            first += len(block)
            size = int(np.clip(size * FRONTIER / max(widest, 1), 1, 1 << 16))
        # one list joined and freed before the other: pairs can be tens of millions
        query = np.concatenate(out_q)
        del out_q
        return query, np.concatenate(out_leaf)

    def _meeting_block(self, q, qlo, qhi, strict):
        """:meth:`leaves_meeting` for the queries `q`; also the most pairs at one level.

        The walk goes down from the root and makes only the children that meet a box.
        A child's float side along an axis is its parent's lower or upper half there,
        the sides of the first child (all lower halves) or of the last (all upper), so
        two tests per axis decide all ``2^n`` children. A strict test ``lo < b`` is
        ``lo <= `` the float below ``b`` (NaN fails both).
        """
        bound_hi = np.where(strict[q], np.nextafter(qhi[q], -np.inf), qhi[q])
        bound_lo = np.where(strict[q], np.nextafter(qlo[q], np.inf), qlo[q])
        k = len(self._offsets)
        mine = np.flatnonzero(np.all((self.lo[0] <= bound_hi) & (self.hi[0] >= bound_lo),
                                     axis=1))
        node = np.zeros(len(mine), int)
        out_q, out_leaf = [np.zeros(0, int)], [np.zeros(0, int)]
        widest = len(q)
        while len(mine):
            child = self.first_child[node]
            leaf = child < 0
            out_q.append(q[mine[leaf]])
            out_leaf.append(node[leaf])
            mine, child = mine[~leaf], child[~leaf]
            widest = max(widest, k * len(mine))
            blo, bhi = bound_lo[mine], bound_hi[mine]
            last = child + (k - 1)
            lower = (self.lo[child] <= bhi) & (self.hi[child] >= blo)
            higher = (self.lo[last] <= bhi) & (self.hi[last] >= blo)
            meet = self._children_meeting(lower, higher)
            # row-major: per parent, its meeting children in order
            parent, offset = np.nonzero(meet)
            mine, node = mine[parent], child[parent] + offset
        query = np.concatenate(out_q)
        leaf = np.concatenate(out_leaf)
        order = np.argsort(query, kind="stable")
        return query[order], leaf[order], widest

    def _children_meeting(self, lower, higher):
        """Per parent, which of its ``2^n`` children meet a box, from whether the lower
        and the upper half along each axis do (`lower`, `higher`, shape ``(P, n)``): up
        to MEET_TABLE_STATES states a table looked up by the ``2n`` bits."""
        upper = self._offsets.T.astype(bool)  # (n, 2^n): the child's half along each axis
        if self.n > MEET_TABLE_STATES:
            meet = np.ones((len(lower), len(self._offsets)), bool)
            for axis in range(self.n):
                meet &= np.where(upper[axis], higher[:, axis, None], lower[:, axis, None])
            return meet
        if self._meet_table is None:
            bits = np.array(list(product((0, 1), repeat=2 * self.n)), bool)[:, ::-1]
            low, high = bits[:, 0::2], bits[:, 1::2]
            self._meet_table = np.all(np.where(upper[None], high[:, :, None],
                                               low[:, :, None]), axis=1)
        weights = 1 << np.arange(2 * self.n)
        code = lower @ weights[0::2] + higher @ weights[1::2]
        return self._meet_table[code]

    def leaf_containing(self, points):
        """For each point, one leaf whose float box contains it (-1 if outside the window).

        A point on a shared face gets one of the neighbours.
        """
        points = np.asarray(points, float)
        q, leaf = self.leaves_meeting(points, points)
        out = np.full(len(points), -1)
        out[q[::-1]] = leaf[::-1]
        return out

    def volume_fraction(self, cells):
        """Exact fraction of the window volume covered by each cell (``2^-n d``)."""
        return 0.5 ** (self.n * self.depth[cells].astype(float))
