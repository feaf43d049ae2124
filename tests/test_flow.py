"""Validated flow enclosures (certify.flow.flow_boxes) against exact and high-precision solutions.

References named beside each check: closed forms (linear flows through the matrix
exponential, exponential decay, Verhulst's 1838 logistic solution, ``x' = x^2``),
scipy.linalg.expm, and mpmath.odefun (Taylor series at 30 significant digits).
Times are exact: the sum of a box's step sizes, added up with fractions.Fraction.
"""

from __future__ import annotations

from fractions import Fraction
from itertools import product

import mpmath
import numpy as np
import pytest
import sympy
from hypothesis import Phase, given, settings
from hypothesis import strategies as st
from scipy.linalg import expm

from certify import interval as iv
from certify.flow import (NO_ENCLOSURE, NOT_FINITE, OK, STEP_LIMIT, STOPPED, FlowStart,
                          flow_boxes, hull_of_set, interval_inverse, truncate_results)
from certify.taylor import _build

x, y, s, k, r = sympy.symbols("x y s k r", real=True)
# No shrinking: a failing example is reported as drawn (shrinking flows is slow).
_PHASES = [Phase.explicit, Phase.generate]
FEW = settings(max_examples=4, derandomize=True, deadline=None, database=None, phases=_PHASES)
SOME = settings(max_examples=12, derandomize=True, deadline=None, database=None,
                phases=_PHASES)


def programs(equations, states, params=(), order=4):
    return _build(tuple(equations), tuple(states), tuple(params), (), order)


def step_end_times(R, b):
    """Exact end time of every step of box `b` (Fractions), from the stored step sizes."""
    total, ends = Fraction(0), []
    for h in R.h[R.steps_of(b)]:
        total += Fraction(float(h))
        ends.append(total)
    return ends


def mpf_time(t):
    return mpmath.mpf(t.numerator) / t.denominator


def assert_in_box(lo, hi, value, what):
    """``lo <= value <= hi`` componentwise, value as mpmath numbers (exact compare)."""
    for i, v in enumerate(value):
        assert mpmath.mpf(float(lo[i])) <= v <= mpmath.mpf(float(hi[i])), (
            f"{what}: component {i} = {v} not in [{lo[i]!r}, {hi[i]!r}]")


def assert_in_set(m, A, rlo, rhi, value, what):
    """``value`` in ``{m + A r}``: solve for r in floats, small tolerance for that solve."""
    v = np.array([float(c) for c in value])
    coords = np.linalg.solve(A, v - m)
    tol = 1e-12 * (1 + np.abs(coords)) + 1e-9 * (rhi - rlo)
    assert np.all(coords >= rlo - tol) and np.all(coords <= rhi + tol), (
        f"{what}: r = {coords} not in [{rlo}, {rhi}]")


def check_trajectory(R, b, solution, what, tube_fractions=(0.5,)):
    """Check every step record of box `b` against ``solution(t: mpf) -> list of mpf``."""
    ends = step_end_times(R, b)
    assert Fraction(float(R.t_lo[b])) <= ends[-1] <= Fraction(float(R.t_hi[b]))
    start = Fraction(0)
    for j, end in zip(range(*R.steps_of(b).indices(len(R.h))), ends):
        value = solution(mpf_time(end))
        assert_in_box(R.end_lo[j], R.end_hi[j], value, f"{what}, end box of step {j}")
        assert_in_set(R.m[j], R.A[j], R.r_lo[j], R.r_hi[j], value, f"{what}, set of step {j}")
        for u in (0,) + tuple(tube_fractions) + (1,):
            t = start + (end - start) * Fraction(u)
            assert_in_box(R.e_lo[j], R.e_hi[j], solution(mpf_time(t)), f"{what}, tube {j}")
        start = end
    if R.success[b]:
        assert_in_box(R.image_lo[b], R.image_hi[b], solution(mpf_time(ends[-1])),
                      f"{what}, image")


# --- linear systems: exact solution expm(A t) x0 ---------------------------------------------

LINEAR = {
    "rotation": [[0, -1], [1, 0]],
    "saddle": [[0, 1], [Fraction(3, 2), Fraction(1, 2)]],
    "node": [[-1, Fraction(1, 2)], [0, -2]],
}


def linear_programs(name, order):
    A = LINEAR[name]
    eqs = [sum(sympy.Rational(A[i][j]) * v for j, v in enumerate((x, y))) for i in range(2)]
    return programs(eqs, (x, y), order=order)


