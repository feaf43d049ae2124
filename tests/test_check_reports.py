"""What ``certify check`` reports beyond the cells: parameters proven for other boxes than
the model file states, and the verdict of a claim, re-derived from the certificate.

References:
- The model files themselves, read with the standard library's ``tomllib`` (not with
  certify's reader): the parameter boxes they state.
- R1, exponential decay x' = -x/2 with the floor x >= 0.5: the exact crossing time from
  x0 is 2 ln(2 x0) (closed form of x0 exp(-t/2) = 0.5).
- R5, SIR with the cap I <= 0.1: S + I - rho ln S is conserved (Kermack & McKendrick,
  Proc. R. Soc. A 115 (1927) 700), so the peak of I from (S0, I0) with S0 > rho is
  S0 + I0 - rho (1 + ln(S0 / rho)) (Hethcote, SIAM Rev. 42 (2000) 599 (mem)); rho = 0.5.
"""

import copy
import json
import math
import tomllib
from fractions import Fraction
from pathlib import Path

import pytest

from certify.check import check_certificate
from certify.cli import main
from certify.container import (decode_array, encode_array, load_certificate_json,
                               write_certificate)

ROOT = Path(__file__).resolve().parent.parent
DATA = ROOT / "tests" / "data"
FISH = ROOT / "models" / "fish_quota_uncertain.toml"
SIR = DATA / "prove_sir_cap.toml"
DECAY = DATA / "prove_decay.toml"
RHO = 0.5


def decay_crossing(x0):
    """R1: exact time at which x' = -x/2 reaches 0.5."""
    return 2 * math.log(2 * x0)


def sir_peak(S0, I0):
    """R5: exact peak of I (Kermack & McKendrick 1927; Hethcote 2000 (mem))."""
    return I0 if S0 <= RHO else S0 + I0 - RHO * (1 + math.log(S0 / RHO))


def stated(path, name):
    """The box a model file states for a parameter, read with tomllib."""
    entry = tomllib.loads(Path(path).read_text())["parameters"][name]
    if isinstance(entry, dict):
        entry = entry.get("range", entry.get("value"))
    lo, hi = (entry, entry) if not isinstance(entry, list) else entry
    return Fraction(str(lo)), Fraction(str(hi))


def text(q):
    q = Fraction(q)
    return str(q.numerator) if q.denominator == 1 else f"{q.numerator}/{q.denominator}"


def check_json(path, capsys, *extra):
    code = main(["check", str(path), "--jobs", "1", "--json", *extra])
    return code, json.loads(capsys.readouterr().out)


def check_console(path, capsys, *extra):
    code = main(["check", str(path), "--jobs", "1", "--quiet", *extra])
    return code, capsys.readouterr().out


# -- parameters proven for other boxes than the file's ----------------------------------

def test_a_param_override_is_reported_by_prove_and_check(tmp_path, capsys):
    lo, hi = stated(FISH, "C")
    assert (lo, hi) == (70, 90)             # the file states an interval for C
    out = tmp_path / "fish"
    assert main(["prove", str(FISH), "--param", "C=70", "--max-depth", "6", "--out", str(out),
                 "--quiet"]) == 0
    expected = [{"name": "C", "proven": ["70", "70"], "model": [text(lo), text(hi)]}]
    summary = json.loads((out / "summary.json").read_text())
    assert summary["parameters_narrowed"] == expected
    code, report = check_json(out / "certificate.json.gz", capsys)
    assert code == 0 and report["valid"] is True
    assert report["parameters_narrowed"] == expected
    code, console = check_console(out / "certificate.json.gz", capsys)
    assert code == 0
    assert "proven only for C = 70 (file: [70, 90])" in console
    # the prove table says it too
    assert main(["prove", str(FISH), "--param", "C=70", "--max-depth", "4",
                 "--out", str(tmp_path / "fish2")]) == 0
    assert "proven only for C = 70 (file: [70, 90])" in capsys.readouterr().out


def test_no_override_or_the_same_box_reports_nothing(tmp_path, capsys):
    lo, _ = stated(SIR, "beta")
    for name, extra in (("plain", []), ("same", ["--param", f"beta={lo}"])):
        out = tmp_path / name
        assert main(["prove", str(SIR), "--max-depth", "3", "--out", str(out), "--quiet",
                     *extra]) == 0
        assert json.loads((out / "summary.json").read_text())["parameters_narrowed"] == []
        code, report = check_json(out / "certificate.json.gz", capsys)
        assert code == 0 and report["parameters_narrowed"] == []


def test_the_map_title_names_the_override(tmp_path):
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from certify.model import load_model
    from certify.plots import plot_map
    from certify.prove import prove

    lo, hi = stated(SIR, "beta")
    assert lo == hi == 2
    model = load_model(SIR).with_parameters({"beta": ("2", "21/10")})
    proof = prove(model, max_depth=3)
    ax = plot_map(proof)
    assert ax.get_title().endswith("proven only for beta = [2, 21/10] (file: 2)")
    plt.close("all")
    plain = plot_map(prove(load_model(SIR), max_depth=3))
    assert "proven only" not in plain.get_title()
    plt.close("all")


