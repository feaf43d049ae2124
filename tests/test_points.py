"""Proven equilibria, stability, limit arcs and tangencies (issue 6).

Each check names its reference: a closed form derived in the test, a published
threshold, or an independent library (numpy eigenvalues, scipy.optimize.root).
"""

from __future__ import annotations

import importlib
import json
from fractions import Fraction
from pathlib import Path

import mpmath
import numpy as np
import pytest
from scipy.optimize import root

from certify.cli import main
from certify.model import load_model, parse_model
from certify.points import (
    STABILITIES,
    TANGENCY_KINDS,
    analyse_limits,
    analyse_points,
    classify_stability,
    explaining_curves,
    find_equilibria,
)

points_module = importlib.import_module("certify.points")

FERMENTER = Path(__file__).resolve().parent.parent / "models" / "fermenter.toml"

HARVEST = """
[model]
name = "logistic growth with constant harvest"
[states]
x = { range = [0, 1.2] }
[parameters]
r = 1
K = 1
H = 0.16
[equations]
x = "r*x*(1 - x/K) - H"
[constraints]
floor = "x >= 0.1"
"""

BRUSSELATOR = """
[model]
name = "Brusselator"
[states]
x = { range = [0, 4] }
y = { range = [0, 4] }
[parameters]
a = 1
b = 1.5
[equations]
x = "a - (b + 1)*x + x^2*y"
y = "b*x - x^2*y"
[constraints]
x_cap = "x <= 4"
y_cap = "y <= 4"
"""

SIR = """
[model]
name = "SIR with a cap on infected"
[states]
S = { range = [0, 1] }
I = { range = [0, 0.1] }
[parameters]
beta = 2
gamma = 1
[equations]
S = "-beta*S*I"
I = "beta*S*I - gamma*I"
[constraints]
ward_cap = "I <= 0.1"
"""

COMPETITION = """
[model]
name = "two competing species"
[states]
u = { range = [0, 1.5] }
v = { range = [0, 1.5] }
[equations]
u = "u*(1 - u - v/2)"
v = "v*(1 - v - u/2)"
[constraints]
u_cap = "u <= 1.4"
"""

LORENZ = """
[model]
name = "Lorenz convection"
[states]
x = { range = [-12, 12] }
y = { range = [-12, 12] }
z = { range = [0, 30] }
[parameters]
sigma = 10
rho = 10
[equations]
x = "sigma*(y - x)"
y = "rho*x - y - x*z"
z = "x*y - 8*z/3"
[constraints]
z_cap = "z <= 29"
"""


def exact(value):
    """An mpmath number for a Fraction, int, string or mpf."""
    if isinstance(value, Fraction):
        return mpmath.mpf(value.numerator) / value.denominator
    return mpmath.mpf(value)


def contains(box, point):
    """True when the float box holds the exact point (mpmath, 50 digits)."""
    with mpmath.workdps(50):
        return all(mpmath.mpf(float(lo)) <= exact(p) <= mpmath.mpf(float(hi))
                   for (lo, hi), p in zip(box, point))


def box_of(result, point):
    """The equilibrium whose box holds `point`, or None."""
    hits = [e for e in result.equilibria if contains(e.box, point)]
    assert len(hits) <= 1
    return hits[0] if hits else None


# --------------------------------------------------------------------- logistic harvest


def test_logistic_harvest_roots_and_stability():
    # Schaefer 1954 surplus-production model (mem): r x (1 - x/K) = H; with r = K = 1 and
    # H = 0.16 the roots are exactly 1/5 and 4/5 (x^2 - x + 4/25 = (x - 1/5)(x - 4/5)).
    result = find_equilibria(parse_model(HARVEST))
    assert len(result.equilibria) == 2 and result.complete
    low, high = result.equilibria
    assert contains(low.box, (Fraction(1, 5),)) and contains(high.box, (Fraction(4, 5),))
    assert all(e.box[0, 1] - e.box[0, 0] < 1e-12 for e in result.equilibria)
    # 1D: stable iff f' < 0; f'(x) = 1 - 2x is +3/5 at 1/5 and -3/5 at 4/5 (exact).
    assert (low.stability, high.stability) == ("unstable", "stable")
    # both lie above the floor 0.1: inside the limits
    assert (low.limits, high.limits) == ("inside", "inside")


