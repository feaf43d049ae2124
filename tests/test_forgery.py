"""Red team on the checker: certificates forged to claim something false must be rejected.

Each test builds a real small certificate with the prover, tampers with it through the
container API, and asserts that ``check_certificate`` / ``check_policy`` and the exit code
of ``certify check`` reject it (1: a claim does not hold, 2: a malformed file). The point
queries of a checked certificate (``label_at``, ``setting_at``) must state only what it
proves, too.

References named beside the checks:

* ``x' = u (1 - x)`` with ``u > 0`` (linear relaxation to ``x = 1``; closed form
  ``x(t) = 1 + (x0 - 1) e^(-u t)``): every start in ``[0.45, 1.9]`` stays there forever
  under either setting, and a start below ``0.45`` violates ``x >= 0.45`` at t = 0, so it
  keeps no policy's promise; without controls (``u = 1``) the same holds for the limit
  ``x >= c`` with ``c`` in ``[0.44, 0.46]``: ``x = 0.42`` violates it for every ``c``;
* the harvested logistic stock ``x' = x (1 - x) - q`` with ``q = 0.16`` (Schaefer 1954,
  surplus production (mem)): equilibria 0.2 (unstable) and 0.8 (stable), so starts below
  0.2 decline and cross ``x = 0.1``, starts above it settle at 0.8;
* cell sides ``0.1 + 1.1 i / 2^d`` compared exactly with Python's ``fractions``;
* the damped linear oscillator ``x' = y, y' = -x - y/2``: ``x(t) = expm(A t) x(0)``
  (closed form, scipy.linalg.expm), used to show that a cell's end points lie partly
  inside and partly outside a stored trapping region.
"""

import base64
import gzip
import json
import shutil
import zlib
from fractions import Fraction

import numpy as np
import pytest
from scipy.linalg import expm

from certify.certificate import certificate_data, read_certificate
from certify.check import check_certificate
from certify.check._policy import check_policy
from certify.cli import main
from certify.container import (decode_array, encode_array, load_certificate_json,
                               write_certificate)
from certify.errors import CertificateError
from certify.model import parse_model
from certify.policy import prove_policy
from certify.policy_output import read_policy, write_policy
from certify.prove import Method, prove

from test_trapping import OSCILLATOR  # the damped oscillator of the trapping tests

RELAX = """\
[model]
name = "relaxation with a two-speed pump"
[states]
x = [0, 2]
[parameters]
u = 1
[equations]
x = "u*(1 - x)"
[limits]
low = "x >= 0.45"
high = "x <= 1.9"
[controls]
u = { settings = [1, 2], hold = 0.05 }
[settings]
min_horizon = 0.1
"""


def _check_cli(path, capsys):
    code = main(["check", str(path), "--workers", "1", "--quiet"])
    out = capsys.readouterr()
    assert "Traceback" not in out.err
    return code


def _rewrite(path, change):
    with gzip.open(path, "rb") as f:
        data = json.loads(f.read())
    change(data)
    with gzip.open(path, "wb") as f:
        f.write(json.dumps(data).encode())


# -- policy claims -----------------------------------------------------------------------
@pytest.fixture(scope="module")
def relax_claim(tmp_path_factory):
    """An honest policy claim: x in [0.46, 0.49] is kept within the limits (closed form)."""
    tmp = tmp_path_factory.mktemp("relax")
    model = tmp / "relax.toml"
    model.write_text(RELAX)
    out = tmp / "claim"
    assert main(["claim", str(model), "--region", "x=0.46:0.49", "--expect", "safe",
                 "--max-depth", "4", "--out", str(out), "--quiet"]) == 0
    assert check_policy(out, jobs=1).valid
    return tmp, out


def _forged_region(relax_claim, tmp_path, region):
    forged = tmp_path / "forged"
    shutil.copytree(relax_claim[1], forged)

    def change(data):
        assert data["claim"]["verdict"] == "proven"
        data["claim"]["region"]["x"] = region
    _rewrite(forged / "policy.json.gz", change)
    return forged


