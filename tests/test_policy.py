"""Safe operating policies for models with ``[controls]`` (certify/policy.py, check/_policy.py).

References named beside the checks:

* the double integrator ``x' = v, v' = u``, ``|u| <= 1``, limits ``|x| <= 1``: its exact
  viability kernel is ``v^2 <= 2 (1 - x)`` for ``v >= 0`` and ``v^2 <= 2 (1 + x)`` for
  ``v <= 0`` (the braking-distance parabolas; Saint-Pierre 1994 (mem)), a convex set of
  area ``16/3`` (integral of the two parabolas); its solutions under a constant ``u`` are
  ``x(t) = x0 + v0 t + u t^2 / 2`` (closed form), which every simulation here uses;
* the policy of the fermenter with the dilution rate as a control
  (``models/fermenter_dilution_control.toml``), simulated with scipy's ``solve_ivp``
  (DOP853, tight tolerances), an integrator outside this project;
* the unstable drift ``x' = x + u``, ``u in {-1, 1}``, limits ``|x| <= 2``: solutions
  ``x(t) = -u + (x0 + u) e^t`` (closed form); the viability kernel with switching is
  ``[-1, 1]`` (for ``x > 1`` even ``u = -1`` gives ``x' > 0``), while a constant ``u``
  keeps only the equilibrium ``x = -u`` (a set of measure 0).
"""

import gzip
import json
import shutil
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest

from certify.check._policy import check_policy
from certify.cli import main
from certify.container import decode_array, encode_array
from certify.errors import ModelError, UsageError
from certify.model import load_model, parse_model
from certify.policy import prove_policy
from certify.policy_output import read_policy, write_policy

DOUBLE = """\
[model]
name = "double integrator with bounded push"
[states]
x = [-1, 1]
v = [-2.5, 2.5]
[parameters]
u = 0
[equations]
x = "v"
v = "u"
[limits]
right = "x <= 1"
left = "x >= -1"
[controls]
u = { settings = [-1, 0, 1], hold = 0.1 }
"""
#: Depth of the double integrator's policy map (cells of 1/128 of each side).
DOUBLE_DEPTH = 7

DRIFT = """\
[model]
name = "unstable drift with a two-way push"
[states]
x = [-3, 3]
[parameters]
u = 0
[equations]
x = "x + u"
[limits]
high = "x <= 2"
low = "x >= -2"
[controls]
u = { settings = [-1, 1], hold = 0.05 }
[settings]
min_horizon = 0.1
"""


@pytest.fixture(scope="module")
def double():
    return prove_policy(parse_model(DOUBLE), max_depth=DOUBLE_DEPTH, time_limit=600)


@pytest.fixture(scope="module")
def drift(tmp_path_factory):
    pp = prove_policy(parse_model(DRIFT), max_depth=8, time_limit=600)
    out = tmp_path_factory.mktemp("drift")
    write_policy(pp, out)
    return pp, out


def _boxes(pp, label):
    sel = pp.proof.labelling.label == label
    leaves = pp.leaves[sel]
    return pp.tree.lo[leaves], pp.tree.hi[leaves]


def _in_kernel(x, v):
    """Exact membership in the double integrator's kernel (Fractions)."""
    if abs(x) > 1:
        return False
    return v * v <= 2 * (1 - x) if v >= 0 else v * v <= 2 * (1 + x)


def _box_meets_kernel(lo, hi):
    """Exact: does the box meet the kernel? The upper parabola and the lower one both
    fall with x, so the box meets it iff some x of the box lies right of where the
    lower parabola reaches v1 and left of where the upper one reaches v0."""
    x0, v0 = (Fraction(float(a)) for a in lo)
    x1, v1 = (Fraction(float(b)) for b in hi)
    right = 1 - v0 * v0 / 2 if v0 > 0 else Fraction(1)
    left = -1 + v1 * v1 / 2 if v1 < 0 else Fraction(-1)
    return max(x0, left, Fraction(-1)) <= min(x1, right, Fraction(1))


