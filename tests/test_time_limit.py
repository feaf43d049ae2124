"""The time limit is kept within a round (certify/prove.py, certify/flow.py).

A round after the first that is still running when the limit passes is abandoned; the
proof is the one of the last finished round, exactly as after Ctrl-C. The deterministic
tests give the flow a clock that always reads "past the deadline" (as if every round
after the first ran past the limit) and compare with the proof of the first round alone,
which the independent checker (python-flint) must find valid. No wall time is asserted.
"""

from __future__ import annotations

import importlib
import math
import re
import tempfile
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest

from certify import load_model, prove
from certify.check import check_certificate
from certify.claim import check_claim
from certify.steps import STEP_KEYS
from certify.sweep import analyse_box

prove_module = importlib.import_module("certify.prove")
flow_module = importlib.import_module("certify.flow")

ROOT = Path(__file__).resolve().parent.parent
FOOD_CHAIN = ROOT / "models" / "microbial_food_chain.toml"  # 3 states
WITHIN = re.compile(r"time limit \S+ s reached within round (\d+); the proof is the one of round (\d+)")


@pytest.fixture
def late_flow(monkeypatch):
    """The flow's clock reads +inf: every flow given a deadline finds it passed."""
    monkeypatch.setattr(flow_module, "time", SimpleNamespace(monotonic=lambda: math.inf))


def _valid(proof):
    """Write the proof and let the independent checker verify the certificate."""
    with tempfile.TemporaryDirectory() as tmp:
        prove_module.write_proof(proof, tmp, figures=False)
        return check_certificate(Path(tmp) / "certificate.json.gz", jobs=1).valid


def test_round_past_the_limit_keeps_the_last_finished_round(late_flow):
    model = load_model(FOOD_CHAIN)
    start_depth = prove_module.Method().start_depth
    proof = prove(model, max_depth=start_depth + 2, time_limit=600)
    # the first round always finishes (a proof needs one); the second is abandoned
    assert WITHIN.fullmatch(proof.stop_reason).groups() == ("2", "1")
    assert proof.rounds == 1 and not proof.interrupted
    assert proof.depth_reached == start_depth
    # the same as the proof of the first round alone (the first round has no deadline;
    # without the round that follows the undecided leaves' tubes at the maximum depth)
    first = prove(model, max_depth=start_depth, follow_undecided=False)
    assert first.rounds == 1 and first.stop_reason.startswith("maximum depth")
    np.testing.assert_array_equal(proof.leaves, first.leaves)
    np.testing.assert_array_equal(proof.labelling.label, first.labelling.label)
    np.testing.assert_array_equal(proof.labelling.crossing_upper, first.labelling.crossing_upper)
    assert proof.fractions == first.fractions
    # no step of the abandoned round is kept
    assert len(proof.steps.batches) == len(first.steps.batches)
    for key in STEP_KEYS:
        np.testing.assert_array_equal(proof.steps.gather(proof.leaves, key),
                                      first.steps.gather(first.leaves, key))
    assert _valid(proof)


def test_followed_round_past_the_limit_gives_the_old_tubes_back(late_flow):
    # the round that follows undecided tubes keeps the tubes flowed in time: with a clock
    # past the limit none is, so every leaf keeps its old tube and the proof is round
    # 1's, bit for bit (certify/steps.py, restore)
    model = load_model(FOOD_CHAIN)
    start_depth = prove_module.Method().start_depth
    proof = prove(model, max_depth=start_depth, time_limit=600)
    assert proof.rounds == 2
    assert re.fullmatch(r"maximum depth 3 reached \(the time limit cut the followed round "
                        r"short: 0 of \d+ tubes\)", proof.stop_reason)
    first = prove(model, max_depth=start_depth, follow_undecided=False)
    np.testing.assert_array_equal(proof.labelling.label, first.labelling.label)
    for key in STEP_KEYS:
        np.testing.assert_array_equal(proof.steps.gather(proof.leaves, key),
                                      first.steps.gather(first.leaves, key))
    assert _valid(proof)