@st.composite
def small_boxes(draw, n_boxes=4, centre=2.0, smallest=1e-4, largest=0.3):
    lo, hi = [], []
    for _ in range(n_boxes):
        c = [draw(st.floats(-centre, centre)) for _ in range(2)]
        w = [draw(st.floats(smallest, largest)) for _ in range(2)]
        lo.append([c[0] - w[0] / 2, c[1] - w[1] / 2])
        hi.append([c[0] + w[0] / 2, c[1] + w[1] / 2])
    return np.array(lo), np.array(hi)


def check_linear_images(R, A, lo, hi):
    """Corner images (scipy.linalg.expm) lie in every step-end box and in the image."""
    widths = []
    for b in range(len(lo)):
        corners = np.array([[lo[b, 0], lo[b, 1]], [lo[b, 0], hi[b, 1]],
                            [hi[b, 0], lo[b, 1]], [hi[b, 0], hi[b, 1]],
                            [(lo[b, 0] + hi[b, 0]) / 2, lo[b, 1]]])
        for j, end in zip(range(*R.steps_of(b).indices(len(R.h))), step_end_times(R, b)):
            images = corners @ expm(A * float(end)).T
            assert np.all(images >= R.end_lo[j]) and np.all(images <= R.end_hi[j])
        images = corners[:4] @ expm(A * float(R.t_lo[b])).T
        assert np.all(images >= R.image_lo[b]) and np.all(images <= R.image_hi[b])
        # the image of a box under a linear flow is the hull of the corner images
        widths.append((R.image_hi[b] - R.image_lo[b], images.max(axis=0) - images.min(axis=0)))
    return widths


@pytest.mark.parametrize("order", [3, 5])
@pytest.mark.parametrize("name", sorted(LINEAR))
def test_linear_flow_contains_corner_images(name, order):
    P = linear_programs(name, order)
    A = np.array(LINEAR[name], dtype=float)

    @SOME
    @given(small_boxes(), st.floats(0.2, 2.0))
    def run(box, horizon):
        lo, hi = box
        R = flow_boxes(P, lo, hi, [], min_horizon=horizon, max_horizon=horizon)
        assert (R.status == OK).all()
        for width, hull in check_linear_images(R, A, lo, hi):
            # No blow-up. Not tight: each step may add a remainder of 1% of the set's
            # width, and an orthogonal frame wrapped around a skewed image adds width on
            # its short side (measured: up to 1.7x on tiny boxes at order 3, and an excess
            # of 0.74 of the longest exact side for the node).
            assert np.all(width <= 2 * hull + hull.max())

    run()


def test_linear_flow_order_one():
    # order 1 (used where a model has kinks): x(t+h) in x + [0,h] f(E), no mean-value form
    A = np.array(LINEAR["node"], dtype=float)
    P = linear_programs("node", 1)
    lo = np.array([[0.5, 0.5], [-1.0, 0.2], [0.0, -0.01]])
    hi = np.array([[0.6, 0.55], [-0.9, 0.3], [0.0, 0.01]])
    R = flow_boxes(P, lo, hi, [], min_horizon=0.4, max_horizon=0.4)
    assert (R.status == OK).all()
    check_linear_images(R, A, lo, hi)


def test_linear_flow_of_a_point_with_mpmath_expm():
    # point box: the enclosure must still contain the exact solution (mpmath expm, 30 digits)
    P = linear_programs("rotation", 4)
    R = flow_boxes(P, np.array([[0.75, -0.5]]), np.array([[0.75, -0.5]]), [],
                   min_horizon=3.0, max_horizon=3.0)
    with mpmath.workdps(30):
        M = mpmath.matrix([[0, -1], [1, 0]])
        x0 = mpmath.matrix([mpmath.mpf(0.75), mpmath.mpf(-0.5)])

        def solution(t):
            v = mpmath.expm(M * t) * x0
            return [v[0], v[1]]

        check_trajectory(R, 0, solution, "rotation of a point")
    # a point has no width for the remainder to be a share of: steps stay coarse
    assert np.all(R.image_hi[0] - R.image_lo[0] < 1e-5)


# --- exponential decay and logistic growth with interval parameters ------------------------

