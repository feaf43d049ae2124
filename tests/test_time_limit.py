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
    # the round that follows undecided tubes replaces steps: abandoning it must restore
    # them (certify/steps.py, restore), so the proof is round 1's, bit for bit
    model = load_model(FOOD_CHAIN)
    start_depth = prove_module.Method().start_depth
    proof = prove(model, max_depth=start_depth, time_limit=600)
    assert WITHIN.fullmatch(proof.stop_reason).groups() == ("2", "1")
    first = prove(model, max_depth=start_depth, follow_undecided=False)
    np.testing.assert_array_equal(proof.labelling.label, first.labelling.label)
    for key in STEP_KEYS:
        np.testing.assert_array_equal(proof.steps.gather(proof.leaves, key),
                                      first.steps.gather(first.leaves, key))
    assert _valid(proof)


def test_short_time_limit_on_a_3d_model_ends_with_a_valid_proof():
    # real clock: whether the limit passes between rounds or within one depends on the
    # machine; either way the run says so and keeps a complete, valid proof
    proof = prove(load_model(FOOD_CHAIN), max_depth=12, time_limit=3)
    assert proof.stop_reason.startswith("time limit 3 s reached")
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