def test_logistic_harvest_above_the_fold_has_no_equilibrium():
    # Schaefer 1954 (mem): no root once H > rK/4 = 1/4 (the fold); H = 0.26.
    model = parse_model(HARVEST).with_parameters({"H": "0.26"})
    result = find_equilibria(model)
    assert result.equilibria == () and result.complete


@pytest.mark.parametrize("h_lo,h_hi", [("0.15", "0.17"), ("0.05", "0.2")])
def test_logistic_harvest_interval_parameter_moves_the_root_inside_its_box(h_lo, h_hi):
    # Exact roots x = (1 -+ sqrt(1 - 4H))/2; for every H in the interval each box must
    # hold the root (checked at the ends and the middle). Over [0.05, 0.2] the lower root
    # sweeps [0.053, 0.276], too far for one Krawczyk box: the proof goes by pieces.
    model = parse_model(HARVEST).with_parameters({"H": (h_lo, h_hi)})
    result = find_equilibria(model)
    assert len(result.equilibria) == 2 and result.complete
    low, high = result.equilibria
    for h in (h_lo, (mpmath.mpf(h_lo) + mpmath.mpf(h_hi)) / 2, h_hi):
        d = mpmath.sqrt(1 - 4 * mpmath.mpf(h))
        assert contains(low.box, ((1 - d) / 2,)) and contains(high.box, ((1 + d) / 2,))
    assert (low.stability, high.stability) == ("unstable", "stable")


# ---------------------------------------------------------------------------- fermenter


def test_fermenter_three_equilibria_match_the_andrews_closed_form():
    # Andrews 1968 substrate inhibition (mem): mu(s) = 0.5 s / (0.5 + s + s^2/2) = D = 0.2
    # <=> s^2 - 3 s + 1 = 0, so s = (3 -+ sqrt 5)/2 with x = Y (s_in - s) = (10 - s)/2;
    # washout is (s_in, 0) = (10, 0). Exact values, compared at 50 digits.
    result = find_equilibria(load_model(FERMENTER))
    assert len(result.equilibria) == 3 and result.complete
    root5 = mpmath.sqrt(5)
    operating = box_of(result, ((3 - root5) / 2, (10 - (3 - root5) / 2) / 2))
    middle = box_of(result, ((3 + root5) / 2, (10 - (3 + root5) / 2) / 2))
    washout = box_of(result, (10, 0))
    assert operating is not None and middle is not None and washout is not None
    assert operating.stability == "stable"
    assert middle.stability == "saddle"
    # Washout by hand: J(10, 0) = [[-D, -mu(10)/Y], [0, mu(10) - D]], upper triangular, so
    # the eigenvalues are -D = -0.2 and mu(10) - D = 5/60.5 - 0.2 < 0: a stable node.
    assert float(Fraction(5) / Fraction("60.5") - Fraction("0.2")) < 0
    assert washout.stability == "stable"
    # x = 0 < 1 breaks biomass_floor on the whole box; the other two lie within limits
    assert washout.limits == "outside"
    assert operating.limits == "inside" and middle.limits == "inside"


def test_fermenter_interval_dilution_rate_keeps_each_equilibrium_in_its_box():
    # Same closed form for every D in [0.19, 0.21] (Andrews 1968 (mem)):
    # 0.5 s = D (0.5 + s + s^2/2) <=> D s^2 + (2D - 1) s + D = 0, x = (10 - s)/2.
    # The saddle moves by about 0.3 in s over this range (ds/dD = 1/mu'(s) ~ -29).
    model = load_model(FERMENTER).with_parameters({"D": ("0.19", "0.21")})
    result = find_equilibria(model)
    assert result.complete
    kinds = sorted(e.stability for e in result.equilibria)
    assert kinds == ["saddle", "stable", "stable"]
    for d in ("0.19", "0.2", "0.21"):
        d = mpmath.mpf(d)
        disc = mpmath.sqrt((2 * d - 1) ** 2 - 4 * d * d)
        for s in ((1 - 2 * d - disc) / (2 * d), (1 - 2 * d + disc) / (2 * d)):
            assert box_of(result, (s, (10 - s) / 2)) is not None


# -------------------------------------------------------------------------- Brusselator


