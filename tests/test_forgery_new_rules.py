"""Red team on the newest rules of the checker: valid certificates edited to claim
something false must be rejected.

The rules under attack (docs/certificate-format.md, "Checking"): successors that the
cell's image sets miss may be left out; ``no-outflow`` window sides; tube boxes cut to the
window for cells whose tubes reach past no open side; tubes stored as their first steps
only. Each test builds a real small certificate with the prover, edits it through the
container API and asserts that ``check_certificate`` and ``certify check`` reject it with a
reason naming what is wrong (exit 1: a claim does not hold, 2: a malformed file).

References named beside the checks:

* the damped rotation ``x' = -y - c x, y' = x - c y`` of
  tests/data/prove_rotation_open_side.toml, solved in closed form by the matrix
  exponential (scipy.linalg.expm; a linear system, common practice): where a start's
  flow ends inside a leaf, every enclosure of the flow meets that leaf; on the side
  ``x = -0.6`` the rate ``x' = -y + 0.03`` points out of the window for ``y > 0.03``;
* the harvested logistic stock ``x' = x (1 - x) - q`` (Schaefer 1954, surplus production
  (mem)); with ``q = 0.16`` it is ``x' = -(x - 0.2)(x - 0.8)``, whose travel time from
  ``x0`` down to ``x1 < x0 < 0.2`` is ``ln(R(x0) / R(x1)) / 0.6`` with
  ``R(x) = (0.8 - x) / (0.2 - x)`` (partial fractions, closed form); with ``q = 0.1`` the
  equilibria are ``(1 -+ sqrt(0.6)) / 2`` (quadratic formula);
* the two-compartment model of tests/test_no_outflow_faces.py: on ``X1 = 0`` the central
  rate is ``k21 X2``, negative wherever ``k21 < 0 < X2`` (by inspection);
* the fermenter of tests/data/fermenter_v2_depth3.certificate.json.gz (version 2: frames
  stored), integrated with scipy ``solve_ivp`` (LSODA, rtol 1e-11);
* cell sides and step times compared exactly with Python's ``fractions``; IEEE 754-2008
  binary64 (common practice) for ``-0.0``, the smallest subnormal ``2^-1074``, ``nextafter``.
"""

from fractions import Fraction

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.linalg import expm

from certify.check import check_certificate
from certify.container import encode_array, load_certificate_json
from certify.errors import CertificateError

from test_certificate_format import V2, _fermenter_rhs
from test_forgery import (_cells, _check_cli, _claim_safe, _proven, _put,
                          _rejected, _set, _tampered, _undecided_at_the_threshold)
from test_forgery import logistic  # noqa: F401  (the module's fixture)
from test_kept_rules import DAMPING, ROTATION
from test_no_outflow_faces import ROOT, TWO_COMPARTMENTS


# -- shared helpers ----------------------------------------------------------------------
@pytest.fixture(scope="module")
def rotation(tmp_path_factory):
    return _proven(tmp_path_factory, "rotation", ROTATION.read_text(), 6)


@pytest.fixture(scope="module")
def compartments(tmp_path_factory):
    return _proven(tmp_path_factory, "compartments", TWO_COMPARTMENTS, 4)


def _box(data, c):
    """Exact sides (lists of Fractions) of cell c."""
    d, index = int(_cells(data, "depth")[c]), _cells(data, "index")[c]
    lo, hi = [], []
    for (a, b), i in zip(data["window"], index):
        a, b = Fraction(a), Fraction(b)
        lo.append(a + (b - a) * Fraction(int(i), 2 ** d))
        hi.append(a + (b - a) * Fraction(int(i) + 1, 2 ** d))
    return lo, hi


def _steps(data, c):
    """Rows of cell c's steps and their exact total time."""
    start = _cells(data, "step_start")
    rows = np.arange(start[c], start[c + 1])
    return rows, sum((Fraction(float(h)) for h in _cells(data, "step_h")[rows]), Fraction(0))


