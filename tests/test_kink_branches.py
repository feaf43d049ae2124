"""Steps of models with abs, min and max on the smooth branch that a tube keeps to.

Where a step's a-priori box keeps every kink on one side, the right-hand side is one
smooth branch there and the step uses its Taylor programs of full order; elsewhere it
is stepped at order 1 (docs/method.md, "Models with kinks"). The references are closed
forms of piecewise-linear equations (solved by hand, common practice), sympy's own
evaluation of Max, Min and Abs, and scipy's DOP853 at tight tolerances.
"""

from __future__ import annotations

import gzip
import json

import mpmath
import numpy as np
import pytest
import sympy
from scipy.integrate import solve_ivp

from certify.check import check_certificate
from certify.check._programs import derive_programs
from certify.errors import CertificateError
from certify.evaluate import parameter_enclosures
from certify.flow import OK, flow_boxes
from certify.model import parse_model
from certify.expr import branch_equations, kink_sites, switch_expressions
from certify.prove import Budget, Method, prove, write_proof
from certify.taylor import chosen_arguments, flow_programs
from test_trapping import KINKED

ONE_STATE = """\
[model]
name = "kinked decay"
[states]
x = {{ range = [-1, 2] }}
[equations]
x = "{rhs}"
[constraints]
x_cap = "x <= 1.9"
"""
OSCILLATOR = KINKED  # a damped oscillator with a stiffer spring beyond x = 1


def _flow(text, lo, hi, horizon, kinks):
    model = parse_model(text)
    programs = flow_programs(model, 4, kinks)
    return flow_boxes(programs, np.array(lo, float), np.array(hi, float),
                      parameter_enclosures(model), min_horizon=horizon, max_horizon=horizon)


def _ends(R, b):
    """Exact end times of the steps of box `b` (mpmath, from the stored step sizes)."""
    t, out = mpmath.mpf(0), []
    for h in R.h[R.steps_of(b)]:
        t += mpmath.mpf(float(h))
        out.append(t)
    return out


def _assert_contains(R, b, solution, what):
    for j, t in zip(range(*R.steps_of(b).indices(len(R.h))), _ends(R, b)):
        value = solution(t)
        for i, v in enumerate(value):
            assert mpmath.mpf(float(R.end_lo[j, i])) <= v <= mpmath.mpf(float(R.end_hi[j, i])), (
                f"{what}: step {j}, component {i}: {v} not in "
                f"[{R.end_lo[j, i]!r}, {R.end_hi[j, i]!r}]")


SITE = """\
[model]
name = "one site"
[states]
x = {{ range = [-2, 2] }}
y = {{ range = [-2, 2] }}
[equations]
x = "{site}"
y = "0"
[constraints]
x_cap = "x <= 1.9"
"""


@pytest.mark.parametrize("site", ["max(x - y, 2*x)", "min(x*y, 1 - y)", "abs(x - y^2)",
                                  "max(x, y, x + y - 1)"])
def test_chosen_argument_is_the_value_on_the_whole_box(site):
    # sympy's own Max, Min and Abs at points of the box are the reference
    model = parse_model(SITE.format(site=site))
    x, y = model.state_symbols
    expr = model.equations[0]
    sites = kink_sites([expr])
    assert len(sites) == 1
    switches = sympy.lambdify([x, y], switch_expressions(sites), "numpy")
    value = sympy.lambdify([x, y], expr, "numpy")
    arguments = [sympy.lambdify([x, y], a, "numpy") for a in sites[0][1]]
    checker = derive_programs(model, 4, "branches").branches
    rng = np.random.default_rng(3)
    chosen = 0
    for _ in range(300):
        lo = rng.uniform(-2, 2, 2)
        hi = lo + rng.uniform(0.001, 0.6, 2)
        grid = np.stack(np.meshgrid(np.linspace(lo[0], hi[0], 41),
                                    np.linspace(lo[1], hi[1], 41)), -1).reshape(-1, 2)
        s = np.array(switches(grid[:, 0], grid[:, 1]), float).reshape(-1, len(grid))
        # the switches' range over the grid, widened a little: an enclosure of their
        # range over the box when they vary slowly, which these do at this grid
        slo, shi = s.min(axis=1) - 1e-3, s.max(axis=1) + 1e-3
        pick = chosen_arguments(sites, slo[None], shi[None])[0, 0]
        assert pick == checker.choices(slo[None] >= 0, shi[None] <= 0)[0, 0]
        if pick < 0:
            continue
        chosen += 1
        np.testing.assert_allclose(
            np.broadcast_to(arguments[pick](grid[:, 0], grid[:, 1]), len(grid)),
            np.broadcast_to(value(grid[:, 0], grid[:, 1]), len(grid)), rtol=0, atol=1e-12)
    assert chosen > 30  # the test did test something