def test_policy_claim_on_starts_that_violate_a_limit_is_not_proven(relax_claim, tmp_path,
                                                                  capsys):
    # x in [0.40, 0.44] violates x >= 0.45 at t = 0, yet lies in the safe cell
    # [0.375, 0.5] that straddles the limit (the relaxation pushes up across it)
    forged = _forged_region(relax_claim, tmp_path, ["2/5", "11/25"])
    result = check_policy(forged, jobs=1)
    assert not result.valid and "does not follow" in result.message
    assert _check_cli(forged, capsys) == 1


def test_policy_claim_beyond_the_window_is_malformed(relax_claim, tmp_path, capsys):
    # no cell meets x in [2.5, 3]: nothing is known about those starts
    forged = _forged_region(relax_claim, tmp_path, ["5/2", "3"])
    with pytest.raises(CertificateError, match="inside the window"):
        check_policy(forged, jobs=1)
    assert _check_cli(forged, capsys) == 2


def test_prover_refutes_a_policy_claim_on_starts_that_violate_a_limit(relax_claim, capsys):
    # the same region asked honestly: refuted (x = 0.4 < 0.45 at t = 0), and it checks
    tmp = relax_claim[0]
    out = tmp / "violating"
    assert main(["claim", str(tmp / "relax.toml"), "--region", "x=0.4:0.44", "--expect",
                 "safe", "--max-depth", "4", "--out", str(out), "--quiet"]) == 1
    capsys.readouterr()
    assert json.loads((out / "claim.json").read_text())["verdict"] == "refuted"
    assert check_policy(out, jobs=1).valid


def test_policy_with_swapped_settings_is_rejected(relax_claim, tmp_path, capsys):
    # read_policy hands out the stored settings for the policy's choices: swapping them
    # would tell the operator to hold u = 2 where the proof holds u = 1
    forged = tmp_path / "swapped"
    shutil.copytree(relax_claim[1], forged)

    def change(data):
        assert data["settings"] == [{"u": "1"}, {"u": "2"}]
        data["settings"].reverse()
    _rewrite(forged / "policy.json.gz", change)
    result = check_policy(forged, jobs=1)
    assert not result.valid and "stored settings" in result.message
    assert _check_cli(forged, capsys) == 1


# -- numbers the point queries use -------------------------------------------------------
RELAX_C = """\
[model]
name = "relaxation towards one above an uncertain floor"
[states]
x = [0, 2]
[parameters]
c = [0.44, 0.46]
[equations]
x = "1 - x"
[limits]
low = "x >= c"
high = "x <= 1.9"
"""


@pytest.fixture(scope="module")
def relax_c(tmp_path_factory):
    path = tmp_path_factory.mktemp("relax_c") / "certificate.json.gz"
    write_certificate(path, certificate_data(prove(parse_model(RELAX_C), max_depth=4), {}))
    return path


def _tampered(path, tmp_path, change):
    data = load_certificate_json(path)
    change(data)
    out = tmp_path / "tampered.json.gz"
    write_certificate(out, data)
    return out


@pytest.mark.parametrize("floats", [[0.3, 0.3], [0.445, 0.46], [np.nan, 0.46]])
def test_parameter_floats_narrower_than_the_box_are_rejected(relax_c, tmp_path, capsys,
                                                             floats):
    honest = read_certificate(relax_c)
    # x = 0.42 violates x >= c for every c in [0.44, 0.46]
    assert list(honest.label_at(np.array([[0.42], [0.47]]))) == ["outside", "safe"]
    forged = _tampered(relax_c, tmp_path, lambda d: d.update(
        parameter_floats=encode_array(np.array([floats]))))
    if floats[0] == 0.3:
        # what the forged file would make the point queries say about x = 0.42
        assert read_certificate(forged).label_at(np.array([[0.42]]))[0] == "safe"
    result = check_certificate(forged, jobs=1)
    assert not result.valid and "parameter_floats" in result.message
    assert _check_cli(forged, capsys) == 1
    # the stored floats are the certificate's own, whatever model it is checked against
    model = tmp_path / "relax_c.toml"
    model.write_text(RELAX_C)
    assert "parameter_floats" in check_certificate(forged, model=model, jobs=1).message