def _successors(data, c):
    start = _cells(data, "successor_start")
    return _cells(data, "successors")[start[c]:start[c + 1]].tolist()


def _set_successors(data, c, keep):
    start, succ = _cells(data, "successor_start"), _cells(data, "successors")
    new = np.concatenate([succ[:start[c]], np.array(keep, np.int64), succ[start[c + 1]:]])
    start[c + 1:] += len(keep) - (start[c + 1] - start[c])
    _put(data, "successors", new.astype(np.int64))
    _put(data, "successor_start", start)


def _replace_steps(data, c, h, E):
    """Cell c's steps replaced by `h`, `E` (the horizon set to enclose their exact sum)."""
    start = _cells(data, "step_start")
    all_h, all_E = _cells(data, "step_h"), _cells(data, "step_E")
    a, b = start[c], start[c + 1]
    _put(data, "step_h", np.concatenate([all_h[:a], h, all_h[b:]]))
    _put(data, "step_E", np.concatenate([all_E[:a], E, all_E[b:]]))
    start[c + 1:] += len(h) - (b - a)
    _put(data, "step_start", start)
    _set(data, "horizon", c, _enclosing(sum((Fraction(float(v)) for v in h), Fraction(0))))


def _enclosing(T):
    """The floats just below and above the exact number T."""
    return [float(np.nextafter(float(T), -np.inf)), float(np.nextafter(float(T), np.inf))]


def _below(T):
    """The largest float below the exact number T."""
    v = float(T)
    return v if Fraction(v) < T else float(np.nextafter(v, -np.inf))


def _reasons_of(result, c):
    return " ".join(f["reason"] for f in result.failures if f["cell"] == c)


def _rejected_cell(path, tmp_path, capsys, change, c, cli=True):
    """The forged file is rejected (by ``certify check`` too, unless `cli` is False) and
    names cell c; returns c's reasons."""
    forged = _tampered(path, tmp_path, change)
    result = check_certificate(forged, jobs=1)
    assert not result.valid
    assert not cli or _check_cli(forged, capsys) == 1
    reasons = _reasons_of(result, c)
    assert reasons, result.failures[:3]
    return reasons


# -- successors that the image sets miss -------------------------------------------------
def _rotation_ends(points, t):
    """Closed form of the damped rotation: the points flowed for time t."""
    return points @ expm(np.array([[-DAMPING, -1.0], [1.0, -DAMPING]]) * t).T


def _grid(lo, hi, k=9):
    """k x k points strictly inside an exact 2-d box."""
    u = (np.arange(k) + 0.5) / k
    xs = float(lo[0]) + u * float(hi[0] - lo[0])
    ys = float(lo[1]) + u * float(hi[1] - lo[1])
    return np.array([[x, y] for x in xs for y in ys])


def _strictly_inside(points, lo, hi, margin=1e-9):
    return [all(float(a) + margin < p < float(b) - margin for p, a, b in zip(q, lo, hi))
            for q in points]


def _reached_successor(data, c, ends):
    """A listed successor other than c holding an end point well inside it."""
    for d in _successors(data, c):
        if d != c and any(_strictly_inside(ends, *_box(data, d))):
            return d
    return None


def _safe_cell_and_reached_successor(data):
    trapped = _cells(data, "trapped")
    for c, label in enumerate(data["cells"]["label"]):
        if label != "safe" or trapped[c] >= 0 or len(_successors(data, c)) < 3:
            continue
        _, T = _steps(data, c)
        d = _reached_successor(data, c, _rotation_ends(_grid(*_box(data, c)), float(T)))
        if d is not None:
            return c, d
    raise AssertionError("no safe cell whose flow reaches one of several successors")