def test_decay_with_interval_rate_contains_every_rate():
    # x' = -k x, k in [1/2, 3/5]: x(t) = x0 exp(-k t) for each constant k (exact formula).
    P = programs([-k * x], (x,), (k,))
    klo, _ = iv.enclose_fraction(Fraction(1, 2))
    _, khi = iv.enclose_fraction(Fraction(3, 5))
    lo, hi = np.array([[1.0], [-0.2]]), np.array([[1.1], [0.3]])
    R = flow_boxes(P, lo, hi, [(klo, khi)], min_horizon=4.0, max_horizon=4.0)
    assert (R.status == OK).all()
    rng = np.random.default_rng(7)
    rates = [klo, khi, Fraction(11, 20)] + list(rng.uniform(klo, khi, 5))
    with mpmath.workdps(30):
        for b in range(2):
            for x0 in (lo[b, 0], hi[b, 0], rng.uniform(lo[b, 0], hi[b, 0])):
                for rate in rates:
                    kr = mpmath.mpf(rate) if not isinstance(rate, Fraction) else (
                        mpmath.mpf(rate.numerator) / rate.denominator)
                    check_trajectory(R, b, lambda t: [mpmath.mpf(x0) * mpmath.exp(-kr * t)],
                                     f"decay k={rate} x0={x0}")
    # the parameter enters each step as an interval: measured 1.42x the exact range
    T = float(R.t_lo[0])
    exact_lo, exact_hi = 1.0 * np.exp(-khi * T), 1.1 * np.exp(-klo * T)
    assert R.image_hi[0, 0] - R.image_lo[0, 0] < 2 * (exact_hi - exact_lo)


def test_logistic_with_interval_rate():
    # x' = r x (1 - x/2), r in [0.9, 1.1]; Verhulst 1838: x = K x0 e^{rt}/(K + x0(e^{rt}-1)).
    P = programs([r * x * (1 - x / 2)], (x,), (r,))
    rlo, rhi = iv.enclose_fraction(Fraction(9, 10))[0], iv.enclose_fraction(Fraction(11, 10))[1]
    lo, hi = np.array([[0.1], [0.5], [2.5]]), np.array([[0.2], [0.5], [2.6]])
    R = flow_boxes(P, lo, hi, [(rlo, rhi)], min_horizon=3.0, max_horizon=3.0)
    assert (R.status == OK).all()
    rng = np.random.default_rng(8)
    with mpmath.workdps(30):
        for b in range(3):
            for x0 in (lo[b, 0], hi[b, 0], rng.uniform(lo[b, 0], hi[b, 0])):
                for rate in (rlo, rhi, rng.uniform(rlo, rhi)):
                    def solution(t, x0=mpmath.mpf(x0), rr=mpmath.mpf(rate)):
                        e = mpmath.exp(rr * t)
                        return [2 * x0 * e / (2 + x0 * (e - 1))]

                    check_trajectory(R, b, solution, f"logistic r={rate} x0={x0}")


# --- nonlinear systems against mpmath.odefun at 30 digits -------------------------------------

def _odefun_solution(rhs, start):
    """mpmath.odefun (Taylor series, 30 digits) from a float start at t = 0."""
    f = mpmath.odefun(rhs, 0, [mpmath.mpf(float(c)) for c in start])
    return lambda t: f(t)


def _run_against_odefun(P, params, rhs, lo, hi, points, horizon, what):
    """Check every step of every box against mpmath.odefun from the given points."""
    R = flow_boxes(P, lo, hi, params, min_horizon=horizon, max_horizon=horizon)
    # boxes this small stay tight enough to reach the horizon (larger Van der Pol boxes,
    # side 0.05, were measured to lose their enclosure near t = 1.9)
    assert (R.status == OK).all(), R.reasons()
    with mpmath.workdps(30):
        for b, pts in enumerate(points):
            for p in pts:
                check_trajectory(R, b, _odefun_solution(rhs, p), f"{what} from {p}")


@st.composite
def boxes_with_points(draw, window, side=(1e-4, 0.02), n_boxes=2):
    lo, hi, points = [], [], []
    for _ in range(n_boxes):
        c = [draw(st.floats(a, b)) for a, b in window]
        w = [draw(st.floats(*side)) for _ in window]
        blo = [ci - wi / 2 for ci, wi in zip(c, w)]
        bhi = [ci + wi / 2 for ci, wi in zip(c, w)]
        u = [draw(st.floats(0, 1)) for _ in window]
        corner = [draw(st.sampled_from([a, b_])) for a, b_ in zip(blo, bhi)]
        points.append([[a + ui * (b_ - a) for a, b_, ui in zip(blo, bhi, u)], corner])
        lo.append(blo)
        hi.append(bhi)
    return np.array(lo), np.array(hi), points


@FEW
@given(boxes_with_points([(-2.0, 2.0), (-2.0, 2.0)], side=(1e-4, 0.01)))
def test_van_der_pol_against_odefun(case):
    # Van der Pol, mu = 1: x' = y, y' = (1 - x^2) y - x
    lo, hi, points = case
    P = programs([y, (1 - x ** 2) * y - x], (x, y))
    _run_against_odefun(P, [], lambda t, z: [z[1], (1 - z[0] ** 2) * z[1] - z[0]],
                        lo, hi, points, 2.0, "Van der Pol")


