"""Tests of the independent certificate checker (certify/check/, ``certify check``).

References named beside the checks:

* exponential decay ``x' = -k x`` from ``x0`` reaches ``x = 1/2`` at ``t = ln(2 x0) / k``
  (closed form);
* the harvested logistic stock ``x' = x (1 - x) - q`` (Schaefer 1954, surplus production
  (mem)) has its equilibria at ``(1 -+ sqrt(1 - 4 q)) / 2``, i.e. 0.2 (unstable) and 0.8
  (stable) for ``q = 0.16``: starts above 0.2 stay between 0.2 and 1.2, starts below it
  decline and cross 0.1;
* the endpoint arithmetic against exact rationals (``fractions.Fraction``), the ball and
  endpoint elementary functions against python-flint arb at 200 bits.

Every certificate produced here must pass; every tampered one must be rejected with exit
code 1 (a claim fails) or 2 (a malformed file), never with a traceback.
"""

import gzip
import json
import math
import random
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
from flint import arb, ctx

from certify.certificate import certificate_data, decode_array, encode_array, write_certificate
from certify.check import check_certificate
from certify.cli import main
from certify.model import load_model
from certify.prove import prove
from certify.check._arith import BallArith, EndpointArith

LOGISTIC = """\
[model]
name = "harvested logistic stock"
time_unit = "yr"
[states]
x = { range = [0.1, 1.2], unit = "K", about = "stock as a share of carrying capacity" }
[parameters]
q = 0.16
[equations]
x = "x*(1 - x) - q"
[constraints]
floor = "x >= 0.1"
ceiling = "x <= 1.2"
"""

DECAY = """\
[model]
name = "exponential decay"
time_unit = "s"
[states]
x = { range = [1, 4], unit = "m", about = "level" }
[parameters]
k = 0.5
[equations]
x = "-k*x"
[constraints]
floor = "x >= 0.5"
[settings]
min_horizon = 5
"""

FERMENTER = "models/fermenter.toml"
#: SIR with a cap (REFERENCES.md R5): the faces S = 0 and I = 0 are lines of rest states.
SIR = str(Path(__file__).resolve().parent / "data" / "prove_sir_cap.toml")


def _prove(tmp, name, text_or_path, depth):
    if text_or_path.endswith(".toml"):
        path = text_or_path
    else:
        path = tmp / f"{name}.toml"
        path.write_text(text_or_path)
    proof = prove(load_model(path), max_depth=depth)
    cert = tmp / f"{name}.json.gz"
    write_certificate(cert, certificate_data(proof, {}))
    return cert


