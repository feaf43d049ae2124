"""Tests of the proof loop (issue 4): every label and bound against something outside it.

* Soundness against simulation: scipy's DOP853 (the method behind ``solve_ivp``) on
  20,000 random starting points per model, with right-hand sides written out by hand
  here in numpy (independent of the project's parser and compiler).
* Exact boundaries and crossing times from closed forms (REFERENCES.md R1, R2, R4, R5).
* Refinement monotonicity, bad input, the summary, interrupts.
"""

from __future__ import annotations

import hashlib
import importlib
import json
import math
import re
import tempfile
from collections import Counter
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path
from typing import Callable

import numpy as np
import pytest
from scipy.integrate import DOP853, solve_ivp

from certify import ModelError, load_model, parse_model, prove, read_certificate
from certify.cells import CellTree
from certify.cli import main

prove_module = importlib.import_module("certify.prove")

ROOT = Path(__file__).resolve().parent.parent
DATA = Path(__file__).resolve().parent / "data"
FERMENTER = ROOT / "models" / "fermenter.toml"
SIR = DATA / "prove_sir_cap.toml"
PENDULUM = DATA / "prove_damped_pendulum.toml"
LOGISTIC = DATA / "prove_logistic_harvest.toml"
OVERDAMPED = DATA / "prove_overdamped.toml"
DECAY = DATA / "prove_decay.toml"
BLOWUP = DATA / "prove_blowup.toml"
NEVER = DATA / "prove_never_satisfiable.toml"
ROTATION = DATA / "prove_rotation_open_side.toml"

DECIDED = ("safe", "doomed", "outside")
N_POINTS = 20_000

# -- tolerances of the simulation checks --------------------------------------------------
# Every limit below has a margin g with |grad g| = 1 (a state minus a number), so a
# margin error equals a state error.
#
# The bulk run integrates chunks of CHUNK points as one stacked system (rtol 1e-10,
# atol 1e-12). scipy controls the RMS of the error over a chunk, so one trajectory may
# carry up to sqrt(2 * CHUNK) ~ 45 times the tolerance per step; over the few hundred
# steps of these non-chaotic 2D flows its margin error stays far below BAND. The bulk run
# only selects suspects: every point it places within BAND of contradicting its label is
# solved again on its own (rtol 1e-12, atol 1e-14), and only that solve can fail a test.
# The single solves are sampled every GRID time units on their dense output; a dip of a
# margin between samples is at most max|g''| GRID^2 / 8 < 1e-7 for these models, and the
# solution error is below 1e-9, so a contradiction must exceed TOL = 1e-6 in the margin,
# and TOL_T = 2 GRID in time (the first sample after a crossing can lag it by GRID).
CHUNK = 1000
BAND = 1e-4
GRID = 1e-3
TOL = 1e-6
TOL_T = 2 * GRID


# -- the models, written out by hand ------------------------------------------------------
def fermenter_rhs(y):
    """Andrews-inhibited chemostat of models/fermenter.toml, y = (s, x)."""
    s, x = y
    mu = 0.5 * s / (0.5 + s + s * s / 2.0)
    return np.stack([0.2 * (10.0 - s) - mu * x / 0.5, (mu - 0.2) * x])


def fermenter_margins(y):
    s, x = y
    return np.stack([x - 1.0, 9.0 - x, 9.0 - s])


def sir_rhs(y):
    """Kermack & McKendrick 1927 SIR with beta = 2, gamma = 1, y = (S, I)."""
    S, I = y
    return np.stack([-2.0 * S * I, 2.0 * S * I - I])


def sir_margins(y):
    return np.stack([0.1 - y[1]])


def pendulum_rhs(y):
    """Damped pendulum theta'' = -0.5 theta' - sin theta (REFERENCES.md R8)."""
    theta, w = y
    return np.stack([w, -0.5 * w - np.sin(theta)])


def pendulum_margins(y):
    theta, w = y
    return np.stack([2.5 - theta, theta + 2.5, 3.5 - w, w + 3.5])


def rotation_rhs(y):
    """Damped rotation x' = -y - c x, y' = x - c y with c = 0.05 (a linear system)."""
    x, y_ = y
    return np.stack([-y_ - 0.05 * x, x - 0.05 * y_])


def rotation_margins(y):
    return np.stack([0.9 - y[0], y[0] + 0.9])


@dataclass(frozen=True)
class Case:
    """A model file with its hand-written flow and limits for the simulation checks."""

    path: Path
    depth: int
    rhs: Callable
    margins: Callable
    settle: float
    expect: tuple


CASES = {
    # depth 8 is the first at which the fermenter proves safe cells
    "fermenter": Case(FERMENTER, 8, fermenter_rhs, fermenter_margins, 100.0,
                      ("safe", "doomed", "outside")),
    # every SIR trajectory ends on the line I = 0 of equilibria, whose cells stay
    # undecided (REFERENCES.md R5), so no SIR cell can be proven safe
    "sir": Case(SIR, 7, sir_rhs, sir_margins, 100.0, ("doomed",)),
    "pendulum": Case(PENDULUM, 7, pendulum_rhs, pendulum_margins, 40.0, ("safe", "doomed")),
    # trajectories leave the window at x = -0.6 and come back or cross x = -0.9 out there
    "rotation": Case(ROTATION, 6, rotation_rhs, rotation_margins, 40.0, ("safe", "doomed")),
}


