"""Followed tubes at the maximum depth (certify/prove.py, ``_Prover.extend``).

After the last refinement round the tubes of the undecided leaves are followed past the
point where they left their cells; the longer tubes that decide a leaf are kept, the
others are given back. The checker verifies the stored tubes whatever their length, so
these tests check that (a) no leaf decided without following loses or changes its label
(the monotonicity argument of docs/proof-loop.md), (b) the certificate passes the
independent checker and a tube with a step dropped is rejected, and (c) the new labels
agree with scipy simulation of the model (DOP853, rtol 1e-10: common practice);
(d) the round takes the leaves in the order of certify/follow_order.py.
"""

from __future__ import annotations

import gzip
import json
import sys
from pathlib import Path

import numpy as np
import pytest
import sympy
from scipy.integrate import solve_ivp

from certify.certificate import certificate_data, write_certificate
from certify.check import check_certificate
from certify.container import decode_array, encode_array
from certify.follow_order import follow_order
from certify.model import load_model
from certify.prove import prove

prove_module = sys.modules["certify.prove"]  # the package exports a function of that name

ROOT = Path(__file__).resolve().parent.parent
#: A 2D model keeps the test short; following is on by default from three states on.
FERMENTER = ROOT / "models" / "fermenter.toml"
DEPTH = 5


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """The fermenter at depth 5 with and without followed tubes, and the certificate."""
    model = load_model(FERMENTER)
    plain = prove(model, max_depth=DEPTH, follow_undecided=False)
    followed = prove(model, max_depth=DEPTH, follow_undecided=True)
    path = tmp_path_factory.mktemp("follow") / "followed.json.gz"
    write_certificate(path, certificate_data(followed, {}))
    return model, plain, followed, path


@pytest.fixture(scope="module")
def passes_alone(runs, tmp_path_factory):
    """The followed proof without and with the cutting passes, and the certificate of
    the second, its tubes not stopped where they meet one fate (certify/fate_grid.py):
    on this model that stop leaves the passes nothing to cut."""
    grid, passes = prove_module.fate_grid, prove_module.DECISIVE_PASSES
    prove_module.fate_grid = lambda *args: None
    try:
        cut = prove(runs[0], max_depth=DEPTH, follow_undecided=True)
        prove_module.DECISIVE_PASSES = 0
        uncut = prove(runs[0], max_depth=DEPTH, follow_undecided=True)
    finally:
        prove_module.fate_grid, prove_module.DECISIVE_PASSES = grid, passes
    path = tmp_path_factory.mktemp("passes") / "cut.json.gz"
    write_certificate(path, certificate_data(cut, {}))
    return uncut, cut, path


def test_following_keeps_every_decided_label_and_decides_more(runs):
    _, plain, followed, _ = runs
    np.testing.assert_array_equal(plain.leaves, followed.leaves)
    before, after = plain.labelling.label, followed.labelling.label
    decided = before != "undecided"
    np.testing.assert_array_equal(before[decided], after[decided])
    gained = ~decided & (after != "undecided")
    assert gained.any()  # not vacuous: following decides leaves at this depth
    assert followed.fractions["undecided"] < plain.fractions["undecided"]


def test_cut_tubes_keep_every_decided_label_and_decide_more(passes_alone):
    # cutting a followed tube at a step end whose successors share a fate replaces the
    # facts of undecided leaves only (docs/proof-loop.md): no decided leaf may change
    uncut, followed, _ = passes_alone
    np.testing.assert_array_equal(uncut.leaves, followed.leaves)
    before, after = uncut.labelling.label, followed.labelling.label
    decided = before != "undecided"
    np.testing.assert_array_equal(before[decided], after[decided])
    assert (~decided & (after != "undecided")).any()  # not vacuous at this depth
    assert followed.fractions["undecided"] < uncut.fractions["undecided"]


def test_step_ends_looked_up_in_small_blocks_give_the_same_proof(runs, passes_alone):
    # the candidate step ends of the passes are looked up in blocks and only what can
    # still decide is kept of each block; the blocks' size must not change the proof
    block, grid = prove_module.STEP_END_BLOCK, prove_module.fate_grid
    prove_module.STEP_END_BLOCK = 7
    prove_module.fate_grid = lambda *args: None
    try:
        small = prove(runs[0], max_depth=DEPTH, follow_undecided=True)
    finally:
        prove_module.STEP_END_BLOCK, prove_module.fate_grid = block, grid
    followed = passes_alone[1]
    np.testing.assert_array_equal(small.leaves, followed.leaves)
    np.testing.assert_array_equal(small.labelling.label, followed.labelling.label)
    np.testing.assert_array_equal(small.labelling.crossing_upper,
                                  followed.labelling.crossing_upper)


def _numeric(model, exprs):
    """Float functions of the states (sympy lambdify; the fermenter's parameters are
    numbers, ``lo == hi``)."""
    values = {p.symbol if hasattr(p, "symbol") else sympy.Symbol(p.name, real=True):
              sympy.Rational(p.lo) for p in model.parameters}
    return sympy.lambdify(model.state_symbols, [sympy.sympify(e).subs(values) for e in exprs],
                          "numpy")


