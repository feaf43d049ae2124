"""The adaptive parameter atlas (`certify sweep --adaptive`): verdicts against closed forms.

Every ``safe`` box must hold, for every parameter value in it, a stable equilibrium
above the floor; every ``none`` box must hold none. The equilibria come from closed
forms checked at the box ends (the roots move monotonically with the parameter).
"""

import math
import subprocess
import sys
from fractions import Fraction

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from certify.atlas import atlas
from certify.atlas_proofs import analyse_parameter_box
from certify.certificate import fraction_text
from certify.errors import UsageError
from certify.model import load_model, parse_model

MONOD = """
[model]
name = "Monod chemostat"
time_unit = "h"
[states]
s = { range = [0, 10], unit = "g/L" }
x = { range = [0, 7], unit = "g/L" }
[parameters]
mu_max = 0.5
K = 1
D = { value = 0.2, unit = "1/h" }
s_in = 10
Y = 0.5
[definitions]
mu = "mu_max*s/(K + s)"
[equations]
s = "D*(s_in - s) - mu*x/Y"
x = "(mu - D)*x"
[constraints]
floor = "x >= 1"
cap = "x <= 6"
"""

HARVEST = """
[model]
name = "Logistic stock under a constant catch"
time_unit = "yr"
[states]
x = { range = [0, 1000], unit = "kt" }
[parameters]
r = 0.4
K = 1000
H = { value = 50, unit = "kt/yr" }
[equations]
x = "r*x*(1 - x/K) - H"
[constraints]
floor = "x >= 200"
"""


def _run(model, vary, tmp_path, resolution, **options):
    return atlas(model, vary, resolution=resolution, start=2, workers=1, use_map=False,
                 out=tmp_path / "atlas", **options)


def _ends(box, name):
    lo, hi = box["params_exact"][name]
    return Fraction(lo), Fraction(hi)


def test_monod_chemostat_washout(tmp_path):
    # Monod 1950; Novick & Szilard 1950: the biomass steady state has mu(s*) = D, so
    # s* = K D / (mu_max - D), x* = Y (s_in - s*), stable when 0 < s* < s_in; else only
    # the washout state (s_in, 0) remains.
    model = parse_model(MONOD)
    result = _run(model, {"D": ("0.05", "0.55")}, tmp_path, 16)
    mu_max, K, s_in, Y, floor, cap = 0.5, 1.0, 10.0, 0.5, 1.0, 6.0

    def x_star(D):
        s = K * D / (mu_max - D) if D < mu_max else math.inf
        return Y * (s_in - s) if s < s_in else -math.inf

    verdicts = {e["verdict"] for e in result.boxes}
    assert {"safe", "none"} <= verdicts
    width = 0.5 / 16
    for box in result.boxes:
        lo, hi = (float(v) for v in _ends(box, "D"))
        if box["verdict"] == "safe":   # x* falls with D: the worst value is the top end
            assert floor < x_star(hi) <= x_star(lo) < cap
        elif box["verdict"] == "none":  # no steady state keeps the floor at the low end
            assert x_star(lo) < floor
        else:  # only around the thresholds x*(D) = floor (D = 4/9) and D = mu(s_in)
            assert 4 / 9 - 2 * width < hi and lo < 5 / 11 + 2 * width
    # washout: every D above mu(s_in) = 5/11 is proven to have no safe state
    assert all(e["verdict"] == "none" for e in result.boxes
               if float(_ends(e, "D")[0]) > 5 / 11)


