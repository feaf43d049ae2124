"""Trapping regions around stable equilibria (certify/trapping.py, certify/check/_trapping.py).

References named beside the checks:

* Lyapunov's direct method (Lyapunov 1892; Khalil, Nonlinear Systems, 2002, ch. 4
  (mem)): a sublevel set of ``V`` on whose boundary ``dV/dt < 0`` is forward invariant;
  ``A^T P + P A = -Q`` has a positive definite solution for Hurwitz ``A`` (Khalil 2002,
  Theorem 4.6 (mem)).
* Float checks beside the proofs: the model's equations evaluated by
  ``sympy.lambdify`` (not by the project's program compiler) and trajectories by scipy
  ``solve_ivp`` (DOP853, rtol 1e-10, atol 1e-12).
* The damped linear oscillator ``x' = y, y' = -x - y/2`` (closed form: eigenvalues
  ``(-1/2 +- i sqrt(15)/2) / 2``, a stable focus at 0).
* The same oscillator with a stiffer spring beyond ``x = 1`` (a ``max`` kink, our own
  toy): below the kink it is the linear oscillator, so its rest state is 0 with the
  eigenvalues above.
"""

from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
import sympy
from scipy.integrate import solve_ivp

from certify.certificate import certificate_data, write_certificate
from certify.check import check_certificate
from certify.container import (decode_array, encode_array, fraction_text,
                               load_certificate_json)
from certify.evaluate import parameter_enclosures
from certify.labels import label_cells
from certify.model import load_model, parse_model
from certify.prove import Method, prove
from certify.taylor import flow_programs
from certify.trapping import ABOVE, BELOW, SHELL, find_regions, grid_box, prove_region

ROOT = Path(__file__).resolve().parent.parent
OSCILLATOR = """\
[model]
name = "damped linear oscillator"
time_unit = "s"
[states]
x = { range = [-2, 2] }
y = { range = [-2, 2] }
[parameters]
k = 1
c = 0.5
[equations]
x = "y"
y = "-k*x - c*y"
[constraints]
x_cap = "x <= 1.5"
x_floor = "x >= -1.5"
"""
KINKED = OSCILLATOR.replace('"-k*x - c*y"', '"-k*x - c*y - 4*max(x - 1, 0)"')
PENDULUM = ROOT / "tests" / "data" / "prove_damped_pendulum.toml"
FOOD_CHAIN = ROOT / "models" / "microbial_food_chain.toml"


def _oscillator():
    return parse_model(OSCILLATOR)


def _floats(model):
    """f and the limits g as numpy functions of (x, p) by sympy.lambdify (float check)."""
    xs, ps = model.state_symbols, model.parameter_symbols
    f = sympy.lambdify([xs, ps], list(model.equations), "numpy")
    g = sympy.lambdify([xs, ps], [c.g for c in model.constraints], "numpy")
    mid = [float((p.lo + p.hi) / 2) for p in model.parameters]
    return (lambda x: np.array(f(x.T, mid), float).reshape(len(xs), -1).T), \
        (lambda x: np.array(g(x.T, mid), float).reshape(len(model.constraints), -1).T)


def _region(model):
    programs = flow_programs(model, 4)
    search = find_regions(model, programs, parameter_enclosures(model))
    assert search.regions, search.notes
    return search.regions[0]


def _on_level_set(region, count, rng):
    """Points with V = level: x = c + sqrt(level) u L^-1 for unit rows u, P = L L^T."""
    n = len(region.centre)
    u = rng.standard_normal((count, n))
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    factor = np.linalg.inv(np.linalg.cholesky(region.matrix))
    return region.centre + np.sqrt(region.level) * u @ factor


def _V(region, x):
    d = x - region.centre
    return np.einsum("ki,ij,kj->k", d, region.matrix, d)


@pytest.fixture(scope="module", params=["oscillator", "kinked", "pendulum", "food_chain"])
def case(request):
    model = {"oscillator": _oscillator, "kinked": lambda: parse_model(KINKED),
             "pendulum": lambda: load_model(PENDULUM),
             "food_chain": lambda: load_model(FOOD_CHAIN)}[request.param]()
    return model, _region(model)


def test_flow_points_inward_on_the_boundary(case):
    model, region = case
    f, g = _floats(model)
    x = _on_level_set(region, 1000, np.random.default_rng(1))
    assert np.allclose(_V(region, x), region.level, rtol=1e-9)
    # the ellipsoid lies inside B, so its boundary in B is the level set itself
    assert np.all((x > region.box_lo) & (x < region.box_hi))
    rate = 2 * np.einsum("ki,ij,kj->k", x - region.centre, region.matrix, f(x))
    assert np.all(rate < 0)  # Lyapunov 1892: the flow points inward (float check)
    assert np.all(g(x) >= 0)  # the region lies inside the limits
    assert np.all(np.linalg.eigvalsh(region.matrix) > 0)  # Khalil 2002, Thm 4.6 (mem)