@pytest.mark.parametrize("b,expected", [("1.5", "stable"), ("2.5", "unstable"),
                                        (("1.4", "1.6"), "stable"),
                                        (("2.4", "2.6"), "unstable"),
                                        (("1.5", "1.9"), "stable"),
                                        (("2.1", "2.5"), "unstable"),
                                        (("1.8", "2.2"), "undetermined")])
def test_brusselator_stability_changes_at_the_hopf_value(b, expected):
    # Prigogine & Lefever 1968; REFERENCES.md R10: equilibrium (a, b/a), trace b - 1 - a^2,
    # det a^2 > 0, so stable below b = 1 + a^2 = 2 and unstable (a focus, not a saddle)
    # above; margins of at least 0.1 on either side, and a range across the Hopf value,
    # where no single word is true.
    model = parse_model(BRUSSELATOR).with_parameters({"b": b})
    result = find_equilibria(model)
    assert len(result.equilibria) == 1 and result.complete
    eq = result.equilibria[0]
    assert eq.stability == expected
    values = b if isinstance(b, tuple) else (b,)
    for value in values:
        assert contains(eq.box, (1, Fraction(value)))


# ------------------------------------------------------------------------------ Lorenz


@pytest.mark.parametrize("rho,expected", [("10", "stable"), ("24", "stable"),
                                          ("25.5", "saddle"), ("28", "saddle")])
def test_lorenz_hurwitz_threshold(rho, expected):
    # Lorenz 1963; REFERENCES.md R12: C+- = (+-sqrt(b(rho-1)), +-sqrt(b(rho-1)), rho-1) with
    # b = 8/3 are stable iff rho < rho_H = 470/19 = 24.7368 (the condition a1 a2 > a3);
    # above it two eigenvalues cross into the right half plane while -13.85 (at rho = 28)
    # stays negative: a saddle. The origin has eigenvalues -8/3 and
    # (-11 +- sqrt(81 + 40 rho))/2, one of each sign for rho > 1: a saddle.
    model = parse_model(LORENZ).with_parameters({"rho": rho})
    result = find_equilibria(model)
    assert len(result.equilibria) == 3 and result.complete
    c = mpmath.sqrt(mpmath.mpf(8) / 3 * (mpmath.mpf(rho) - 1))
    for sign in (-1, 1):
        eq = box_of(result, (sign * c, sign * c, mpmath.mpf(rho) - 1))
        assert eq is not None and eq.stability == expected
    assert box_of(result, (0, 0, 0)).stability == "saddle"


def test_wide_parameter_ranges_are_decided_on_pieces_of_the_range():
    # Brusselator (R10 above): for b in [1.5, 1.9] the equilibrium (1, b) moves along
    # the whole of y in [1.5, 1.9]; pairing every y of that box with every b (the box
    # alone) holds unstable matrices (y = 1.9 with b = 1.5 gives trace 0.3), so only the
    # pieces of the parameter range prove it stable.
    model = parse_model(BRUSSELATOR).with_parameters({"b": ("1.5", "1.9")})
    (eq,) = find_equilibria(model).equilibria
    programs = points_module._programs(model)
    params = points_module._params(model)
    lo, hi = np.array([[a for a, _ in eq.box]], float), np.array([[b for _, b in eq.box]], float)
    whole = points_module._box_stability(programs.jacobian, lo, hi, params,
                                         points_module._interval_positions(model),
                                         np.array([4.0, 4.0]))
    assert whole[0] == "undetermined" and eq.stability == "stable"


@pytest.mark.parametrize("rho,expected", [(("10", "20"), "stable"), (("26", "30"), "saddle"),
                                          (("20", "30"), "undetermined")])
def test_lorenz_outer_equilibria_over_a_range_of_rho(rho, expected):
    # Lorenz 1963; REFERENCES.md R12 (as above): C+- stable for rho < 470/19 = 24.7368,
    # saddles above it. Over rho in [10, 20] they move by 2.4 along x and y and 10 along z,
    # and a range across 24.7368 has no single word.
    model = parse_model(LORENZ).with_parameters({"rho": rho})
    result = find_equilibria(model)
    assert len(result.equilibria) == 3 and result.complete
    lo, hi = (mpmath.mpf(v) for v in rho)
    for sign in (-1, 1):
        for r in (lo, hi, (lo + hi) / 2):
            c = mpmath.sqrt(mpmath.mpf(8) / 3 * (r - 1))
            eq = box_of(result, (sign * c, sign * c, r - 1))
            assert eq is not None and eq.stability == expected