@FEW
@given(boxes_with_points([(0.3, 2.5), (0.3, 2.5)]))
def test_lotka_volterra_against_odefun(case):
    # Lotka-Volterra x' = x (1 - y), y' = y (x - 1)
    lo, hi, points = case
    P = programs([x * (1 - y), y * (x - 1)], (x, y))
    _run_against_odefun(P, [], lambda t, z: [z[0] * (1 - z[1]), z[1] * (z[0] - 1)],
                        lo, hi, points, 2.5, "Lotka-Volterra")


MU_MAX, KS, KI, D, S_IN, Y = sympy.symbols("mu_max Ks Ki D s_in Y", real=True)
FERMENTER_PARAMS = (MU_MAX, KS, KI, D, S_IN, Y)
FERMENTER_VALUES = [Fraction(1, 2), Fraction(1, 2), Fraction(2), Fraction(1, 5), Fraction(10),
                    Fraction(1, 2)]


def fermenter_programs(order=4):
    # chemostat with Andrews 1968 substrate inhibition (mem)
    mu = MU_MAX * s / (KS + s + s ** 2 / KI)
    return programs([D * (S_IN - s) - mu * x / Y, (mu - D) * x], (s, x), FERMENTER_PARAMS,
                    order)


def fermenter_rhs(values):
    mu_max, ks, ki, d, s_in, yy = [mpmath.mpf(q.numerator) / q.denominator
                                   if isinstance(q, Fraction) else mpmath.mpf(q) for q in values]

    def rhs(t, z):
        mu = mu_max * z[0] / (ks + z[0] + z[0] ** 2 / ki)
        return [d * (s_in - z[0]) - mu * z[1] / yy, (mu - d) * z[1]]

    return rhs


@FEW
@given(boxes_with_points([(0.5, 11.0), (0.5, 9.0)]))
def test_fermenter_against_odefun(case):
    lo, hi, points = case
    params = [iv.enclose_fraction(v) for v in FERMENTER_VALUES]
    with mpmath.workdps(30):
        rhs = fermenter_rhs(FERMENTER_VALUES)
    _run_against_odefun(fermenter_programs(), params, rhs, lo, hi, points, 3.0, "fermenter")


def test_fermenter_with_interval_dilution_rate():
    # D in [0.19, 0.21]: solutions for several constant D inside lie in the enclosure.
    params = [iv.enclose_fraction(v) for v in FERMENTER_VALUES]
    params[3] = (0.19, 0.21)
    lo, hi = np.array([[3.0, 2.0]]), np.array([[3.02, 2.01]])
    R = flow_boxes(fermenter_programs(), lo, hi, params, min_horizon=2.0, max_horizon=2.0)
    assert (R.status == OK).all()
    with mpmath.workdps(30):
        for d in (0.19, 0.21, 0.2, 0.2049):
            values = list(FERMENTER_VALUES)
            values[3] = d
            for p in ([3.0, 2.0], [3.02, 2.01], [3.011, 2.0037]):
                check_trajectory(R, 0, _odefun_solution(fermenter_rhs(values), p),
                                 f"fermenter D={d} from {p}")


# --- failure behaviour -------------------------------------------------------------------------

SQUARE = programs([x ** 2], (x,))


def test_blow_up_fails_without_an_image():
    # x' = x^2, x(t) = x0 / (1 - x0 t) blows up at t = 1/x0 < 2 for x0 in [1, 1.01].
    R = flow_boxes(SQUARE, np.array([[1.0]]), np.array([[1.01]]), [], min_horizon=2.0,
                   max_horizon=2.0)
    assert R.status[0] < 0 and not R.success[0]
    assert R.status[0] in (NO_ENCLOSURE, NOT_FINITE)
    assert np.isnan(R.image_lo[0]).all() and np.isnan(R.image_hi[0]).all()
    # the steps it did take are still valid enclosures, all before the blow-up time
    ends = step_end_times(R, 0)
    assert ends and ends[-1] < Fraction(100, 101)
    for j, end in zip(range(*R.steps_of(0).indices(len(R.h))), ends):
        t = mpf_time(end)
        for x0 in (mpmath.mpf(1), mpmath.mpf(1.01)):
            assert_in_box(R.end_lo[j], R.end_hi[j], [x0 / (1 - x0 * t)], "blow-up step")


