"""The centered form of the Jacobian on the mean-value box (docs/method.md, step 4).

In three or more states the step encloses each Jacobian entry that is not constant in
the states by ``Df_e(m) + sum_l (d Df_e / d x_l)(J) (J_l - m_l)`` as well as by its natural
interval extension, and uses the intersection. Checked here against the mean-value
theorem (common practice): the enclosure holds the Jacobian at points of ``J``, evaluated
independently with sympy's ``lambdify``; it is never wider than the natural extension;
its excess over the sampled range shrinks with the square of ``J``'s width (second
order), the natural extension's only linearly. The checker derives the same entries.
The Jacobian of ``f^[2] = Df f / 2`` (the second Taylor coefficient, by definition) is
also enclosed by the product ``(Df(J) Df(J) + D^2f(J)[f(J)]) / 2``, checked the same way.
The step's first-order term takes ``Df(m)`` and leaves the rest of ``h (f(x) - f(m))`` to
``(h/2) D^2f(J)[J - m, J - m]`` (docs/method.md, exact order, step 4), checked against
sympy.
"""

from __future__ import annotations

import numpy as np
import sympy

from certify import parse_model
from certify.check._programs import derive_programs
from certify.evaluate import evaluate_boxes, parameter_enclosures
from certify.flow import _centered_jacobian, _first_order_at_centre, _product_jacobian
from certify.taylor import centered_entries, flow_programs
from test_points import COMPETITION  # two competing species: a model of two states

# Hastings & Powell 1991, "Chaos in a three-species food chain", scaled form with their
# parameters a1 = 5, b1 = 3, a2 = 0.1, b2 = 2, d1 = 0.4, d2 = 0.01 (from memory).
CHAIN = """
[model]
name = "Hastings-Powell chain"
[states]
x = { range = [0, 1] }
y = { range = [0, 0.5] }
z = { range = [7, 11] }
[parameters]
a1 = 5
b1 = 3
a2 = 0.1
b2 = 2
d1 = 0.4
d2 = 0.01
[equations]
x = "x*(1 - x) - a1*x*y/(1 + b1*x)"
y = "a1*x*y/(1 + b1*x) - a2*y*z/(1 + b2*y) - d1*y"
z = "a2*y*z/(1 + b2*y) - d2*z"
[limits]
floor = "z >= 7.5"
"""


def _sympy_chain():
    """The states and ``f`` of CHAIN in sympy (independent of the compiled programs)."""
    x, y, z = sympy.symbols("x y z")
    a1, b1, a2, b2, d1, d2 = 5, 3, sympy.Rational(1, 10), 2, sympy.Rational(2, 5), \
        sympy.Rational(1, 100)
    f = sympy.Matrix([x * (1 - x) - a1 * x * y / (1 + b1 * x),
                      a1 * x * y / (1 + b1 * x) - a2 * y * z / (1 + b2 * y) - d1 * y,
                      a2 * y * z / (1 + b2 * y) - d2 * z])
    return (x, y, z), f


def _sympy_jacobian(model, coefficient=1):
    """The Jacobian of ``f`` (or, with `coefficient` 2, of ``f^[2] = Df f / 2``) as a
    numpy function of the states, by sympy (independent of the compiled programs)."""
    (x, y, z), f = _sympy_chain()
    if coefficient == 2:
        f = f.jacobian([x, y, z]) * f / 2
    return sympy.lambdify((x, y, z), f.jacobian([x, y, z]), "numpy")


def _boxes(rng, count, width):
    """Random boxes of the given widths (per axis) inside the chain's window, and a
    point `m` in each (the set's centre in a step: anywhere in J)."""
    lo = np.array([0.0, 0.0, 7.0]) + rng.random((count, 3)) * (np.array([1, 0.5, 4]) - width)
    hi = lo + width
    m = lo + rng.random((count, 3)) * width
    return lo, hi, m