def test_policy_point_queries_do_not_call_an_undecidable_start_safe(tmp_path):
    # with c in [0.44, 0.46], x = 0.45 violates x >= c for c > 0.45: no policy keeps it
    text = RELAX.replace("u = 1\n", "u = 1\nc = [0.44, 0.46]\n").replace(
        'low = "x >= 0.45"', 'low = "x >= c"')
    write_policy(prove_policy(parse_model(text), max_depth=4, time_limit=60, compare=False),
                 tmp_path, figures=False)
    assert check_policy(tmp_path, jobs=1).valid
    policy = read_policy(tmp_path)
    points = np.array([[0.42], [0.45], [0.47]])
    assert list(policy.label_at(points)) == ["outside", "undecided", "safe"]
    assert list(policy.setting_at(points)[:2]) == [-1, -1]
    assert policy.setting_at(points)[2] >= 0


# -- cells, steps and trapping regions ---------------------------------------------------
LOGISTIC = """\
[model]
name = "harvested logistic stock"
[states]
x = [0.1, 1.2]
[parameters]
q = 0.16
[equations]
x = "x*(1 - x) - q"
[limits]
floor = "x >= 0.1"
ceiling = "x <= 1.2"
"""

def _proven(tmp_path_factory, name, text, depth):
    """A checked certificate of `text` at `depth`, proven with the unscaled lengths of time
    (certify/time_scale.py), so that the cells the forgeries edit do not move with it."""
    path = tmp_path_factory.mktemp(name) / "certificate.json.gz"
    proof = prove(parse_model(text), method=Method(), max_depth=depth)
    write_certificate(path, certificate_data(proof, {}))
    assert check_certificate(path, jobs=1).valid
    return path


@pytest.fixture(scope="module")
def logistic(tmp_path_factory):
    return _proven(tmp_path_factory, "logistic", LOGISTIC, 6)


@pytest.fixture(scope="module")
def oscillator(tmp_path_factory):
    return _proven(tmp_path_factory, "oscillator", OSCILLATOR, 4)


def _cells(data, key):
    return decode_array(data["cells"][key])


def _put(data, key, values):
    values = np.asarray(values)
    data["cells"][key] = encode_array(values, "<i8" if values.dtype.kind == "i" else "<f8")


def _claim_safe(data, c):
    """Relabel cell c safe with the bounds a safe cell states."""
    data["cells"]["label"][c] = "safe"
    for key in ("crossing_upper", "survival_lower"):
        values = _cells(data, key)
        values[c] = np.inf
        _put(data, key, values)
    rank = _cells(data, "rank")
    rank[c] = -1
    _put(data, "rank", rank)


def _rejected(path, tmp_path, capsys, change):
    forged = _tampered(path, tmp_path, change)
    result = check_certificate(forged, jobs=1)
    assert not result.valid
    assert _check_cli(forged, capsys) == 1
    return " ".join(f["reason"] for f in result.failures)


def test_a_cell_listed_twice_with_another_label_is_rejected(logistic, tmp_path, capsys):
    # the doomed cell nearest the floor listed again as safe (starts below 0.2 decline)
    def change(data):
        cells = data["cells"]
        c = cells["label"].index("doomed")
        for key in ("depth", "index", "rank", "crossing_upper", "survival_lower", "horizon",
                    "trapped"):
            values = _cells(data, key)
            _put(data, key, np.concatenate([values, values[c:c + 1]]))
        for key in ("successor_start", "step_start"):
            values = _cells(data, key)
            _put(data, key, np.concatenate([values, values[-1:]]))
        cells["label"].append("doomed")
        cells["image_known"].append(True)
        cells["trapped_whole"].append(False)
        cells["count"] += 1
        _claim_safe(data, cells["count"] - 1)
    assert "have the same address" in _rejected(logistic, tmp_path, capsys, change)


def test_a_horizon_that_does_not_enclose_the_steps_is_rejected(logistic, tmp_path, capsys):
    def change(data):
        c = data["cells"]["label"].index("safe")
        horizon = _cells(data, "horizon")
        horizon[c] = [100.0, 200.0]
        _put(data, "horizon", horizon)
    assert "does not enclose the sum" in _rejected(logistic, tmp_path, capsys, change)


