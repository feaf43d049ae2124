"""Rule (c) of the kept test: a limit's curvature along the solutions (docs/design.md, 5).

Checked on the damped rotation of tests/data/prove_rotation_open_side.toml, whose
solutions are known in closed form (a linear system, common practice):
``x(t) = r0 exp(-c t) cos(a0 + t)``, ``y(t) = r0 exp(-c t) sin(a0 + t)``, c = 0.05. Its
trajectories graze the limits ``|x| <= 0.9`` at the tops of their turns, where the rate
of ``0.9 - x`` changes sign within a step: rules (a) and (b) cannot keep such steps.
"""

from __future__ import annotations

from dataclasses import replace
from importlib import import_module
from pathlib import Path

import numpy as np
import pytest

from certify import load_model, prove
from certify.check import check_certificate

prove_module = import_module("certify.prove")
ROTATION = Path(__file__).resolve().parent / "data" / "prove_rotation_open_side.toml"
DAMPING = 0.05
LIMIT = 0.9


def exact_x(points, t):
    """``x(t)`` of the damped rotation from each start (closed form), shape (N, len(t))."""
    r0 = np.hypot(points[:, 0], points[:, 1])
    a0 = np.arctan2(points[:, 1], points[:, 0])
    return r0[:, None] * np.exp(-DAMPING * t)[None] * np.cos(a0[:, None] + t[None])


@pytest.fixture(scope="module")
def proofs(tmp_path_factory):
    """The rotation at depth 6 with the curvature rule, and with it switched off."""
    model = load_model(ROTATION)
    with_rule = prove(model, max_depth=6)
    out = tmp_path_factory.mktemp("curvature")
    prove_module.write_proof(with_rule, out, figures=False)
    patch = pytest.MonkeyPatch()
    original = prove_module.flow_programs
    patch.setattr(prove_module, "flow_programs",
                  lambda m, *args: replace(original(m, *args), limit_curvatures=None))
    try:
        without = prove(model, max_depth=6)
    finally:
        patch.undo()
    return with_rule, without, out / "certificate.json.gz"


def test_grazing_tubes_are_kept_and_the_checker_agrees(proofs):
    with_rule, without, path = proofs
    assert with_rule.fractions["safe"] > without.fractions["safe"] + 0.01
    assert with_rule.fractions["undecided"] < without.fractions["undecided"]
    result = check_certificate(path, jobs=1)
    assert result.valid, result.failures[:3]


def assert_safe_starts_keep_the_limits(proof, seed):
    """Six random starts in every safe cell of a proof of the rotation stay within the
    limits over 60 s in closed form (starts beyond a limit are outside: skipped)."""
    tree, leaves = proof.tree, proof.leaves
    safe = leaves[proof.labelling.label == "safe"]
    generator = np.random.default_rng(seed)
    lo, hi = tree.lo[safe], tree.hi[safe]
    points = (lo[:, None, :] + generator.uniform(0, 1, (len(safe), 6, 2)) * (hi - lo)[:, None, :]
              ).reshape(-1, 2)
    points = points[np.abs(points[:, 0]) <= LIMIT]
    t = np.linspace(0.0, 60.0, 60_001)
    peak = np.abs(exact_x(points, t)).max(axis=1)
    # a grid sample never exceeds the true maximum: any sample above the limit is a
    # start that crosses it
    assert len(points) > 1000
    assert np.all(peak <= LIMIT), points[peak > LIMIT][:3]


def test_safe_starts_keep_the_limits_in_closed_form(proofs):
    assert_safe_starts_keep_the_limits(proofs[0], seed=7)
