"""The model library (models/*.toml): every file carries its header (the demo fermenter has
its own, shorter one), and its proven labels agree with simulation.

The agreement check proves each model at a coarse depth and integrates starts drawn in
its decided cells with scipy's ``solve_ivp`` (DOP853, tight tolerances, a terminal event
on the limits): a start of a ``safe`` cell must not cross within the simulated horizon,
and a start of a ``doomed`` cell must cross within its proven crossing-time bounds.
Reference: scipy.integrate.solve_ivp, an integrator outside this project.
"""

from pathlib import Path

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from certify import load_model, prove
from certify.taylor import flow_programs

MODELS = sorted((Path(__file__).resolve().parent.parent / "models").glob("*.toml"))

#: Coarse depth and simulated horizon (model time units) per model file.
CHECKS = {
    "fermenter.toml": (6, 200.0),
    "fish_stock.toml": (8, 200.0),
    "fish_quota_uncertain.toml": (8, 200.0),
    "epidemic_ward.toml": (6, 1500.0),
    "stirred_reactor.toml": (6, 60.0),
    "generator_swing.toml": (6, 20.0),
    "crane_load.toml": (6, 120.0),
    "microbial_food_chain.toml": (3, 40.0),
    "greenhouse_biocontrol.toml": (6, 400.0),
    "chemostat_competition.toml": (4, 80.0),
    "lake_plankton.toml": (4, 100.0),
    "two_generators.toml": (3, 20.0),
    # models with [controls]: prove() maps the value in [parameters] (the policy is
    # simulated in tests/test_policy.py)
    "fermenter_dilution_control.toml": (6, 200.0),
    "epidemic_contact_restrictions.toml": (6, 1500.0),
}

#: Starts simulated per model.
N_STARTS = 24


def test_every_model_file_is_covered():
    assert {m.name for m in MODELS} == set(CHECKS)


@pytest.mark.parametrize("path", [m for m in MODELS if m.name != "fermenter.toml"],
                         ids=lambda p: p.name)
def test_header_names_source_limits_and_caution(path):
    header = "\n".join(line for line in path.read_text().splitlines() if line.startswith("#"))
    assert "Which limits matter" in header
    assert "Measured at the default budget" in header
    assert "speaks about the model, not about" in header
    assert any(word in header for word in ("(mem)", "19", "20"))  # where the form is published
    model = load_model(path)
    assert "max_depth" in model.settings and "time_limit" in model.settings
    # proves within 5 minutes (3D and fewer states) or 10 minutes (4D and more)
    assert model.settings["time_limit"] <= (300 if len(model.states) <= 3 else 600)


def _simulate(model, point, horizon):
    """First crossing time of a limit from `point` by DOP853 (inf if none by `horizon`)."""
    programs = flow_programs(model, 1)
    params = [0.5 * (float(p.lo) + float(p.hi)) for p in model.parameters]

    def rhs(_, x):
        return programs.field.point(np.concatenate([x, params])[None])[0]

    def margin(_, x):
        return float(np.min(programs.limits.point(np.concatenate([x, params])[None])[0]))

    margin.terminal = True
    margin.direction = -1
    sol = solve_ivp(rhs, (0, horizon), point, method="DOP853", rtol=1e-10, atol=1e-12,
                    events=margin)
    return sol.t[-1] if sol.status == 1 else np.inf


@pytest.mark.parametrize("path", MODELS, ids=lambda p: p.name)
def test_labels_agree_with_simulation(path):
    depth, horizon = CHECKS[path.name]
    model = load_model(path)
    proof = prove(model, max_depth=depth, time_limit=1e9)
    tree, leaves, labels = proof.tree, proof.leaves, proof.labelling.label
    rng = np.random.default_rng(7)
    programs = flow_programs(model, 1)
    params = [0.5 * (float(p.lo) + float(p.hi)) for p in model.parameters]
    checked = 0
    for label in ("safe", "doomed"):
        cells = np.flatnonzero(labels == label)
        for i in rng.choice(cells, size=min(N_STARTS // 2, len(cells)), replace=False):
            lo, hi = tree.lo[leaves[i]], tree.hi[leaves[i]]
            point = lo + rng.random(len(lo)) * (hi - lo)
            g = programs.limits.point(np.concatenate([point, params])[None])[0]
            if np.min(g) < 1e-9:
                continue  # a start on or beyond a limit is outside, not a test of the label
            t_cross = _simulate(model, point, horizon)
            checked += 1
            if label == "safe":
                assert np.isinf(t_cross), (point, t_cross)  # scipy DOP853: no crossing
            else:
                # scipy DOP853 crossing time lies in the proven bounds
                assert proof.labelling.survival_lower[i] <= t_cross * (1 + 1e-6) + 1e-9
                assert t_cross <= proof.labelling.crossing_upper[i] * (1 + 1e-6) + 1e-9
    assert checked > 0