def test_a_safe_cell_whose_steps_are_handed_to_its_neighbour_is_rejected(logistic, tmp_path,
                                                                         capsys):
    # offsets still rise from 0 to S, but the cell (not in a trapping region) keeps no
    # step: no image, so no safe claim
    def change(data):
        labels, trapped = data["cells"]["label"], _cells(data, "trapped")
        c = next(c for c in range(1, len(labels)) if labels[c] == "safe" and trapped[c] < 0)
        start = _cells(data, "step_start")
        start[c] = start[c + 1]
        _put(data, "step_start", start)
        # horizons enclosing the new exact sums of the step sizes
        h = _cells(data, "step_h")
        horizon = _cells(data, "horizon")
        for d in (c - 1, c):
            T = sum((Fraction(v) for v in h[start[d]:start[d + 1]]), Fraction(0))
            horizon[d] = [np.nextafter(float(T), -np.inf), np.nextafter(float(T), np.inf)]
        _put(data, "horizon", horizon)
    reasons = _rejected(logistic, tmp_path, capsys, change)
    assert "its image is not finite" in reasons and "does not enclose" not in reasons


def test_safe_by_an_image_only_partly_in_the_trapping_region_is_rejected(oscillator, tmp_path,
                                                                          capsys):
    data = load_certificate_json(oscillator)
    region = data["regions"][0]
    centre = np.array([float(Fraction(v)) for v in region["centre"]])
    P = np.array([[float(Fraction(v)) for v in row] for row in region["matrix"]])
    level = float(Fraction(region["level"]))
    depth, index = _cells(data, "depth"), _cells(data, "index")
    c = int(np.flatnonzero((depth == 4) & (index[:, 0] == 1) & (index[:, 1] == 14))[0])
    # not safe by this region (it may be safe by its successors): a claim that the region
    # holds its image is a forgery
    assert data["cells"]["label"][c] != "outside" and _cells(data, "trapped")[c] < 0
    start = _cells(data, "step_start")
    T = float(sum(Fraction(h) for h in _cells(data, "step_h")[start[c]:start[c + 1]]))
    # closed form: the cell [-1.75, -1.5] x [1.5, 1.75] ends partly inside V <= level
    flow = expm(np.array([[0.0, 1.0], [-1.0, -0.5]]) * T)
    ends = [flow @ np.array([x, y]) - centre for x in (-1.75, -1.5) for y in (1.5, 1.75)]
    values = [d @ P @ d for d in ends]
    assert min(values) < level * 0.99 and max(values) > level * 1.01

    def change(data):
        _claim_safe(data, c)
        trapped = _cells(data, "trapped")
        trapped[c] = 0
        _put(data, "trapped", trapped)
        data["cells"]["trapped_whole"][c] = False
    assert "not proven to lie in trapping region 0" in _rejected(oscillator, tmp_path, capsys,
                                                                 change)


def test_a_point_within_a_rounding_of_a_side_gets_the_label_of_its_exact_cell(logistic):
    # cell sides 0.1 + 1.1 i / 2^d are mostly not floats: the float boxes are rounded
    # outward and overlap by an ulp; the point there belongs to one exact cell only
    data = load_certificate_json(logistic)
    depth, index = _cells(data, "depth"), _cells(data, "index")[:, 0]
    labels = data["cells"]["label"]
    lo = [Fraction(1, 10) + Fraction(11, 10) * Fraction(int(i), 2 ** int(d))
          for d, i in zip(depth, index)]
    hi = [Fraction(1, 10) + Fraction(11, 10) * Fraction(int(i) + 1, 2 ** int(d))
          for d, i in zip(depth, index)]
    cert = read_certificate(logistic)
    checked = 0
    for a in range(len(lo)):
        b = next((b for b in range(len(lo)) if lo[b] == hi[a]), None)
        if b is None or labels[a] == labels[b] or Fraction(float(hi[a])) == hi[a]:
            continue
        above = float(hi[a]) if Fraction(float(hi[a])) > hi[a] else \
            float(np.nextafter(float(hi[a]), np.inf))
        below = float(np.nextafter(above, -np.inf))
        assert Fraction(below) < hi[a] < Fraction(above)
        got = cert.label_at(np.array([[below], [above]]))
        assert [str(g) for g in got] == [labels[a], labels[b]]
        checked += 1
    assert checked > 0