def test_mixed_batch_good_boxes_still_succeed():
    lo = np.array([[1.0], [-1.01], [1.0], [-0.5]])
    hi = np.array([[1.01], [-1.0], [1.01], [-0.5]])
    R = flow_boxes(SQUARE, lo, hi, [], min_horizon=2.0, max_horizon=2.0)
    np.testing.assert_array_equal(R.success, [False, True, False, True])
    assert np.isnan(R.image_lo[[0, 2]]).all()
    with mpmath.workdps(30):
        for b in (1, 3):
            for x0 in (lo[b, 0], hi[b, 0]):
                check_trajectory(R, b, lambda t, x0=mpmath.mpf(x0): [x0 / (1 - x0 * t)],
                                 f"x' = x^2 from {x0}")
    assert R.reasons()[0] != R.reasons()[1]


def test_step_limit_keeps_the_image_reached():
    # decay x' = -x with a step limit: status 2, time below the horizon, image usable
    P = programs([-x], (x,))
    R = flow_boxes(P, np.array([[1.0]]), np.array([[2.0]]), [], min_horizon=10.0,
                   max_horizon=10.0, max_steps=5)
    assert R.status[0] == STEP_LIMIT and R.success[0] and R.n_steps[0] == 5
    T = step_end_times(R, 0)[-1]
    assert T < 10
    with mpmath.workdps(30):
        for x0 in (1.0, 2.0):
            assert_in_box(R.image_lo[0], R.image_hi[0],
                          [x0 * mpmath.exp(-mpf_time(T))], "step-limit image")


def test_resumed_flow_takes_the_steps_of_one_flow_and_holds_the_solution():
    # Van der Pol, mu = 1, flowed to t = 1 (stopping at the first step end past it) and
    # then on from there to t = 3: the same steps, bit for bit, as one flow to t = 3, and
    # the image holds the solution from mpmath.odefun (30 digits)
    P = programs([y, (1 - x ** 2) * y - x], (x, y))
    lo = np.array([[1.0, 0.5], [-1.2, 0.3], [0.2, -1.0]])
    hi = lo + np.array([[0.01, 0.02], [0.005, 0.01], [0.02, 0.01]])
    whole = flow_boxes(P, lo, hi, [], min_horizon=3.0, max_horizon=3.0)
    first = flow_boxes(P, lo, hi, [], min_horizon=1.0, max_horizon=3.0,
                       should_stop=lambda ids, *rest: np.ones(len(ids), bool))
    assert np.all(first.status == STOPPED)
    rest = flow_boxes(P, lo, hi, [], min_horizon=3.0, max_horizon=3.0,
                      start=FlowStart.of(first))
    for b in range(len(lo)):
        for name in ("h", "e_lo", "e_hi", "end_lo", "end_hi", "t0_lo"):
            joined = np.concatenate([getattr(first, name)[first.steps_of(b)],
                                     getattr(rest, name)[rest.steps_of(b)]])
            np.testing.assert_array_equal(getattr(whole, name)[whole.steps_of(b)], joined)
    np.testing.assert_array_equal(rest.image_lo, whole.image_lo)
    np.testing.assert_array_equal(rest.t_hi, whole.t_hi)
    with mpmath.workdps(30):
        for b in range(len(lo)):
            T = step_end_times(first, b)[-1] + step_end_times(rest, b)[-1]
            for corner in product(*zip(lo[b], hi[b])):
                solution = mpmath.odefun(lambda t, z: [z[1], (1 - z[0] ** 2) * z[1] - z[0]],
                                         0, [mpmath.mpf(c) for c in corner])
                assert_in_box(rest.image_lo[b], rest.image_hi[b], solution(mpf_time(T)),
                              "resumed Van der Pol image")


def test_resumed_flow_meets_the_stop_rule_and_step_limit_where_it_resumes():
    # decay x' = -x: a flow resumed with no steps left ends at once with its start;
    # one resumed past min_horizon is first asked whether it stops where it resumes
    P = programs([-x], (x,))
    lo, hi = np.array([[1.0], [2.0]]), np.array([[1.1], [2.1]])
    first = flow_boxes(P, lo, hi, [], min_horizon=0.5, max_horizon=5.0, max_steps=40,
                       should_stop=lambda ids, *rest: np.ones(len(ids), bool))
    start = FlowStart.of(first)
    start.steps[0] = 40
    asked = []

    def stop_second(ids, end_lo, end_hi, t_lo, t_hi):
        asked.append((ids.copy(), end_lo.copy()))
        return ids == 1

    rest = flow_boxes(P, lo, hi, [], min_horizon=0.5, max_horizon=5.0, max_steps=40,
                      should_stop=stop_second, start=start)
    assert rest.status[0] == STEP_LIMIT and rest.n_steps[0] == 0
    assert rest.status[1] == STOPPED and rest.n_steps[1] == 0
    np.testing.assert_array_equal(rest.image_lo, first.image_lo)
    np.testing.assert_array_equal(rest.next_h, first.next_h)
    # both are asked at their ends (as one flow would be at that step end), then the
    # one without steps left ends there
    np.testing.assert_array_equal(asked[0][0], [0, 1])
    np.testing.assert_array_equal(asked[0][1], first.image_lo)


