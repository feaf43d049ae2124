"""Float RK4 batch simulation against closed forms and scipy.integrate.solve_ivp."""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
import sympy
from scipy.integrate import solve_ivp

from certify.program import compile_program
from certify.simulate import simulate

x, y, k, r, K = sympy.symbols("x y k r K", real=True)
DECAY = compile_program([-k * x], (x, k))
LOGISTIC = compile_program([r * x * (1 - x / K)], (x, r, K))


def logistic_exact(x0, rate, cap, t):
    """Verhulst 1838 closed form ``K x0 e^{rt} / (K + x0 (e^{rt} - 1))``."""
    e = np.exp(rate * t)
    return cap * x0 * e / (cap + x0 * (e - 1))


def test_exponential_decay_final_state_and_crossing_time():
    # x' = -k x: x(t) = x0 e^{-kt}; x = m first at t = ln(x0/m)/k (exact formula).
    m, rate = 0.3, 0.7
    limit = compile_program([x - sympy.Rational(3, 10)], (x, k))
    x0 = np.array([[0.5], [1.0], [4.0], [0.31], [0.2]])
    res = simulate(DECAY, x0, [rate], 5.0, dt=0.01, events=limit)
    exact = x0[:, 0] * np.exp(-rate * 5.0)
    np.testing.assert_allclose(res.states[:, 0], exact, rtol=1e-9)
    assert res.finite.all()
    expected = np.log(x0[:, 0] / m) / rate
    crossing = expected <= 5.0
    np.testing.assert_array_equal(res.crossed, crossing | (x0[:, 0] < m))
    # linear interpolation inside a step of 0.01: error O(h^2)
    np.testing.assert_allclose(res.crossing_time[:4][crossing[:4]],
                               expected[:4][crossing[:4]], atol=2e-5)
    # 4.0 reaches 0.3 only at t = 3.70; 0.2 starts below: time 0 (exact)
    assert res.crossing_time[4] == 0.0 and res.crossing_limit[4] == 0
    assert res.n_steps == 500 and res.h == pytest.approx(0.01)


@pytest.mark.parametrize("rate,cap", [(1.0, 2.0), (0.5, 10.0), (-0.3, 4.0)])
def test_logistic_growth_against_closed_form(rate, cap):
    # every x0 < K when r < 0: above K the closed form has a pole (finite-time blow-up)
    x0 = np.array([[0.05], [0.5], [1.9], [3.0]])
    res = simulate(LOGISTIC, x0, [rate, cap], 6.0, dt=0.02)
    np.testing.assert_allclose(res.states[:, 0], logistic_exact(x0[:, 0], rate, cap, 6.0),
                               rtol=1e-8)


def test_rk4_has_order_four():
    # Classic RK4 is fourth order (Kutta 1901): halving h divides the error by about 16.
    x0 = np.array([[0.1]])
    exact = logistic_exact(0.1, 1.0, 2.0, 4.0)
    errors = [abs(simulate(LOGISTIC, x0, [1.0, 2.0], 4.0, dt=dt).states[0, 0] - exact)
              for dt in (0.2, 0.1, 0.05)]
    ratios = [errors[0] / errors[1], errors[1] / errors[2]]
    assert all(12 < q < 20 for q in ratios), ratios


def test_parameter_intervals_use_midpoints():
    x0 = np.array([[1.0], [2.0]])
    a = simulate(DECAY, x0, [(0.5, 1.5)], 2.0, dt=0.05)
    b = simulate(DECAY, x0, [1.0], 2.0, dt=0.05)
    c = simulate(DECAY, x0, [Fraction(1)], 2.0, dt=0.05)
    np.testing.assert_array_equal(a.states, b.states)
    np.testing.assert_array_equal(a.states, c.states)
    np.testing.assert_allclose(a.states[:, 0], x0[:, 0] * math.exp(-2.0), rtol=1e-6)


def test_which_limit_crosses_first():
    # Rotation x' = -y, y' = x: from (cos a, sin a) the point is at angle a + t.
    # Limits y >= -1/2 (index 0) and y <= 1/2 (index 1).
    rotation = compile_program([-y, x], (x, y))
    limits = compile_program([y + sympy.Rational(1, 2), sympy.Rational(1, 2) - y], (x, y))
    x0 = np.array([[1.0, 0.0], [-1.0, 0.0], [0.1, 0.0], [0.0, 0.7]])
    res = simulate(rotation, x0, [], 3.0, dt=0.01, events=limits)
    np.testing.assert_array_equal(res.crossed, [True, True, False, True])
    np.testing.assert_array_equal(res.crossing_limit, [1, 0, -1, 1])
    # y = sin t reaches 1/2 at t = pi/6 (exact formula); the third never crosses
    np.testing.assert_allclose(res.crossing_time[:2], [math.pi / 6] * 2, atol=1e-5)
    assert math.isnan(res.crossing_time[2]) and res.crossing_time[3] == 0.0
    # the radius is conserved by the exact flow: cos/sin closed form at t = 3
    np.testing.assert_allclose(res.states[0], [math.cos(3.0), math.sin(3.0)], atol=1e-8)