def test_check_against_a_file_names_the_boxes_the_certificate_was_proven_for(tmp_path,
                                                                               capsys):
    out = tmp_path / "fish"
    assert main(["prove", str(FISH), "--param", "C=90", "--max-depth", "5", "--out", str(out),
                 "--quiet"]) == 0
    _, report = check_json(out / "certificate.json.gz", capsys, "--model", str(FISH))
    assert report["parameters_narrowed"] == [{"name": "C", "proven": ["90", "90"],
                                              "model": ["70", "90"]}]
    _, console = check_console(out / "certificate.json.gz", capsys, "--model", str(FISH))
    assert "the certificate was proven for C = 90 (file: [70, 90])" in console


# -- claim verdicts re-derived -----------------------------------------------------------

def claim(tmp_path, capsys, model, region, expect, until=None, depth=8):
    argv = ["claim", str(model), "--region", region, "--expect", expect,
            "--max-depth", str(depth), "--out", str(tmp_path / "claim"), "--json"]
    if until is not None:
        argv += ["--until", until]
    main(argv)
    out = json.loads(capsys.readouterr().out)
    return out, Path(out["certificate"])


def edited(path, tmp_path, edit, name="edited.json.gz"):
    data = load_certificate_json(path)
    edit(data)
    target = tmp_path / name
    write_certificate(target, data)
    return target


@pytest.fixture(scope="module")
def refuted_by_a_cell(tmp_path_factory):
    """decay, stays until 3.8 on x in [2, 3]: refuted (R1: 2 ln 6 = 3.58 < 3.8)."""
    tmp = tmp_path_factory.mktemp("refuted")
    main(["claim", str(DECAY), "--region", "x=2:3", "--expect", "stays", "--until", "3.8",
          "--max-depth", "8", "--out", str(tmp), "--json"])
    return tmp / "certificate.json.gz"


def test_a_refuted_claim_is_re_derived(refuted_by_a_cell, capsys):
    record = load_certificate_json(refuted_by_a_cell)["claim"]
    c = record["counterexample"]
    (x0,) = c["point"]
    lo, hi = c["crossing_time"]
    assert record["verdict"] == "refuted" and 2 <= x0 <= 3
    assert lo <= decay_crossing(x0) <= hi <= 3.8                    # R1
    assert "flow" in c            # the limit was named by the point's own flow
    code, console = check_console(refuted_by_a_cell, capsys)
    assert code == 0
    assert "claim: refuted: re-derived" in console
    code, report = check_json(refuted_by_a_cell, capsys)
    assert {k: report["claim"][k] for k in ("stored", "derived", "follows", "problems")} \
        == {"stored": "refuted", "derived": "refuted", "follows": True, "problems": []}


@pytest.mark.parametrize("edit, problem", [
    (lambda d: d["claim"].update(verdict="proven"), "proven does not follow"),
    # R1: the point crosses after 2 ln(2 x0) > 2.77, so it does not refute "stays until 2.5"
    (lambda d: d["claim"].update(until="2.5"), "does not break the claim"),
    (lambda d: d["claim"]["counterexample"]["crossing_time"].__setitem__(1, 1.0),
     "upper bound 1.0 is not proven"),
    (lambda d: d["claim"]["counterexample"]["crossing_time"].__setitem__(0, 2.9),
     "lower bound 2.9 is not proven"),
    (lambda d: d["claim"]["counterexample"].update(limit="ceiling"),
     "does not verify a crossing of ceiling"),
    (lambda d: d["claim"]["counterexample"].update(point=[3.0]),
     "does not verify a crossing of floor"),
])
def test_an_edited_claim_record_is_rejected(refuted_by_a_cell, tmp_path, capsys, edit,
                                            problem):
    path = edited(refuted_by_a_cell, tmp_path, edit)
    result = check_certificate(path, jobs=1)
    assert not result.valid and result.status == 1
    assert any(problem in p for p in result.claim.problems), result.claim.problems
    code, console = check_console(path, capsys)
    assert code == 1 and "claim: " in console and "does not follow" in console


def test_proven_and_inconclusive_verdicts_are_re_derived(tmp_path, capsys):
    # R1: every start in [2, 3] stays above 0.5 up to 2 ln 4 = 2.77 > 2.5
    assert decay_crossing(2) > 2.7
    out, path = claim(tmp_path / "p", capsys, DECAY, "x=2:3", "stays", "2.5")
    assert out["verdict"] == "proven"
    code, console = check_console(path, capsys)
    assert code == 0 and "claim: proven: re-derived" in console
    # edited to refuted (without a counterexample) it is rejected
    bad = edited(path, tmp_path, lambda d: d["claim"].update(verdict="refuted"))
    assert check_certificate(bad, jobs=1).valid is False
    # a stored inconclusive where proven follows is weaker: reported, not rejected
    weaker = edited(path, tmp_path, lambda d: d["claim"].update(
        verdict="inconclusive", undecided_volume=1.0), "weaker.json.gz")
    result = check_certificate(weaker, jobs=1)
    assert result.valid and result.claim.derived == "proven"
    assert "proven follows" in result.claim.summary()
    # stays until 2.7 is true (R1) but not proven at depth 3: inconclusive, re-derived
    out, path = claim(tmp_path / "i", capsys, DECAY, "x=2:3", "stays", "2.7", depth=3)
    assert out["verdict"] == "inconclusive" and out["undecided_volume"] > 0
    code, report = check_json(path, capsys)
    assert code == 0
    assert report["claim"]["derived"] == "inconclusive"
    assert report["claim"]["undecided_volume"] == out["undecided_volume"]
    # an undecided volume edited below the unsettled one is rejected
    smaller = edited(path, tmp_path, lambda d: d["claim"].update(undecided_volume=0.0),
                     "smaller.json.gz")
    assert check_certificate(smaller, jobs=1).valid is False