# -- simulation ---------------------------------------------------------------------------
def first_times_bulk(case, x0, t_end, thresholds):
    """First sampled time at which the smallest margin drops below each threshold.

    Parameters
    ----------
    case : Case
    x0 : ndarray, shape (N, n)
    t_end : float
    thresholds : sequence of float

    Returns
    -------
    ndarray, shape (len(thresholds), N)
        ``inf`` where the margin stays at or above the threshold up to `t_end`.
    """
    out = np.full((len(thresholds), len(x0)), np.inf)
    for start in range(0, len(x0), CHUNK):
        part = x0[start:start + CHUNK]
        out[:, start:start + CHUNK] = _first_times_chunk(case, part, t_end, thresholds)
    return out


def _first_times_chunk(case, x0, t_end, thresholds):
    N, n = x0.shape
    out = np.full((len(thresholds), N), np.inf)

    def record(t, y):
        g = case.margins(y.reshape(n, N, -1)).min(axis=0)
        for i, c in enumerate(thresholds):
            below = g < c
            hit = below.any(axis=1) & np.isinf(out[i])
            out[i, hit] = t[np.argmax(below[hit], axis=1)]

    record(np.zeros(1), x0.T.reshape(-1, 1))
    solver = DOP853(lambda t, y: case.rhs(y.reshape(n, N)).reshape(-1), 0.0,
                    x0.T.reshape(-1), t_end, rtol=1e-10, atol=1e-12)
    while solver.status == "running":
        solver.step()
        assert solver.status != "failed", solver.status
        t = np.linspace(solver.t_old, solver.t, 9)[1:]
        record(t, solver.dense_output()(t))
    return out


def first_times_single(case, x0, t_end, thresholds):
    """The same for one point, by ``solve_ivp`` with tight tolerances, sampled every GRID."""
    sol = solve_ivp(lambda t, y: case.rhs(y[:, None])[:, 0], (0.0, t_end), x0,
                    method="DOP853", rtol=1e-12, atol=1e-14, dense_output=True)
    assert sol.success, sol.message
    t = np.linspace(0.0, t_end, int(math.ceil(t_end / GRID)) + 1)
    g = case.margins(sol.sol(t)).min(axis=0)
    out = []
    for c in thresholds:
        below = np.flatnonzero(g < c)
        out.append(t[below[0]] if len(below) else np.inf)
    return out


def contradictions(case, points, labels, lower, upper):
    """Points whose simulated trajectory contradicts their label or their time bounds.

    Returns
    -------
    list of str
        One line per contradiction (a reproducer).
    """
    finite_upper = upper[np.isfinite(upper)]
    t_end = max(case.settle, (finite_upper.max() if len(finite_upper) else 0.0) + 1.0)
    clearly, nearly = first_times_bulk(case, points, t_end, [-BAND, BAND])
    safe, doomed = labels == "safe", labels == "doomed"
    suspects = ((safe & np.isfinite(nearly))          # comes near a limit
                | (doomed & ~(clearly <= upper))     # not clearly across by its bound
                | (~safe & (nearly < lower)))        # near a limit before its survival bound
    found = []
    for i in np.flatnonzero(suspects):
        below, at = first_times_single(case, points[i], t_end, [-TOL, TOL])
        where = f"start {points[i].tolist()} labelled {labels[i]} with [{lower[i]}, {upper[i]}]"
        if safe[i] and np.isfinite(below):
            found.append(f"{where}: crosses a limit at t = {below}")
        if doomed[i] and not at <= upper[i] + TOL_T:
            found.append(f"{where}: has not crossed by its upper bound (first at {at})")
        if not safe[i] and below < lower[i] - TOL_T:
            found.append(f"{where}: crosses at t = {below}, before its lower bound")
    return found


# -- proofs shared by several tests -------------------------------------------------------
@dataclass
class Run:
    """A proof, its summary and its certificate read back from disk."""

    model: object
    proof: object
    summary: dict
    cert: object


@pytest.fixture(scope="module")
def certified(tmp_path_factory):
    """``certified(path, depth, **options)`` proves once per arguments and caches."""
    cache = {}

    def get(path, depth, **options):
        key = (str(path), depth, tuple(sorted(options.items())))
        if key not in cache:
            model = load_model(path)
            proof = prove(model, max_depth=depth, **options)
            out = tmp_path_factory.mktemp(f"{Path(path).stem}-{depth}")
            summary = prove_module.write_proof(proof, out, figures=False)
            cache[key] = Run(model, proof, summary, read_certificate(out / "certificate.json.gz"))
        return cache[key]

    return get


def random_points(model, count, generator):
    """Uniform random points in the window of `model`."""
    lo = np.array([float(a) for a, _ in model.window])
    hi = np.array([float(b) for _, b in model.window])
    return generator.uniform(lo, hi, (count, len(lo)))


def cell_points(cert, generator, per_cell=4):
    """Corners, centre and random points of every cell, clipped to the window.

    Returns
    -------
    points : ndarray, shape (M, n)
    cell : ndarray of int, shape (M,)
        The cell each point was taken from.
    """
    lo, hi = cert.lo, cert.hi
    L, n = lo.shape
    corners = np.array(np.meshgrid(*[[0.0, 1.0]] * n, indexing="ij")).reshape(n, -1).T
    fractions = np.concatenate([corners, np.full((1, n), 0.5),
                                generator.uniform(0, 1, (per_cell, n))])
    points = lo[:, None, :] + fractions[None] * (hi - lo)[:, None, :]
    wlo = np.array([float(a) for a, _ in cert.model.window])
    whi = np.array([float(b) for _, b in cert.model.window])
    points = np.clip(points, wlo, whi).reshape(-1, n)
    return points, np.repeat(np.arange(L), len(fractions))