def _enclosures(programs, params, lo, hi, m):
    """The natural ``Df(J)`` and the step's ``Df(J)`` with the centered form."""
    natural = evaluate_boxes(programs.jacobian, lo, hi, params)
    return natural, _centered_jacobian(programs, *natural, lo, hi, m, params)[:2]


def _sampled_range(jac, lo, hi, per_side=6):
    """Entrywise min and max of the Jacobian on a grid of each box (floats)."""
    t = np.linspace(0, 1, per_side)
    grid = np.array(np.meshgrid(t, t, t, indexing="ij")).reshape(3, -1).T
    points = lo[:, None, :] + grid[None] * (hi - lo)[:, None, :]
    values = np.array([[np.array(jac(*p), float).ravel() for p in box] for box in points])
    return values.min(axis=1), values.max(axis=1)


def test_centered_enclosure_holds_the_jacobian_and_is_no_wider():
    model = parse_model(CHAIN)
    programs = flow_programs(model, 4)
    params = parameter_enclosures(model)
    assert programs.hessian is not None and len(programs.centered) > 0
    rng = np.random.default_rng(7)
    lo, hi, m = _boxes(rng, 60, np.array([0.05, 0.02, 0.1]))
    (nlo, nhi), (clo, chi) = _enclosures(programs, params, lo, hi, m)
    smin, smax = _sampled_range(_sympy_jacobian(model), lo, hi)
    assert np.all(clo <= smin) and np.all(chi >= smax)
    assert np.all(clo >= nlo) and np.all(chi <= nhi)
    # the intersection tightens the entries it is applied to
    entries = list(programs.centered)
    assert np.mean((chi - clo)[:, entries] < (nhi - nlo)[:, entries]) > 0.5


def test_product_form_holds_the_jacobian_of_the_second_coefficient():
    model = parse_model(CHAIN)
    programs = flow_programs(model, 4)
    params = parameter_enclosures(model)
    rng = np.random.default_rng(5)
    lo, hi, m = _boxes(rng, 60, np.array([0.05, 0.02, 0.1]))
    natural = evaluate_boxes(programs.jacobian, lo, hi, params)
    glo, ghi, hlo, hhi = _centered_jacobian(programs, *natural, lo, hi, m, params)
    wlo, whi = evaluate_boxes(programs.higher_jacobians, lo, hi, params)
    plo, phi = _product_jacobian(programs, glo, ghi, hlo, hhi, wlo, whi, lo, hi, params)
    smin, smax = _sampled_range(_sympy_jacobian(model, coefficient=2), lo, hi)
    assert np.all(plo[:, :9] <= smin) and np.all(phi[:, :9] >= smax)
    assert np.all(plo >= wlo) and np.all(phi <= whi)
    # only the Jacobian of f^[2] is narrowed, and on most boxes as a whole
    np.testing.assert_array_equal(plo[:, 9:], wlo[:, 9:])
    assert np.mean((phi - plo)[:, :9].sum(axis=1) < (whi - wlo)[:, :9].sum(axis=1)) > 0.5


def test_centered_excess_shrinks_with_the_square_of_the_box():
    model = parse_model(CHAIN)
    programs = flow_programs(model, 4)
    params = parameter_enclosures(model)
    jac = _sympy_jacobian(model)
    entries = list(programs.centered)
    excess = {}
    for scale in (1.0, 0.25):
        rng = np.random.default_rng(11)
        lo, hi, _ = _boxes(rng, 40, scale * np.array([0.08, 0.04, 0.2]))
        m = 0.5 * (lo + hi)
        (nlo, nhi), (clo, chi) = _enclosures(programs, params, lo, hi, m)
        smin, smax = _sampled_range(jac, lo, hi)
        sampled = (smax - smin)[:, entries]
        excess[scale] = (np.median(((chi - clo)[:, entries] - sampled).sum(axis=1)),
                         np.median(((nhi - nlo)[:, entries] - sampled).sum(axis=1)))
    centered_ratio = excess[1.0][0] / excess[0.25][0]
    natural_ratio = excess[1.0][1] / excess[0.25][1]
    # a quarter of the width: second order gives 16, first order 4
    assert centered_ratio > 8
    assert natural_ratio < 6


