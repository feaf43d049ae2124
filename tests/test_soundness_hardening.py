"""Soundness hardening: a-priori boxes that touch their own sides, and the decision of
whether a normal component vanishes on a window face.

References named beside the checks:

* ``x' = sqrt(max(x - 1, 0))`` from ``x(0) = 1`` has the solution ``x = 1`` and also
  ``x(t) = 1 + t^2 / 4`` (differentiate: ``x' = t / 2 = sqrt(x - 1)``; the classic
  non-uniqueness example of a field that is continuous but not Lipschitz, common
  practice), which crosses ``x = 1.5`` at ``t = sqrt(2)``. So no start of ``[7/8, 1]``
  can be proven safe against the limit ``x <= 1.5``.
* ``sin(y)^2 + cos(y)^2 = 1`` (Pythagorean identity): the face ``x = 0`` of the model
  below does carry no normal flow, but only a non-rational rewrite shows it;
  ``(y^2 - 1) / (y + 1) = y - 1`` (polynomial division), a rational identity.
* SIR: ``S' = -beta S I`` is 0 on ``S = 0`` and ``I' = (beta S - gamma) I`` on ``I = 0``
  (Kermack & McKendrick 1927; by inspection).
* ``x' = -x`` and ``x' = -1`` reach ``x = 1/4`` from ``x0`` at ``ln(4 x0)`` and
  ``x0 - 1/4`` (closed forms).
"""

from pathlib import Path

import numpy as np
import pytest

from certify.certificate import certificate_data
from certify.cells import CellTree
from certify.check import check_certificate
from certify.check._cells import CheckContext
from certify.check._faces import confirm_face
from certify.check._programs import derive_programs
from certify.container import (decode_array, encode_array, load_certificate_json,
                               write_certificate)
from certify.evaluate import parameter_enclosures
from certify.faces import analyse_faces
from certify.model import load_model, parse_model
from certify.prove import prove
from certify.taylor import flow_programs

KINKED_ROOT = """\
[model]
name = "kinked square-root growth"
[states]
x = [0, 2]
[equations]
x = "sqrt(max(x - 1, 0))"
[constraints]
cap = "x <= 1.5"
"""

#: Window [0, 2] at depth 4: cells of width 1/8; [7/8, 1] is index 7.
DEPTH, CELL_INDEX = 4, 7

INTEGER_KEYS = ("step_start", "successor_start", "successors")

SIR = str(Path(__file__).resolve().parent / "data" / "prove_sir_cap.toml")

TRIG_FACE = """\
[model]
name = "logistic growth with a Pythagorean term"
[states]
x = [0, 1]
y = [0, 1]
[equations]
x = "x*(1 - x) + y*(sin(y)**2 + cos(y)**2 - 1)"
y = "-y"
[constraints]
cap = "x <= 2"
"""

RATIONAL_FACE = """\
[model]
name = "growth with a rational term"
[states]
x = [0, 1]
y = [0, 1]
[equations]
x = "x + (y**2 - 1)/(y + 1) - y + 1"
y = "-y"
[constraints]
cap = "x <= 2"
"""


@pytest.fixture(scope="module")
def kinked(tmp_path_factory):
    """The honest certificate of the kinked model and the index of the cell [7/8, 1]."""
    tmp = tmp_path_factory.mktemp("kinked")
    source = tmp / "kinked.toml"
    source.write_text(KINKED_ROOT)
    proof = prove(load_model(source), max_depth=DEPTH)
    path = tmp / "honest.json.gz"
    write_certificate(path, certificate_data(proof, {}))
    cells = load_certificate_json(path)["cells"]
    depth, index = decode_array(cells["depth"]), decode_array(cells["index"])
    found = np.flatnonzero((depth == DEPTH) & (index[:, 0] == CELL_INDEX))
    assert len(found) == 1
    return path, int(found[0])


def _forge(data, cell):
    """Give `cell` one step of h = 1/8 with E the cell itself, itself as its successor,
    and the label safe."""
    cells = data["cells"]
    start = decode_array(cells["step_start"])
    rows = np.r_[0:start[cell], start[cell + 1]:start[-1]]
    at = start[cell]
    new = {
        "step_h": np.insert(decode_array(cells["step_h"])[rows], at, 1 / 8),
        "step_E": np.insert(decode_array(cells["step_E"])[rows], at, [[[7 / 8, 1.0]]], 0),
    }
    if "step_m" in cells:      # version 2 stores the frames; version 3 leaves them to the checker
        new["step_m"] = np.insert(decode_array(cells["step_m"])[rows], at, [[15 / 16]], 0)
        new["step_A"] = np.insert(decode_array(cells["step_A"])[rows], at, [[[1.0]]], 0)
    counts = np.diff(start)
    counts[cell] = 1
    new["step_start"] = np.concatenate([[0], np.cumsum(counts)])
    succ_start, succ = decode_array(cells["successor_start"]), decode_array(cells["successors"])
    lists = [list(succ[succ_start[c]:succ_start[c + 1]]) for c in range(len(succ_start) - 1)]
    lists[cell] = [cell]
    new["successors"] = np.array([s for row in lists for s in row])
    new["successor_start"] = np.concatenate([[0], np.cumsum([len(row) for row in lists])])
    horizon = decode_array(cells["horizon"])
    horizon[cell] = 1 / 8
    new["horizon"] = horizon
    for key, value in new.items():
        cells[key] = encode_array(value, "<i8" if key in INTEGER_KEYS else "<f8")
    cells["label"][cell] = "safe"
    cells["image_known"][cell] = True
    return data