# -- soundness against simulation ---------------------------------------------------------
@pytest.mark.parametrize("name", list(CASES))
def test_labels_agree_with_simulation(name, certified):
    # scipy DOP853 on 20,000 random starts; tolerances as explained at the top of the file
    case = CASES[name]
    run = certified(case.path, case.depth)
    points = random_points(run.model, N_POINTS, np.random.default_rng(4))
    labels = run.cert.label_at(points)
    lower, upper = run.cert.crossing_time_bounds(points)
    counts = Counter(labels)
    for label in case.expect:
        assert counts[label] > 0, counts  # the check is not vacuous
    # outside: a limit is violated at t = 0 (exact sign: a float difference of two
    # floats has the sign of the exact difference)
    g0 = case.margins(points.T).min(axis=0)
    assert np.all(g0[labels == "outside"] < 0)
    assert np.all(lower[labels == "outside"] == 0)
    # safe and doomed points satisfy the limits at t = 0
    assert np.all(g0[(labels == "safe") | (labels == "doomed")] >= 0)
    # safe: no proven crossing; doomed: a finite upper bound above the lower bound
    assert np.all(np.isinf(lower[labels == "safe"]) & np.isinf(upper[labels == "safe"]))
    doomed = labels == "doomed"
    assert np.all(np.isfinite(upper[doomed]) & (lower[doomed] <= upper[doomed]))
    found = contradictions(case, points, labels, lower, upper)
    assert not found, "\n".join(found[:10])