def test_andrews_fermenter_fold(tmp_path):
    # Andrews 1968 (mem) kinetics mu = mu_max s/(Ks + s + s^2/Ki): mu(s) = D is the
    # quadratic (D/Ki) s^2 + (D - mu_max) s + D Ks = 0; its smaller root is the stable
    # operating point, x* = Y (s_in - s1); past the fold D > max mu there is no root.
    model = load_model("models/fermenter.toml")
    result = _run(model, {"D": ("0.05", "0.35")}, tmp_path, 16)
    mu_max, Ks, Ki, s_in, Y = 0.5, 0.5, 2.0, 10.0, 0.5

    def operating(D):
        return _andrews_operating(D, s_in, mu_max, Ks, Ki, Y)

    assert {e["verdict"] for e in result.boxes} >= {"safe", "none"}
    for box in result.boxes:
        lo, hi = (float(v) for v in _ends(box, "D"))
        if box["verdict"] == "safe":
            s1, x = operating(hi)   # s1 rises and x* falls with D
            assert 0 < s1 < 9 and 1 < x < 9
            assert operating(lo)[1] < 9
        elif box["verdict"] == "none":
            assert operating(lo) is None   # the fold: max mu = 0.25 at s = 1
            assert lo > 0.25
        else:
            assert lo < 0.25 + 2 * 0.3 / 16 and hi > 0.25 - 2 * 0.3 / 16
    # the proven structure of every leaf (proven after the verdicts) matches the closed
    # form where it is uniform: the washout state (s_in, 0), stable when mu(s_in) < D,
    # and the roots of the quadratic with s < s_in (the smaller one stable)
    mu = lambda s: mu_max * s / (Ks + s + s * s / Ki)   # noqa: E731
    uniform = 0
    for box in result.boxes:
        structure = box["structure"]
        assert structure is not None
        if structure["changes"]:
            continue
        uniform += 1
        for D in (float(v) for v in _ends(box, "D")):
            a, b, c = D / Ki, D - mu_max, D * Ks
            disc = b * b - 4 * a * c
            roots = [] if disc < 0 else [(-b + sign * math.sqrt(disc)) / (2 * a)
                                         for sign in (-1, 1)]
            roots = [r for r in roots if 0 < r < s_in]
            assert structure["count"] == 1 + len(roots)
            assert structure["stable"] == (1 if roots else 0) + (mu(s_in) < D)
    assert uniform >= 1   # the check above is not vacuous


def test_logistic_harvest_matches_box_by_box(tmp_path):
    # Schaefer 1954; Clark 1990: x' = r x (1 - x/K) - H has the positive equilibria
    # K/2 (1 +- sqrt(1 - 4H/(rK))), none when H > rK/4 = 100 kt/yr.
    model = parse_model(HARVEST)
    result = _run(model, {"H": ("20", "180")}, tmp_path, 16)
    r, K, floor = 0.4, 1000.0, 200.0
    threshold = r * K / 4
    width = 160 / 16
    for box in result.boxes:
        lo, hi = (float(v) for v in _ends(box, "H"))
        if hi < threshold:
            upper = K / 2 * (1 + math.sqrt(1 - 4 * hi / (r * K)))
            assert upper > floor
            assert box["verdict"] == "safe" or lo > threshold - 2 * width
        elif lo > threshold:
            assert box["verdict"] == "none" or hi < threshold + 2 * width
        else:
            assert box["verdict"] == "undetermined"   # holds both regimes
        if box["verdict"] == "none":
            assert lo > threshold
        if box["verdict"] == "safe":
            assert hi <= threshold
    assert result.areas["undetermined"] <= 3 / 16


def _box_answer(model, bounds):
    parameters = {p.name: [fraction_text(p.lo), fraction_text(p.hi)] for p in model.parameters}
    for name, (lo, hi) in bounds.items():
        parameters[name] = [lo, hi]
    return analyse_parameter_box(model.text, model.path, parameters, None, None, False, False,
                                 True)


def _andrews_operating(D, s_in, mu_max=0.5, Ks=0.5, Ki=2.0, Y=0.5):
    # Andrews 1968 (mem): mu(s) = D is (D/Ki) s^2 + (D - mu_max) s + D Ks = 0; the smaller
    # root s1 is the stable operating point, x* = Y (s_in - s1) (steady-state balance,
    # Monod 1950); None past the fold.
    a, b, c = D / Ki, D - mu_max, D * Ks
    disc = b * b - 4 * a * c
    if disc < 0:
        return None
    s1 = (-b - math.sqrt(disc)) / (2 * a)
    return s1, Y * (s_in - s1)


def _confirm_region(record, ds, feeds, per_face=7):
    """scipy solve_ivp (tight tolerances) from the boundary of a proven parallelotope,
    at the given parameter values: every trajectory stays in it and within the limits."""
    centre = np.array([float(Fraction(v)) for v in record["centre"]])
    frame = np.array([[float(Fraction(v)) for v in row] for row in record["frame"]])
    radii = np.array([float(Fraction(v)) for v in record["radii"]])
    starts = []
    for i in range(2):
        for side in (-1, 1):
            for t in np.linspace(-1, 1, per_face):
                u = np.zeros(2)
                u[i] = side * radii[i]
                u[1 - i] = t * radii[1 - i]
                starts.append(centre + frame @ u)
    for D in ds:
        for s_in in feeds:
            def f(t, y, D=D, s_in=s_in):
                s, x = y
                mu = 0.5 * s / (0.5 + s + s * s / 2.0)
                return [D * (s_in - s) - mu * x / 0.5, (mu - D) * x]

            for x0 in starts:
                sol = solve_ivp(f, (0, 200), x0, rtol=1e-10, atol=1e-12, max_step=0.5)
                u = np.linalg.solve(frame, (sol.y.T - centre).T).T
                assert np.all(np.abs(u) <= radii * (1 + 1e-6) + 1e-9)
                assert np.all(sol.y[1] >= 1) and np.all(sol.y[1] <= 9) and np.all(sol.y[0] <= 9)