def test_double_integrator_safe_cells_lie_in_the_kernel(double):
    # Saint-Pierre 1994 (mem): the kernel is convex, so a box lies in it iff its corners do
    lo, hi = _boxes(double, "safe")
    assert len(lo) > 0
    for a, b in zip(lo, hi):
        corners = [(Fraction(float(x)), Fraction(float(v))) for x in (a[0], b[0])
                   for v in (a[1], b[1])]
        assert all(_in_kernel(x, v) for x, v in corners), (a, b)


def test_double_integrator_doomed_cells_miss_the_kernel(double):
    # Saint-Pierre 1994 (mem): no doomed cell may hold a viable start
    lo, hi = _boxes(double, "doomed")
    assert len(lo) > 0
    assert not any(_box_meets_kernel(a, b) for a, b in zip(lo, hi))


def test_double_integrator_safe_cells_cover_the_kernel(double):
    # kernel area 16/3 (integral of the braking parabolas), window area 2 * 5 = 10
    share = double.fractions["safe"] * 10 / (16 / 3)
    assert share >= 0.90, share


def _policy_arrays(pp, name="u"):
    number = np.full(len(pp.tree), -1)
    number[pp.leaves] = np.arange(len(pp.leaves))
    horizon = np.stack([p.facts.horizon_lo for p in pp.per_setting])
    values = np.array([float(s[name]) for s in pp.settings])
    return number, horizon, values


def _start_points(pp, label, n, rng):
    lo, hi = _boxes(pp, label)
    vol = np.prod(hi - lo, axis=1)
    pick = rng.choice(len(lo), size=n, p=vol / vol.sum())
    return lo[pick] + rng.random((n, lo.shape[1])) * (hi[pick] - lo[pick]), pick


def test_double_integrator_policy_keeps_the_limits(double):
    # closed form x(t) = x0 + v0 t + u t^2/2 under the setting held for the cell's horizon
    rng = np.random.default_rng(18)
    pp = double
    number, horizon, values = _policy_arrays(pp)
    labels = pp.proof.labelling.label
    p, _ = _start_points(pp, "safe", 20_000, rng)
    x, v = p[:, 0].copy(), p[:, 1].copy()
    t = np.zeros(len(x))
    while t.min() < 30.0:
        leaf = number[pp.tree.leaf_containing(np.stack([x, v], 1))]
        assert np.all(leaf >= 0) and np.all(labels[leaf] == "safe")
        k = pp.choice[leaf]
        u, T = values[k], horizon[k, leaf]
        assert np.all(T >= 0.1)  # the hold time
        with np.errstate(divide="ignore", invalid="ignore"):
            vertex = np.where(u != 0, -v / u, -1.0)
        inner = (vertex > 0) & (vertex < T)
        tv = np.where(inner, vertex, 0.0)
        extremes = np.stack([x, x + v * T + u * T * T / 2, x + v * tv + u * tv * tv / 2])
        assert np.abs(extremes).max() <= 1 + 1e-9
        x, v = x + v * T + u * T * T / 2, v + u * T
        t += T


def _first_hit(x, v, u, d):
    """First time in [0, d] where |x + v t + u t^2/2| reaches 1, or None (closed form)."""
    roots = []
    for side in (1.0, -1.0):
        a, b, c = u / 2, v, x - side
        if a == 0:
            cand = [-c / b] if b != 0 else []
        else:
            disc = b * b - 4 * a * c
            cand = [] if disc < 0 else [(-b - disc ** 0.5) / (2 * a), (-b + disc ** 0.5) / (2 * a)]
        roots += [r for r in cand if 0 <= r <= d]
    return min(roots) if roots else None