@pytest.mark.parametrize("frames", ["qr", "qr+parallelepiped"])
def test_a_successor_the_flow_reaches_cannot_be_left_out(rotation, tmp_path, capsys, frames):
    # closed form: a start of cell c ends inside leaf d at c's horizon, so every set
    # enclosing the flow meets d; neither frame rule's sets may call d missed
    data = load_certificate_json(rotation)
    c, d = _safe_cell_and_reached_successor(data)

    def change(data):
        _set_successors(data, c, [e for e in _successors(data, c) if e != d])
        data["method"]["frames"] = frames
    reasons = _rejected_cell(rotation, tmp_path, capsys, change, c)
    assert "not among its successors" in reasons


def test_a_safe_claim_resting_on_dropped_undecided_successors_is_rejected(rotation, tmp_path,
                                                                         capsys):
    # an undecided cell claimed safe once its successors that are not safe are left out:
    # its starts include ones the closed form carries into those successors
    data = load_certificate_json(rotation)
    labels = data["cells"]["label"]
    c = next(c for c, label in enumerate(labels) if label == "undecided"
             and _cells(data, "survival_lower")[c] > 0
             and any(labels[d] == "undecided" and d != c and any(_strictly_inside(
                 _rotation_ends(_grid(*_box(data, c)), float(_steps(data, c)[1])),
                 *_box(data, d))) for d in _successors(data, c)))

    def change(data):
        _claim_safe(data, c)
        _set_successors(data, c, [d for d in _successors(data, c)
                                  if labels[d] in ("safe", "outside")])
    reasons = _rejected_cell(rotation, tmp_path, capsys, change, c)
    assert "not among its successors" in reasons or "limits are not proven kept" in reasons


def _drop_one_successor_each(data, pick):
    """Leave out successor number `pick` (other than the cell) of every cell whose claims
    rest on its successors; returns ``{cell: dropped leaf}``."""
    labels = data["cells"]["label"]
    trapped, rank = _cells(data, "trapped"), _cells(data, "rank")
    survival = _cells(data, "survival_lower")
    dropped = {}
    for c, label in enumerate(labels):
        if (label == "safe" and trapped[c] >= 0) or (label == "doomed" and rank[c] <= 0) \
                or label == "outside":
            continue
        if label == "undecided" and not survival[c] > float(_steps(data, c)[1]):
            continue
        others = [d for d in _successors(data, c) if d != c]
        if others:
            dropped[c] = others[pick % len(others)]
            _set_successors(data, c, [d for d in _successors(data, c) if d != dropped[c]])
    return dropped


def _accepted_drops_reached(path, tmp_path, pick, ends):
    """Every claim-bearing cell loses one successor; returns the number of cells checked,
    the number whose forged list was accepted, and those accepted whose flow (`ends(data,
    c)`: end points of starts of c at its horizon) lies well inside the dropped leaf."""
    data = load_certificate_json(path)
    dropped = _drop_one_successor_each(data, pick)
    forged = _tampered(path, tmp_path, lambda d: _drop_one_successor_each(d, pick))
    failed = {f["cell"] for f in check_certificate(forged, jobs=1).failures}
    accepted = [c for c in dropped if c not in failed]
    reached = [(c, d) for c, d in dropped.items() if c in accepted
               and any(_strictly_inside(ends(data, c), *_box(data, d)))]
    return len(dropped), len(accepted), reached


@pytest.mark.parametrize("pick", [0, -1])
def test_every_successor_drop_the_checker_accepts_is_one_the_flow_misses(rotation, tmp_path,
                                                                         pick):
    # one forged file, one successor left out per cell whose claims rest on them; the
    # checker may accept a drop only where the closed-form flow of a 15 x 15 grid of the
    # cell's starts stays out of the dropped leaf
    def ends(data, c):
        return _rotation_ends(_grid(*_box(data, c), 15), float(_steps(data, c)[1]))
    total, accepted, reached = _accepted_drops_reached(rotation, tmp_path, pick, ends)
    assert reached == []
    assert total > 200 and 0 < accepted < total / 4


