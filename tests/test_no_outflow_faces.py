"""Window faces where the flow never points out (``no-outflow``), prover and checker.

References named beside the checks:

* a two-compartment model with first-order transfer (the textbook linear mammillary
  model, e.g. Gibaldi & Perrier, *Pharmacokinetics* (mem)) plus a saturable
  Michaelis-Menten elimination from the central compartment: on ``X1 = 0`` the central
  rate is ``k21 X2 >= 0`` and on ``X2 = 0`` the tissue rate is ``k12 X1 >= 0`` (by
  inspection), so both floors are ``no-outflow``;
* an SEI epidemic (Kermack-McKendrick form with a latent class, e.g. Keeling & Rohani,
  *Modeling Infectious Diseases* (mem)): ``S' = -beta S I <= 0`` wherever ``S, I >= 0``
  (by inspection), so no trajectory that stays in the window gains susceptibles;
* trajectories from sampled starts of proven cells, integrated with scipy ``solve_ivp``
  (LSODA, rtol 1e-10), must agree with the labels and the crossing-time bounds.
"""

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from certify.cells import CellTree
from certify.certificate import certificate_data, read_certificate, write_certificate
from certify.check import check_certificate
from certify.check._cells import CheckContext
from certify.check._faces import confirm_face
from certify.check._programs import derive_programs
from certify.evaluate import parameter_enclosures
from certify.faces import analyse_faces
from certify.model import parse_model
from certify.prove import prove
from certify.taylor import flow_programs

TWO_COMPARTMENTS = """\
[model]
name = "two compartments, saturable clearance"
time_unit = "h"
[states]
X1 = { range = [0, 60], unit = "mg", about = "central" }
X2 = { range = [0, 60], unit = "mg", about = "tissue" }
[parameters]
k12 = 0.6
k21 = 0.2
Vmax = 8
Km = 10
[equations]
X1 = "-k12*X1 + k21*X2 - Vmax*X1/(Km + X1)"
X2 = "k12*X1 - k21*X2"
[limits]
tissue_cap = "X2 <= 30"
"""

SEI = """\
[model]
name = "SEI against a cap on the infectious"
time_unit = "d"
[states]
S = [0, 1]
E = [0, 0.05]
I = [0, 0.05]
[parameters]
beta = 0.5
sigma = 0.3
gamma = 0.2
[equations]
S = "-beta*S*I"
E = "beta*S*I - sigma*E"
I = "sigma*E - gamma*I"
[limits]
cap = "I <= 0.04"
"""

#: x' = x sqrt(y) is >= 0 on x = 0 but not Lipschitz near y = 0: no Gronwall bound.
ROOT = """\
[model]
name = "root rate"
[states]
x = [0, 1]
y = [0, 1]
[equations]
x = "1 - x + sqrt(y)"
y = "-y + x*sqrt(y)"
[limits]
cap = "x <= 2"
"""


def _prover_kinds(model):
    faces = analyse_faces(model, flow_programs(model, 2), CellTree(model.window),
                          parameter_enclosures(model))
    return {(f["axis"], f["side"]): f["kind"] for f in faces}


def _checker_confirms(model, axis, side, kind):
    context = CheckContext(programs=derive_programs(model, 2),
                           params=tuple((p.lo, p.hi) for p in model.parameters),
                           window=model.window, open_faces=(), grid_depth=0)
    return confirm_face(context, axis, side, kind)


def test_compartment_floors_are_no_outflow_on_both_sides():
    model = parse_model(TWO_COMPARTMENTS)
    kinds = _prover_kinds(model)
    assert kinds[(0, "lo")] == "no-outflow" and kinds[(1, "lo")] == "no-outflow"
    assert _checker_confirms(model, 0, "lo", "no-outflow")
    assert _checker_confirms(model, 1, "lo", "no-outflow")
    # X2 = 60 violates the cap; on X1 = 60 the central rate is negative (inflow)
    assert kinds[(1, "hi")] == "limit" and kinds[(0, "hi")] == "inflow"


def test_a_face_with_an_outward_rate_somewhere_is_not_no_outflow():
    # on x = 1 the rate 1 - 1 + sqrt(y) = sqrt(y) points out for y > 0
    model = parse_model(ROOT)
    assert _prover_kinds(model)[(0, "hi")] == "open"
    assert not _checker_confirms(model, 0, "hi", "no-outflow")


