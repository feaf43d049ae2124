"""The successor lookup of the cell tree against a direct test of every leaf."""

from fractions import Fraction

import numpy as np

from certify.cells import CellTree


def _random_tree(rng, n, rounds):
    tree = CellTree([(Fraction(-1), Fraction(2))] + [(Fraction(0), Fraction(1, 3))] * (n - 1))
    tree.split([0])
    for _ in range(rounds):
        leaves = tree.leaves()
        tree.split(rng.choice(leaves, size=max(1, len(leaves) // 4), replace=False))
    return tree


def _queries(rng, tree, count):
    """Boxes with sides on cell sides (touching leaves), anywhere, flat, reaching out of
    the window, infinite, and empty."""
    leaves = tree.leaves()
    a = tree.lo[rng.choice(leaves, count)]
    b = tree.hi[rng.choice(leaves, count)]
    lo, hi = np.minimum(a, b), np.maximum(a, b)
    free = rng.random(lo.shape) < 0.3
    span = tree.hi[0] - tree.lo[0]
    lo = np.where(free, tree.lo[0] + (rng.random(lo.shape) * 1.4 - 0.2) * span, lo)
    hi = np.where(free, lo + rng.random(lo.shape) * 0.5 * span, hi)
    flat = rng.random(lo.shape) < 0.15
    hi = np.where(flat, lo, hi)
    lo[rng.random(lo.shape) < 0.02] = -np.inf
    hi[rng.random(hi.shape) < 0.02] = np.inf
    empty = rng.random(len(lo)) < 0.05
    lo[empty, 0], hi[empty, 0] = hi[empty, 0] + 1.0, lo[empty, 0]
    strict = rng.random(lo.shape) < 0.5
    return lo, hi, strict


def test_leaves_meeting_are_the_leaves_whose_boxes_meet():
    # The rule of CellTree.leaves_meeting stated directly (closed boxes meet where every
    # axis' ranges overlap; a strict axis needs an overlap of the open range): every
    # leaf tested against every box, in 2, 3, 4 and 7 states (beyond the table of
    # CellTree._children_meeting).
    rng = np.random.default_rng(5)
    for n, rounds in ((2, 5), (3, 4), (4, 3), (7, 1)):
        tree = _random_tree(rng, n, rounds)
        leaves = tree.leaves()
        lo, hi, strict = _queries(rng, tree, 300)
        query, leaf = tree.leaves_meeting(lo, hi, strict=strict)
        assert np.all(np.diff(query) >= 0)
        found = {(int(q), int(c)) for q, c in zip(query, leaf)}
        assert len(found) == len(query)
        want = set()
        for i in range(len(lo)):
            below = np.where(strict[i], tree.lo[leaves] < hi[i], tree.lo[leaves] <= hi[i])
            above = np.where(strict[i], tree.hi[leaves] > lo[i], tree.hi[leaves] >= lo[i])
            want |= {(i, int(c)) for c in leaves[np.all(below & above, axis=1)]}
        assert found == want
        assert len(want) > 5 * len(lo)  # boxes meet many leaves, some none


def test_leaf_numbers_name_each_leaf_by_its_position():
    tree = CellTree([(Fraction(0), Fraction(1)), (Fraction(0), Fraction(2))])
    tree.split(tree.split([0])[[0, 3]])
    leaves = tree.leaves()[::-1]   # any order the caller keeps its leaves in
    number = tree.leaf_numbers(leaves)
    np.testing.assert_array_equal(number[leaves], np.arange(len(leaves)))
    others = np.setdiff1d(np.arange(len(tree)), leaves)
    assert len(others) and np.all(number[others] == -1)
