"""Tests of ``certify diff`` on the demo fermenter and a revision with a higher dilution rate.

References:
- Window volume: the demo window is [0, 12] x [0, 10] (models/fermenter.toml), 120 in
  state units.
- Washout (exact): with the Andrews rate mu(s) = mu_max s / (Ks + s + s^2/Ki) and
  Ks + s + s^2/Ki >= s (1 + 2 sqrt(Ks/Ki)) (AM-GM), mu <= mu_max / (1 + 2 sqrt(Ks/Ki))
  = 0.5 / 2 = 0.25 for the demo numbers. With D = 0.3, x' = (mu - D) x <= -0.05 x, so
  every start with x0 <= 9 falls below the floor x >= 1 (chemostat washout when D exceeds
  the largest growth rate; Smith & Waltman 1995 (mem)). The revised model has no safe start.
- Soundness (docs/design.md, section 5): labels are theorems, so two maps of one model never
  call the same start safe in one and doomed in the other.
"""

import json
import shutil
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest

from certify.cli import main
from certify.diff import LABELS, _common_refinement, diff_certificates
from certify.model import load_model, parse_model
from certify.prove import prove, write_proof

FERMENTER = Path(__file__).resolve().parent.parent / "models" / "fermenter.toml"
WINDOW_VOLUME = 12 * 10
SAFE, DOOMED, OUTSIDE, UNDECIDED = range(4)


def _prove_to(model, depth, folder):
    write_proof(prove(model, max_depth=depth, time_limit=1e9), folder, figures=False)
    return folder


@pytest.fixture(scope="module")
def certs(tmp_path_factory):
    root = tmp_path_factory.mktemp("diff")
    text = FERMENTER.read_text()
    assert "\nD = 0.2\n" in text
    revised = root / "fermenter_fast.toml"
    revised.write_text(text.replace("\nD = 0.2\n", "\nD = 0.3\n"))
    copy = root / "fermenter_copy.toml"
    shutil.copy(FERMENTER, copy)
    return {
        # depth 8 is where the demo map first proves safe starts
        "old": _prove_to(load_model(FERMENTER), 8, root / "old"),
        "new": _prove_to(load_model(revised), 7, root / "new"),
        "coarse": _prove_to(load_model(FERMENTER), 5, root / "coarse"),
        "copy": _prove_to(load_model(copy), 5, root / "copy"),
        "root": root,
    }


@pytest.fixture(scope="module")
def old_new(certs):
    return diff_certificates(certs["old"], certs["new"])


def _summary_fractions(folder):
    return json.loads((folder / "summary.json").read_text())["fractions"]


def test_volume_table_sums_to_the_window_volume(certs, old_new):
    result = old_new
    assert result.window_volume == WINDOW_VOLUME
    assert abs(result.table.sum() - WINDOW_VOLUME) <= 1e-12 * WINDOW_VOLUME
    assert result.exact          # the demo limits bound single states by numbers
    # rows add up to OLD's own label volumes, columns to NEW's (the prover's summary)
    old, new = _summary_fractions(certs["old"]), _summary_fractions(certs["new"])
    for i, label in enumerate(LABELS):
        assert result.table[i].sum() == pytest.approx(old[label] * WINDOW_VOLUME, rel=1e-9,
                                                      abs=1e-9)
        assert result.table[:, i].sum() == pytest.approx(new[label] * WINDOW_VOLUME,
                                                         rel=1e-9, abs=1e-9)


def test_higher_dilution_rate_loses_every_safe_start(certs, old_new, capsys):
    result = old_new
    t = result.table
    assert t[SAFE].sum() > 0                  # the demo proves its operating point safe
    assert np.all(t[:, SAFE] == 0)            # washout: nothing is safe with D = 0.3
    assert t[SAFE, SAFE] == 0 and t[SAFE, OUTSIDE] == 0   # same limits: outside unchanged
    assert result.proven_loss == pytest.approx(t[SAFE, DOOMED], abs=0)
    assert result.unproven_loss == t[SAFE, UNDECIDED]
    assert result.proven_loss + result.unproven_loss == pytest.approx(t[SAFE].sum())
    code = main(["diff", str(certs["old"]), str(certs["new"]), "--fail-on", "safe-loss",
                 "--json", "--out", str(certs["root"] / "out")])
    out = json.loads(capsys.readouterr().out)
    assert code == (1 if t[SAFE, DOOMED] + t[SAFE, OUTSIDE] > 0 else 0)
    assert out["failed"] is (code == 1)
    assert out["proven_loss_volume"] == result.proven_loss
    assert out["unproven_loss_volume"] == result.unproven_loss
    # the listed loss boxes, cut to the demo limits (s <= 9, 1 <= x <= 9), add up to the
    # loss volumes
    for key, volume in (("proven_loss_boxes", result.proven_loss),
                        ("unproven_loss_boxes", result.unproven_loss)):
        boxes = np.array(out[key]).reshape(-1, 2, 2)
        s_hi = np.minimum(boxes[:, 0, 1], 9)
        x_lo, x_hi = np.maximum(boxes[:, 1, 0], 1), np.minimum(boxes[:, 1, 1], 9)
        inside = np.clip(s_hi - boxes[:, 0, 0], 0, None) * np.clip(x_hi - x_lo, 0, None)
        assert inside.sum() == pytest.approx(volume, rel=1e-9, abs=1e-12)
    assert Path(out["plot"]).stat().st_size > 0
    assert json.loads((certs["root"] / "out" / "diff.json").read_text())["table"] == t.tolist()
    assert result.fails("any-change")