@pytest.fixture(scope="module")
def v2_reached():
    """The doomed cell of rank 1 of the version-2 file, a listed successor that
    solve_ivp's flow from its starts reaches at its horizon, and the cell's step rows."""
    data = load_certificate_json(V2)
    labels, rank = data["cells"]["label"], _cells(data, "rank")
    c = next(c for c, label in enumerate(labels) if label == "doomed" and rank[c] > 0)
    rows, T = _steps(data, c)
    ends = np.array([solve_ivp(_fermenter_rhs, (0, float(T)), p, method="LSODA", rtol=1e-11,
                               atol=1e-11).y[:, -1] for p in _grid(*_box(data, c), 4)])
    d = _reached_successor(data, c, ends)
    assert d is not None
    return c, d, rows


#: Frames and centres a version-2 file could state for the last step end (``step_A``,
#: ``step_m``).
FORGED_FRAMES = {
    "near singular, far centre": ([[1.0, 1.0], [1.0, 1.0 + 2.0 ** -40]], [1e300, -1e300]),
    "extreme scales": ([[2.0 ** -1000, 0.0], [0.0, 2.0 ** 1000]], None),
    "subnormal": ([[5e-324, 0.0], [0.0, 1.0]], None),
}


@pytest.mark.parametrize("frame", sorted(FORGED_FRAMES))
def test_version_2_frames_do_not_make_a_reached_successor_missed(v2_reached, tmp_path, capsys,
                                                                 frame):
    # version 2 states every step end's frame A and centre m; the checker takes them as
    # data and encloses A^-1 itself. A forger drops the successor that solve_ivp's flow
    # reaches and picks the last frame (and centre) to make the set look thin there
    c, d, rows = v2_reached
    A_last, m_last = FORGED_FRAMES[frame]

    def change(data):
        _set_successors(data, c, [e for e in _successors(data, c) if e != d])
        A = _cells(data, "step_A")
        A[rows[-1]] = A_last
        _put(data, "step_A", A)
        if m_last is not None:
            m = _cells(data, "step_m")
            m[rows[-1]] = m_last
            _put(data, "step_m", m)
    reasons = _rejected_cell(V2, tmp_path, capsys, change, c, cli=frame == "subnormal")
    assert "not among its successors" in reasons or "does not verify" in reasons


@pytest.mark.parametrize("key, value", [("step_A", np.nan), ("step_A", np.inf),
                                        ("step_m", -np.inf), ("set0_m", np.nan)])
def test_version_2_frames_that_are_not_finite_are_malformed(tmp_path, capsys, key, value):
    def change(data):
        a = _cells(data, key)
        a.reshape(-1)[0] = value
        _put(data, key, a)
    forged = _tampered(V2, tmp_path, change)
    with pytest.raises(CertificateError, match=f"cells.{key}"):
        check_certificate(forged, jobs=1)
    assert _check_cli(forged, capsys) == 2


# -- no-outflow sides and the other kinds -----------------------------------------------
def _face(data, axis, side):
    return next(f for f in data["faces"] if f["axis"] == axis and f["side"] == side)


@pytest.mark.parametrize("kind", ["no-outflow", "inflow", "invariant", "limit"])
def test_an_open_side_the_flow_leaves_through_cannot_be_called_harmless(rotation, tmp_path,
                                                                        capsys, kind):
    # closed form: on x = -0.6 the rate -y + 0.03 is negative (outward) for y > 0.03,
    # and x >= -0.9 holds there: the side is open. Its cover is forged to match (one
    # piece, the whole side, with the reason the kind would need)
    data = load_certificate_json(rotation)
    assert _face(data, 0, "lo")["kind"] == "open"
    assert -0.5 + DAMPING * 0.6 < 0

    def change(data):
        face = _face(data, 0, "lo")
        face["kind"] = kind
        face["cover_lo"] = encode_array(np.array([[-0.6, -1.2]]), "<f8")
        face["cover_hi"] = encode_array(np.array([[-0.6, 1.2]]), "<f8")
        reason = {"no-outflow": 4, "inflow": 2}.get(kind, 1)
        face["cover_reason"] = encode_array(np.array([reason]), "<i8")
    reasons = _rejected(rotation, tmp_path, capsys, change)
    assert f"face x lo is not proven to be of kind {kind!r}" in reasons