def test_routh_hurwitz_against_numpy_eigenvalues():
    # numpy.linalg.eigvals (LAPACK) as the reference, on random point matrices of size
    # 1..4 whose eigenvalues keep |Re| >= 0.05: every class must be decided and agree.
    rng = np.random.default_rng(6)
    for n in (1, 2, 3, 4):
        mats = rng.normal(size=(400, n, n))
        re = np.real(np.linalg.eigvals(mats))
        keep = np.abs(re).min(axis=1) >= 0.05
        mats, re = mats[keep], re[keep]
        got = classify_stability(mats, mats)
        expected = np.where((re < 0).all(1), "stable",
                            np.where((re < 0).any(1), "saddle", "unstable"))
        np.testing.assert_array_equal(got, expected)


def test_routh_hurwitz_is_undetermined_across_the_boundary():
    # An interval Jacobian that holds both a stable and an unstable matrix
    # ([[t, -1], [1, t]] with t in [-0.1, 0.1]: eigenvalues t +- i) cannot be classified.
    lo = np.array([[[-0.1, -1.0], [1.0, -0.1]]])
    hi = np.array([[[0.1, -1.0], [1.0, 0.1]]])
    assert classify_stability(lo, hi)[0] == "undetermined"


# ------------------------------------------------------------------ scipy cross-check


@pytest.mark.parametrize("text", [None, COMPETITION, LORENZ], ids=["fermenter", "competition",
                                                                   "lorenz"])
def test_equilibria_against_scipy_root(text):
    # scipy.optimize.root (MINPACK hybr) from a grid of starts: every converged root in the
    # window lies in a reported box, and every box holds a root scipy found.
    model = load_model(FERMENTER) if text is None else parse_model(text)
    result = find_equilibria(model)
    assert result.complete
    n = len(model.states)
    lo = np.array([float(a) for a, _ in model.window])
    hi = np.array([float(b) for _, b in model.window])
    field = _field(model)
    grid = np.stack(np.meshgrid(*[np.linspace(a, b, 9 if n < 3 else 6) for a, b in zip(lo, hi)],
                                indexing="ij"), -1).reshape(-1, n)
    found = []
    for start in grid:
        sol = root(field, start, tol=1e-13)
        if sol.success and np.max(np.abs(field(sol.x))) < 1e-10:
            if np.all(sol.x >= lo - 1e-9) and np.all(sol.x <= hi + 1e-9):
                found.append(sol.x)
    found = np.array(found)
    assert len(found) >= len(result.equilibria)
    boxes = np.array([e.box for e in result.equilibria])
    tol = 1e-8
    near = ((found[:, None, :] >= boxes[None, :, :, 0] - tol)
            & (found[:, None, :] <= boxes[None, :, :, 1] + tol)).all(2)
    assert near.any(axis=1).all(), found[~near.any(axis=1)]
    assert near.any(axis=0).all()


def _field(model):
    from certify.points import _programs

    program = _programs(model).field
    params = np.array([float(p.lo) for p in model.parameters])
    return lambda x: program.point(np.concatenate([x, params]))


# -------------------------------------------------------------------------- tangencies


def test_sir_cap_tangency_lies_at_the_threshold_and_returns():
    # Kermack & McKendrick 1927; REFERENCES.md R5 (beta = 2, gamma = 1). On the cap I = c:
    # g = c - I, dg/dt = -I (beta S - gamma) = 0 at S = gamma/beta = 1/2 (exact), and
    # d2g/dt2 = grad(dg/dt) . f = beta^2 S I^2 - I (beta S - gamma)^2 = beta gamma c^2 > 0
    # there: I peaks at the cap and comes back (kind "returns").
    (limit,) = analyse_limits(parse_model(SIR))
    assert len(limit.tangencies) == 1
    (t,) = limit.tangencies
    assert t.unique and t.kind == "returns"
    assert contains(t.box, (Fraction(1, 2), Fraction(1, 10)))
    assert np.all(t.box[:, 1] - t.box[:, 0] < 1e-9)
    # dg/dt = -c (2 S - 1): leaves exactly for S > 1/2, returns for S < 1/2 (on I = c)
    assert len(limit.leaves) and len(limit.returns)
    assert np.all(limit.leaves[:, 0, 0] > 0.5)
    assert np.all(limit.returns[:, 0, 1] < 0.5)
    assert np.all(limit.leaves[:, 1, 1] >= 0.1) and np.all(limit.returns[:, 1, 1] >= 0.1)