def _values(lo, hi, rng):
    lo, hi = float(Fraction(lo)), float(Fraction(hi))
    return [lo, hi] + list(rng.uniform(lo, hi, 2))


@pytest.mark.parametrize("D, s_in", [
    (["13/80", "29/160"], ["8", "69/8"]),
    # a 1/64 box just left of the fold (D = 0.25) at the lowest feed, where the
    # operating point sits barely above the biomass floor
    (["31/128", "79/320"], ["3", "101/32"]),
])
def test_safe_region_confirmed_by_simulation(D, s_in):
    model = load_model("models/fermenter.toml")
    answer = _box_answer(model, {"D": D, "s_in": s_in})
    assert answer["verdict"] == "safe" and answer["by"] == "trapping region"
    # the closed form agrees: the operating point keeps the limits on the whole box
    # (s1 rises and x* falls with D, x* rises with s_in)
    s1, x = _andrews_operating(float(Fraction(D[1])), float(Fraction(s_in[0])))
    assert 1 < x and s1 < 9 and _andrews_operating(float(Fraction(D[0])),
                                                   float(Fraction(s_in[1])))[1] < 9
    rng = np.random.default_rng(7)
    _confirm_region(answer["proof"], _values(*D, rng), _values(*s_in, rng))


def test_regions_of_halved_parameter_boxes_cover_the_box():
    # Near the exchange of stability of the washout state and the saddle (s_in = s2(D))
    # no single parallelotope is found for this 1/64 box; its four quarters each get
    # one. Every part is checked by scipy simulation at its own corners and random
    # values, and the parts tile the box.
    model = load_model("models/fermenter.toml")
    D, s_in = ("13/80", "107/640"), ("101/32", "53/16")
    answer = _box_answer(model, {"D": D, "s_in": s_in})
    assert answer["verdict"] == "safe" and answer["by"] == "trapping region"
    parts = answer["proof"]["parts"]
    assert len(parts) == 4
    rng = np.random.default_rng(3)
    boxes = []
    for part in parts:
        (d0, d1), (f0, f1) = ([Fraction(v) for v in part["params"][k]] for k in ("D", "s_in"))
        boxes.append((d0, d1, f0, f1))
        _confirm_region(part, _values(d0, d1, rng)[:3], _values(f0, f1, rng)[:3], per_face=4)
    # the parts cover the box (its corners and random points lie in some part); they
    # may reach a rounding beyond it, as the proofs use outward float enclosures
    points = [(Fraction(d), Fraction(f)) for d in D for f in s_in]
    points += [(Fraction(d), Fraction(f)) for d, f in zip(_values(*D, rng), _values(*s_in, rng))]
    for d, f in points:
        assert any(d0 <= d <= d1 and f0 <= f <= f1 for d0, d1, f0, f1 in boxes)
    area = sum((d1 - d0) * (f1 - f0) for d0, d1, f0, f1 in boxes)
    hull = ((max(b[1] for b in boxes) - min(b[0] for b in boxes))
            * (max(b[3] for b in boxes) - min(b[2] for b in boxes)))
    assert area == hull


def test_three_state_competition_chemostat(tmp_path):
    # A three-state model (models/chemostat_competition.toml, a weak contaminant
    # m1 = 0.5): the product strain alone rests at S* = a2 D / (m2 - D),
    # y* = Y (S_in - S*) (Monod 1950 steady-state balance); the contaminant cannot
    # invade when g1(S*) < D (competitive exclusion, Hsu, Hubbell & Waltman 1977 (mem)).
    # A safe box needs y* >= 0.1 there for every D in it; a none box must hold no
    # equilibrium keeping the product floor (the other equilibria have y = 0).
    model = load_model("models/chemostat_competition.toml").with_parameters({"m1": "0.5"})
    result = _run(model, {"D": ("0.25", "1.25")}, tmp_path, 8)
    m1, a1, m2, a2, Y, S_in = 0.5, 2.0, 1.5, 4.0, 0.5, 5.0

    def resting(D):
        S = a2 * D / (m2 - D)
        return Y * (S_in - S), m1 * S / (a1 + S)

    assert {e["verdict"] for e in result.boxes} >= {"safe", "none"}
    for box in result.boxes:
        lo, hi = (float(v) for v in _ends(box, "D"))
        if box["verdict"] == "safe":
            for D in np.linspace(lo, hi, 9):
                y, g1 = resting(D)
                assert 0.1 <= y <= 2.4 and g1 < D
        elif box["verdict"] == "none":
            assert resting(lo)[0] < 0.1
    # where the product strain rests well above its floor the atlas says so
    assert all(e["verdict"] == "safe" for e in result.boxes if float(_ends(e, "D")[1]) <= 0.75)