def test_trajectories_from_the_region_stay_in_it(case):
    model, region = case
    f, g = _floats(model)
    rng = np.random.default_rng(2)
    edge = _on_level_set(region, 40, rng)
    starts = region.centre + (edge - region.centre) * rng.random((40, 1)) ** 0.5
    for x0 in starts:
        sol = solve_ivp(lambda t, x: f(x[None])[0], (0, 30), x0, method="DOP853",
                        rtol=1e-10, atol=1e-12, dense_output=True)
        xs = sol.sol(np.linspace(0, 30, 600)).T
        assert np.all(_V(region, xs) <= region.level * (1 + 1e-8))  # scipy vs the proof
        assert np.all(g(xs) >= 0)


def test_cover_classes_hold_at_sampled_points(case):
    """Every class agrees with float evaluation at random points of its sub-boxes."""
    model, region = case
    f, g = _floats(model)
    rng = np.random.default_rng(3)
    pick = rng.choice(len(region.cover_depth), size=min(2000, len(region.cover_depth)),
                      replace=False)
    width = (region.box_hi - region.box_lo) / 2.0 ** region.cover_depth[pick]
    x = region.box_lo + (region.cover_index[pick] + rng.random(width.shape)) * width
    v = _V(region, x)
    kind = region.cover_class[pick]
    assert np.all(v[kind == ABOVE] > region.level)
    assert np.all(v[kind == BELOW] < region.level)
    shell = kind == SHELL
    rate = 2 * np.einsum("ki,ij,kj->k", x[shell] - region.centre, region.matrix, f(x[shell]))
    assert np.all(rate < 0)
    assert np.all(g(x[kind != ABOVE]) >= 0)


# -- a matrix that is not a Lyapunov function -----------------------------------------------
BAD = np.array([[1.0, 0.875], [0.875, 1.0]])


def test_a_wrong_matrix_yields_no_region():
    model = _oscillator()
    # float check that BAD is wrong: at (0, y) the rate 2 d^T P f is 2 (7/8 - 1/2) y^2 > 0
    f, _ = _floats(model)
    x = np.array([[0.0, 0.3]])
    assert 2 * x[0] @ BAD @ f(x)[0] > 0
    programs = flow_programs(model, 4)
    lo, hi = grid_box(np.array([-0.9, -0.9]), np.array([0.9, 0.9]))
    region = prove_region(programs, parameter_enclosures(model), np.zeros(2), BAD, 0.1, lo,
                          hi, max_depth=8)
    assert region is None