def test_fermenter_tangencies_follow_from_mu_equal_d():
    # biomass_floor x >= 1: dg/dt = (mu(s) - D) x vanishes where s^2 - 3 s + 1 = 0 (Andrews
    # 1968 (mem), as above). There d2g/dt2 = mu'(s) s' with s' = 1.6 - 0.2 s > 0; mu rises
    # below s = sqrt(Ks Ki) = 1 and falls above, so (3 - sqrt5)/2 "returns" and
    # (3 + sqrt5)/2 "leaves" (derived by hand).
    limits = {r.name: r for r in analyse_limits(load_model(FERMENTER))}
    floor = limits["biomass_floor"]
    root5 = mpmath.sqrt(5)
    kinds = {}
    for t in floor.tangencies:
        assert t.unique
        for s in ((3 - root5) / 2, (3 + root5) / 2):
            if contains(t.box, (s, 1)):
                kinds[float(s)] = t.kind
    assert kinds == {float((3 - root5) / 2): "returns", float((3 + root5) / 2): "leaves"}
    # discharge_limit s <= 9: dg/dt = -(D (s_in - s) - mu(9) x / Y) with mu(9) = 0.09 is 0
    # at x = 0.2 * 0.5 / 0.09 = 10/9 (exact)
    (t,) = limits["discharge_limit"].tangencies
    assert contains(t.box, (9, Fraction(10, 9)))


def test_leaving_and_returning_boxes_have_the_proven_sign():
    # Independent re-check with plain float sampling: inside every leaves box the float
    # value of dg/dt is negative, inside every returns box positive (1000 random points).
    model = load_model(FERMENTER)
    from certify.points import _programs

    rng = np.random.default_rng(1)
    params = np.array([float(p.lo) for p in model.parameters])
    for limit, prog in zip(analyse_limits(model), _programs(model).limits):
        for key, sign in (("leaves", -1), ("returns", 1)):
            boxes = getattr(limit, key)
            pick = boxes[rng.integers(len(boxes), size=1000)]
            pts = pick[:, :, 0] + rng.random((1000, 2)) * (pick[:, :, 1] - pick[:, :, 0])
            rate = prog.rate.point(np.concatenate([pts, np.tile(params, (1000, 1))], 1))[:, 1]
            assert np.all(sign * rate > 0)


# ----------------------------------------------------------------------- curves and map


def test_stable_manifold_separates_labels_on_a_proof_map():
    # Consistency (issue 6): the estimated stable manifold of the fermenter's saddle passes
    # only through undecided cells or along borders between different labels, never
    # through the middle of a region decided with one label. No exception is allowed.
    from certify.prove import prove

    model = load_model(FERMENTER)
    proof = prove(model, max_depth=7)
    curves = [c for c in explaining_curves(model, analyse_points(model))
              if c.kind == "stable manifold"]
    assert len(curves) == 2
    node_label = np.full(len(proof.tree), "", dtype=object)
    node_label[proof.leaves] = proof.labelling.label
    width = np.array([float(b - a) for a, b in model.window]) / 2 ** 7
    checked = 0
    for curve in curves:
        pts = curve.points
        tangent = np.gradient(pts, axis=0)
        normal = np.stack([-tangent[:, 1], tangent[:, 0]], 1)
        normal /= np.linalg.norm(normal, axis=1, keepdims=True) + 1e-300
        here = node_label[proof.tree.leaf_containing(pts)]
        side_a = node_label[proof.tree.leaf_containing(pts + 1.5 * width * normal)]
        side_b = node_label[proof.tree.leaf_containing(pts - 1.5 * width * normal)]
        inside = (pts >= proof.tree.lo[0]).all(1) & (pts <= proof.tree.hi[0]).all(1)
        fine = (here == "undecided") | (side_a != side_b) | (side_a == "undecided") \
            | (side_b == "undecided")
        assert np.all(fine[inside]), pts[inside & ~fine][:5]
        checked += int(inside.sum())
    assert checked > 300