def test_branch_of_nested_sites_equals_the_equation_where_it_is_chosen():
    # sympy's own evaluation of the nested Max/Min/Abs is the reference
    model = parse_model(SITE.format(site="max(x, min(y, 1 - x)) + abs(x*y - min(y, 1 - x))"))
    x, y = model.state_symbols
    sites = kink_sites(model.equations[:1])
    assert len(sites) == 3  # min(y, 1 - x) once (inside both others), abs, max
    switches = sympy.lambdify([x, y], switch_expressions(sites), "numpy")
    pts = np.random.default_rng(5).uniform(-2, 2, (400, 2))
    s = np.array(switches(pts[:, 0], pts[:, 1]), float).T
    choice = chosen_arguments(sites, s, s)  # at a point every sign is known
    assert np.all(choice >= 0)
    value = sympy.lambdify([x, y], model.equations[0], "numpy")(pts[:, 0], pts[:, 1])
    for c in np.unique(choice, axis=0):
        rows = np.all(choice == c, axis=1)
        branch = branch_equations(model.equations[:1], sites, tuple(int(v) for v in c))[0]
        assert not branch.has(sympy.Max, sympy.Min, sympy.Abs)
        got = sympy.lambdify([x, y], branch, "numpy")(pts[rows, 0], pts[rows, 1])
        np.testing.assert_allclose(got, value[rows], rtol=0, atol=1e-12)


def test_decay_through_abs_matches_the_closed_form_and_is_tighter():
    # x' = -|x| from x0 > 0: x(t) = x0 exp(-t) (the branch x' = -x throughout)
    lo, hi = [[0.6], [1.2]], [[0.61], [1.21]]
    R = _flow(ONE_STATE.format(rhs="-abs(x)"), lo, hi, 3.0, "branches")
    assert (R.status == OK).all(), R.reasons()
    with mpmath.workdps(30):
        for b in range(2):
            for x0 in (lo[b][0], hi[b][0], 0.5 * (lo[b][0] + hi[b][0])):
                _assert_contains(R, b, lambda t: [mpmath.mpf(x0) * mpmath.exp(-t)],
                                 f"decay from {x0}")
    order1 = _flow(ONE_STATE.format(rhs="-abs(x)"), lo, hi, 3.0, "order-1")
    wide = order1.image_hi - order1.image_lo
    assert np.all(R.image_hi - R.image_lo < 0.5 * wide)
    assert np.all(R.n_steps < order1.n_steps)


def test_flow_across_the_kink_matches_the_closed_form():
    # x' = 1 - 2 max(x, 0): x0 < 0 moves at rate 1 up to t1 = -x0, then
    # x(t) = 1/2 - exp(-2 (t - t1)) / 2 (solved by hand)
    lo, hi = [[-0.5], [-0.05]], [[-0.49], [-0.04]]
    R = _flow(ONE_STATE.format(rhs="1 - 2*max(x, 0)"), lo, hi, 2.5, "branches")
    assert (R.status == OK).all(), R.reasons()

    def solution(x0):
        x0 = mpmath.mpf(x0)
        return lambda t: [x0 + t if t <= -x0 else 0.5 - 0.5 * mpmath.exp(-2 * (t + x0))]

    with mpmath.workdps(30):
        for b in range(2):
            for x0 in (lo[b][0], hi[b][0]):
                _assert_contains(R, b, solution(x0), f"across the kink from {x0}")
    assert np.all(R.image_hi - R.image_lo < 0.05)