def test_a_position_patched_twice_is_malformed(logistic, tmp_path, capsys):
    # two patch values for one survival bound, the second doubled: which one a decoder
    # keeps is not defined
    def change(data):
        E = data["cells"]["survival_lower"]
        at = decode_array(E["patch_at"])
        values = np.frombuffer(zlib.decompress(base64.b64decode(E["patch"])), np.uint8)
        values = values.reshape(8, -1).T.copy().view("<f8").reshape(-1)
        at = np.concatenate([at, at[:1]])
        values = np.concatenate([values, values[:1] * 2])
        E["patch_at"] = encode_array(at, "<i8")
        grouped = values.view(np.uint8).reshape(-1, 8).T
        E["patch"] = base64.b64encode(zlib.compress(grouped.tobytes())).decode("ascii")
    forged = _tampered(logistic, tmp_path, change)
    with pytest.raises(CertificateError, match="patched twice"):
        check_certificate(forged, jobs=1)
    assert _check_cli(forged, capsys) == 2


def _undecided_at_the_threshold(data):
    """The undecided cell holding the unstable equilibrium 0.2 (Schaefer 1954 (mem)):
    its starts below 0.2 decline and cross the floor 0.1, those above settle at 0.8."""
    depth, index = _cells(data, "depth"), _cells(data, "index")[:, 0]
    for c, label in enumerate(data["cells"]["label"]):
        lo = Fraction(1, 10) + Fraction(11, 10) * Fraction(int(index[c]), 2 ** int(depth[c]))
        hi = Fraction(1, 10) + Fraction(11, 10) * Fraction(int(index[c]) + 1,
                                                           2 ** int(depth[c]))
        if label == "undecided" and lo < Fraction(1, 5) < hi:
            return c
    raise AssertionError("no undecided cell holds x = 0.2")


def _set(data, key, c, value):
    values = _cells(data, key)
    values[c] = value
    _put(data, key, values)


def _outside_at_the_threshold(data):
    # every start of the cell keeps 0.1 <= x <= 1.2 at t = 0
    c = _undecided_at_the_threshold(data)
    data["cells"]["label"][c] = "outside"
    _set(data, "survival_lower", c, 0.0)
    _set(data, "crossing_upper", c, 0.0)
    _set(data, "rank", c, 0)


def _forever_at_the_threshold(data):
    # its starts below 0.2 do cross the floor
    _set(data, "survival_lower", _undecided_at_the_threshold(data), np.inf)


def _doomed_surviving_its_deadline(data):
    rank = _cells(data, "rank")
    c = next(c for c, label in enumerate(data["cells"]["label"])
             if label == "doomed" and rank[c] == 0)
    _set(data, "survival_lower", c, 2 * float(_cells(data, "crossing_upper")[c]) + 1)


@pytest.mark.parametrize("change, reason", [
    (_outside_at_the_threshold, "no limit is proven violated on the whole cell"),
    (_forever_at_the_threshold, "survival bound inf"),
    (_doomed_surviving_its_deadline, "survival bound"),
])
def test_forged_outside_and_survival_claims_are_rejected(logistic, tmp_path, capsys, change,
                                                         reason):
    assert reason in _rejected(logistic, tmp_path, capsys, change)


# -- step records the reader refuses, and steps no arithmetic verifies -------------------
def _checked_safe_cell(data):
    """A safe cell whose own steps the checker recomputes (not trapped)."""
    labels, trapped = data["cells"]["label"], _cells(data, "trapped")
    return next(c for c in range(len(labels)) if labels[c] == "safe" and trapped[c] < 0)