def test_events_as_a_callable():
    res = simulate(DECAY, np.array([[1.0], [0.1]]), [1.0], 3.0, dt=0.01,
                   events=lambda s: s - 0.25)
    # x = e^{-t} reaches 1/4 at ln 4 (exact formula)
    assert res.crossing_time[0] == pytest.approx(math.log(4.0), abs=2e-5)
    assert res.crossing_time[1] == 0.0 and res.crossing_limit[0] == 0


VDP_MU = 1.0


def test_van_der_pol_against_solve_ivp():
    # Van der Pol x' = y, y' = mu (1 - x^2) y - x, reference DOP853 at rtol 1e-12.
    vdp = compile_program([y, VDP_MU * (1 - x ** 2) * y - x], (x, y))
    rng = np.random.default_rng(11)
    x0 = rng.uniform(-2.5, 2.5, (20, 2))
    res = simulate(vdp, x0, [], 8.0, dt=0.005)

    def rhs(t, s):
        return [s[1], VDP_MU * (1 - s[0] ** 2) * s[1] - s[0]]

    for start, end in zip(x0, res.states):
        ref = solve_ivp(rhs, (0.0, 8.0), start, method="DOP853", rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(end, ref.y[:, -1], atol=1e-7)


def test_fermenter_against_solve_ivp():
    s_, x_ = sympy.symbols("s x", real=True)
    mu = sympy.Rational(1, 2) * s_ / (sympy.Rational(1, 2) + s_ + s_ ** 2 / 2)
    field = compile_program([sympy.Rational(1, 5) * (10 - s_) - 2 * mu * x_,
                             (mu - sympy.Rational(1, 5)) * x_], (s_, x_))
    rng = np.random.default_rng(12)
    x0 = np.column_stack([rng.uniform(0, 12, 10), rng.uniform(0, 10, 10)])
    res = simulate(field, x0, [], 20.0, dt=0.01)

    def rhs(t, z):
        m = 0.5 * z[0] / (0.5 + z[0] + z[0] ** 2 / 2)
        return [0.2 * (10 - z[0]) - m * z[1] / 0.5, (m - 0.2) * z[1]]

    for start, end in zip(x0, res.states):
        ref = solve_ivp(rhs, (0.0, 20.0), start, method="DOP853", rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(end, ref.y[:, -1], atol=1e-7)


def test_blow_up_is_reported_not_finite():
    # x' = x^2 from x0 = 1 blows up at t = 1 (exact solution 1/(1 - t)).
    square = compile_program([x ** 2], (x,))
    res = simulate(square, np.array([[1.0], [-1.0]]), [], 2.0, dt=0.01)
    np.testing.assert_array_equal(res.finite, [False, True])
    assert res.states[1, 0] == pytest.approx(-1.0 / 3.0, rel=1e-8)  # -1/(1 + t)


def test_zero_horizon_returns_the_start():
    x0 = np.array([[1.5]])
    res = simulate(DECAY, x0, [1.0], 0.0, dt=0.1)
    assert res.n_steps == 0
    np.testing.assert_array_equal(res.states, x0)


@pytest.mark.parametrize("kwargs,match", [
    (dict(x0=[1.0]), r"`x0` must have shape \(N, 1\)"),
    (dict(x0=[[1.0, 2.0]]), r"`x0` must have shape"),
    (dict(params=[]), r"`params` must have 1 entries"),
    (dict(params=[(2.0, 1.0)]), r"lo <= hi"),
    (dict(dt=0.0), r"`dt` must be positive"),
    (dict(t_end=-1.0), r"`t_end` must be finite"),
])
def test_invalid_input_raises(kwargs, match):
    args = dict(x0=[[1.0]], params=[1.0], t_end=1.0, dt=0.1)
    args.update(kwargs)
    with pytest.raises(ValueError, match=match):
        simulate(DECAY, args["x0"], args["params"], args["t_end"], dt=args["dt"])