def test_first_step_respects_max_step_and_horizon():
    P = programs([-x], (x,))
    R = flow_boxes(P, np.array([[1.0]]), np.array([[1.0]]), [], min_horizon=0.05,
                   max_horizon=0.05, step=0.1)
    assert R.h[0] <= 0.05 and R.t_lo[0] >= 0.05
    R = flow_boxes(P, np.array([[1.0]]), np.array([[1.0]]), [], min_horizon=1.0,
                   max_horizon=1.0, step=0.5, max_step=0.2)
    assert R.h.max() <= 0.2


# --- width behaviour -----------------------------------------------------------------------------

def test_contracting_flow_shrinks_the_box():
    # eigenvalues -1 and -2 (triangular, non-normal): exact image widths e^{-2} w etc.
    P = programs([-x + 3 * y, -2 * y], (x, y))
    lo, hi = np.array([[0.9, 0.4]]), np.array([[1.0, 0.5]])
    R = flow_boxes(P, lo, hi, [], min_horizon=2.0, max_horizon=2.0)
    assert R.status[0] == OK
    width = R.image_hi[0] - R.image_lo[0]
    assert np.all(width < hi[0] - lo[0])
    M = expm(np.array([[-1.0, 3.0], [0.0, -2.0]]) * float(R.t_lo[0]))  # scipy.linalg.expm
    exact = np.abs(M) @ (hi[0] - lo[0])                                  # hull of the image
    assert np.all(width <= 1.5 * exact)


DAMPED = programs([y, -x - y / 10], (x, y))
DAMPED_BOX = (np.array([[0.9, -0.1]]), np.array([[1.1, 0.1]]))


def damped_corner_hull_width(t):
    A = np.array([[0.0, 1.0], [-1.0, -0.1]])
    corners = np.array([[a, b] for a in (0.9, 1.1) for b in (-0.1, 0.1)])
    images = corners @ expm(A * t).T                                      # scipy.linalg.expm
    return images.max(axis=0) - images.min(axis=0)


@pytest.mark.parametrize("frames", ["qr+parallelepiped", "qr"])
def test_frames_keep_the_damped_oscillator_tight(frames):
    # both frame rules: the box of the parallelepiped stays close to the exact hull
    lo, hi = DAMPED_BOX
    R = flow_boxes(DAMPED, lo, hi, [], min_horizon=10.0, max_horizon=10.0, max_step=0.2,
                   frames=frames)
    assert R.status[0] == OK
    T = float(R.t_lo[0])
    exact = damped_corner_hull_width(T)
    width = R.image_hi[0] - R.image_lo[0]
    assert np.all(width >= exact) and np.all(width <= 1.5 * exact)


# Two oscillators with the same damping and different frequencies, written in
# coordinates where the flow is a strong shear (velocity units 9x the position units), as
# in the swing equations of two generators: x1' = v1, v1' = -84 x1 - 3 v1,
# x2' = v2, v2' = -33.5 x2 - 3 v2 (common practice: a linear test flow; exact solution
# by scipy.linalg.expm).
SHEAR_MATRIX = np.array([[0.0, 1.0, 0.0, 0.0], [-84.0, -3.0, 0.0, 0.0],
                         [0.0, 0.0, 0.0, 1.0], [0.0, 0.0, -33.5, -3.0]])
SHEAR_BOX = (np.array([[0.3, -0.03, -0.2, -0.03]]), np.array([[0.31, 0.03, -0.19, 0.03]]))


def _shear_flow(frames):
    u = sympy.symbols("x1 v1 x2 v2")
    rhs = [sum(sympy.Rational(SHEAR_MATRIX[i, j]).limit_denominator(10) * u[j]
               for j in range(4)) for i in range(4)]
    lo, hi = SHEAR_BOX
    return flow_boxes(programs(rhs, u), lo, hi, [], min_horizon=3.0, max_horizon=3.0,
                      step=0.02, max_step=0.05, frames=frames)


def _shear_hull_width(t):
    lo, hi = SHEAR_BOX
    corners = np.array(list(product(*zip(lo[0], hi[0]))))
    images = corners @ expm(SHEAR_MATRIX * t).T                           # scipy.linalg.expm
    return images.max(axis=0) - images.min(axis=0)