@pytest.fixture(scope="module")
def oscillator_cert(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("trap")
    path = tmp / "model.toml"
    path.write_text(OSCILLATOR)
    # the unscaled lengths of time: with the scaled ones (certify/time_scale.py) the tubes
    # are long enough that the same cells are safe without the region
    proof = prove(load_model(path), method=Method(), max_depth=5)
    cert = tmp / "cert.json.gz"
    write_certificate(cert, certificate_data(proof, {}))
    return proof, cert


def test_oscillator_certificate_is_valid_and_uses_the_region(oscillator_cert):
    proof, cert = oscillator_cert
    trapped = proof.facts.trapped >= 0
    assert trapped.any() and proof.facts.trapped_whole.any()
    assert np.all(proof.labelling.label[trapped] == "safe")
    # without the region the same facts prove fewer cells safe
    with np.errstate(all="ignore"):  # as prove() does: NaN marks unusable bounds
        plain = label_cells(type(proof.facts)(**{**proof.facts.__dict__, "trapped": None}))
    assert (plain.label == "safe").sum() < (proof.labelling.label == "safe").sum()
    result = check_certificate(cert, jobs=1)
    assert result.valid, result.failures[:3]


def test_kinked_certificate_is_valid_and_uses_the_region(tmp_path):
    # a model with a kink has no Jacobian program of the model as written; its region
    # is linearised by central differences and proven with the natural interval form,
    # and the checker re-verifies it with its own arithmetic
    proof = prove(parse_model(KINKED), method=Method(), max_depth=5)
    assert len(proof.trapping.regions) == 1
    trapped = proof.facts.trapped >= 0
    assert trapped.any()
    assert np.all(proof.labelling.label[trapped] == "safe")
    cert = tmp_path / "kinked.json.gz"
    write_certificate(cert, certificate_data(proof, {}))
    result = check_certificate(cert, jobs=1)
    assert result.valid, result.failures[:3]


def _tampered(cert, tmp_path, change):
    data = load_certificate_json(cert)
    change(data)
    write_certificate(tmp_path / "bad.json.gz", data)
    result = check_certificate(tmp_path / "bad.json.gz", jobs=1)
    assert not result.valid
    return " ".join(f["reason"] for f in result.failures)


def test_forged_wrong_matrix_is_rejected(oscillator_cert, tmp_path):
    def forge(data):
        data["regions"][0]["matrix"] = [[fraction_text(Fraction(v)) for v in row]
                                        for row in BAD]
    assert "trapping region 0" in _tampered(oscillator_cert[1], tmp_path, forge)


def test_enlarged_level_is_rejected(oscillator_cert, tmp_path):
    def forge(data):
        level = Fraction(data["regions"][0]["level"])
        data["regions"][0]["level"] = fraction_text(level * 4)
    assert "trapping region 0" in _tampered(oscillator_cert[1], tmp_path, forge)


def _cover(data, key):
    return decode_array(data["regions"][0][key])


def _put_cover(data, key, array):
    data["regions"][0][key] = encode_array(np.asarray(array), "<i8")


def test_changed_class_is_rejected(oscillator_cert, tmp_path):
    def forge(data):
        kind = _cover(data, "cover_class").copy()
        kind[np.flatnonzero(kind == SHELL)[0]] = BELOW
        _put_cover(data, "cover_class", kind)
    assert "trapping region 0" in _tampered(oscillator_cert[1], tmp_path, forge)


def test_removed_sub_box_is_rejected(oscillator_cert, tmp_path):
    def forge(data):
        keep = np.arange(len(_cover(data, "cover_depths"))) != 5
        for key in ("cover_depths", "cover_index", "cover_class"):
            _put_cover(data, key, _cover(data, key)[keep])
    assert "does not tile" in _tampered(oscillator_cert[1], tmp_path, forge)


def test_overlapping_sub_box_is_rejected(oscillator_cert, tmp_path):
    def forge(data):
        # replace sub-box 5 by its parent along axis 0: it overlaps its sibling, and a
        # copy of another sub-box keeps the volumes adding up
        depth, index = _cover(data, "cover_depths").copy(), _cover(data, "cover_index").copy()
        row = int(np.flatnonzero(depth[:, 0] > 0)[0])
        depth[row, 0] -= 1
        index[row, 0] //= 2
        _put_cover(data, "cover_depths", depth)
        _put_cover(data, "cover_index", index)
    assert "does not tile" in _tampered(oscillator_cert[1], tmp_path, forge)


def test_first_format_cover_with_one_depth_per_sub_box_is_read(tmp_path):
    """Covers by cubic sub-boxes (``cover_depth`` of shape (k,)) still check."""
    path = tmp_path / "model.toml"
    path.write_text(OSCILLATOR)
    model = load_model(path)
    proof = prove(model, max_depth=4)
    data = certificate_data(proof, {})
    region = proof.trapping.regions[0]
    # the same region with a cover halved along every axis at once, down to depth 6
    # (classes re-proven by the prover's own classify at the finer, cubic level)
    from certify.trapping import classify
    n, d = 2, 6
    grid = np.stack(np.meshgrid(*[np.arange(1 << d)] * n, indexing="ij"), -1).reshape(-1, n)
    kind = classify(flow_programs(model, 4), parameter_enclosures(model), region.centre,
                    region.matrix, region.level, region.box_lo, region.box_hi,
                    np.full((len(grid), n), d), grid)
    assert np.all(kind >= 0)
    entry = data["regions"][0]
    del entry["cover_depths"]
    entry["cover_depth"] = encode_array(np.full(len(grid), d), "<i8")
    entry["cover_index"] = encode_array(grid, "<i8")
    entry["cover_class"] = encode_array(kind, "<i8")
    write_certificate(tmp_path / "old.json.gz", data)
    result = check_certificate(tmp_path / "old.json.gz", jobs=1)
    assert result.valid, result.failures[:3]


def _brute_tiles(depth, index, d):
    """Reference: count how often each cell of the 2^d grid is covered (must be once)."""
    n = depth.shape[1]
    count = np.zeros((1 << d,) * n, int)
    for dep, ind in zip(depth, index):
        sl = tuple(slice(i << (d - e), (i + 1) << (d - e)) for e, i in zip(dep, ind))
        count[sl] += 1
    return bool(np.all(count == 1))


def test_tiling_check_agrees_with_counting_on_random_covers():
    """k-d covers, and the same with one box dropped, moved or duplicated, against a count."""
    from certify.check._trapping import tiling_problem
    rng = np.random.default_rng(7)
    for trial in range(60):
        n = 1 + trial % 3
        depth, index = np.zeros((1, n), np.int64), np.zeros((1, n), np.int64)
        for _ in range(6):
            row = rng.integers(len(depth))
            a = rng.integers(n)
            kids_d = np.repeat(depth[row:row + 1], 2, 0)
            kids_i = np.repeat(index[row:row + 1], 2, 0)
            kids_d[:, a] += 1
            kids_i[:, a] = 2 * kids_i[:, a] + np.array([0, 1])
            depth = np.concatenate([np.delete(depth, row, 0), kids_d])
            index = np.concatenate([np.delete(index, row, 0), kids_i])
        assert tiling_problem(depth, index) is None and _brute_tiles(depth, index, 7)
        k = rng.integers(len(depth))
        variants = [(np.delete(depth, k, 0), np.delete(index, k, 0)),
                    (np.concatenate([depth, depth[k:k + 1]]),
                     np.concatenate([index, index[k:k + 1]]))]
        moved = index.copy()
        moved[k] = rng.integers(0, 1 << depth[k])
        variants.append((depth, moved))
        for dep, ind in variants:
            if len(dep):
                assert (tiling_problem(dep, ind) is None) == _brute_tiles(dep, ind, 7)


def test_forged_trapped_cell_is_rejected(oscillator_cert, tmp_path):
    proof, cert = oscillator_cert

    def forge(data):
        label = np.array(data["cells"]["label"])
        c = int(np.flatnonzero((label == "undecided"))[0])
        data["cells"]["label"][c] = "safe"
        trapped = np.full(len(label), -1)
        trapped[c] = 0
        data["cells"]["trapped"] = encode_array(trapped, "<i8")
        data["cells"]["trapped_whole"] = [i == c for i in range(len(label))]
    assert "does not lie in trapping region 0" in _tampered(cert, tmp_path, forge)


# -- the 3D food chain: safe cells at depth 4, checked and simulated ------------------------
def test_food_chain_gains_safe_cells_that_simulation_confirms(tmp_path):
    model = load_model(FOOD_CHAIN)
    proof = prove(model, max_depth=4)
    safe = proof.labelling.label == "safe"
    # the region decides some of them (others may be safe through their successors)
    assert safe.any() and np.any(proof.facts.trapped[safe] >= 0)
    cert = tmp_path / "cert.json.gz"
    write_certificate(cert, certificate_data(proof, {}))
    assert check_certificate(cert, jobs=1).valid
    f, g = _floats(model)
    rng = np.random.default_rng(4)
    nodes = proof.leaves[safe]
    for node in rng.choice(nodes, size=min(20, len(nodes)), replace=False):
        x0 = proof.tree.lo[node] + rng.random(3) * (proof.tree.hi[node] - proof.tree.lo[node])
        sol = solve_ivp(lambda t, x: f(x[None])[0], (0, 200), x0, method="DOP853",
                        rtol=1e-10, atol=1e-12, dense_output=True)
        assert np.all(g(sol.sol(np.linspace(0, 200, 2000)).T) >= 0)  # scipy: limits kept


@pytest.mark.parametrize("per_axis", [False, True])
def test_checker_exact_cells_are_the_dyadic_subboxes(per_axis):
    # definition of the dyadic subdivision: side k of a cell at depth e with index j is
    # [a + j (b - a) / 2^e, a + (j + 1) (b - a) / 2^e], here in fractions.Fraction; the
    # checker's cells (one depth per cell) and trapping covers (one per axis) share it
    from certify.check._cells import exact_cells

    box = [(Fraction(-1, 3), Fraction(5, 7)), (Fraction(0), Fraction(2))]
    rng = np.random.default_rng(4)
    depth = rng.integers(0, 7, (40, 2) if per_axis else 40)
    each = depth if per_axis else np.repeat(depth[:, None], 2, 1)
    index = np.array([[rng.integers(0, 1 << int(e)) for e in row] for row in each])
    lo, hi = exact_cells(box, depth, index)
    for c in range(40):
        for k, (a, b) in enumerate(box):
            width = (b - a) / 2 ** int(each[c, k])
            assert lo[c, k] == a + int(index[c, k]) * width
            assert hi[c, k] == a + (int(index[c, k]) + 1) * width