def test_cells_decided_by_following_agree_with_simulation(runs):
    model, plain, followed, _ = runs
    gained = (plain.labelling.label == "undecided") & (followed.labelling.label != "undecided")
    cells = followed.leaves[gained]
    lo, hi = followed.tree.lo[cells], followed.tree.hi[cells]
    x0 = lo + np.random.default_rng(14).random(lo.shape) * (hi - lo)
    labels = followed.labelling.label[gained]
    upper = followed.labelling.crossing_upper[gained]
    assert all(p.lo == p.hi for p in model.parameters)
    field = _numeric(model, model.equations)
    limits = _numeric(model, [c.g for c in model.constraints])

    def f(_, x):
        return field(*x)

    for x, label, bound in zip(x0, labels, upper):
        # scipy DOP853 at rtol 1e-10 (common practice for a reference trajectory)
        horizon = 100.0 if label == "safe" else float(bound)
        sol = solve_ivp(f, (0.0, horizon), x, method="DOP853", rtol=1e-10, atol=1e-12,
                        dense_output=True)
        path = sol.sol(np.linspace(0.0, horizon, 4001))
        margins = np.min([np.broadcast_to(g, path.shape[1]) for g in limits(*path)], axis=0)
        if label == "safe":
            assert margins.min() > -1e-6, (x, label)
        else:
            assert margins.min() < 1e-6, (x, label, bound)


def test_followed_certificate_passes_the_checker(runs):
    result = check_certificate(runs[3], jobs=1)
    assert result.valid, result.failures[:3]


@pytest.mark.parametrize("reference", ["plain", "uncut"])
def test_a_followed_tube_with_a_step_dropped_is_rejected(runs, passes_alone, reference,
                                                          tmp_path):
    # a leaf decided by following (reference plain) or by a cut tube (reference uncut)
    if reference == "plain":
        _, before, followed, path = runs
    else:
        before, followed, path = passes_alone
    gained = np.flatnonzero((before.labelling.label == "undecided")
                            & (followed.labelling.label != "undecided"))
    with gzip.open(path, "rb") as f:
        data = json.loads(f.read())
    cells = data["cells"]
    start = decode_array(cells["step_start"])
    c = int(gained[0])
    last = int(start[c + 1]) - 1
    assert last > int(start[c])
    for key in [k for k in ("step_h", "step_E", "step_m", "step_A") if k in cells]:
        a = decode_array(cells[key])
        cells[key] = encode_array(np.delete(a, last, axis=0), "<f8")
    start[c + 1:] -= 1
    cells["step_start"] = encode_array(start, "<i8")
    tampered = tmp_path / "dropped.json.gz"
    with gzip.open(tampered, "wb") as f:
        f.write(json.dumps(data).encode())
    result = check_certificate(tampered, jobs=1)
    assert not result.valid


def test_the_cell_limit_runs_the_followed_round(runs, tmp_path):
    # When the cell limit stops refinement before max_depth, the undecided leaves' tubes
    # are followed before the proof ends. The leaves are those of the same budget
    # without following, every label decided there stays (docs/proof-loop.md), more is
    # decided, and the checker agrees.
    model, plain = runs[0], runs[1]
    budget = {"max_depth": DEPTH + 3, "max_cells": len(plain.leaves)}
    unfollowed = prove(model, follow_undecided=False, **budget)
    followed = prove(model, follow_undecided=True, **budget)
    assert unfollowed.stop_reason == f"cell limit {len(plain.leaves)} reached"
    assert followed.stop_reason == (f"cell limit {len(plain.leaves)} reached; the undecided "
                                    f"leaves' tubes were followed instead")
    np.testing.assert_array_equal(unfollowed.leaves, followed.leaves)
    before, after = unfollowed.labelling.label, followed.labelling.label
    decided = before != "undecided"
    np.testing.assert_array_equal(before[decided], after[decided])
    assert followed.fractions["undecided"] < unfollowed.fractions["undecided"]
    path = tmp_path / "limited.json.gz"
    write_certificate(path, certificate_data(followed, {}))
    assert check_certificate(path, jobs=1).valid


@pytest.fixture(scope="module")
def food_chain_plain():
    """The library's food chain at depth 4 without followed tubes (some of its undecided
    leaves have a safe successor and a doomed one)."""
    return prove(load_model(ROOT / "models" / "microbial_food_chain.toml"), max_depth=4,
                 follow_undecided=False)


def test_the_followed_round_takes_the_leaves_with_prospects_first(food_chain_plain):
    # certify/follow_order.py, checked against a plain walk over the edges: first the
    # leaves whose tubes keep the limits with safe decided successors only, then those
    # with no safe successor; leaves with a safe successor and either a doomed or
    # outside one or a failed tube are left out
    plain = food_chain_plain
    facts, label = plain.facts, plain.labelling.label
    successors = [set() for _ in plain.leaves]
    for s, d in zip(facts.src, facts.dst):
        successors[s].add(label[d])
    failed = ~facts.flow_ok | ~facts.kept | facts.escapes

    def rank(k):
        safe = "safe" in successors[k]
        against = bool(successors[k] & {"doomed", "outside"})
        if not safe:
            return 1
        return 2 if failed[k] or against else 0

    undecided = np.flatnonzero(label == "undecided")
    wanted = plain.leaves[undecided]
    chosen = follow_order(plain.tree, plain.leaves, plain.labelling, facts, wanted)
    position = {leaf: k for k, leaf in enumerate(plain.leaves)}
    ranks = [rank(position[leaf]) for leaf in chosen]
    expected = sorted((rank(k), n) for n, k in enumerate(undecided) if rank(k) < 2)
    assert ranks == [r for r, _ in expected]
    np.testing.assert_array_equal(chosen, wanted[[n for _, n in expected]])
    assert {0, 1} <= set(ranks)  # not vacuous
    assert len(chosen) < len(wanted)