@pytest.fixture(scope="module")
def certs(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("certs")
    return {"logistic": _prove(tmp, "logistic", LOGISTIC, 8),
            "decay": _prove(tmp, "decay", DECAY, 6),
            "fermenter": _prove(tmp, "fermenter", FERMENTER, 5),
            "sir": _prove(tmp, "sir", SIR, 6)}


def _load(path):
    with gzip.open(path, "rb") as f:
        return json.loads(f.read())


def _save(data, path):
    with gzip.open(path, "wb") as f:
        f.write(json.dumps(data).encode())
    return path


def _cells(data, key):
    return decode_array(data["cells"][key])


def _put(data, key, array, dtype="<f8"):
    data["cells"][key] = encode_array(array, dtype)


def _check(path, capsys, *extra):
    code = main(["check", str(path), "--jobs", "1", "--quiet", *extra])
    out = capsys.readouterr()
    assert "Traceback" not in out.err
    return code, out


# -- valid certificates ------------------------------------------------------------------
@pytest.mark.parametrize("name", ["logistic", "decay", "fermenter", "sir"])
def test_every_certificate_produced_passes(certs, name, capsys):
    code, out = _check(certs[name], capsys)
    assert code == 0, out.out
    assert out.out.startswith("VALID: ")
    result = check_certificate(certs[name], jobs=1)
    assert result.valid and result.status == 0 and result.failures == []
    assert result.cells_checked == _load(certs[name])["cells"]["count"]


def test_two_worker_processes_agree(certs, capsys):
    code, out = _check(certs["fermenter"], capsys, "--jobs", "2")
    assert code == 0, out.out


def test_json_output(certs, capsys):
    code = main(["check", str(certs["logistic"]), "--jobs", "1", "--json"])
    report = json.loads(capsys.readouterr().out)
    assert code == 0
    assert set(report) == {"valid", "cells_checked", "failures", "seconds",
                           "parameters_narrowed"}
    assert report["valid"] is True and report["failures"] == []
    assert report["parameters_narrowed"] == []       # proven for the file's own numbers


def test_decay_crossing_bounds_agree_with_closed_form(certs):
    # closed form: x0 e^{-k t} = 1/2 at t = ln(2 x0) / k; the latest crossing in a cell
    # starts from its top, so every verified bound must be at least ln(2 hi) / k
    data = _load(certs["decay"])
    assert check_certificate(certs["decay"], jobs=1).valid
    labels = data["cells"]["label"]
    depth, index = _cells(data, "depth"), _cells(data, "index")
    upper = _cells(data, "crossing_upper")
    assert labels.count("doomed") == len(labels)
    for d, i, bound in zip(depth, index[:, 0], upper):
        hi = 1 + 3 * Fraction(int(i) + 1, 2 ** int(d))
        assert bound >= math.log(2 * hi) / 0.5
        assert bound < math.log(2 * hi) / 0.5 + 1.5


def test_logistic_labels_agree_with_the_equilibria(certs):
    # Schaefer (1954) (mem): equilibria (1 -+ sqrt(1 - 4q)) / 2 = 0.2, 0.8 for q = 0.16
    data = _load(certs["logistic"])
    labels = data["cells"]["label"]
    depth, index = _cells(data, "depth"), _cells(data, "index")
    low = (1 - math.sqrt(1 - 4 * 0.16)) / 2
    for label, d, i in zip(labels, depth, index[:, 0]):
        lo = 0.1 + 1.1 * int(i) / 2 ** int(d)
        hi = 0.1 + 1.1 * (int(i) + 1) / 2 ** int(d)
        if label == "safe":
            assert lo >= low - 1e-12
        if label == "doomed":
            assert hi <= low + 1e-12
    assert "safe" in labels and "doomed" in labels


# -- tampering ---------------------------------------------------------------------------
def _first(labels, wanted, extra=lambda c: True):
    return next(c for c, label in enumerate(labels) if label == wanted and extra(c))


def _steps(data, c):
    start = _cells(data, "step_start")
    return int(start[c]), int(start[c + 1])


def relabel_undecided_safe(data):
    labels = data["cells"]["label"]
    c = _first(labels, "undecided")
    labels[c] = "safe"
    survival = _cells(data, "survival_lower")
    survival[c] = np.inf
    _put(data, "survival_lower", survival)


def relabel_doomed_safe(data):
    labels = data["cells"]["label"]
    c = _first(labels, "doomed")
    labels[c] = "safe"
    for key, value in (("crossing_upper", np.inf), ("survival_lower", np.inf)):
        a = _cells(data, key)
        a[c] = value
        _put(data, key, a)
    rank = _cells(data, "rank")
    rank[c] = -1
    _put(data, "rank", rank, "<i8")


def relabel_safe_doomed(data):
    labels = data["cells"]["label"]
    c = _first(labels, "safe")
    labels[c] = "doomed"
    rank = _cells(data, "rank")
    rank[c] = 1
    _put(data, "rank", rank, "<i8")
    crossing = _cells(data, "crossing_upper")
    crossing[c] = 1000.0
    _put(data, "crossing_upper", crossing)


def shrink_apriori_box(data):
    labels = data["cells"]["label"]
    s0, s1 = _steps(data, _first(labels, "safe"))
    E = _cells(data, "step_E")
    k = (s0 + s1) // 2
    mid = E[k].mean(axis=1)
    half = (E[k, :, 1] - E[k, :, 0]) / 8
    E[k, :, 0], E[k, :, 1] = mid - half, mid + half
    _put(data, "step_E", E)


def enlarge_step(data):
    labels = data["cells"]["label"]
    s0, _ = _steps(data, _first(labels, "safe"))
    h = _cells(data, "step_h")
    h[s0] *= 4
    _put(data, "step_h", h)


def remove_successors_of_a_safe_cell(data):
    labels = data["cells"]["label"]
    c = _first(labels, "safe")
    start = _cells(data, "successor_start")
    succ = _cells(data, "successors")
    n = int(start[c + 1] - start[c])
    assert n > 0
    succ = np.delete(succ, np.arange(start[c], start[c + 1]))
    start[c + 1:] -= n
    _put(data, "successor_start", start, "<i8")
    _put(data, "successors", succ, "<i8")


def delete_cell(data):
    cells = data["cells"]
    c = _first(cells["label"], "undecided")
    L = cells["count"]
    for key in ("depth", "index", "rank", "crossing_upper", "survival_lower", "horizon",
                "set0_m", "set0_r", "trapped"):
        if key not in cells:        # version 3 stores no start sets
            continue
        a = _cells(data, key)
        _put(data, key, np.delete(a, c, axis=0), "<i8" if a.dtype.kind == "i" else "<f8")
    for key in ("label", "image_known", "trapped_whole"):
        del cells[key][c]
    start = _cells(data, "successor_start")
    succ = _cells(data, "successors")
    owner = np.repeat(np.arange(L), np.diff(start))
    keep = (owner != c) & (succ != c)
    owner, succ = owner[keep], succ[keep]
    owner[owner > c] -= 1
    succ[succ > c] -= 1
    _put(data, "successor_start", np.searchsorted(owner, np.arange(L)), "<i8")
    _put(data, "successors", succ, "<i8")
    steps = _cells(data, "step_start")
    s0, s1 = int(steps[c]), int(steps[c + 1])
    for key in ("step_h", "step_E", "step_m", "step_A"):
        if key in cells:            # version 3 stores no frames m, A
            _put(data, key, np.delete(_cells(data, key), np.arange(s0, s1), axis=0))
    steps = np.concatenate([steps[:c], steps[c + 1:] - (s1 - s0)])
    _put(data, "step_start", steps, "<i8")
    cells["count"] = L - 1


def overlap_cells(data):
    depth, index = _cells(data, "depth"), _cells(data, "index")
    c = int(np.argmax(depth))
    depth[c] -= 1
    index[c] //= 2
    _put(data, "depth", depth, "<i8")
    _put(data, "index", index, "<i8")


def change_model_coefficient(data):
    text = data["model"]["text"]
    assert "q = 0.16" in text
    data["model"]["text"] = text.replace("q = 0.16", "q = 0.15")


def widen_parameter(data):
    data["parameters"]["q"] = ["3/20", "17/100"]


def lower_crossing_bound(data):
    labels = data["cells"]["label"]
    rank = _cells(data, "rank")
    c = _first(labels, "doomed", lambda c: rank[c] == 0)
    s0, _ = _steps(data, c)
    crossing = _cells(data, "crossing_upper")
    crossing[c] = _cells(data, "step_h")[s0] / 2
    _put(data, "crossing_upper", crossing)


def rank_equal_to_successor(data):
    labels = data["cells"]["label"]
    rank = _cells(data, "rank")
    start, succ = _cells(data, "successor_start"), _cells(data, "successors")
    c = _first(labels, "doomed", lambda c: rank[c] > 0)
    d = max(succ[start[c]:start[c + 1]], key=lambda d: rank[d])
    rank[c] = rank[d]
    _put(data, "rank", rank, "<i8")


def raise_survival_bound(data):
    labels = data["cells"]["label"]
    survival = _cells(data, "survival_lower")
    c = _first(labels, "undecided", lambda c: 0 < survival[c] < np.inf)
    survival[c] += 50
    _put(data, "survival_lower", survival)


def claim_limit_face(data):
    face = next(f for f in data["faces"] if f["kind"] == "inflow")
    face["kind"] = "limit"


def claim_invariant_face(data):
    # S' = -beta S I does not vanish on the side S = 1 (only where I = 0); it is <= 0
    # there, so the side is no-outflow
    face = next(f for f in data["faces"] if f["axis"] == 0 and f["side"] == "hi")
    assert face["kind"] == "no-outflow"
    face["kind"] = "invariant"


def claim_no_outflow_face(data):
    # I' = (beta S - gamma) I is positive on the side I = 0.1 wherever S > gamma/beta
    face = next(f for f in data["faces"] if f["axis"] == 1 and f["side"] == "hi")
    assert face["kind"] == "open"
    face["kind"] = "no-outflow"


def unknown_version(data):
    data["version"] = 99


def drop_key(data):
    del data["cells"]["step_E"]


def truncate_array(data):
    # the tube boxes hold one step fewer than their stated shape
    E = _cells(data, "step_E")
    _put(data, "step_E", E[:-1])
    data["cells"]["step_E"]["shape"] = list(E.shape)


def truncate_compressed_data(data):
    text = data["cells"]["step_h"]["data"]
    data["cells"]["step_h"]["data"] = text[:len(text) // 8 * 4]


def successor_offset_out_of_range(data):
    start = _cells(data, "successor_start")
    start[len(start) // 2] = start[-1] + 1
    _put(data, "successor_start", start, "<i8")


def step_count_mismatch(data):
    # one step dropped from the step arrays; the offsets still count it
    steps = _cells(data, "step_start")
    assert steps[-1] > 0
    for key in ("step_h", "step_E"):
        _put(data, key, _cells(data, key)[:-1])


MUTATIONS = [
    ("logistic", relabel_undecided_safe, {1}),
    ("logistic", relabel_doomed_safe, {1}),
    ("logistic", relabel_safe_doomed, {1}),
    ("logistic", shrink_apriori_box, {1}),
    ("logistic", enlarge_step, {1}),
    ("logistic", remove_successors_of_a_safe_cell, {1}),
    ("logistic", delete_cell, {1}),
    ("fermenter", overlap_cells, {1}),
    ("logistic", change_model_coefficient, {1}),
    ("logistic", widen_parameter, {1}),
    ("decay", lower_crossing_bound, {1}),
    ("logistic", rank_equal_to_successor, {1}),
    ("logistic", raise_survival_bound, {1}),
    ("fermenter", claim_limit_face, {1}),
    ("sir", claim_invariant_face, {1}),
    ("sir", claim_no_outflow_face, {1}),
    ("sir", remove_successors_of_a_safe_cell, {1}),
    ("logistic", unknown_version, {2}),
    ("logistic", drop_key, {2}),
    ("logistic", truncate_array, {2}),
    ("logistic", truncate_compressed_data, {2}),
    ("logistic", successor_offset_out_of_range, {2}),
    ("logistic", step_count_mismatch, {2}),
]


@pytest.mark.parametrize("name, mutate, codes", MUTATIONS,
                         ids=[m.__name__ for _, m, _ in MUTATIONS])
def test_tampered_certificates_are_rejected(certs, tmp_path, capsys, name, mutate, codes):
    data = _load(certs[name])
    mutate(data)
    code, out = _check(_save(data, tmp_path / "tampered.json.gz"), capsys)
    assert code in codes, out.out + out.err
    if code == 1:
        assert out.out.startswith("INVALID: ")
    else:
        assert out.err.startswith("certify: error: ") and len(out.err.splitlines()) == 1


def test_failures_name_cells_and_reasons(certs, tmp_path):
    data = _load(certs["logistic"])
    relabel_safe_doomed(data)
    result = check_certificate(_save(data, tmp_path / "t.json.gz"), jobs=1)
    assert not result.valid and result.status == 1
    c = _first(data["cells"]["label"], "doomed", lambda c: _cells(data, "rank")[c] == 1
               and _cells(data, "crossing_upper")[c] == 1000.0)
    failure = next(f for f in result.failures if f["cell"] == c)
    assert failure["label"] == "doomed" and "successor" in failure["reason"]
    assert failure["address"] == [int(_cells(data, "depth")[c]),
                                  [int(v) for v in _cells(data, "index")[c]]]
    # the safe cells flowing into it fail too: their successor is no longer safe
    assert all(f["label"] in ("doomed", "safe") for f in result.failures)


# -- random damage -----------------------------------------------------------------------
def _claims(path):
    """What a certificate claims about the model (evidence such as steps excluded)."""
    data = _load(path)
    cells = data["cells"]
    return {"model": data["model"]["text"], "states": data["states"],
            "parameters": data["parameters"], "window": data["window"],
            "labels": cells["label"], "depth": _cells(data, "depth").tolist(),
            "index": _cells(data, "index").tolist(),
            "crossing_upper": _cells(data, "crossing_upper"),
            "survival_lower": _cells(data, "survival_lower")}


def _same_or_weaker(before, after):
    for key in ("model", "states", "parameters", "window", "labels", "depth", "index"):
        assert after[key] == before[key], key
    assert np.all(after["crossing_upper"] >= before["crossing_upper"])
    assert np.all(after["survival_lower"] <= before["survival_lower"])


def test_random_byte_flips_never_crash(certs, tmp_path, capsys):
    raw = certs["logistic"].read_bytes()
    before = _claims(certs["logistic"])
    rng = random.Random(20261201)
    for trial in range(30):
        damaged = bytearray(raw)
        position = rng.randrange(len(damaged))
        damaged[position] ^= 1 << rng.randrange(8)
        path = tmp_path / f"flip{trial}.json.gz"
        path.write_bytes(bytes(damaged))
        code, out = _check(path, capsys)
        assert code in (0, 1, 2), (position, out)
        if code == 0:
            _same_or_weaker(before, _claims(path))


def test_random_flips_inside_the_json_never_crash(certs, tmp_path, capsys):
    text = gzip.decompress(certs["logistic"].read_bytes())
    before = _claims(certs["logistic"])
    rng = random.Random(1954)
    for trial in range(30):
        damaged = bytearray(text)
        position = rng.randrange(len(damaged))
        damaged[position] ^= 1 << rng.randrange(7)
        path = tmp_path / f"jflip{trial}.json.gz"
        path.write_bytes(gzip.compress(bytes(damaged)))
        code, out = _check(path, capsys)
        assert code in (0, 1, 2), (position, out)
        if code == 0:
            _same_or_weaker(before, _claims(path))


# -- malformed input ---------------------------------------------------------------------
def test_missing_file_and_non_gzip_are_malformed(tmp_path, capsys):
    code, out = _check(tmp_path / "none.json.gz", capsys)
    assert code == 2 and "no such file" in out.err
    path = tmp_path / "plain.json.gz"
    path.write_text("not gzip")
    code, out = _check(path, capsys)
    assert code == 2 and str(path) in out.err


def test_malformed_key_is_named(certs, tmp_path, capsys):
    data = _load(certs["logistic"])
    data["cells"]["step_h"]["shape"] = [3]
    code, out = _check(_save(data, tmp_path / "m.json.gz"), capsys)
    assert code == 2 and "cells.step_h" in out.err


# -- regression against a revised model --------------------------------------------------
def test_revised_model_reports_claims(certs, tmp_path, capsys):
    same = tmp_path / "same.toml"
    same.write_text(LOGISTIC)
    code, out = _check(certs["logistic"], capsys, "--model", str(same))
    assert code == 0, out.out
    heavier = tmp_path / "heavier.toml"
    heavier.write_text(LOGISTIC.replace("q = 0.16", "q = 0.2"))
    code = main(["check", str(certs["logistic"]), "--jobs", "1", "--json",
                 "--model", str(heavier)])
    report = json.loads(capsys.readouterr().out)
    # with q = 0.2 the lower equilibrium moves up to (1 - sqrt(0.2)) / 2 = 0.276 (Schaefer
    # (mem)): stocks below it decline, so safe claims reaching below it cannot hold
    assert code == 1 and not report["valid"]
    assert report["claims"]["failed"]["safe"] > 0
    assert report["claims"]["held"]["safe"] + report["claims"]["failed"]["safe"] == \
        _load(certs["logistic"])["cells"]["label"].count("safe")


ROOT_RATE = """
[model]
name = "growth with a square-root rate"
[states]
x = [0, 1]
y = [0, 1]
[equations]
x = "x*sqrt(y)"
y = "-y"
[constraints]
cap = "x <= 2"
"""


def test_invariant_face_needs_the_identity_and_a_lipschitz_slab():
    # By inspection: S' = -beta S I is 0 on S = 0, I' = (beta S - gamma) I on I = 0, and
    # the SIR field is polynomial; x' = x sqrt(y) is 0 on x = 0 but its derivative
    # x / (2 sqrt(y)) is unbounded near y = 0, so uniqueness is not available there.
    from certify.model import parse_model
    from certify.check._cells import CheckContext
    from certify.check._faces import confirm_face
    from certify.check._programs import derive_programs

    def context(model):
        return CheckContext(programs=derive_programs(model, 2),
                            params=tuple((p.lo, p.hi) for p in model.parameters),
                            window=model.window, open_faces=(), grid_depth=0)

    sir = context(load_model(SIR))
    assert confirm_face(sir, 0, "lo", "invariant") and confirm_face(sir, 1, "lo", "invariant")
    assert not confirm_face(sir, 0, "hi", "invariant")
    assert not confirm_face(sir, 1, "hi", "invariant")
    root = context(parse_model(ROOT_RATE))
    assert not confirm_face(root, 0, "lo", "invariant")
    assert not confirm_face(root, 1, "lo", "invariant")


def test_revised_model_needs_the_same_states(certs, tmp_path, capsys):
    other = tmp_path / "other.toml"
    other.write_text(LOGISTIC.replace("x = {", "y = {").replace('x = "x*(1 - x) - q"',
                                                                'y = "y*(1 - y) - q"')
                     .replace('"x >= 0.1"', '"y >= 0.1"').replace('"x <= 1.2"', '"y <= 1.2"'))
    code, out = _check(certs["logistic"], capsys, "--model", str(other))
    assert code == 2 and "states" in out.err


def test_demo_ends_with_its_own_check(tmp_path, capsys):
    assert main(["demo", "--max-depth", "3", "--out", str(tmp_path), "--quiet"]) == 0
    assert "independent check: VALID" in capsys.readouterr().out


# -- the arithmetic ----------------------------------------------------------------------
def _fraction(x):
    m, e = x.man_exp()
    return Fraction(int(m)) * Fraction(2) ** int(e)


def test_endpoint_arithmetic_is_the_tightest_double_enclosure():
    # reference: exact rational arithmetic (fractions.Fraction)
    rng = np.random.default_rng(5)
    a_lo = rng.uniform(-3, 3, 200)
    a_hi = a_lo + rng.uniform(0, 2, 200)
    b_lo = rng.uniform(0.5, 3, 200)
    b_hi = b_lo + rng.uniform(0, 2, 200)
    ar = EndpointArith()
    ar.enter()
    a, b = ar.box(a_lo, a_hi), ar.box(b_lo, b_hi)
    for op, exact in (("mul", lambda x, y: x * y), ("div", lambda x, y: x / y),
                      ("add", lambda x, y: x + y), ("sub", lambda x, y: x - y)):
        lo, hi = getattr(ar, op)(a, b)
        for j in range(200):
            if op == "sub":
                corners = [Fraction(a_lo[j]) - Fraction(b_hi[j]),
                           Fraction(a_hi[j]) - Fraction(b_lo[j])]
            else:
                corners = [exact(Fraction(x), Fraction(y))
                           for x in (a_lo[j], a_hi[j]) for y in (b_lo[j], b_hi[j])]
            low, high = min(corners), max(corners)
            lo_f, hi_f = float(_fraction(lo[j])), float(_fraction(hi[j]))
            assert Fraction(lo_f) == _fraction(lo[j]) and Fraction(hi_f) == _fraction(hi[j])
            assert Fraction(lo_f) <= low and high <= Fraction(hi_f)
            assert Fraction(np.nextafter(lo_f, np.inf)) > low
            assert Fraction(np.nextafter(hi_f, -np.inf)) < high


def test_ball_and_endpoint_arithmetic_enclose_elementary_functions():
    # reference: python-flint arb at 200 bits on the exact interval ends
    xs = np.linspace(-2.5, 2.5, 41)
    for ar in (BallArith(), EndpointArith()):
        ar.enter()
        box = ar.box(xs, xs + 0.25)
        for name in ("exp", "sin", "cos", "atan", "tanh", "sinh", "cosh"):
            value = ar.function(name, box)
            lo, hi = ar.lower(value), ar.upper(value)
            for j, x in enumerate(xs):
                ctx.prec = 200
                for t in (x, x + 0.125, x + 0.25):
                    exact = getattr(arb(t), name)()
                    assert lo[j] <= exact.lower() and exact.upper() <= hi[j]
                ar.enter()


def test_grid_bounds_name_exactly_the_grid_cells_a_box_needs():
    # the definition in docs/certificate-format.md, in exact rational arithmetic: along a
    # thick axis a grid cell is needed when it overlaps the open range, along a flat axis
    # when it holds the point; windows with sides that are not floats
    from certify.check._cells import grid_bounds

    rng = np.random.default_rng(5)
    window = ((Fraction(-3, 10), Fraction(7, 3)), (Fraction(1, 7), Fraction(5, 3)))
    depth = 5
    scale = 1 << depth
    for _ in range(400):
        lo, hi = [], []
        for a, b in window:
            grid = a + (b - a) * Fraction(int(rng.integers(0, scale + 1)), scale)
            x = grid if rng.random() < 0.4 else a + (b - a) * Fraction(rng.random())
            y = x if rng.random() < 0.3 else min(b, x + (b - a) * Fraction(rng.random() / 4))
            lo.append(x)
            hi.append(y)
        first, last = grid_bounds(window, depth, lo, hi)
        for k, (a, b) in enumerate(window):
            u_lo, u_hi = (lo[k] - a) / (b - a) * scale, (hi[k] - a) / (b - a) * scale
            for j in range(-1, scale + 1):
                needed = (j + 1 > u_lo and j < u_hi) if lo[k] < hi[k] else j <= u_lo <= j + 1
                assert needed == (first[k] <= j + 1 and j <= last[k]), (k, j, lo, hi)
