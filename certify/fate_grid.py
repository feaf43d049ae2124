"""Where a labelling's fates lie, on a uniform grid: does a box meet one fate only?

A followed tube (docs/proof-loop.md, "Followed tubes at the maximum depth") runs until
its end box grows past a limit, and the round then keeps the tubes that decide. A tube
whose end box already lies on leaves of one fate (safe, or doomed, besides outside
leaves) under the labelling made before the round has reached what it was followed
for: stopping it there saves the rest of its steps. On the library's food chain at
depth 6, the tubes that the round decided spent two fifths of their steps after such an
end.

This is a choice of where a tube ends, not a fact of the proof: the labelling that
follows decides every label from the stored steps, and the checker re-derives it. So
the grid may be coarse (it is capped at :data:`MOST_CELLS` cells) and its lookups need
no outward rounding; a grid cell counts as one fate only when every leaf meeting it has
that fate or is outside.
"""

from __future__ import annotations

from itertools import product

import numpy as np

from .labels import DOOMED, OUTSIDE, SAFE

__all__ = ["FateGrid", "fate_grid"]

#: Most cells of a fate grid (a grid coarser than the leaves is built beyond it).
MOST_CELLS = 1 << 21
#: Bits of a grid cell's code: it meets a leaf that is neither safe nor outside, one that
#: is neither doomed nor outside.
NOT_SAFE, NOT_DOOMED = 1, 2


class FateGrid:
    """Which grid cells meet a leaf that keeps them from being of one fate.

    Parameters
    ----------
    origin, width : ndarray, shape (n,)
        The window's lower corner and the grid cells' sides.
    code : ndarray of uint8, shape ``(size,) * n``
        Per grid cell, the bits NOT_SAFE and NOT_DOOMED.
    """

    def __init__(self, origin, width, code):
        self.origin = np.asarray(origin, float)
        self.width = np.asarray(width, float)
        self.size = code.shape[0]
        self.code = code
        self._sums = None

    def __getstate__(self):
        # the batches carry the codes (a byte a cell); a worker makes its own tables
        return {k: v for k, v in self.__dict__.items() if k != "_sums"} | {"_sums": None}

    def one_fate(self, lo, hi):
        """Per box ``[lo, hi]`` (shape (N, n)): every grid cell it meets is safe or
        outside, or every one is doomed or outside."""
        if self._sums is None:
            self._sums = np.stack([_summed(self.code & bit) for bit in (NOT_SAFE, NOT_DOOMED)])
        with np.errstate(invalid="ignore"):
            first = np.floor((lo - self.origin) / self.width)
            last = np.floor((hi - self.origin) / self.width) + 1
        usable = np.all(np.isfinite(first) & np.isfinite(last), axis=1)
        first = np.clip(np.nan_to_num(first), 0, self.size).astype(np.int64)
        last = np.clip(np.nan_to_num(last), 0, self.size).astype(np.int64)
        usable &= np.all(last > first, axis=1)
        # cells keeping the box from being safe, and from being doomed
        against = _box_sums(self._sums, first, last)
        return usable & np.any(against == 0, axis=0)


def fate_grid(tree, leaves, label):
    """The fate grid of a labelling.

    Parameters
    ----------
    tree : certify.cells.CellTree
    leaves : ndarray of int
        Node ids of the leaves.
    label : ndarray of str
        Their labels.

    Returns
    -------
    FateGrid
        On a grid of ``2^g`` cells a side, ``g`` the deepest leaf's depth or less, so
        that the grid has at most :data:`MOST_CELLS` cells.
    """
    n = tree.n
    depth = tree.depth[leaves]
    g = int(min(depth.max(), max(MOST_CELLS.bit_length() - 1, n) // n))
    size = 1 << g
    index = tree.index[leaves]
    # per leaf the range of grid cells it covers (a deeper leaf: the one holding it)
    shift = (g - depth)[:, None]
    coarse = shift >= 0
    first = np.where(coarse, index << np.maximum(shift, 0), index >> np.maximum(-shift, 0))
    last = np.where(coarse, (index + 1) << np.maximum(shift, 0), first + 1)
    code = np.zeros((size,) * n, np.uint8)
    for bit, fate in ((NOT_SAFE, SAFE), (NOT_DOOMED, DOOMED)):
        against = (label != fate) & (label != OUTSIDE)
        code |= np.where(_held(first[against], last[against], size, n), bit, 0).astype(np.uint8)
    lo, _, hi, _ = tree.window_bounds()
    return FateGrid(lo, (hi - lo) / size, code)


def _held(first, last, size, n):
    """Per grid cell, whether one of the blocks ``[first, last)`` holds it (counts added
    as differences at the blocks' corners, then summed along each axis)."""
    diff = np.zeros((size + 1,) * n, np.int32)
    for uppers, at in _corners(first, last):
        np.add.at(diff, at, (-1) ** uppers)
    for k in range(n):
        np.cumsum(diff, axis=k, out=diff)
    return diff[(slice(0, size),) * n] > 0


def _summed(flags):
    """The summed table ``S[i] = number of flags[j] set for j < i`` (one more cell a
    side; int32 holds the at most MOST_CELLS of them)."""
    n = flags.ndim
    table = np.zeros(tuple(s + 1 for s in flags.shape), np.int32)
    table[(slice(1, None),) * n] = flags != 0
    for k in range(n):
        np.cumsum(table, axis=k, out=table)
    return table


def _box_sums(tables, first, last):
    """Per stacked summed table, the sums of its counts over the grid boxes
    ``[first, last)`` (inclusion-exclusion over the boxes' corners, looked up once for
    all tables); shape (tables, N)."""
    n = first.shape[1]
    total = np.zeros((len(tables), len(first)), np.int64)
    for uppers, at in _corners(first, last):
        total += (-1) ** (n - uppers) * tables[(slice(None),) + at]
    return total


def _corners(first, last):
    """Yield, per corner of the boxes ``[first, last)`` (shape (N, n)), how many of its
    coordinates are upper ones and its index tuple."""
    n = first.shape[1]
    for corner in product((0, 1), repeat=n):
        yield sum(corner), tuple(np.where(c, last[:, k], first[:, k])
                                 for k, c in enumerate(corner))
