"""The compact step store (certify.steps) and the blocked leaf lookup (certify.cells).

References: the closed form x(t) = x0 exp(-t) of x' = -x (exact decay; every a-priori
box E of a step must hold the solution over the step, checked with mpmath), and, for
the lookup, the definition of "closed boxes meet", evaluated pair by pair with
fractions.Fraction on the exact dyadic cells.
"""

from __future__ import annotations

from fractions import Fraction

import mpmath
import numpy as np
import pytest
import sympy

import certify.cells as cells_module
from certify.cells import CellTree
from certify.flow import flow_boxes
from certify.steps import StepBatch, StepStore
from certify.taylor import _build

x = sympy.Symbol("x", real=True)


def decay_flow(starts, width):
    programs = _build((-x,), (x,), (), (), 4)
    lo = np.array(starts, float)[:, None]
    return flow_boxes(programs, lo, lo + width, [], min_horizon=1.0, max_horizon=1.0,
                      step=0.1)


def exact(t):
    return mpmath.mpf(t.numerator) / t.denominator


def assert_holds_decay(store, node, x0_lo, x0_hi):
    """Every stored E of `node` holds x0 exp(-t) over its step (closed form)."""
    start = store.offsets(np.array([node]))
    h = store.gather(np.array([node]), "h")
    E = store.gather(np.array([node]), "E")
    assert len(h) == start[1] > 0
    t = Fraction(0)
    for k in range(len(h)):
        # exp(-t) decreases: over [t, t + h] the solutions from [x0_lo, x0_hi] lie in
        # [x0_lo exp(-(t + h)), x0_hi exp(-t)] (x0 > 0)
        low = mpmath.mpf(x0_lo) * mpmath.exp(-exact(t + Fraction(float(h[k]))))
        high = mpmath.mpf(x0_hi) * mpmath.exp(-exact(t))
        assert mpmath.mpf(float(E[k, 0, 0])) <= low and high <= mpmath.mpf(float(E[k, 0, 1]))
        t += Fraction(float(h[k]))
    assert t >= 1


def test_store_keeps_what_it_is_given_and_forgets_split_cells():
    store = StepStore(1)
    first = decay_flow([1.0, 2.0, 3.0], 0.01)
    store.add(np.array([0, 1, 2]), StepBatch.from_flow(first))
    second = decay_flow([4.0, 5.0], 0.01)
    store.add(np.array([5, 6]), StepBatch.from_flow(second))
    # the stored records are the flow's own, bit for bit
    for node, (R, b) in {1: (first, 1), 6: (second, 1)}.items():
        rows = R.steps_of(b)
        np.testing.assert_array_equal(store.gather(np.array([node]), "h"), R.h[rows])
        np.testing.assert_array_equal(store.gather(np.array([node]), "E")[..., 0], R.e_lo[rows])
        np.testing.assert_array_equal(store.gather(np.array([node]), "E")[..., 1], R.e_hi[rows])
    mark = store.snapshot()
    store.add(np.array([7]), StepBatch.from_flow(decay_flow([6.0], 0.01)))
    store.restore(mark)
    assert store.offsets(np.array([7]))[-1] == 0
    # nodes 0, 1 and 5 were split: their steps go, the batches shrink (compaction)
    store.forget_all_but(np.array([2, 6, 9]))
    assert sum(b.size for b in store.batches) == first.n_steps[2] + second.n_steps[1]
    assert store.offsets(np.array([0, 1, 5]))[-1] == 0
    assert_holds_decay(store, 2, 3.0, 3.01)
    assert_holds_decay(store, 6, 5.0, 5.01)


def test_followed_by_puts_each_box_steps_after_its_own():
    # a followed tube's steps: those of its first part, then those it went on with
    first = StepBatch.from_flow(decay_flow([1.0, 2.0, 3.0], 0.01))
    then = StepBatch.from_flow(decay_flow([4.0, 5.0, 6.0], 0.02))
    joined = first.followed_by(then)
    np.testing.assert_array_equal(joined.n_steps, first.n_steps + then.n_steps)
    for b in range(3):
        for key in ("h", "E"):
            mine = getattr(first, key)[first.rows(np.array([b]))]
            theirs = getattr(then, key)[then.rows(np.array([b]))]
            np.testing.assert_array_equal(getattr(joined, key)[joined.rows(np.array([b]))],
                                          np.concatenate([mine, theirs]))


def test_replaced_steps_are_given_back_and_restored():
    # a followed tube replaces a cell's steps (certify/prove.py, extend): set_refs gives
    # the old ones back, restore() undoes a replacement made after the snapshot
    store = StepStore(1)
    short = decay_flow([1.0, 2.0], 0.01)
    store.add(np.array([0, 1]), StepBatch.from_flow(short))
    old = store.refs(np.array([1]))
    mark = store.snapshot()
    longer = flow_boxes(_build((-x,), (x,), (), (), 4), np.array([[2.0]]), np.array([[2.01]]),
                        [], min_horizon=3.0, max_horizon=3.0, step=0.1)
    store.add(np.array([1]), StepBatch.from_flow(longer))
    np.testing.assert_array_equal(store.gather(np.array([1]), "h"), longer.h)
    store.set_refs(np.array([1]), old)
    np.testing.assert_array_equal(store.gather(np.array([1]), "h"), short.h[short.steps_of(1)])
    store.add(np.array([1]), StepBatch.from_flow(longer))
    store.restore(mark)
    np.testing.assert_array_equal(store.gather(np.array([1]), "h"), short.h[short.steps_of(1)])
    assert_holds_decay(store, 1, 2.0, 2.01)


def exact_cells(tree, leaves):
    """Exact Fraction boxes of the leaves, from their dyadic addresses."""
    out = []
    for node in leaves:
        d, idx = int(tree.depth[node]), tree.index[node]
        box = []
        for k, (a, b) in enumerate(tree.window):
            w = (b - a) / 2 ** d
            box.append((a + int(idx[k]) * w, a + (int(idx[k]) + 1) * w))
        out.append(box)
    return out


@pytest.mark.parametrize("frontier", [5, 1 << 19])
def test_blocked_lookup_finds_exactly_the_meeting_leaves(monkeypatch, frontier):
    monkeypatch.setattr(cells_module, "FRONTIER", frontier)
    window = [(Fraction(0), Fraction(1)), (Fraction(-1), Fraction(1))]
    tree = CellTree(window)
    rng = np.random.default_rng(3)
    new = tree.split([0])
    for _ in range(3):
        new = tree.split(new[rng.random(len(new)) < 0.6])
    leaves = tree.leaves()
    # queries on a grid of 1/64 so that many share faces with cells exactly
    ends = rng.integers(0, 65, size=(40, 2, 2)) / 64
    qlo = np.stack([np.minimum(ends[:, 0, 0], ends[:, 1, 0]),
                    2 * np.minimum(ends[:, 0, 1], ends[:, 1, 1]) - 1], 1)
    qhi = np.stack([np.maximum(ends[:, 0, 0], ends[:, 1, 0]),
                    2 * np.maximum(ends[:, 0, 1], ends[:, 1, 1]) - 1], 1)
    q, leaf = tree.leaves_meeting(qlo, qhi)
    assert np.all(np.diff(q) >= 0)
    found = set(zip(q.tolist(), leaf.tolist()))
    boxes = exact_cells(tree, leaves)
    expected = set()
    for i in range(len(qlo)):
        for node, box in zip(leaves, boxes):
            if all(Fraction(qlo[i, k]) <= box[k][1] and box[k][0] <= Fraction(qhi[i, k])
                   for k in range(2)):
                expected.add((i, int(node)))
    assert found == expected
