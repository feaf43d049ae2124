"""The fate grid that stops followed tubes (certify/fate_grid.py).

A followed tube stops at an end box that the grid says meets one fate only. That choice
never enters a label (the labelling and the checker work from the stored steps), but a
grid that said "one fate" where the box meets another fate or an undecided leaf would
end tubes where they cannot decide. So the grid is checked against a plain walk over
the leaves that each box meets (``CellTree.leaves_meeting``): whenever it says one
fate, the leaves agree; and it does say so inside decided leaves.
"""

from __future__ import annotations

import pickle
from pathlib import Path

import numpy as np
import pytest

import certify.fate_grid as fate_grid_module
from certify.fate_grid import fate_grid
from certify.model import load_model
from certify.prove import prove

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def food_chain():
    """The library's food chain at depth 4 (cells of every label)."""
    return prove(load_model(ROOT / "models" / "microbial_food_chain.toml"), max_depth=4,
                 follow_undecided=False)


def _one_fate_by_walk(tree, leaves, label, lo, hi):
    """Per box: the labels of the leaves it meets are all safe or outside, or all doomed
    or outside."""
    position = {leaf: k for k, leaf in enumerate(leaves)}
    met = [set() for _ in lo]
    for q, leaf in zip(*tree.leaves_meeting(lo, hi)):
        met[q].add(label[position[leaf]])
    return np.array([bool(m) and (m <= {"safe", "outside"} or m <= {"doomed", "outside"})
                     for m in met])


@pytest.mark.parametrize("most_cells", [fate_grid_module.MOST_CELLS, 1 << 6])
def test_one_fate_only_where_every_leaf_met_agrees(food_chain, monkeypatch, most_cells):
    # the second grid (4 cells a side) is coarser than the leaves (16 a side)
    monkeypatch.setattr(fate_grid_module, "MOST_CELLS", most_cells)
    proof = food_chain
    tree, leaves, label = proof.tree, proof.leaves, proof.labelling.label
    grid = fate_grid(tree, leaves, label)
    rng = np.random.default_rng(7)
    lo_w, _, hi_w, _ = tree.window_bounds()
    cell = (hi_w - lo_w) / 16
    centre = rng.uniform(lo_w, hi_w, size=(4000, tree.n))
    half = rng.uniform(0, 1.5, size=(4000, tree.n)) * cell
    lo, hi = np.maximum(centre - half, lo_w), np.minimum(centre + half, hi_w)
    said = grid.one_fate(lo, hi)
    walked = _one_fate_by_walk(tree, leaves, label, lo, hi)
    assert not np.any(said & ~walked)
    assert said.sum() > 0.2 * walked.sum()  # not vacuous


def test_inside_a_leaf_the_grid_knows_its_fate(food_chain):
    proof = food_chain
    tree, leaves, label = proof.tree, proof.leaves, proof.labelling.label
    grid = fate_grid(tree, leaves, label)
    lo, hi = tree.lo[leaves], tree.hi[leaves]
    inset = 1e-6 * (hi - lo)
    said = grid.one_fate(lo + inset, hi - inset)
    assert {"safe", "doomed", "undecided"} <= set(label)
    np.testing.assert_array_equal(said, label != "undecided")


def test_a_grid_sent_to_a_worker_answers_alike(food_chain):
    # the batches of a followed round carry the grid to other processes (pickled without
    # its summed tables, which the worker makes again)
    proof = food_chain
    tree, leaves, label = proof.tree, proof.leaves, proof.labelling.label
    grid = fate_grid(tree, leaves, label)
    lo, hi = tree.lo[leaves], tree.hi[leaves]
    here = grid.one_fate(lo, hi)
    sent = pickle.loads(pickle.dumps(grid))
    np.testing.assert_array_equal(sent.one_fate(lo, hi), here)