def test_a_doomed_claim_refuted_by_a_surviving_start_is_re_derived(tmp_path, capsys):
    # R1: starts above x = 2 stay above the floor past t = 2 ln 4 > 2.5
    out, path = claim(tmp_path, capsys, DECAY, "x=2:3", "doomed", "2.5")
    assert out["verdict"] == "refuted"
    (x0,) = out["counterexample"]["point"]
    assert decay_crossing(x0) > 2.5
    code, console = check_console(path, capsys)
    assert code == 0 and "claim: refuted: re-derived" in console
    # a survival bound beyond what the cells prove is rejected
    bad = edited(path, tmp_path, lambda d: d["claim"]["counterexample"].update(
        crossing_time=[None, None]))
    assert check_certificate(bad, jobs=1).valid is False


@pytest.fixture(scope="module")
def refuted_by_a_flow(tmp_path_factory):
    """SIR, safe on S in [0.6, 0.9], I in [0, 0.001]: the map settles nothing near I = 0,
    the point's own flow enclosure proves a crossing."""
    tmp = tmp_path_factory.mktemp("flow")
    main(["claim", str(SIR), "--region", "S=0.6:0.9, I=0:0.001", "--expect", "safe",
          "--max-depth", "4", "--out", str(tmp), "--json"])
    return tmp / "certificate.json.gz"


def test_a_counterexample_resting_on_its_own_flow_is_re_derived(refuted_by_a_flow, capsys):
    record = load_certificate_json(refuted_by_a_flow)["claim"]
    c = record["counterexample"]
    assert record["verdict"] == "refuted" and c["reason"].startswith("its own flow")
    assert sir_peak(*c["point"]) > 0.1                                  # R5
    code, console = check_console(refuted_by_a_flow, capsys)
    assert code == 0 and "claim: refuted: re-derived" in console


def _flow_edit(key, change):
    def edit(data):
        flow = data["claim"]["counterexample"]["flow"]
        a = decode_array(flow[key])
        change(a)
        flow[key] = encode_array(a)
    return edit


def _steps_shorter(h):
    # every step halved: the tubes still hold for the shorter steps, but the flow ends
    # at half the time, before the crossing (which the checker may prove at any step end,
    # not only the last, as its balls can be tighter than the prover's intervals)
    h /= 2


def _first_box_smaller(E):
    mid = E[0, :, :].mean(axis=1)
    E[0, :, 0], E[0, :, 1] = mid, mid


@pytest.mark.parametrize("edit", [
    # a point of the region whose peak stays below the cap (R5), off the stored box
    lambda d: d["claim"]["counterexample"].update(point=[0.7, 0.0005]),
    _flow_edit("step_h", _steps_shorter),
    _flow_edit("step_E", _first_box_smaller),
    _flow_edit("box", lambda b: b.__iadd__(0.05)),
], ids=["point moved", "step shortened", "a-priori box shrunk", "box moved"])
def test_a_forged_point_flow_is_rejected(refuted_by_a_flow, tmp_path, capsys, edit):
    assert sir_peak(0.7, 0.0005) < 0.1                                  # R5
    path = edited(refuted_by_a_flow, tmp_path, edit)
    result = check_certificate(path, jobs=1)
    assert not result.valid
    assert result.claim.derived != "refuted"
    assert any("flow of the point" in p for p in result.claim.problems)
    code, console = check_console(path, capsys)
    assert code == 1 and "claim: refuted: does not follow" in console


def test_a_malformed_claim_record_names_the_key(refuted_by_a_flow, tmp_path, capsys):
    path = edited(refuted_by_a_flow, tmp_path, lambda d: d["claim"].update(verdict="maybe"))
    code = main(["check", str(path), "--jobs", "1", "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and "claim.verdict" in err and "Traceback" not in err


def test_the_flow_is_stored_in_the_certificate_not_in_claim_json(refuted_by_a_flow):
    flow = load_certificate_json(refuted_by_a_flow)["claim"]["counterexample"]["flow"]
    h = decode_array(flow["step_h"])
    claim_json = json.loads((refuted_by_a_flow.parent / "claim.json").read_text())
    assert "flow" not in claim_json["counterexample"]
    # the stored steps reach the reported crossing bound (rounded up by the prover)
    assert 0 < math.fsum(h) <= claim_json["counterexample"]["crossing_time"][1]