def _first_step(key, value, where=()):
    def change(data):
        values = _cells(data, key)
        values[(int(_cells(data, "step_start")[_checked_safe_cell(data)]),) + where] = value
        _put(data, key, values)
    return change


@pytest.mark.parametrize("key, value, where", [
    ("step_h", np.nan, ()), ("step_h", np.inf, ()), ("step_h", 0.0, ()),
    ("step_h", -0.0, ()), ("step_h", -0.05, ()),
    ("step_E", np.nan, (0, 0)), ("step_E", -np.inf, (0, 0)), ("step_E", np.inf, (0, 1)),
])
def test_steps_that_are_not_finite_or_not_forward_are_malformed(logistic, tmp_path, capsys,
                                                                 key, value, where):
    # IEEE 754-2008: -0.0 == 0.0 and NaN compares false both ways; a step of size <= 0
    # (a backward or empty flow) or a tube box with an infinite side proves nothing
    forged = _tampered(logistic, tmp_path, _first_step(key, value, where))
    with pytest.raises(CertificateError, match=f"cells.{key}"):
        check_certificate(forged, jobs=1)
    assert _check_cli(forged, capsys) == 2


def _swapped_tube(data):
    # the tube box [lo, hi] stored as [hi, lo]: no solution can stay in it
    s = int(_cells(data, "step_start")[_checked_safe_cell(data)])
    E = _cells(data, "step_E")
    E[s, 0] = E[s, 0, ::-1].copy()
    _put(data, "step_E", E)


def _tube_to_the_float_range(data):
    # a tube box [-MAX, MAX]: the field on it overflows (inf - inf is NaN in the float
    # pass), so the Picard inclusion cannot hold in any pass
    s = int(_cells(data, "step_start")[_checked_safe_cell(data)])
    E = _cells(data, "step_E")
    E[s, 0] = [-np.finfo(float).max, np.finfo(float).max]
    _put(data, "step_E", E)


def _tiny_first_step(data):
    # the smallest subnormal as the first step (horizon adjusted): a positive step is
    # sound and its tubes still hold, but the image now lies where the flow is a step
    # earlier, beyond the stored successors
    c = _checked_safe_cell(data)
    start, h = _cells(data, "step_start"), _cells(data, "step_h")
    h[start[c]] = 5e-324
    _put(data, "step_h", h)
    T = sum((Fraction(v) for v in h[start[c]:start[c + 1]]), Fraction(0))
    horizon = _cells(data, "horizon")
    horizon[c] = [np.nextafter(float(T), -np.inf), np.nextafter(float(T), np.inf)]
    _put(data, "horizon", horizon)


@pytest.mark.parametrize("change, reason", [
    (_swapped_tube, "step 0 does not verify"),
    (_tube_to_the_float_range, "step 0 does not verify"),
    (_tiny_first_step, "which is not among its successors"),
])
def test_edited_steps_are_rejected(logistic, tmp_path, capsys, change, reason):
    assert reason in _rejected(logistic, tmp_path, capsys, change)


@pytest.mark.parametrize("frames", ["parallelepiped", "QR", "", None, ["qr"]])
def test_an_unknown_frame_rule_is_malformed(logistic, tmp_path, capsys, frames):
    forged = _tampered(logistic, tmp_path, lambda d: d["method"].update(frames=frames))
    with pytest.raises(CertificateError, match="method.frames"):
        check_certificate(forged, jobs=1)
    assert _check_cli(forged, capsys) == 2


@pytest.mark.parametrize("method", [{"frames": "qr"}, {"frames": "qr+parallelepiped"},
                                    {"order": 1}, {"order": 8}])
def test_no_frame_rule_or_order_proves_a_false_safe_cell(logistic, tmp_path, capsys,
                                                          method):
    # the cell holding the unstable equilibrium 0.2 claimed safe: its starts below 0.2
    # cross the floor (Schaefer 1954 (mem)). Frames and order are the checker's method,
    # any of them sound: each recomputes the steps and none proves the claim
    def change(data):
        _claim_safe(data, _undecided_at_the_threshold(data))
        data["method"].update(method)
    _rejected(logistic, tmp_path, capsys, change)