def test_honest_certificate_of_the_kinked_model_checks(kinked):
    path, cell = kinked
    result = check_certificate(path, jobs=1)
    assert result.valid, result.failures
    # no start of [7/8, 1] is safe: the solution 1 + t^2/4 from x = 1 crosses 1.5
    assert load_certificate_json(path)["cells"]["label"][cell] != "safe"


def test_forged_box_that_only_touches_its_sides_is_rejected(kinked, tmp_path):
    # f = 0 on E = [7/8, 1], so X + [0, h] f(E) = E: a non-strict inclusion, and the
    # model has a kink (max), so no Jacobian can supply uniqueness
    path, cell = kinked
    forged = tmp_path / "forged.json.gz"
    write_certificate(forged, _forge(load_certificate_json(path), cell))
    result = check_certificate(forged, jobs=1)
    assert not result.valid
    reasons = [f["reason"] for f in result.failures if f["cell"] == cell]
    assert reasons and "step 0 does not verify" in reasons[0]


def _prover_kinds(model):
    faces = analyse_faces(model, flow_programs(model, 2), CellTree(model.window),
                          parameter_enclosures(model))
    return {(f["axis"], f["side"]): f["kind"] for f in faces}


def _checker_confirms(model, axis, side):
    context = CheckContext(programs=derive_programs(model, 2),
                           params=tuple((p.lo, p.hi) for p in model.parameters),
                           window=model.window, open_faces=(), grid_depth=0)
    return confirm_face(context, axis, side, "invariant")


def test_a_zero_shown_only_by_a_trigonometric_rewrite_stays_open():
    # f_x on x = 0 is y (sin(y)^2 + cos(y)^2 - 1): 0 by the Pythagorean identity, but
    # neither a rational function nor a structural zero, so neither side decides it
    model = parse_model(TRIG_FACE)
    assert _prover_kinds(model)[(0, "lo")] == "open"
    assert not _checker_confirms(model, 0, "lo")
    # y' = -y vanishes on y = 0 structurally: still invariant on both sides
    assert _prover_kinds(model)[(1, "lo")] == "invariant"
    assert _checker_confirms(model, 1, "lo")


def test_a_rational_identity_is_decided():
    # f_x on x = 0 is (y^2 - 1)/(y + 1) - y + 1 = 0 (polynomial division)
    model = parse_model(RATIONAL_FACE)
    assert _prover_kinds(model)[(0, "lo")] == "invariant"
    assert _checker_confirms(model, 0, "lo")


def test_the_epidemic_rest_lines_stay_invariant():
    model = load_model(SIR)
    kinds = _prover_kinds(model)
    assert kinds[(0, "lo")] == "invariant" and kinds[(1, "lo")] == "invariant"
    assert _checker_confirms(model, 0, "lo") and _checker_confirms(model, 1, "lo")


STILL_STATE = """\
[model]
name = "decay beside a state at rest"
[states]
x = [0, 2]
y = [0, 1]
[equations]
x = "RATE"
y = "0"
[constraints]
floor = "x >= 0.25"
"""


def _touching_tube(tmp_path, rate):
    """Prove the model, then shrink the y side of one cell's first tube to the cell's
    own y range: y' = 0 reaches it exactly, so that inclusion is not strict."""
    tmp_path.mkdir()
    source = tmp_path / "still.toml"
    source.write_text(STILL_STATE.replace("RATE", rate))
    path = tmp_path / "still.json.gz"
    write_certificate(path, certificate_data(prove(load_model(source), max_depth=3), {}))
    assert check_certificate(path, jobs=1).valid
    data = load_certificate_json(path)
    cells = data["cells"]
    start = decode_array(cells["step_start"])
    cell = next(c for c in range(cells["count"])
                if start[c + 1] > start[c] and cells["label"][c] in ("safe", "doomed"))
    depth, index = decode_array(cells["depth"])[cell], decode_array(cells["index"])[cell]
    tube = decode_array(cells["step_E"])
    tube[start[cell], 1] = [index[1] / 2 ** depth, (index[1] + 1) / 2 ** depth]
    cells["step_E"] = encode_array(tube)
    write_certificate(path, data)
    return check_certificate(path, jobs=1), cell


def test_a_tube_touched_on_a_side_needs_a_finite_jacobian(tmp_path):
    # y' = 0 with x' = -x: Df = diag(-1, 0) is finite everywhere, so the touching side is
    # covered by uniqueness. With x' = min(-1, -x/10) (= -1 on the window, a kink) there
    # is no Jacobian: the strict inclusion is required and the same edit is rejected.
    # Both fields cross x = 0.25 from every start in x > 1/4 (closed forms x0 e^-t and
    # x0 - t), so the cells there are doomed and have steps to edit.
    smooth, _ = _touching_tube(tmp_path / "smooth", "-x")
    assert smooth.valid, smooth.failures
    kinked, cell = _touching_tube(tmp_path / "kinked", "min(-1, -x/10)")
    assert not kinked.valid
    assert [f["cell"] for f in kinked.failures] == [cell]