def test_double_integrator_doomed_starts_cross_under_random_controls(double):
    # closed form; any measurable control is allowed, here random piecewise constant ones
    # with values anywhere in [-1, 1] (the hull), switching at random times
    rng = np.random.default_rng(1994)
    pp = double
    p, pick = _start_points(pp, "doomed", 2000, rng)
    lo, _ = _boxes(pp, "doomed")
    bound = pp.proof.labelling.crossing_upper[pp.proof.labelling.label == "doomed"][pick]
    for (x, v), limit in zip(p, bound):
        t, hit = 0.0, None
        while hit is None and t < 100:
            u, d = rng.uniform(-1, 1), rng.exponential(0.2)
            hit = _first_hit(x, v, u, d)
            if hit is None:
                x, v, t = x + v * d + u * d * d / 2, v + u * d, t + d
        assert hit is not None and t + hit <= limit + 1e-9, (x, v, t, limit)


def test_switching_beats_every_constant_setting(drift):
    # closed form: a constant u keeps only x = -u (measure 0); switching keeps [-1, 1]
    pp, _ = drift
    assert max(pp.constant_shares) == 0.0
    assert pp.fractions["safe"] > max(pp.constant_shares)
    assert pp.fractions["safe"] >= 0.9 * (2 / 6)
    lo, hi = _boxes(pp, "safe")
    assert np.all(lo >= -1) and np.all(hi <= 1)
    lo, hi = _boxes(pp, "doomed")
    assert np.all((lo >= 1) | (hi <= -1))


def test_drift_policy_points_towards_the_middle(drift):
    # closed form: from x = 0.9, u = 1 held for the hold time 0.05 or more ends above
    # -1 + 1.9 e^0.05 > 1, outside the kernel; likewise u = -1 from x = -0.9
    pp, out = drift
    policy = read_policy(out)
    xs = np.array([[-0.9], [0.9]])
    assert [float(policy.settings[i]["u"]) for i in policy.setting_at(xs)] == [1, -1]
    assert list(policy.label_at(xs)) == ["safe"] * 2
    assert list(policy.setting_at(np.array([[1.5], [2.5]]))) == [-1, -1]


def test_policy_certificate_checks(drift):
    _, out = drift
    result = check_policy(out, jobs=1)
    assert result.valid, result.failures[:3]
    assert main(["check", str(out), "--workers", "1"]) == 0


def _rewrite(path, change):
    with gzip.open(path, "rb") as f:
        data = json.loads(f.read())
    change(data)
    with gzip.open(path, "wb") as f:
        f.write(json.dumps(data).encode())


def test_tampered_setting_is_rejected(drift, tmp_path):
    pp, out = drift
    bad = tmp_path / "bad"
    shutil.copytree(out, bad)
    # a cell right of 0 with u = +1 instead of -1 drifts out (closed form)
    c = int(np.flatnonzero((pp.choice == 0) & (pp.tree.lo[pp.leaves][:, 0] >= 0.5))[0])

    def change(data):
        data["cells"]["choice"][c] = 1
    _rewrite(bad / "policy.json.gz", change)
    result = check_policy(bad, jobs=1)
    assert not result.valid
    assert any(f["cell"] == c for f in result.failures)
    assert main(["check", str(bad), "--workers", "1"]) == 1


def test_shortened_hold_is_rejected(drift, tmp_path):
    _, out = drift
    bad = tmp_path / "bad"
    shutil.copytree(out, bad)

    def change(data):
        text = data["model"]["text"].replace("hold = 0.05", "hold = 0.01")
        data["model"]["text"] = text
    _rewrite(bad / "policy.json.gz", change)
    assert not check_policy(bad, jobs=1).valid  # the model's hash no longer fits

    import hashlib

    def rehash(data):
        data["model"]["sha256"] = hashlib.sha256(data["model"]["text"].encode()).hexdigest()
    _rewrite(bad / "policy.json.gz", rehash)
    result = check_policy(bad, jobs=1)
    assert not result.valid
    assert "not about the policy's model" in result.message