# -- exact boundaries ---------------------------------------------------------------------
def sir_peak(S0, I0, rho=0.5):
    """Largest infected fraction of the trajectory from (S0, I0).

    Kermack & McKendrick 1927: S + I - rho ln S is conserved; I peaks where S = rho if
    S0 > rho (Hethcote 2000 (mem)), else I only falls. I0 = 0 is an equilibrium.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        over = S0 + I0 - rho * (1.0 + np.log(S0 / rho))
    return np.where((S0 <= rho) | (I0 == 0), I0, over)


def test_sir_peak_formula_reference_values():
    # REFERENCES.md R5 (Kermack & McKendrick 1927): I*(0.6), I*(0.7), I*(0.8) put the
    # peak exactly at the cap 0.1, and I* = 0 at S0 = 0.8861249148046152
    for S0, I0 in [(0.6, 0.09116077839698), (0.7, 0.06823611831061),
                   (0.8, 0.03500181462287), (0.8861249148046152, 1e-300)]:
        assert sir_peak(np.array(S0), np.array(I0)) == pytest.approx(0.1, abs=1e-13)


# Cell boxes are float enclosures (one ulp outward) and the closed forms are evaluated
# in double precision, both far below this tolerance on the quantities compared.
EXACT_TOL = 1e-12


def test_sir_cells_respect_the_exact_peak(certified):
    # Kermack & McKendrick 1927: safe iff the peak of I stays <= 0.1
    run = certified(SIR, CASES["sir"].depth)
    points, cell = cell_points(run.cert, np.random.default_rng(5))
    peak = sir_peak(points[:, 0], points[:, 1])
    labels = run.cert.labels[cell]
    assert Counter(run.cert.labels)["doomed"] > 0
    assert Counter(run.cert.labels)["safe"] > 0
    assert not np.any((labels == "safe") & (peak > 0.1 + EXACT_TOL))
    bad = (labels == "doomed") & (peak <= 0.1 - EXACT_TOL)
    assert not bad.any(), points[bad][:5]
    # the same at random points through label_at
    points = random_points(run.model, N_POINTS, np.random.default_rng(6))
    labels = run.cert.label_at(points)
    peak = sir_peak(points[:, 0], points[:, 1])
    assert not np.any((labels == "safe") & (peak > 0.1))
    assert not np.any((labels == "doomed") & (peak <= 0.1))


def overdamped_sup(p, q):
    """Supremum over t >= 0 of x1(t) = (2p+q) u - (p+q) u^2, u = e^-t (exact, R4)."""
    a, b = 2 * p + q, p + q
    with np.errstate(divide="ignore", invalid="ignore"):
        u = a / (2 * b)
        inner = np.where((b > 0) & (u > 0) & (u < 1), a * a / (4 * b), -np.inf)
    return np.maximum(np.maximum(p, 0.0), inner)


def overdamped_crossing(p, q):
    """First t with x1(t) = 1: t = -ln u, u the largest root <= 1 (exact, R4)."""
    a, b = 2 * p + q, p + q
    with np.errstate(divide="ignore", invalid="ignore"):
        return -np.log((a + np.sqrt(a * a - 4 * b)) / (2 * b))


def test_overdamped_reference_values():
    # REFERENCES.md R4 (exact): q*(0) = 4 is the boundary; T(0, 5) and T(-1, 8)
    assert overdamped_sup(0.0, 4.0) == pytest.approx(1.0, abs=1e-15)
    assert overdamped_sup(-1.0, 6.828427124746190) == pytest.approx(1.0, abs=1e-14)
    assert overdamped_crossing(0.0, 5.0) == pytest.approx(0.3235071311574468, abs=1e-14)
    assert overdamped_crossing(-1.0, 8.0) == pytest.approx(0.46108045943398307, abs=1e-14)


def test_overdamped_cells_respect_the_exact_boundary_and_times(certified):
    # exact (R4): safe iff sup x1 <= 1; doomed starts cross at -ln u within the bounds
    run = certified(OVERDAMPED, 7)
    counts = Counter(run.cert.labels)
    assert counts["safe"] > 0 and counts["doomed"] > 0
    points, cell = cell_points(run.cert, np.random.default_rng(7))
    points = np.concatenate([points, random_points(run.model, N_POINTS, np.random.default_rng(8))])
    sup = overdamped_sup(points[:, 0], points[:, 1])
    labels = np.concatenate([run.cert.labels[cell], run.cert.label_at(points[len(cell):])])
    assert not np.any((labels == "safe") & (sup > 1 + EXACT_TOL))
    assert not np.any((labels == "doomed") & (sup <= 1 - EXACT_TOL))
    lower, upper = run.cert.crossing_time_bounds(points)
    doomed = (labels == "doomed") & (sup > 1 + EXACT_TOL)
    T = overdamped_crossing(points[doomed, 0], points[doomed, 1])
    assert np.all((lower[doomed] <= T + EXACT_TOL) & (T <= upper[doomed] + EXACT_TOL))
    # every survival bound is below the exact crossing time (inf when never crossing)
    T_all = np.where(sup > 1, overdamped_crossing(points[:, 0], points[:, 1]), np.inf)
    assert np.all(lower <= T_all + EXACT_TOL)


def logistic_crossing(x0):
    """R2a (exact, partial fractions): T = (5/3) ln[(0.8 - x0) / (7 (0.2 - x0))]."""
    return 5.0 / 3.0 * np.log((0.8 - x0) / (7.0 * (0.2 - x0)))


def test_logistic_harvest_exact_boundary_and_times(certified):
    # exact (R2a, Clark 1976 (mem)): safe = [0.2, 1.2], doomed = [0.1, 0.2)
    assert logistic_crossing(0.15) == pytest.approx(1.0317320140103714, abs=1e-14)
    run = certified(LOGISTIC, 10)
    points, cell = cell_points(run.cert, np.random.default_rng(9))
    x0 = points[:, 0]
    labels = run.cert.labels[cell]
    assert Counter(run.cert.labels)["safe"] > 0 and Counter(run.cert.labels)["doomed"] > 0
    assert not np.any((labels == "safe") & (x0 < 0.2 - EXACT_TOL))
    assert not np.any((labels == "doomed") & (x0 >= 0.2 + EXACT_TOL))
    lower, upper = run.cert.crossing_time_bounds(points)
    doomed = (run.cert.label_at(points) == "doomed") & (x0 < 0.2)
    T = logistic_crossing(x0[doomed])
    assert np.all((lower[doomed] <= T) & (T <= upper[doomed]))


# -- exact crossing times -----------------------------------------------------------------
@pytest.mark.parametrize("window,options", [
    # R1 as listed: the window side x = 1 is neither a limit nor a side where the flow
    # points inward, so each cell's flow must reach x = 0.5 within one horizon
    # (T(4) = 4.16 < 5)
    ("[1, 4]", {"min_horizon": 5.0}),
    # a window reaching below the limit: its lower side is a limit, and the doomed
    # proofs chain cells (ranks above 0)
    ("[0.25, 4]", {}),
])
def test_exponential_decay_crossing_times(window, options):
    # exact (R1): x' = -x/2 reaches 0.5 at T = ln(x0/0.5)/0.5 = 2 ln(2 x0)
    model = parse_model(DECAY.read_text().replace("x = [1, 4]", f"x = {window}"))
    proof = prove(model, max_depth=6, **options)
    assert proof.counts["undecided"] == 0 and proof.counts["safe"] == 0
    lo = float(model.window[0][0])
    x0 = np.concatenate([np.linspace(lo, 4.0, 2001), np.random.default_rng(10).uniform(lo, 4, 2000)])
    x0 = x0[x0 >= 0.5]
    assert 2 * math.log(2 * 4.0) == pytest.approx(4.158883083359672, abs=1e-14)  # R1 T(4)
    T = 2 * np.log(2 * x0)
    cert = _certificate_of(proof)
    labels = cert.label_at(x0[:, None])
    assert np.all(labels == "doomed")
    lower, upper = cert.crossing_time_bounds(x0[:, None])
    assert np.all((lower <= T) & (T <= upper)), x0[(lower > T) | (T > upper)][:5]


def _certificate_of(proof):
    """Write a proof to a temporary folder and read its certificate back."""
    with tempfile.TemporaryDirectory() as tmp:
        prove_module.write_proof(proof, tmp, figures=False)
        return read_certificate(Path(tmp) / "certificate.json.gz")


# -- refinement monotonicity --------------------------------------------------------------
@pytest.mark.parametrize("path,shallow,deep", [
    (FERMENTER, 6, 8), (PENDULUM, 5, 7), (OVERDAMPED, 5, 7),
])
def test_deeper_run_never_relabels_decided_points(path, shallow, deep, certified):
    # docs/design.md, section 5: decided cells are never split or relabelled
    a, b = certified(path, shallow), certified(path, deep)
    points = random_points(a.model, N_POINTS, np.random.default_rng(11))
    la, lb = a.cert.label_at(points), b.cert.label_at(points)
    both = np.isin(la, DECIDED) & np.isin(lb, DECIDED)
    assert both.sum() > N_POINTS // 4
    assert np.array_equal(la[both], lb[both]), Counter(zip(la[both & (la != lb)], lb[both & (la != lb)]))
    # the deeper run decides at least as much of the window
    assert b.summary["fractions"]["undecided"] <= a.summary["fractions"]["undecided"]


# -- bad input ----------------------------------------------------------------------------
@pytest.mark.parametrize("window,cap", [("[1, 2]", "10"), ("[1, 2]", "1e6"), ("[1, 12]", "10")])
def test_blow_up_inside_the_window(window, cap):
    # x' = x^2 from x0 escapes to infinity at t = 1/x0 (exact) and reaches the cap at
    # T = 1/x0 - 1/cap. Flows that cannot be enclosed up to the cap leave their cells
    # undecided; doomed cells must bracket T. With the window [1, 12] its upper side
    # lies beyond the cap, so images leaving through it have crossed.
    text = BLOWUP.read_text().replace("x <= 10", f"x <= {cap}")
    model = parse_model(text.replace("x = [1, 2]", f"x = {window}"))
    proof = prove(model, max_depth=6)
    assert set(proof.labelling.label) <= {"doomed", "undecided", "outside"}
    x0 = np.linspace(1.0, float(model.window[0][1]), 1001)
    T = np.maximum(1.0 / x0 - 1.0 / float(cap), 0.0)  # 0 above the cap
    cert = _certificate_of(proof)
    labels = cert.label_at(x0[:, None])
    lower, upper = cert.crossing_time_bounds(x0[:, None])
    assert np.all((labels == "outside") == (x0 > float(cap)))
    assert np.all(lower <= T)
    doomed = labels == "doomed"
    assert np.all(T[doomed] <= upper[doomed])
    if window == "[1, 12]":
        assert np.all(doomed | (x0 > float(cap)))


def test_limits_that_never_hold_make_everything_outside():
    # x >= 3 and x <= 1 together hold nowhere (exact)
    model = load_model(NEVER)
    proof = prove(model, max_depth=4)
    assert set(proof.labelling.label) == {"outside"}
    assert proof.fractions["outside"] == 1.0
    cert = _certificate_of(proof)
    x0 = np.linspace(0.0, 4.0, 101)[:, None]
    assert np.all(cert.label_at(x0) == "outside")
    lower, upper = cert.crossing_time_bounds(x0)
    assert np.all(lower == 0) and np.all(upper == 0)


def test_window_of_zero_width_is_a_model_error(tmp_path):
    text = PENDULUM.read_text().replace("range = [-2.5, 2.5]", "range = [1, 1]")
    with pytest.raises(ModelError, match=r"\[states\] theta: the range \[1, 1\] is empty"):
        parse_model(text, path="zero.toml")
    path = tmp_path / "zero.toml"
    path.write_text(text)
    with pytest.raises(ModelError, match="zero.toml"):
        load_model(path)


def _one_error_line(capsys):
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("certify: error: "), err
    return err[0]


def test_cli_prove_missing_file(tmp_path, capsys):
    path = tmp_path / "missing.toml"
    assert main(["prove", str(path), "--out", str(tmp_path / "out"), "--quiet"]) == 2
    assert "missing.toml: no such file" in _one_error_line(capsys)
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("param,message", [
    ("zz=1", "unknown parameter 'zz'"),
    ("c=2:1", "LO is above HI"),
    ("c=x", "is not a number"),
])
def test_cli_prove_bad_param(param, message, tmp_path, capsys):
    code = main(["prove", str(PENDULUM), "--param", param, "--out", str(tmp_path), "--quiet"])
    assert code == 2
    assert message in _one_error_line(capsys)


# -- the summary --------------------------------------------------------------------------
SUMMARY_KEYS = {"model", "model_sha256", "window", "fractions", "cells", "depth_reached",
                "finest_cells_per_side", "seconds", "certificate"}


def test_cli_prove_json_summary(tmp_path, capsys):
    out = tmp_path / "proof"
    assert main(["prove", str(PENDULUM), "--max-depth", "5", "--out", str(out), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary == json.loads((out / "summary.json").read_text())
    assert SUMMARY_KEYS <= set(summary)
    assert summary["model"] == "Damped pendulum with an angle limit"
    assert summary["model_sha256"] == hashlib.sha256(PENDULUM.read_bytes()).hexdigest()
    assert summary["window"] == [[-2.5, 2.5], [-3.5, 3.5]]
    assert set(summary["fractions"]) == {"safe", "doomed", "outside", "undecided"}
    assert abs(sum(summary["fractions"].values()) - 1.0) <= 1e-12
    assert all(0 <= f <= 1 for f in summary["fractions"].values())
    assert Path(summary["certificate"]) == out / "certificate.json.gz"
    assert (out / "map.png").stat().st_size > 0
    cert = read_certificate(summary["certificate"])
    assert summary["cells"] == {k: int(np.sum(cert.labels == k)) for k in summary["fractions"]}
    # finest_cells_per_side[k] = window side / smallest cell side along k (exact dyadics)
    sides = np.array([hi - lo for lo, hi in summary["window"]])
    smallest = (cert.hi - cert.lo).min(axis=0)
    assert summary["finest_cells_per_side"] == [int(round(s)) for s in sides / smallest]
    assert summary["finest_cells_per_side"] == [2 ** summary["depth_reached"]] * 2
    assert summary["depth_reached"] == 5


def test_cli_prove_table_names_the_window_sides(tmp_path, capsys):
    # the SIR test model (time unit "d"): rest lines S = 0 and I = 0, S' = -beta S I <= 0
    # on S = 1 (no outflow), open on I = 0.1
    out = tmp_path / "sir"
    assert main(["prove", str(SIR), "--max-depth", "4", "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "sides:     S = 0 invariant, S = 1 no-outflow, I = 0 invariant, I = 0.1 open" in text
    assert re.search(r"crosses a limit within [0-9.]+ d$", text, re.MULTILINE)


def test_fractions_split_straddling_cells_exactly(certified):
    # The fermenter's limits are linear in one state each: the part of a cell inside
    # K = {x >= 1, x <= 9, s <= 9} is a box, so each label's volume is exact.
    run = certified(FERMENTER, 6)
    cert, summary = run.cert, run.summary
    lo = np.maximum(cert.lo, [-np.inf, 1.0])
    hi = np.minimum(cert.hi, [9.0, 9.0])
    inside = np.prod(np.clip(hi - lo, 0, None), axis=1) / 120.0
    expected = {k: float(inside[cert.labels == k].sum()) for k in ("safe", "doomed", "undecided")}
    expected["outside"] = 1.0 - sum(expected.values())
    assert summary["fractions_exact"] is True
    assert abs(sum(summary["fractions"].values()) - 1.0) <= 1e-12
    for k, v in expected.items():
        assert summary["fractions"][k] == pytest.approx(v, abs=1e-12), k
    # the limits cut cells here, and straddling cells are not all outside
    straddling = (cert.lo[:, 1] < 1.0) & (cert.hi[:, 1] > 1.0)
    assert straddling.any() and np.any(cert.labels[straddling] != "outside")


# -- interrupts ---------------------------------------------------------------------------
@pytest.fixture
def interrupt_second_round(monkeypatch):
    """Make the prover raise KeyboardInterrupt when it analyses its second batch of cells."""
    calls = []
    original = prove_module._Prover.analyse

    def analyse(self, nodes):
        calls.append(len(nodes))
        if len(calls) == 2:
            raise KeyboardInterrupt
        return original(self, nodes)

    monkeypatch.setattr(prove_module._Prover, "analyse", analyse)
    return calls


def test_interrupt_keeps_the_first_round(interrupt_second_round, tmp_path, capsys):
    model = load_model(PENDULUM)
    start_depth = prove_module.Method().start_depth
    interrupted = prove(model, max_depth=7)
    assert len(interrupt_second_round) == 2
    assert interrupted.interrupted and interrupted.rounds == 1
    assert interrupted.stop_reason == "interrupted"
    # the proof of the first round alone: all leaves at the start depth, one analysis
    interrupt_second_round.clear()
    first = prove(model, max_depth=start_depth)
    assert not first.interrupted and len(interrupt_second_round) == 1
    np.testing.assert_array_equal(interrupted.leaves, first.leaves)
    np.testing.assert_array_equal(interrupted.labelling.label, first.labelling.label)
    np.testing.assert_array_equal(interrupted.labelling.crossing_upper,
                                  first.labelling.crossing_upper)
    assert interrupted.fractions == first.fractions
    # the command line writes the certificate of that round and exits with 130
    interrupt_second_round.clear()
    out = tmp_path / "proof"
    assert main(["prove", str(PENDULUM), "--max-depth", "7", "--out", str(out), "--quiet"]) == 130
    assert "interrupted" in capsys.readouterr().err
    cert = read_certificate(out / "certificate.json.gz")
    np.testing.assert_array_equal(cert.labels, first.labelling.label)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["interrupted"] is True and summary["depth_reached"] == start_depth


# -- window faces and successors -------------------------------------------------------

ROOT_FACE = """
[model]
name = "growth with a square-root rate"
[states]
x = [0, 1]
y = [0, 1]
[parameters]
k = 1
[equations]
x = "x*sqrt(y)"
y = "-k*y"
[constraints]
cap = "x <= 2"
"""


def _face_kinds(model, order):
    from certify.evaluate import parameter_enclosures
    from certify.faces import analyse_faces
    from certify.taylor import flow_programs

    faces = analyse_faces(model, flow_programs(model, order), CellTree(model.window),
                          parameter_enclosures(model))
    return {(f["axis"], f["side"]): f["kind"] for f in faces}


def test_rest_lines_of_the_epidemic_are_invariant_faces():
    # S' = -beta S I vanishes on S = 0 and I' = (beta S - gamma) I on I = 0 (by
    # inspection); on S = 1 and I = 0.1 the normal components are not identically 0,
    # and on S = 1 it is -beta I <= 0 (no outflow).
    assert _face_kinds(load_model(SIR), 4) == {
        (0, "lo"): "invariant", (0, "hi"): "no-outflow", (1, "lo"): "invariant",
        (1, "hi"): "open"}


def test_a_face_near_which_the_field_is_not_lipschitz_stays_open():
    # x' = x sqrt(y) vanishes on x = 0 and y' = -k y on y = 0, but the derivative
    # x / (2 sqrt(y)) of the first component is unbounded near y = 0, which both faces
    # reach: no Lipschitz bound, no uniqueness argument, so both stay open.
    kinds = _face_kinds(parse_model(ROOT_FACE), 2)
    assert kinds[(0, "lo")] == "open" and kinds[(1, "lo")] == "open"


def _random_boxes(rng, grid, count):
    """Boxes in the unit square: on grid lines (so they touch leaves), anywhere, and
    flat along one axis (a third of each)."""
    for trial in range(count):
        if trial % 3 == 0:
            ends = rng.integers(0, grid + 1, size=(2, 2)) / grid
        else:
            ends = rng.random((2, 2))
        if trial % 3 == 2:
            axis = trial % 2
            ends[1, axis] = ends[0, axis] = rng.integers(0, grid + 1) / grid
        yield ends.min(0), ends.max(0)


def _tube_reaches(proof, axis, value):
    """Per leaf: some a-priori box of its tube reaches below ``x_axis = value``."""
    start = proof.steps.offsets(proof.leaves)
    below = proof.steps.gather(proof.leaves, "E")[:, axis, 0] < value
    owner = np.repeat(np.arange(len(proof.leaves)), np.diff(start))
    return np.bincount(owner, weights=below, minlength=len(proof.leaves)) > 0


def test_trajectories_that_leave_the_window_are_followed(certified, capsys):
    # x = -0.6 is an open side of the damped rotation: the flow leaves there for
    # y > 0.03 and comes back half a turn later (r(t) = r0 exp(-t/20), closed form)
    run = certified(ROTATION, 6)
    kinds = {(f["state"], f["side"]): f["kind"] for f in run.summary["faces"]}
    assert kinds[("x", "lo")] == "open" and kinds[("x", "hi")] == "limit"
    labels = run.proof.labelling.label
    outside_the_window = _tube_reaches(run.proof, 0, -0.6)
    # cells whose trajectories went out and came back are proven safe; cells whose
    # trajectories cross x = -0.9, beyond the window, are proven doomed
    assert np.sum(outside_the_window & (labels == "safe")) > 10
    beyond_left = _tube_reaches(run.proof, 0, -0.9)
    assert np.sum(beyond_left & (labels == "doomed")) > 10
    # the certificate passes the independent checker
    cert = run.summary["certificate"]
    assert main(["check", cert, "--jobs", "1", "--quiet"]) == 0
    assert capsys.readouterr().out.startswith("VALID: ")


def test_open_sides_are_reported_by_prove_and_show(tmp_path, capsys):
    out = tmp_path / "rotation"
    assert main(["prove", str(ROTATION), "--max-depth", "3", "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "open:      the flow may leave the window at x = -0.6, y = -1.2, y = 1.2;" in text
    assert main(["show", str(ROTATION)]) == 0
    text = capsys.readouterr().out
    assert "  x = -0.6: open\n  x = 1.2: limit\n  y = -1.2: open\n  y = 1.2: open" in text
    assert main(["show", str(ROTATION), "--json"]) == 0
    sides = json.loads(capsys.readouterr().out)["sides"]
    assert [(s["state"], s["value"], s["kind"]) for s in sides] == [
        ("x", "-0.6", "open"), ("x", "1.2", "limit"), ("y", "-1.2", "open"),
        ("y", "1.2", "open")]


def test_safe_set_and_survival_bounds_agree_with_networkx():
    # the safe fixpoint and the survival lower bounds of docs/design.md, section 5 on a
    # random graph, against networkx (an outside reference): a candidate is safe unless
    # it reaches a non-candidate inside the limits; L_c = min(first_unkept_c,
    # T_c + min L_d) over successors d inside the limits is a shortest path from the
    # cells' own bounds. Weights are multiples of 1/4 so that the sums are exact.
    import networkx as nx

    from certify.labels import CellFacts, label_cells

    rng = np.random.default_rng(11)
    L = 400
    pairs = np.unique(rng.integers(0, L, (900, 2)), axis=0).astype(np.int32)
    src, dst = pairs[:, 0], pairs[:, 1]
    outside = rng.random(L) < 0.1
    kept = rng.random(L) < 0.85
    horizon = rng.integers(1, 9, L) / 4
    first_unkept = np.where(kept, np.inf, rng.integers(0, 9, L) / 4)
    facts = CellFacts(outside=outside, flow_ok=np.ones(L, bool), kept=kept,
                      escapes=np.zeros(L, bool), crossing=np.full(L, np.inf),
                      horizon_lo=horizon, horizon_hi=horizon, first_unkept=first_unkept,
                      src=src, dst=dst)
    with np.errstate(invalid="ignore"):  # as in prove(): inf bounds stay inf
        labelling = label_cells(facts)
    g = nx.DiGraph()
    g.add_nodes_from(range(L))
    g.add_edges_from((int(a), int(b)) for a, b in pairs if not outside[b])
    candidate = ~outside & kept
    bad = set()
    for t in np.flatnonzero(~candidate & ~outside):
        bad |= nx.ancestors(g, int(t)) | {int(t)}
    safe = {int(c) for c in np.flatnonzero(candidate) if c not in bad}
    assert 0 < len(safe) < L
    assert set(np.flatnonzero(labelling.label == "safe").tolist()) == safe
    # reversed graph: d -> c weighs T_c; a super node reaches c with c's own bound
    r = nx.DiGraph()
    r.add_weighted_edges_from((int(b), int(a), horizon[a]) for a, b in g.edges)
    own = np.where(outside, 0.0, first_unkept)
    r.add_weighted_edges_from(("start", int(c), own[c]) for c in np.flatnonzero(np.isfinite(own)))
    dist = nx.single_source_dijkstra_path_length(r, "start")
    for c in range(L):
        if c in safe:
            expected = np.inf
        elif outside[c]:
            expected = 0.0
        else:
            expected = dist.get(c, np.inf)
        got = labelling.survival_lower[c]
        assert got <= expected and (got >= expected * (1 - 1e-8) or expected == np.inf), c


def test_refinement_splits_cycles_failures_and_borders_first():
    # a random graph on undecided leaves plus a few decided ones; the strongly
    # connected components come from networkx (an outside reference)
    import networkx as nx

    from certify.labels import CellFacts, Labelling

    rng = np.random.default_rng(7)
    L = 300
    label = np.where(rng.random(L) < 0.8, "undecided",
                     rng.choice(["safe", "doomed", "outside"], L))
    src = rng.integers(0, L, 450)
    dst = rng.integers(0, L, 450)
    own = rng.random(L) < 0.05
    facts = CellFacts(outside=label == "outside", flow_ok=~own, kept=np.ones(L, bool),
                      escapes=np.zeros(L, bool), crossing=np.full(L, np.inf),
                      horizon_lo=np.ones(L), horizon_hi=np.ones(L),
                      first_unkept=np.full(L, np.inf), src=src, dst=dst)
    labelling = Labelling(label=label, rank=np.full(L, -1),
                          crossing_upper=np.full(L, np.inf), survival_lower=np.zeros(L))
    und = np.flatnonzero(label == "undecided")
    g = nx.DiGraph()
    g.add_nodes_from(und)
    g.add_edges_from((a, b) for a, b in zip(src, dst) if a in g and b in g)
    expected = set()
    for part in nx.strongly_connected_components(g):
        if len(part) > 1 or any(g.has_edge(c, c) for c in part):
            expected |= part
    expected |= {int(c) for c in und if own[c]}
    expected |= {int(a) for a, b in zip(src, dst)
                 if label[a] == "undecided" and label[b] in ("safe", "doomed")}
    leaves = np.arange(L)
    # a tree with at least L nodes; the leaves' numbers are nodes 0 .. L-1 of it
    tree = CellTree([(Fraction(0), Fraction(1))])
    new = np.array([0])
    while len(tree) < L:
        new = tree.split(new)
    causes_first = prove_module._causes_first
    # a tight cell budget: the causes alone
    first = causes_first(tree, leaves, labelling, facts, und, False)
    assert 0 < len(expected) < len(und)
    assert set(first.tolist()) == expected
    # with no cause left, every wanted leaf is split
    waiting = np.array(sorted(set(und.tolist()) - expected))
    assert set(causes_first(tree, leaves, labelling, facts, waiting, True)) \
        == set(waiting.tolist())
    # with a spare budget, the waiting leaves are held back only while the causes are
    # fewer than half of the wanted leaves
    causes = np.array(sorted(expected))
    few = np.sort(np.concatenate([causes[:len(waiting) // 3], waiting]))
    many = np.sort(np.concatenate([causes, waiting[:len(causes) // 2]]))
    assert 0 < 2 * len(causes[:len(waiting) // 3]) < len(few)
    assert set(causes_first(tree, leaves, labelling, facts, few, True)) \
        == set(causes[:len(waiting) // 3].tolist())
    assert set(causes_first(tree, leaves, labelling, facts, many, True)) == set(many.tolist())
    assert set(causes_first(tree, leaves, labelling, facts, many, False)) == expected


def test_successors_cover_the_image_and_touching_leaves_are_left_out():
    # covering property of the successor rule (docs/proof-loop.md): every point of a
    # box inside the window lies in some named leaf; a leaf left out shares no point of
    # the box's relative interior. The checker's exact grid rule names no other leaf.
    from fractions import Fraction
    from certify.cells import CellTree
    from certify.check._cells import grid_bounds

    rng = np.random.default_rng(11)
    tree = CellTree([(Fraction(0), Fraction(1)), (Fraction(0), Fraction(1))])
    tree.split([0])
    for _ in range(5):
        leaves = tree.leaves()
        tree.split(rng.choice(leaves, size=max(1, len(leaves) // 3), replace=False))
    leaves = tree.leaves()
    depth = int(tree.depth[leaves].max())
    left_out = 0
    for lo, hi in _random_boxes(rng, 2 ** depth, 300):
        thick = lo < hi
        _, leaf = tree.leaves_meeting(lo[None], hi[None], strict=thick[None])
        named = set(leaf.tolist())
        points = lo + rng.random((200, 2)) * (hi - lo)
        points = np.concatenate([points, [lo, hi, [lo[0], hi[1]], [hi[0], lo[1]]]])
        for p in points:
            holding = np.all((tree.lo[leaves] <= p) & (p <= tree.hi[leaves]), axis=1)
            assert named & set(leaves[holding].tolist()), (lo, hi, p)
        _, touching = tree.leaves_meeting(lo[None], hi[None])
        for c in set(touching.tolist()) - named:
            left_out += 1
            overlap = np.minimum(tree.hi[c], hi) - np.maximum(tree.lo[c], lo)
            assert np.any(thick & (overlap <= 0)), (lo, hi, c)
        first, last = grid_bounds(tree.window, depth, [Fraction(x) for x in lo],
                                  [Fraction(x) for x in hi])
        for c in leaves:
            shift = depth - int(tree.depth[c])
            c_lo, c_hi = tree.index[c] << shift, (tree.index[c] + 1) << shift
            if np.all((c_lo <= last) & (c_hi >= first)):
                assert c in named
    assert left_out > 50  # the rule does leave touching leaves out


def test_transition_graph_edges_cover_simulated_images(certified):
    # For starts in cells of every label, the state at the cell's horizon T_c, integrated
    # by scipy's DOP853 (an integrator outside this project), lies in one of the cell's
    # successors (the successor rule claims they cover the image); and the labels are
    # the fixpoints of docs/design.md, section 5 on the networkx graph.
    import networkx as nx

    run = certified(SIR, CASES["sir"].depth)
    graph = run.cert.transition_graph()
    assert isinstance(graph, nx.DiGraph) and graph.number_of_nodes() == len(run.cert.labels)
    for c, data in graph.nodes(data=True):
        after = {graph.nodes[d]["label"] for d in graph.successors(c)}
        if data["label"] == "safe":
            assert after <= {"safe", "outside"}
        if data["label"] == "doomed" and data["rank"] > 0:
            assert all(graph.nodes[d]["rank"] < data["rank"] for d in graph.successors(c)
                       if graph.nodes[d]["label"] != "outside")
    safe = [c for c, d in graph.nodes(data=True) if d["label"] == "safe"]
    reach = set().union(*(nx.descendants(graph, c) for c in safe[:50]))
    assert {graph.nodes[d]["label"] for d in reach} <= {"safe", "outside"}
    rng = np.random.default_rng(3)
    cells = rng.choice([c for c in graph if graph.out_degree(c) > 0], 60, replace=False)
    beta, gamma = 2.0, 1.0
    for c in cells:
        node = graph.nodes[c]
        start = rng.uniform(node["lo"], node["hi"])
        T = node["horizon"][0]
        sol = solve_ivp(lambda t, y: [-beta * y[0] * y[1], beta * y[0] * y[1] - gamma * y[1]],
                        (0, T), start, method="DOP853", rtol=1e-12, atol=1e-14)
        end = sol.y[:, -1]
        if end[1] > 0.1:  # crossed the cap: no successor is needed for this start
            continue
        held = [d for d in graph.successors(c)
                if all(graph.nodes[d]["lo"][k] - 1e-9 <= end[k] <= graph.nodes[d]["hi"][k] + 1e-9
                       for k in range(2))]
        assert held, (c, start, T, end)