def test_no_outflow_without_a_lipschitz_slab_is_rejected(tmp_path_factory, tmp_path, capsys):
    # y' = -y + x sqrt(y) is 0 on y = 0 (inward rate >= 0) but d/dy sqrt(y) is unbounded
    # there: the Gronwall argument has no Lipschitz constant (by inspection)
    path = _proven(tmp_path_factory, "root", ROOT, 3)
    assert _face(load_certificate_json(path), 1, "lo")["kind"] == "open"
    reasons = _rejected(path, tmp_path, capsys,
                        lambda data: _face(data, 1, "lo").update(kind="no-outflow"))
    assert "face y lo is not proven to be of kind 'no-outflow'" in reasons


def test_a_parameter_box_under_which_a_side_lets_flow_out_is_noticed(compartments, tmp_path,
                                                                    capsys):
    # k21 = 0.2 moved to the box [-0.2, 0.2]: on X1 = 0 the rate k21 X2 is negative for
    # k21 < 0 < X2, so the no-outflow side X1 lo does not hold for the whole box
    data = load_certificate_json(compartments)
    assert _face(data, 0, "lo")["kind"] == "no-outflow"
    names = list(data["parameters"])

    def change(data):
        data["parameters"]["k21"] = ["-1/5", "1/5"]
        rows = np.array([[float(Fraction(v)) for v in data["parameters"][p]] for p in names])
        rows[names.index("k21")] = [np.nextafter(-0.2, -1), np.nextafter(0.2, 1)]
        data["parameter_floats"] = encode_array(rows, "<f8")
    forged = _tampered(compartments, tmp_path, change)
    result = check_certificate(forged, jobs=1)
    assert not result.valid
    assert "face X1 lo is not proven to be of kind 'no-outflow'" in result.message
    assert [p["name"] for p in result.parameters_narrowed] == ["k21"]
    assert _check_cli(forged, capsys) == 1


@pytest.mark.parametrize("kind", ["invariant", "limit", "inflow"])
def test_a_no_outflow_side_cannot_be_promoted(compartments, tmp_path, capsys, kind):
    # on X1 = 0 the central rate k21 X2 is >= 0, positive for X2 > 0 and 0 at X2 = 0, and
    # the cap X2 <= 30 holds on part of it: neither identically 0, nor strictly inward
    # everywhere, nor violating a limit everywhere (by inspection)
    assert _face(load_certificate_json(compartments), 0, "lo")["kind"] == "no-outflow"
    reasons = _rejected(compartments, tmp_path, capsys,
                        lambda data: _face(data, 0, "lo").update(kind=kind))
    assert f"face X1 lo is not proven to be of kind {kind!r}" in reasons


def test_a_regression_check_confirms_the_sides_again(compartments, tmp_path):
    # the same certificate checked against a revised model with k21 = -0.2: its stored
    # no-outflow side X1 lo no longer holds (the rate k21 X2 is negative for X2 > 0)
    revised = tmp_path / "revised.toml"
    revised.write_text(TWO_COMPARTMENTS.replace("k21 = 0.2", "k21 = -0.2"))
    result = check_certificate(compartments, model=revised, jobs=1)
    assert not result.valid
    assert "face X1 lo is not proven to be of kind 'no-outflow'" in result.message


# -- tube boxes cut to the window --------------------------------------------------------
def _cell_leaving_by_the_open_side(data):
    """A cell outside every trapping region some of whose starts cross x = -0.6 (closed
    form) by its horizon, with its step rows."""
    labels, trapped = data["cells"]["label"], _cells(data, "trapped")
    for c, label in enumerate(labels):
        if label == "outside" or trapped[c] >= 0:
            continue
        rows, T = _steps(data, c)
        if len(rows) == 0:
            continue
        times = np.linspace(0, float(T), 200)
        starts = _grid(*_box(data, c), 5)
        xs = np.array([_rotation_ends(starts, t)[:, 0] for t in times])
        if xs.min() < -0.6 - 1e-3 and _cells(data, "step_E")[rows, 0, 0].min() < -0.6:
            return c, rows
    raise AssertionError("no cell whose flow crosses x = -0.6")