def test_a_longer_hold_than_proven_is_rejected(drift, tmp_path):
    # the tubes run for about 0.1; a model asking for a hold of 5 is not met by them
    _, out = drift
    bad = tmp_path / "bad"
    shutil.copytree(out, bad)
    import hashlib

    text = None

    def change(data):
        nonlocal text
        text = data["model"]["text"].replace("hold = 0.05", "hold = 5")
        data["model"] = {"text": text, "sha256": hashlib.sha256(text.encode()).hexdigest(),
                         "name": data["model"]["name"], "file": None}

    def same_model(data):
        data["model"]["text"] = text
        data["model"]["sha256"] = hashlib.sha256(text.encode()).hexdigest()
    _rewrite(bad / "policy.json.gz", change)
    for sub in bad.glob("*.json.gz"):
        if sub.name != "policy.json.gz":
            _rewrite(sub, same_model)
    result = check_policy(bad, jobs=1)
    assert not result.valid
    assert any("shorter than the hold time" in f["reason"] for f in result.failures)


def test_forged_inclusion_step_is_rejected(drift, tmp_path):
    pp, out = drift
    bad = tmp_path / "bad"
    shutil.copytree(out, bad)
    incl = pp.inclusion
    c = int(np.flatnonzero((incl.labelling.label == "doomed") & (incl.labelling.rank > 0))[0])

    def change(data):
        cells = data["cells"]
        start = decode_array(cells["step_start"])
        E = decode_array(cells["step_E"]).copy()
        s = int(start[c])
        mid = E[s].mean(axis=-1, keepdims=True)
        E[s] = mid + (E[s] - mid) * 0.01  # far too small an a-priori box
        cells["step_E"] = encode_array(E)
    _rewrite(bad / "inclusion.json.gz", change)
    result = check_policy(bad, jobs=1)
    assert not result.valid
    assert any("the inclusion" in f["reason"] for f in result.failures)


def test_inclusion_of_higher_order_is_rejected(drift, tmp_path):
    # Taylor terms of order 2 and more assume a control without jumps: not for doomed
    _, out = drift
    bad = tmp_path / "bad"
    shutil.copytree(out, bad)

    def change(data):
        data["method"]["order"] = 2
    _rewrite(bad / "inclusion.json.gz", change)
    result = check_policy(bad, jobs=1)
    assert not result.valid
    assert any("only order 1" in f["reason"] for f in result.failures)


def test_cli_prove_writes_a_policy(tmp_path):
    model = tmp_path / "drift.toml"
    model.write_text(DRIFT)
    out = tmp_path / "out"
    assert main(["prove", str(model), "--out", str(out), "--max-depth", "6", "--quiet"]) == 0
    summary = json.loads((out / "summary.json").read_text())
    assert summary["safe_share_held_constant"] == [0.0, 0.0]
    assert summary["safe_share_policy"] > 0
    assert sum(p["cells"] for p in summary["policy"]) == summary["cells"]["safe"]
    assert (out / "policy.json.gz").is_file()


BAD = [
    ("[controls]\nk = { settings = [1, 2] }\n", "[controls] k: is not a parameter"),
    ("[controls]\nu = { settings = [] }\n", "[controls] u: settings: is empty"),
    ("[controls]\nu = { settings = [1, 2], hold = -1 }\n", "[controls] u: hold: must be 0 or more"),
    ("[controls]\nu = { range = [1, 2], settings = 1 }\n", "[controls] u: settings: with a range"),
    ("[controls]\nu = { range = [2, 1], settings = 3 }\n", "[controls] u: range: [2, 1] must have lo below hi"),
    ("[controls]\nu = { settings = [1, 1] }\n", "[controls] u: settings: lists a setting twice"),
    ("[controls]\nu = { hold = 1 }\n", "[controls] u: missing key 'settings'"),
    ("[controls]\nu = { settings = [1], hld = 1 }\n", "[controls] u: unknown key 'hld'"),
    ("[controls]\nu = 3\n", "[controls] u: expected { settings = [...], hold = ... }"),
]


@pytest.mark.parametrize("extra, message", BAD)
def test_bad_controls_are_named(extra, message):
    base = DOUBLE.split("[controls]")[0]
    with pytest.raises(ModelError) as info:
        parse_model(base + extra, path="m.toml")
    assert str(info.value).startswith("m.toml: " + message), str(info.value)