def test_kinked_oscillator_contains_scipy_trajectories():
    # scipy DOP853 at rtol 1e-12 as the reference (common practice); boxes on both
    # sides of the kink x = 1 and across it
    lo = np.array([[0.5, 0.8], [1.2, -0.3], [0.95, 0.1]])
    hi = lo + 0.01
    R = _flow(OSCILLATOR, lo, hi, 4.0, "branches")
    assert (R.status == OK).all(), R.reasons()

    def f(t, z):
        return [z[1], -z[0] - 0.5 * z[1] - 4 * max(z[0] - 1, 0)]

    for b in range(len(lo)):
        ends = [float(t) for t in _ends(R, b)]
        rows = range(*R.steps_of(b).indices(len(R.h)))
        for start in (lo[b], hi[b], 0.5 * (lo[b] + hi[b])):
            sol = solve_ivp(f, (0, ends[-1]), start, method="DOP853", rtol=1e-12, atol=1e-13,
                            t_eval=ends)
            for j, value in zip(rows, sol.y.T):
                assert np.all(R.end_lo[j] - 1e-9 <= value) and np.all(value <= R.end_hi[j] + 1e-9)


def test_certificate_of_a_kinked_model_checks(tmp_path):
    model = parse_model(OSCILLATOR)
    branches = prove(model, budget=Budget(max_depth=5, time_limit=1e9))
    order1 = prove(model, method=Method(kinks="order-1"), budget=Budget(max_depth=5,
                                                                        time_limit=1e9))
    assert branches.fractions["undecided"] < order1.fractions["undecided"]
    write_proof(branches, tmp_path, figures=False)
    cert = tmp_path / "certificate.json.gz"
    with gzip.open(cert, "rt") as fh:
        assert json.load(fh)["method"]["kinks"] == "branches"
    result = check_certificate(cert)
    assert result.valid, result.failures[:3]


def test_unknown_kink_rule_is_a_malformed_certificate(tmp_path):
    model = parse_model(OSCILLATOR)
    write_proof(prove(model, budget=Budget(max_depth=3, time_limit=1e9)), tmp_path,
                figures=False)
    cert = tmp_path / "certificate.json.gz"
    with gzip.open(cert, "rt") as fh:
        data = json.load(fh)
    data["method"]["kinks"] = "smooth"
    with gzip.open(cert, "wt") as fh:
        json.dump(data, fh)
    with pytest.raises(CertificateError, match="method.kinks"):
        check_certificate(cert)


@pytest.mark.parametrize("arithmetic", ["float", "ball", "fine", "endpoint"])
def test_every_checker_arithmetic_takes_the_branch_steps(tmp_path, monkeypatch, arithmetic):
    # each of the checker's passes alone re-derives the branch choice and verifies
    from certify.check import checker

    proof = prove(parse_model(OSCILLATOR), budget=Budget(max_depth=4, time_limit=1e9))
    assert (proof.labelling.label == "safe").any()
    write_proof(proof, tmp_path, figures=False)
    monkeypatch.setattr(checker, "PASSES", (arithmetic,))
    result = check_certificate(tmp_path / "certificate.json.gz", jobs=1)
    assert result.valid, result.failures[:3]
    # the control: stepped at order 1 throughout, the same steps prove too little
    monkeypatch.setattr(checker, "derive_programs",
                        lambda model, order, kinks: derive_programs(model, order, "order-1"))
    assert not check_certificate(tmp_path / "certificate.json.gz", jobs=1).valid


def test_curvature_rule_keeps_grazing_tubes_on_a_branch(tmp_path, monkeypatch):
    # rule (c) of the kept test (docs/design.md, section 5) on the smooth branch of a
    # step's tube: it decides more of the oscillator, and the checker agrees
    from dataclasses import replace

    from certify import taylor

    model = parse_model(OSCILLATOR)
    with_rule = prove(model, budget=Budget(max_depth=5, time_limit=1e9))
    write_proof(with_rule, tmp_path, figures=False)
    result = check_certificate(tmp_path / "certificate.json.gz")
    assert result.valid, result.failures[:3]
    branch_programs = taylor.Branches.programs
    monkeypatch.setattr(taylor.Branches, "programs", lambda self, choice: replace(
        branch_programs(self, choice), limit_curvatures=None))
    taylor._with_branches.cache_clear()
    without = prove(model, budget=Budget(max_depth=5, time_limit=1e9))
    taylor._with_branches.cache_clear()
    assert with_rule.fractions["undecided"] < without.fractions["undecided"]