def test_followed_round_keeps_the_pieces_flowed_before_the_limit(monkeypatch):
    # A clock that passes the limit after some flow steps: the pieces flowed before it
    # keep their followed tubes, the rest their old ones. Replacing undecided leaves'
    # tubes never undecides a leaf (docs/proof-loop.md), and the checker agrees.
    model = load_model(FOOD_CHAIN)
    start_depth = prove_module.Method().start_depth
    full = prove(model, max_depth=start_depth, time_limit=600)
    first = prove(model, max_depth=start_depth, follow_undecided=False)
    monkeypatch.setattr(prove_module, "FOLLOW_PIECE", 2)
    calls = []
    monkeypatch.setattr(flow_module, "time", SimpleNamespace(
        monotonic=lambda: calls.append(1) or 0.0))
    prove(model, max_depth=start_depth, time_limit=600)   # counts the clock's readings
    ticks = iter(range(len(calls) // 2 + 1))
    monkeypatch.setattr(flow_module, "time", SimpleNamespace(
        monotonic=lambda: 0.0 if next(ticks, None) is not None else math.inf))
    proof = prove(model, max_depth=start_depth, time_limit=600)
    done, total = map(int, re.search(r"short: (\d+) of (\d+) tubes", proof.stop_reason).groups())
    assert 0 < done < total and done % 2 == 0
    decided = first.labelling.label != "undecided"
    np.testing.assert_array_equal(proof.labelling.label[decided], first.labelling.label[decided])
    assert np.sum(proof.labelling.label == "undecided") <= np.sum(~decided)
    assert np.sum(proof.labelling.label == "undecided") >= np.sum(full.labelling.label == "undecided")
    assert _valid(proof)


def test_followed_round_stops_when_its_labelling_would_pass_the_limit(monkeypatch):
    # Followed tubes have wider images: a labelling of them takes longer than the last
    # one in proportion to the pairs it looks up. Images that add a vast number of pairs
    # make the foreseen labelling end past the limit, so no piece after the first is
    # flowed; the first keeps its followed tubes and the checker agrees.
    model = load_model(FOOD_CHAIN)
    start_depth = prove_module.Method().start_depth
    first = prove(model, max_depth=start_depth, follow_undecided=False)
    monkeypatch.setattr(prove_module, "FOLLOW_PIECE", 2)
    calls = iter(range(10 ** 6))
    # counted before (old images: none) and after taking each piece (new: very many)
    monkeypatch.setattr(prove_module._Prover, "_pairs",
                        lambda self, lo, hi: 10 ** 15 * (next(calls) % 2))
    proof = prove(model, max_depth=start_depth, time_limit=600)
    done, total = map(int, re.search(r"short: (\d+) of (\d+) tubes", proof.stop_reason).groups())
    assert done == 2 < total
    decided = first.labelling.label != "undecided"
    np.testing.assert_array_equal(proof.labelling.label[decided], first.labelling.label[decided])
    assert _valid(proof)


def test_short_of_budget_foresees_the_next_round():
    # the last splitting round took 10 s for 100 new cells; splitting 50 leaves of a
    # 3-state model makes 400 cells, about 40 s (common practice: a linear forecast)
    tree = SimpleNamespace(n=3)
    budget = prove_module.Budget(max_depth=9, max_cells=10_000, time_limit=300)
    wanted = np.arange(50)
    assert prove_module.short_of_budget(tree, wanted, budget, 1000, 250.0, (10.0, 100)) is None
    reason = prove_module.short_of_budget(tree, wanted, budget, 1000, 270.0, (10.0, 100))
    assert reason == "the next round (about 40 s) would end past the time limit 300 s"
    # no room for one more split (7 new leaves a split)
    assert prove_module.short_of_budget(tree, wanted, budget, 9_994, 0.0, None) == \
        "cell limit 10000 reached"
    assert prove_module.short_of_budget(tree, wanted[:0], budget, 9_994, 0.0, None) is None
    # in the 100 s left, 80 % at 0.8 s a split leaf (8 new cells at 0.1 s): 100 leaves
    assert prove_module.time_fit(tree, budget, 200.0, (10.0, 100)) == 100
    assert prove_module.time_fit(tree, budget, 200.0, None) == 0


def test_short_time_limit_on_a_3d_model_ends_with_a_valid_proof():
    # real clock: whether the limit passes between rounds or within one, or the next
    # round is foreseen to end past it (then the undecided tubes are followed instead),
    # depends on the machine; either way the run says so and keeps a complete, valid proof
    proof = prove(load_model(FOOD_CHAIN), max_depth=12, time_limit=3)
    assert proof.stop_reason.startswith("time limit 3 s reached") or re.match(
        r"the next round \(about \d+ s\) would end past the time limit 3 s; the undecided "
        r"leaves' tubes were followed instead", proof.stop_reason)
    within = WITHIN.fullmatch(proof.stop_reason)
    if within:
        assert int(within.group(2)) == proof.rounds == int(within.group(1)) - 1
    assert proof.rounds >= 1 and not proof.interrupted
    assert sum(proof.counts.values()) == len(proof.leaves)
    assert _valid(proof)


def test_claim_keeps_its_time_limit_within_a_round(late_flow):
    model = load_model(FOOD_CHAIN)
    start_depth = prove_module.Method().start_depth
    region = {"n": (0.2, 0.4), "b": (0.5, 0.7), "c": (0.1, 0.15)}
    result = check_claim(model, region, "safe", max_depth=start_depth + 2, time_limit=600)
    assert WITHIN.fullmatch(result.proof.stop_reason).groups() == ("2", "1")
    assert result.proof.rounds == 1
    # nothing is proven safe at the start depth (models/microbial_food_chain.toml notes)
    assert result.verdict == "inconclusive"
    assert result.proof.stop_reason in result.message


def test_sweep_box_keeps_its_time_limit_within_a_round(late_flow):
    start_depth = prove_module.Method().start_depth
    answer = analyse_box(FOOD_CHAIN.read_text(), str(FOOD_CHAIN), {"D": ("0.5", "0.5")},
                         start_depth + 2, 600.0, False)
    assert WITHIN.fullmatch(answer["result"]["stop_reason"]).groups() == ("2", "1")