def test_range_settings_are_evenly_spaced():
    base = DOUBLE.split("[controls]")[0]
    model = parse_model(base + "[controls]\nu = { range = [0.1, 0.4], settings = 4, hold = 0.5 }\n")
    control, = model.controls
    assert control.settings == tuple(Fraction(k, 10) for k in (1, 2, 3, 4))
    assert control.hold == Fraction(1, 2)


def test_models_without_controls_have_none():
    assert parse_model(DOUBLE.split("[controls]")[0]).controls == ()


def test_a_control_cannot_be_swept():
    from certify.sweep import sweep

    with pytest.raises(UsageError, match="is a control"):
        sweep(parse_model(DOUBLE), {"u": (-1, 1, 2)})


@pytest.mark.parametrize("region, verdict, code", [
    ("x=-0.5:0.5", "proven", 0),     # inside the kernel [-1, 1] (closed form)
    ("x=0.5:1.5", "refuted", 1),     # meets (1, 2], doomed under every control
])
def test_policy_claims(tmp_path, region, verdict, code):
    model = tmp_path / "drift.toml"
    model.write_text(DRIFT)
    out = tmp_path / "claim"
    assert main(["claim", str(model), "--region", region, "--expect", "safe",
                 "--max-depth", "8", "--out", str(out), "--quiet"]) == code
    assert json.loads((out / "claim.json").read_text())["verdict"] == verdict
    assert check_policy(out, jobs=1).valid

    def flip(data):
        data["claim"]["verdict"] = "refuted" if verdict == "proven" else "proven"
    _rewrite(out / "policy.json.gz", flip)
    result = check_policy(out, jobs=1)
    assert not result.valid and "does not follow" in result.message


def test_policy_claims_expect_safe_only(tmp_path):
    model = tmp_path / "drift.toml"
    model.write_text(DRIFT)
    assert main(["claim", str(model), "--region", "x=0:1", "--expect", "doomed",
                 "--out", str(tmp_path / "o"), "--quiet"]) == 2


FERMENTER = Path(__file__).resolve().parent.parent / "models" / "fermenter_dilution_control.toml"


def test_fermenter_policy_keeps_the_limits_in_simulation():
    # scipy.integrate.solve_ivp (DOP853, rtol 1e-10): each setting held for its cell's
    # horizon, then the setting of the cell reached, over 50 h
    from scipy.integrate import solve_ivp

    from certify.taylor import flow_programs

    model = load_model(FERMENTER)
    pp = prove_policy(model, max_depth=6, compare=False)
    number, horizon, _ = _policy_arrays(pp, "D")
    labels = pp.proof.labelling.label
    programs = [flow_programs(model.with_parameters(s), 1) for s in pp.settings]
    params = [[float(p.lo) for p in model.with_parameters(s).parameters] for s in pp.settings]
    limits = flow_programs(model, 1).limits
    rng = np.random.default_rng(2026)
    starts, _ = _start_points(pp, "safe", 150, rng)
    # a label speaks of the starts of its cell that keep the limits at t = 0
    g0 = limits.point(np.concatenate([starts, np.tile(params[0], (len(starts), 1))], 1))
    starts = starts[np.all(g0 >= 0, axis=1)][:100]
    assert len(starts) == 100
    for point in starts:
        y, t = point.copy(), 0.0
        while t < 50.0:
            leaf = number[pp.tree.leaf_containing(y[None])[0]]
            assert leaf >= 0 and labels[leaf] == "safe", (point, t, y)
            k = pp.choice[leaf]
            T = horizon[k, leaf]
            field = programs[k].field
            sol = solve_ivp(lambda _, z: field.point(np.concatenate([z, params[k]])[None])[0],
                            (0.0, T), y, method="DOP853", rtol=1e-10, atol=1e-12,
                            dense_output=True)
            path = sol.sol(np.linspace(0.0, T, 50)).T
            g = limits.point(np.concatenate([path, np.tile(params[0], (len(path), 1))], 1))
            assert g.min() >= -1e-7, (point, t, g.min())
            y, t = sol.y[:, -1], t + T