def _sympy_field():
    """``f`` of the chain and its Jacobian as numpy functions (sympy)."""
    states, f = _sympy_chain()
    return (sympy.lambdify(states, f, "numpy"),
            sympy.lambdify(states, f.jacobian(list(states)), "numpy"))


def test_second_order_rest_holds_what_the_first_order_term_at_m_leaves():
    # Taylor's formula with integral remainder (common practice): for x in J,
    # h (f(x) - f(m) - Df(m) (x - m)) = h int_0^1 (1 - s) D^2f(m + s (x - m))[x - m, x - m] ds,
    # which the step encloses by (h/2) D^2f(J)[J - m, J - m]; checked at grid points of J
    # with f and Df from sympy
    model = parse_model(CHAIN)
    programs = flow_programs(model, 4)
    params = parameter_enclosures(model)
    field, jac = _sympy_field()
    rng = np.random.default_rng(3)
    lo, hi, m = _boxes(rng, 60, np.array([0.05, 0.02, 0.1]))
    h = np.full(len(lo), 0.125)
    natural = evaluate_boxes(programs.jacobian, lo, hi, params)
    _, _, hlo, hhi = _centered_jacobian(programs, *natural, lo, hi, m, params)
    at_lo, at_hi, qlo, qhi = _first_order_at_centre(programs, hlo, hhi, lo, hi, m, h, params)
    t = np.linspace(0, 1, 5)
    grid = np.array(np.meshgrid(t, t, t, indexing="ij")).reshape(3, -1).T
    for b in range(len(lo)):
        at_m = np.array(jac(*m[b]), float)
        assert np.all(at_lo[b].reshape(3, 3) <= at_m) and np.all(at_hi[b].reshape(3, 3) >= at_m)
        for point in lo[b] + grid * (hi[b] - lo[b]):
            d = point - m[b]
            rest = h[b] * (np.array(field(*point), float).ravel()
                           - np.array(field(*m[b]), float).ravel() - at_m @ d)
            slack = 1e-12 * (1 + np.abs(rest))   # the float evaluation of the reference
            assert np.all(qlo[b] <= rest + slack) and np.all(qhi[b] >= rest - slack)
    # second order: a quarter of the box gives about a sixteenth of the width
    small_lo, small_hi = m - (m - lo) / 4, m + (hi - m) / 4
    natural = evaluate_boxes(programs.jacobian, small_lo, small_hi, params)
    _, _, hlo, hhi = _centered_jacobian(programs, *natural, small_lo, small_hi, m, params)
    _, _, slo, shi = _first_order_at_centre(programs, hlo, hhi, small_lo, small_hi, m, h,
                                            params)
    assert np.median((shi - slo).sum(axis=1) / (qhi - qlo).sum(axis=1)) < 1 / 10


def test_checker_derives_the_same_entries():
    for text in (CHAIN, COMPETITION):
        model = parse_model(text)
        prover = flow_programs(model, 4)
        checker = derive_programs(model, 4)
        assert checker.centered == prover.centered
        assert (checker.hessian is None) == (prover.hessian is None)
    # two states: the Jacobian is cut where that pays instead (no centered entries)
    assert flow_programs(parse_model(COMPETITION), 4).centered == ()
    x, y, z = sympy.symbols("x y z")
    # rows [y, x, 0], [0, 0, -1], [3, 0, 0]: only the first two entries vary
    df = sympy.Matrix([x * y, -z, 3 * x]).jacobian([x, y, z])
    assert centered_entries(df, (x, y, z)) == (0, 1)