def test_tubes_pulled_inside_the_open_side_do_not_verify(rotation, tmp_path, capsys):
    # a forger pulls the tubes back to x >= -0.6 so that they reach past no open side and
    # get cut to the window, and claims the cell safe by its listed safe successors; the
    # closed form shows starts that do leave by x = -0.6, so no such box holds their flow
    data = load_certificate_json(rotation)
    c, rows = _cell_leaving_by_the_open_side(data)
    labels = data["cells"]["label"]

    def change(data):
        _claim_safe(data, c)
        _set_successors(data, c, [d for d in _successors(data, c) if labels[d] == "safe"])
        E = _cells(data, "step_E")
        E[rows, 0, 0] = np.maximum(E[rows, 0, 0], -0.6)
        _put(data, "step_E", E)
    assert "does not verify" in _rejected_cell(rotation, tmp_path, capsys, change, c)


def _doomed_cell_out_of_the_window_early(data):
    """A doomed cell (outside every trapping region) and a number k of its steps after
    which, in closed form, every start on a 7 x 7 grid has kept |x| < 0.88 and some lies
    beyond the open side x = -0.6; some start crosses |x| = 0.9 later (within 13 s)."""
    h = _cells(data, "step_h")
    for c, label in enumerate(data["cells"]["label"]):
        if label != "doomed" or _cells(data, "trapped")[c] >= 0:
            continue
        starts = _grid(*_box(data, c), 7)
        starts = starts[np.abs(starts[:, 0]) <= 0.9]
        later = np.array([_rotation_ends(starts, t)[:, 0] for t in np.linspace(0, 13, 1500)])
        if len(starts) == 0 or not np.abs(later).max() > 0.95:
            continue
        rows, T = _steps(data, c)[0], 0.0
        for k in range(1, len(rows) + 1):
            T += float(h[rows[k - 1]])
            xs = np.array([_rotation_ends(starts, t)[:, 0] for t in np.linspace(0, T, 300)])
            if np.abs(xs).max() > 0.88:
                break
            if xs[-1].min() < -0.62:
                return c, k
    raise AssertionError("no doomed cell whose starts are beyond x = -0.6 early")


def test_a_tube_cut_while_the_flow_is_beyond_an_open_side_is_not_safe(rotation, tmp_path,
                                                                      capsys):
    # every cell but the outside ones claimed safe, and a doomed cell's tube cut to its
    # first k steps, when (closed form) some of its starts are beyond the open side
    # x = -0.6 without having crossed a limit yet, every leaf listed as its successor:
    # its image reaches past the open side where no limit is violated, so the cut to
    # the window does not apply and the part beyond the window escapes
    data = load_certificate_json(rotation)
    c, k = _doomed_cell_out_of_the_window_early(data)
    rows, _ = _steps(data, c)

    def change(data):
        for d, label in enumerate(list(data["cells"]["label"])):
            if label != "outside":
                _claim_safe(data, d)
        _replace_steps(data, c, _cells(data, "step_h")[rows[:k]],
                       _cells(data, "step_E")[rows[:k]])
        _set_successors(data, c, list(range(data["cells"]["count"])))
    reasons = _rejected_cell(rotation, tmp_path, capsys, change, c, cli=False)
    assert "may leave the window where no limit is proven violated" in reasons


def test_a_window_that_is_not_the_models_is_rejected(rotation, tmp_path, capsys):
    # the open side moved to x = -0.9, where the limit left holds: the stated window would
    # keep the flow inside, but the model's is [-0.6, 1.2]
    def change(data):
        data["window"][0][0] = "-9/10"
    assert "window differs" in _rejected(rotation, tmp_path, capsys, change)