def test_parallelepiped_frames_follow_a_shearing_rotation():
    # The exact image of a box under a linear flow is a parallelepiped: the parallelepiped
    # frame carries it with no wrapping, so after 3 time units (about 4 turns of the
    # faster oscillator) only the Taylor remainders have added up (measured: 1.1-3.1
    # times the exact hull); QR frames wrap the sheared set at every step (measured:
    # 8-1600 times the hull).
    R = _shear_flow("qr+parallelepiped")
    assert R.status[0] == OK
    exact = _shear_hull_width(float(R.t_lo[0]))
    width = R.image_hi[0] - R.image_lo[0]
    assert np.all(width >= exact) and np.all(width <= 4 * exact)
    qr = _shear_flow("qr")
    assert qr.status[0] != OK or np.any(qr.image_hi[0] - qr.image_lo[0] > 10 * width)


def test_reboxing_every_step_grows_much_more():
    # Boxing the set at every step (no parallelepiped kept) wraps: measured about 2700x
    # the exact width after 10 time units; require at least 3x the QR result.
    lo, hi = DAMPED_BOX
    qr = flow_boxes(DAMPED, lo, hi, [], min_horizon=10.0, max_horizon=10.0, max_step=0.2)
    blo, bhi = lo, hi
    elapsed = Fraction(0)
    while elapsed < Fraction(10):
        R = flow_boxes(DAMPED, blo, bhi, [], min_horizon=0.2, max_horizon=0.2, step=0.2,
                       max_step=0.2)
        assert R.status[0] == OK
        elapsed += sum(Fraction(float(h)) for h in R.h)
        blo, bhi = R.image_lo, R.image_hi
    assert abs(float(elapsed) - float(qr.t_lo[0])) < 1e-9
    assert np.all(bhi - blo >= 3 * (qr.image_hi - qr.image_lo))
    exact = damped_corner_hull_width(float(elapsed))
    assert np.all(bhi - blo >= exact)


# --- caller control and helpers ------------------------------------------------------------------

def test_should_stop_is_honoured():
    # decay x' = -x: stop once the box lies below 1/2, not before min_horizon = 0.3
    P = programs([-x], (x,))
    calls = []

    def below_half(ids, end_lo, end_hi, t_lo, t_hi):
        calls.append((ids.copy(), t_lo.copy()))
        return end_hi[:, 0] < 0.5

    lo = np.array([[0.3], [1.0], [4.0]])
    hi = np.array([[0.35], [1.1], [4.1]])
    R = flow_boxes(P, lo, hi, [], min_horizon=0.3, max_horizon=2.0, should_stop=below_half)
    np.testing.assert_array_equal(R.status, [STOPPED, STOPPED, OK])
    assert all(np.all(t >= 0.3) for _, t in calls)
    assert all(set(ids) <= {0, 1, 2} for ids, _ in calls)
    # box 0 is already below 1/2: it stops at the first step end past 0.3
    assert R.t_lo[0] >= 0.3 and R.t_lo[0] < 0.3 + 0.26
    # box 1 stops once e^{-t} 1.1 < 1/2 can hold, i.e. not before ln(2.2) = 0.788
    assert R.t_lo[1] >= np.log(2.2) - 1e-12 and R.image_hi[1, 0] < 0.5
    # box 2 reaches the horizon
    assert R.t_lo[2] >= 2.0
    with mpmath.workdps(30):
        for b in range(3):
            for x0 in (lo[b, 0], hi[b, 0]):
                check_trajectory(R, b, lambda t, x0=mpmath.mpf(x0): [x0 * mpmath.exp(-t)],
                                 f"decay from {x0}")


def test_interval_inverse_encloses_the_inverse():
    # rotation matrices perturbed by 1e-6: the inverse from numpy.linalg.inv (float,
    # error ~1e-16) lies in the enclosure, and its width is ~ the perturbation.
    rng = np.random.default_rng(4)
    angles = rng.uniform(0, 2 * np.pi, 20)
    A = np.array([[[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]] for a in angles])
    A += 1e-6 * rng.standard_normal(A.shape)
    lo, hi, ok = interval_inverse(A)
    assert ok.all()
    inv = np.linalg.inv(A)
    assert np.all(lo <= inv) and np.all(inv <= hi)
    assert np.all(hi - lo < 1e-4)
    # a skewed matrix: its exact inverse [[-2, 1], [3/2, -1/2]] (by hand) is enclosed
    lo, hi, ok = interval_inverse(np.array([[[1.0, 2.0], [3.0, 4.0]]]))
    assert ok[0]
    assert np.all(lo[0] <= [[-2, 1], [1.5, -0.5]]) and np.all([[-2, 1], [1.5, -0.5]] <= hi[0])
    # nearly singular (condition number ~1e17): no usable enclosure
    _, _, ok = interval_inverse(np.array([[[1.0, 1.0], [1.0, 1.0 + 2.0 ** -52]]]))
    assert not ok[0]