def test_no_outflow_needs_a_lipschitz_slab():
    # on y = 0 the rate is 0 (>= 0 inward), but d/dy of x sqrt(y) is unbounded there
    model = parse_model(ROOT)
    assert _prover_kinds(model)[(1, "lo")] == "open"
    assert not _checker_confirms(model, 1, "lo", "no-outflow")


@pytest.fixture(scope="module")
def compartments(tmp_path_factory):
    path = tmp_path_factory.mktemp("nooutflow") / "two.json.gz"
    proof = prove(parse_model(TWO_COMPARTMENTS), max_depth=6)
    write_certificate(path, certificate_data(proof, {}))
    return path


def test_the_certificate_with_no_outflow_faces_checks(compartments):
    assert check_certificate(compartments, jobs=1).valid


def test_labels_agree_with_integrated_trajectories(compartments):
    cert = read_certificate(compartments)
    assert {"safe", "doomed"} <= set(cert.labels.tolist())
    k12, k21, vmax, km = 0.6, 0.2, 8.0, 10.0

    def rate(t, x):
        return [-k12 * x[0] + k21 * x[1] - vmax * x[0] / (km + x[0]), k12 * x[0] - k21 * x[1]]

    _assert_labels_agree(cert, rate, axis=1, cap=30.0, seed=7, count=40, safe_horizon=200.0)


def _sei_rate(t, x, beta=0.5, sigma=0.3, gamma=0.2):
    return [-beta * x[0] * x[2], beta * x[0] * x[2] - sigma * x[1], sigma * x[1] - gamma * x[2]]


@pytest.fixture(scope="module")
def sei(tmp_path_factory):
    path = tmp_path_factory.mktemp("sei") / "sei.json.gz"
    proof = prove(parse_model(SEI), max_depth=4)
    write_certificate(path, certificate_data(proof, {}))
    return proof, path


def test_images_of_cells_that_stay_in_the_window_gain_no_susceptibles(sei):
    # the floors E = 0 and I = 0 are no-outflow (E' = beta S I, I' = sigma E there), so
    # trajectories that keep the cap stay in the window, where S' <= 0: the drift caps
    # every such image at its cell's upper S, so no successor lies above it in S
    proof, _ = sei
    kinds = {(f["axis"], f["side"]): f["kind"] for f in proof.faces}
    assert kinds[(1, "lo")] == kinds[(2, "lo")] == "no-outflow"
    facts = proof.facts
    lo, hi = proof.tree.lo[proof.leaves], proof.tree.hi[proof.leaves]
    settled = facts.flow_ok & facts.kept & ~facts.escapes & ~facts.outside
    edges = settled[facts.src]
    assert edges.any()
    assert np.all(lo[facts.dst[edges], 0] < hi[facts.src[edges], 0])
    assert (proof.labelling.label == "safe").any()


def test_the_sei_certificate_checks_and_agrees_with_trajectories(sei):
    _, path = sei
    assert check_certificate(path, jobs=1).valid
    cert = read_certificate(path)

    _assert_labels_agree(cert, _sei_rate, axis=2, cap=0.04, seed=3, count=30,
                         safe_horizon=400.0)


def _assert_labels_agree(cert, rate, axis, cap, seed, count, safe_horizon):
    """Random starts in up to `count` safe and doomed cells, integrated with scipy's LSODA
    (tight tolerances): safe starts never pass ``x[axis] <= cap`` (a touch within the
    tolerance is allowed) up to `safe_horizon`; doomed starts pass it within their
    proven crossing-time bounds."""
    def over_cap(t, x):
        return cap - x[axis]
    over_cap.terminal = True
    rng = np.random.default_rng(seed)
    n = cert.lo.shape[1]
    for label in ("safe", "doomed"):
        leaves = np.flatnonzero(cert.labels == label)
        for leaf in rng.choice(leaves, size=min(count, len(leaves)), replace=False):
            x0 = cert.lo[leaf] + rng.random(n) * (cert.hi[leaf] - cert.lo[leaf])
            if cert.label_at(x0[None])[0] != label:
                continue
            lower, upper = cert.crossing_time_bounds(x0[None])
            horizon = safe_horizon if label == "safe" else float(upper[0]) + 1e-6
            sol = solve_ivp(rate, (0, horizon), x0, method="LSODA", rtol=1e-10,
                            atol=1e-12, events=over_cap)
            crossed = len(sol.t_events[0]) > 0
            if label == "safe":
                assert not crossed or sol.y_events[0][0][axis] <= cap + 1e-7, x0
            else:
                assert crossed and sol.t_events[0][0] >= float(lower[0]) - 1e-7, x0