def test_a_window_side_beyond_the_floats_is_malformed(rotation, tmp_path, capsys):
    # found by benchmarks/forgery_fuzz.py (the 3D subject): a side of 1e400 made the
    # checker's cell midpoints overflow before the window was compared with the model's
    def change(data):
        data["window"][1][1] = "1e400"
    forged = _tampered(rotation, tmp_path, change)
    with pytest.raises(CertificateError, match=r"window\[1\]"):
        check_certificate(forged, jobs=1)
    assert _check_cli(forged, capsys) == 2


# -- tubes stored as their first steps ---------------------------------------------------
def _crossing_time(x0, x1=Fraction(1, 10)):
    """Closed form travel time of the harvested stock (q = 0.16) from x0 down to x1 < x0 < 0.2."""
    R = lambda x: (0.8 - x) / (0.2 - x)  # noqa: E731
    return float(np.log(R(float(x0)) / R(float(x1))) / 0.6)


def _halved(h, E):
    return h / 2, E, None


def _reversed(h, E):
    return h[::-1].copy(), E[::-1].copy(), Fraction(float(h[-1]))


def _start_cut(h, E):
    return h[6:], E[6:], None


def _crossing_dropped(h, E):
    return h[:-1], E[:-1], None


def _subnormal_middle(h, E):
    h = h.copy()
    h[5:9] = 5e-324
    return h, E, None


@pytest.mark.parametrize("edit", [_halved, _reversed, _start_cut, _crossing_dropped,
                                  _subnormal_middle])
def test_edited_steps_prove_no_earlier_crossing(logistic, tmp_path, capsys, edit):  # noqa: F811
    # the doomed rank-0 cell with the most steps: its highest start crosses x = 0.1 at
    # the closed-form time t; the forger edits the steps and claims a bound below t
    data = load_certificate_json(logistic)
    rank, K = _cells(data, "rank"), np.diff(_cells(data, "step_start"))
    c = max((c for c, label in enumerate(data["cells"]["label"])
             if label == "doomed" and rank[c] == 0), key=lambda c: K[c])
    rows, _ = _steps(data, c)
    lo, hi = _box(data, c)
    assert hi[0] < Fraction(1, 5) and K[c] >= 10
    t = _crossing_time(hi[0])
    h, E, claimed = edit(_cells(data, "step_h")[rows], _cells(data, "step_E")[rows])
    T = sum((Fraction(float(v)) for v in h), Fraction(0)) if claimed is None else claimed
    bound = float(T)
    assert bound < t

    def change(data):
        _replace_steps(data, c, h, E)
        _set(data, "crossing_upper", c, bound)
    reasons = _rejected_cell(logistic, tmp_path, capsys, change, c)
    assert "rank 0 without a proven crossing" in reasons or "below the proven" in reasons


@pytest.mark.parametrize("keep", [1, 4])
def test_a_tube_cut_short_proves_no_false_safe_claim(logistic, tmp_path, capsys,  # noqa: F811
                                                     keep):
    # the undecided cell holding the unstable equilibrium 0.2: its starts below 0.2 cross
    # the floor (closed form). Claimed safe with its tube cut to its first steps (as a cut
    # tube is stored) and only its safe successors listed
    data = load_certificate_json(logistic)
    c = _undecided_at_the_threshold(data)
    lo, _ = _box(data, c)
    assert lo[0] < Fraction(1, 5) and np.isfinite(_crossing_time(lo[0]))
    rows, _ = _steps(data, c)
    labels = data["cells"]["label"]

    def change(data):
        _claim_safe(data, c)
        _replace_steps(data, c, _cells(data, "step_h")[rows[:keep]],
                       _cells(data, "step_E")[rows[:keep]])
        _set_successors(data, c, [d for d in _successors(data, c) if labels[d] == "safe"])
    reasons = _rejected_cell(logistic, tmp_path, capsys, change, c)
    assert "not among its successors" in reasons or "not proven kept" in reasons