def test_hull_of_set_contains_vertices():
    m = np.array([[1.0, -1.0]])
    A = np.array([[[0.6, -0.8], [0.8, 0.6]]])
    rlo, rhi = np.array([[-0.1, -0.2]]), np.array([[0.1, 0.3]])
    lo, hi = hull_of_set(m, A, rlo, rhi)
    for a in (-0.1, 0.1):
        for b in (-0.2, 0.3):
            v = [Fraction(1) + Fraction(0.6) * Fraction(a) - Fraction(0.8) * Fraction(b),
                 Fraction(-1) + Fraction(0.8) * Fraction(a) + Fraction(0.6) * Fraction(b)]
            assert all(Fraction(lo[0, i]) <= v[i] <= Fraction(hi[0, i]) for i in range(2))


def test_flow_without_sets_keeps_the_same_boxes():
    # keep_sets=False (the proof loop's flows) leaves out the sets m + A [r] alone: step
    # sizes, tubes, end boxes and images are those of the full flow, bit for bit, and
    # hold the corner images (closed form expm(A t) x0, scipy.linalg.expm)
    P = linear_programs("saddle", 4)
    A = np.array(LINEAR["saddle"], dtype=float)
    lo = np.array([[1.0, 0.0], [-0.5, 0.25], [0.1, -1.0]])
    hi = lo + np.array([[0.05, 0.1], [0.01, 0.01], [0.2, 0.05]])
    full = flow_boxes(P, lo, hi, [], min_horizon=1.5, max_horizon=1.5)
    bare = flow_boxes(P, lo, hi, [], min_horizon=1.5, max_horizon=1.5, keep_sets=False)
    assert bare.m is None and bare.A is None and bare.r_lo is None and bare.r_hi is None
    for name in ("status", "n_steps", "h", "t0_lo", "t0_hi", "x_lo", "x_hi", "e_lo", "e_hi",
                 "end_lo", "end_hi", "image_lo", "image_hi", "t_lo", "t_hi"):
        np.testing.assert_array_equal(getattr(bare, name), getattr(full, name))
    assert (bare.status == OK).all()
    check_linear_images(bare, A, lo, hi)


def test_selected_and_truncated_flows_are_flows_of_their_own():
    # the prover cuts followed tubes at a step end (certify/prove.py, _Prover.extend):
    # the first k steps of a flow must again enclose the exact flow (scipy.linalg.expm
    # of the rotation), with the k-th end box as image and its end time as horizon
    A = np.array(LINEAR["rotation"], dtype=float)
    lo = np.array([[0.5, -0.2], [1.0, 0.3], [-0.7, 0.1]])
    hi = lo + np.array([[0.1, 0.05], [0.02, 0.2], [0.3, 0.3]])
    R = flow_boxes(linear_programs("rotation", 4), lo, hi, [], min_horizon=2.0,
                   max_horizon=2.0)
    assert (R.status == OK).all() and (R.n_steps >= 4).all()
    boxes = np.array([2, 0])
    keep = np.array([R.n_steps[2] // 2, R.n_steps[0]])
    T = truncate_results(R, keep, boxes=boxes)
    np.testing.assert_array_equal(T.n_steps, keep)
    for i, b in enumerate(boxes):
        for name in ("h", "e_lo", "e_hi", "end_lo", "end_hi", "t0_lo"):
            np.testing.assert_array_equal(getattr(T, name)[T.steps_of(i)],
                                          getattr(R, name)[R.steps_of(b)][:keep[i]])
        ends = step_end_times(T, i)
        assert Fraction(float(T.t_lo[i])) <= ends[-1] <= Fraction(float(T.t_hi[i]))
    assert T.status[0] == STOPPED and T.status[1] == OK
    np.testing.assert_array_equal(T.image_lo[1], R.image_lo[0])
    # the sets at the full horizon are not the cut flow's: none (NaN) for it
    assert np.isnan(T.image_m[0]).all() and np.isnan(T.image_A[0]).all()
    np.testing.assert_array_equal(T.image_A[1], R.image_A[0])
    check_linear_images(T, A, lo[boxes], hi[boxes])