def test_text_report_of_a_revision(certs, capsys):
    code = main(["diff", str(certs["coarse"]), str(certs["new"]), "--fail-on", "any-change",
                 "--out", str(certs["root"] / "text")])
    text = capsys.readouterr().out
    assert code == 1 and "FAILED --fail-on any-change" in text
    assert "parameter D: 0.2 -> 0.3" in text
    assert "unproven loss (safe -> undecided)" in text


def test_model_differences_name_the_edited_parameter(old_new):
    result = old_new
    assert result.model_changes == [{"kind": "parameter", "name": "D", "old": "0.2",
                                     "new": "0.3"}]


def test_identical_revision_reports_no_change(certs, capsys):
    result = diff_certificates(certs["coarse"], certs["copy"])
    assert result.changed_volume == 0
    assert np.count_nonzero(result.table - np.diag(np.diag(result.table))) == 0
    assert result.model_changes == []
    for fail_on in ("safe-loss", "any-change"):
        code = main(["diff", str(certs["coarse"]), str(certs["copy"]), "--fail-on", fail_on,
                     "--out", str(certs["root"] / "same")])
        text = capsys.readouterr().out
        assert code == 0 and f"PASSED --fail-on {fail_on}" in text


def test_maps_of_one_model_at_two_depths_never_contradict(certs):
    result = diff_certificates(certs["coarse"], certs["old"])
    assert result.volume("safe", "doomed") == 0 and result.volume("doomed", "safe") == 0
    assert result.model_changes == []
    assert abs(result.table.sum() - WINDOW_VOLUME) <= 1e-12 * WINDOW_VOLUME


def test_common_refinement_takes_the_deeper_cell_of_each_pair():
    # window [0, 1]: OLD = [0, 1/2] (depth 1), [1/2, 3/4], [3/4, 1] (depth 2);
    # NEW = [0, 1/4], [1/4, 1/2] (depth 2), [1/2, 1] (depth 1)
    old = (np.array([1, 2, 2]), np.array([[0], [2], [3]]))
    new = (np.array([2, 2, 1]), np.array([[0], [1], [1]]))
    pieces = sorted((o, n, d, int(i[0])) for o, n, d, i in _common_refinement(old, new))
    assert pieces == [(0, 0, 2, 0), (0, 1, 2, 1), (1, 2, 2, 2), (2, 2, 2, 3)]
    # the pieces tile the window: volumes 4 x 1/4
    assert sum(Fraction(1, 2 ** d) for _, _, d, _ in pieces) == 1


# -- bad input ---------------------------------------------------------------------------

DECAY = """
[model]
name = "decay"
[states]
x = [1, 4]
[equations]
x = "-x/2"
[constraints]
floor = "x >= 0.5"
"""


@pytest.fixture(scope="module")
def other_certs(certs):
    root = certs["root"]
    narrow = parse_model(FERMENTER.read_text().replace("range = [0, 12]", "range = [0, 10]"))
    not_a_cert = root / "notes.txt"
    not_a_cert.write_text("not a certificate\n")
    return {"decay": _prove_to(parse_model(DECAY), 3, root / "decay"),
            "narrow": _prove_to(narrow, 3, root / "narrow"),
            "text": not_a_cert}


@pytest.mark.parametrize("other, message", [
    ("decay", "are about different states (s, x vs x)"),
    ("narrow", "have different windows for s ([0, 12] vs [0, 10])"),
    ("text", "text (a model file?); expected a certificate"),
    ("missing", "no such file"),
])
def test_bad_pairs_exit_2_with_one_line(certs, other_certs, capsys, other, message):
    path = other_certs.get(other, certs["root"] / "missing.json.gz")
    code = main(["diff", str(certs["coarse"]), str(path)])
    err = capsys.readouterr().err
    assert code == 2
    assert message in err
    assert "Traceback" not in err and err.count("\n") == 1


def test_unknown_fail_on_is_a_usage_error(certs, capsys):
    code = main(["diff", str(certs["coarse"]), str(certs["copy"]), "--fail-on", "safe_loss"])
    assert code == 2 and "invalid choice" in capsys.readouterr().err


def test_check_refuses_to_compare_a_forged_certificate(certs, tmp_path, capsys):
    # A doomed cell relabelled safe: it was proven to cross, so the claim is false
    # (labels are theorems, docs/design.md section 5). Without --check the forged map
    # passes the safe-loss gate; with it the checker rejects NEW and nothing is compared.
    from test_forgery import _claim_safe, _tampered

    def change(data):
        _claim_safe(data, data["cells"]["label"].index("doomed"))

    forged = _tampered(certs["coarse"] / "certificate.json.gz", tmp_path, change)
    gate = ["diff", str(certs["coarse"]), str(forged), "--fail-on", "safe-loss",
            "--out", str(tmp_path / "out")]
    assert main(gate) == 0
    capsys.readouterr()
    assert main(gate + ["--check", "--workers", "1"]) == 1
    out = capsys.readouterr().out
    assert f"VALID OLD: {certs['coarse']}" in out
    assert f"INVALID NEW: {forged}" in out and "not compared" in out
    assert main(gate + ["--check", "--workers", "1", "--json"]) == 1
    data = json.loads(capsys.readouterr().out)
    assert data["compared"] is False
    assert data["checked"]["OLD"]["valid"] and not data["checked"]["NEW"]["valid"]
    assert data["checked"]["NEW"]["failures"]


def test_check_passes_two_honest_certificates_through(certs, tmp_path, capsys):
    code = main(["diff", str(certs["coarse"]), str(certs["copy"]), "--check", "--workers", "1",
                 "--out", str(tmp_path)])
    out = capsys.readouterr().out
    assert code == 0
    assert out.count("VALID ") == 2 and "changed label" in out