def test_a_cut_tube_does_not_carry_a_survival_bound_past_its_end(logistic, tmp_path,  # noqa: F811
                                                                  capsys):
    # the threshold cell's lowest start crosses the floor at the closed-form time t; the
    # tube is cut to its first step, its image declared unknown, and survival claimed t + 1
    data = load_certificate_json(logistic)
    c = _undecided_at_the_threshold(data)
    lo, _ = _box(data, c)
    t = _crossing_time(lo[0])
    rows, _ = _steps(data, c)

    def change(data):
        _replace_steps(data, c, _cells(data, "step_h")[rows[:1]],
                       _cells(data, "step_E")[rows[:1]])
        data["cells"]["image_known"][c] = False
        _set(data, "survival_lower", c, t + 1)
    assert "exceeds the horizon" in _rejected_cell(logistic, tmp_path, capsys, change, c)


# -- stored numbers at the float corners -------------------------------------------------
def _first(data, label):
    return data["cells"]["label"].index(label)


def _rank0_bound_an_ulp_early(data):
    # the crossing evidence of a doomed cell is its step end time, an exact sum; the
    # largest float below it is a false bound
    rank = _cells(data, "rank")
    c = next(c for c, label in enumerate(data["cells"]["label"])
             if label == "doomed" and rank[c] == 0)
    _set(data, "crossing_upper", c, _below(_steps(data, c)[1]))
    return c


def _outside_surviving_a_subnormal(data):
    c = _first(data, "outside")
    _set(data, "survival_lower", c, 5e-324)
    return c


def _outside_crossing_before_zero(data):
    c = _first(data, "outside")
    _set(data, "crossing_upper", c, -5e-324)
    return c


def _horizon_of_signed_zeros(data):
    c = _first(data, "safe")
    _set(data, "horizon", c, [-0.0, 0.0])
    return c


@pytest.mark.parametrize("change, reason", [
    (_rank0_bound_an_ulp_early, "below the proven crossing time"),
    (_outside_surviving_a_subnormal, "survival time above 0"),
    (_outside_crossing_before_zero, "negative crossing time"),
    (_horizon_of_signed_zeros, "does not enclose the sum"),
])
def test_bounds_at_the_float_corners_are_compared_exactly(rotation, tmp_path, capsys, change,
                                                          reason):
    data = load_certificate_json(rotation)
    c = change(data)
    assert reason in _rejected_cell(rotation, tmp_path, capsys, change, c)


def test_the_whole_cell_flag_without_a_trapping_region_skips_nothing(rotation, tmp_path,
                                                                    capsys):
    # a doomed cell (its crossing proven by the honest check) claimed safe with the flag
    # that lets a cell inside a trapping region skip its flow, but no region: the checker
    # recomputes its steps and names why they do not make it safe
    data = load_certificate_json(rotation)
    rank = _cells(data, "rank")
    c = next(c for c, label in enumerate(data["cells"]["label"])
             if label == "doomed" and rank[c] == 0 and _cells(data, "survival_lower")[c] > 0)

    def change(data):
        _claim_safe(data, c)
        data["cells"]["trapped_whole"][c] = True
    reasons = _rejected_cell(rotation, tmp_path, capsys, change, c)
    assert "does not verify" not in reasons and "limits are not proven kept" in reasons


def test_claims_moved_to_another_parameter_value_are_checked_there(logistic, tmp_path,  # noqa: F811
                                                                    capsys):
    # q = 0.16 restated as q = 0.1 (point to point): the lower equilibrium moves from 0.2
    # to (1 - sqrt(0.6)) / 2 ~ 0.113, so the doomed starts above it no longer decline
    assert (1 - np.sqrt(0.6)) / 2 < 0.12

    def change(data):
        data["parameters"]["q"] = ["1/10", "1/10"]
    forged = _tampered(logistic, tmp_path, change)
    result = check_certificate(forged, jobs=1)
    assert not result.valid
    assert [p["name"] for p in result.parameters_narrowed] == ["q"]
    assert any(f["label"] == "doomed" for f in result.failures)
    assert _check_cli(forged, capsys) == 1