def test_explaining_curves_start_at_their_points_and_stay_in_the_limits():
    # Each stable-manifold branch starts at the saddle ((3 + sqrt5)/2, ...) and every
    # point of every curve satisfies the limits up to the integrator's tolerance.
    model = load_model(FERMENTER)
    result = analyse_points(model)
    curves = explaining_curves(model, result)
    saddle = float((3 + mpmath.sqrt(5)) / 2)
    kinds = sorted(c.kind for c in curves)
    assert kinds == ["stable manifold", "stable manifold", "tangent trajectory"]
    for c in curves:
        if c.kind == "stable manifold":
            assert abs(c.points[0, 0] - saddle) < 1e-9
        s, x = c.points[:, 0], c.points[:, 1]
        assert np.all((x >= 1 - 1e-6) & (x <= 9 + 1e-6) & (s <= 9 + 1e-6))


# ------------------------------------------------------------------------ CLI, summary


def test_cli_json_has_the_structure_of_the_issue(capsys):
    # The --json structure is fixed by issue 6.
    code = main(["points", str(FERMENTER), "--json"])
    assert code == 0
    data = json.loads(capsys.readouterr().out)
    assert set(data) == {"equilibria", "complete", "unresolved", "limits"}
    assert data["complete"] is True and data["unresolved"] == []
    for e in data["equilibria"]:
        assert set(e) == {"box", "stability", "limits"} and e["stability"] in STABILITIES
        assert len(e["box"]) == 2 and all(len(side) == 2 for side in e["box"])
    assert set(data["limits"]) == {"biomass_floor", "aeration_cap", "discharge_limit"}
    for entry in data["limits"].values():
        assert set(entry) == {"leaves", "returns", "tangencies"}
        for t in entry["tangencies"]:
            assert set(t) == {"box", "kind"} and t["kind"] in TANGENCY_KINDS


def test_cli_table_and_parameter_override(capsys):
    # D = 0.2 is the file's own value: three equilibria, one a saddle (closed form above);
    # an unknown parameter is a usage error (exit code 2, DEVELOPERS.md).
    assert main(["points", str(FERMENTER), "--param", "D=0.2"]) == 0
    out = capsys.readouterr().out
    assert "saddle" in out and "proven free of equilibria" in out
    assert main(["points", str(FERMENTER), "--param", "nope=1"]) == 2
    assert "unknown parameter 'nope'" in capsys.readouterr().err


def test_unresolved_boxes_cover_a_line_of_equilibria():
    # SIR (Kermack & McKendrick 1927): every point with I = 0 is an equilibrium, so the
    # search cannot finish; the unresolved boxes must cover the whole segment I = 0.
    result = find_equilibria(parse_model(SIR), max_depth=8)
    assert not result.complete
    s = np.linspace(0, 1, 101)
    boxes = result.unresolved
    covered = ((s[:, None] >= boxes[None, :, 0, 0]) & (s[:, None] <= boxes[None, :, 0, 1])
               & (boxes[None, :, 1, 0] <= 0)).any(1)
    assert covered.all()


def test_proof_summary_carries_the_points(tmp_path):
    # summary.json of `certify prove` holds the same keys as `certify points --json`.
    from certify.prove import prove
    from certify.report import proof_summary

    model = parse_model(HARVEST)
    summary = proof_summary(prove(model, max_depth=3))
    assert {"equilibria", "complete", "unresolved", "limits"} <= set(summary)
    assert [e["stability"] for e in summary["equilibria"]] == ["unstable", "stable"]
    assert summary["limits"]["floor"]["tangencies"] == []
    json.dumps(summary)


def test_a_line_of_rest_states_is_reported_as_not_cleared(tmp_path, capsys):
    # SIR (Kermack & McKendrick 1927): every state with I = 0 is at rest, a line of
    # equilibria that no box search can isolate; the text must not read as "no equilibria"
    path = Path(__file__).resolve().parent / "data" / "prove_sir_cap.toml"
    assert main(["points", str(path), "--max-depth", "6"]) == 0
    text = capsys.readouterr().out
    assert "  none isolated" in text and "NOT complete" in text
    assert "line or surface of rest states" in text