def test_none_box_is_doomed_by_simulation():
    # scipy solve_ivp: past the fold every start keeping the limits crosses one before
    # the proven deadline (washout, Monod 1950 / Andrews 1968 (mem)).
    model = load_model("models/fermenter.toml")
    answer = _box_answer(model, {"D": ["3/10", "7/20"], "s_in": ["8", "9"]})
    assert answer["verdict"] == "none" and answer["by"] == "limit rate"
    deadline = answer["proof"]["deadline"]

    def f(t, y, D=0.3, s_in=8.5):
        s, x = y
        mu = 0.5 * s / (0.5 + s + s * s / 2.0)
        return [D * (s_in - s) - mu * x / 0.5, (mu - D) * x]

    def crossed(t, y):
        return min(y[1] - 1, 9 - y[1], 9 - y[0])

    crossed.terminal = True
    for s0 in (0.0, 1.0, 4.0, 8.9):
        for x0 in (1.0, 5.0, 8.9):
            sol = solve_ivp(f, (0, deadline), [s0, x0], rtol=1e-10, atol=1e-12,
                            events=crossed)
            assert sol.status == 1 and sol.t[-1] <= deadline


@pytest.mark.parametrize("vary, options, words", [
    ({"nope": ("0", "1")}, {}, "unknown parameter"),
    ({"D": ("0.2", "0.2")}, {}, "empty"),
    ({"D": ("0.1", "0.3")}, {"resolution": 48}, "power of two"),
    ({"D": ("0.1", "0.3")}, {"resolution": 8, "start": 16}, "exceed"),
    ({"D": ("0.1", "0.3", 4)}, {}, "(lo, hi)"),
    ({"D": ("0.1", "0.3")}, {"time_budget": -1}, "time_budget"),
])
def test_bad_input(tmp_path, vary, options, words):
    model = load_model("models/fermenter.toml")
    options = {"resolution": 8, **options}
    with pytest.raises(UsageError, match=words.replace("(", r"\(").replace(")", r"\)")):
        atlas(model, vary, out=tmp_path / "a", workers=1, **options)


def test_cli_refuses_box_count_with_adaptive(tmp_path):
    run = subprocess.run([sys.executable, "-m", "certify.cli", "sweep", "models/fermenter.toml",
                          "--vary", "D=0.1:0.3:4", "--adaptive", "--out", str(tmp_path / "a")],
                         capture_output=True, text=True)
    assert run.returncode == 2
    assert "NAME=LO:HI" in run.stderr and "Traceback" not in run.stderr


LEAVING = """
[model]
name = "Leaves the window before it turns"
[states]
x = [0, 0.9]
y = [0, 1]
[equations]
x = "1"
y = "x - 1"
[constraints]
ground = "y >= 0"
"""


def test_limit_rate_needs_closed_window_faces():
    # On the window dy/dt = x - 1 <= -0.1, yet y(t) = y0 - t + t^2/2 (from x0 = 0,
    # closed form) never falls below y0 - 1/2: the start (0, 1) is safe. Its trajectory
    # leaves the window through the open face x = 0.9, so the limit-rate test must not
    # claim "none".
    from certify.atlas_proofs import none_by_limit_rate

    assert none_by_limit_rate(parse_model(LEAVING)) is None
    t = np.linspace(0, 50, 5001)
    assert np.min(1 - t + t ** 2 / 2) >= 0.5


def test_leaves_tile_the_range_and_a_rerun_reuses_them(tmp_path):
    # the leaves partition the range exactly (exact rational ends, common practice for a
    # binary tree); a rerun with the same folder analyses nothing again
    model = parse_model(HARVEST)
    first = _run(model, {"H": ("20", "180")}, tmp_path, 8)
    ends = sorted((_ends(e, "H") for e in first.boxes))
    assert ends[0][0] == 20 and ends[-1][1] == 180
    assert all(a[1] == b[0] for a, b in zip(ends, ends[1:]))
    assert sum(first.areas.values()) == pytest.approx(1.0)
    again = _run(model, {"H": ("20", "180")}, tmp_path, 8)
    assert again.n_analysed == 0
    assert [e["verdict"] for e in again.boxes] == [e["verdict"] for e in first.boxes]
    with pytest.raises(UsageError, match="other settings"):
        _run(model, {"H": ("20", "180")}, tmp_path, 16)
