"""Compiled programs: enclosure of exact, float and arb values, CSE, errors, broadcasting.

The demo fermenter (a chemostat with Andrews 1968 substrate inhibition (mem)):
``mu = mu_max s / (Ks + s + s^2/Ki)``, ``s' = D (s_in - s) - mu x / Y``,
``x' = (mu - D) x`` with ``mu_max = 1/2, Ks = 1/2, Ki = 2, D = 1/5, s_in = 10, Y = 1/2``.
"""

from __future__ import annotations

from fractions import Fraction

import flint
import numpy as np
import pytest
import sympy
from flint import arb, fmpq
from hypothesis import given, settings
from hypothesis import strategies as st

from certify import interval as iv
from certify.errors import ModelError
from certify.program import compile_program

S, X = sympy.Symbol("s", real=True), sympy.Symbol("x", real=True)
MU_MAX, KS, KI, D, S_IN, Y = (sympy.Symbol(n, real=True)
                              for n in ("mu_max", "Ks", "Ki", "D", "s_in", "Y"))
PARAMS = (MU_MAX, KS, KI, D, S_IN, Y)
VALUES = dict(zip(PARAMS, [Fraction(1, 2), Fraction(1, 2), Fraction(2), Fraction(1, 5),
                           Fraction(10), Fraction(1, 2)]))
MU = MU_MAX * S / (KS + S + S ** 2 / KI)
FIELD = [D * (S_IN - S) - MU * X / Y, (MU - D) * X]
INPUTS = (S, X) + PARAMS
PROGRAM = compile_program(FIELD, INPUTS)


@pytest.fixture(autouse=True)
def arb_precision():
    """Evaluate arb references at 128 bits (restored afterwards)."""
    old = flint.ctx.prec
    flint.ctx.prec = 128
    yield
    flint.ctx.prec = old


def fermenter_exact(s, x):
    """The fermenter right-hand side in exact rational arithmetic."""
    v = VALUES
    mu = v[MU_MAX] * s / (v[KS] + s + s * s / v[KI])
    return v[D] * (v[S_IN] - s) - mu * x / v[Y], (mu - v[D]) * x


def fermenter_arb(s, x):
    """The same with python-flint arb balls (inputs exact floats, parameters exact)."""
    v = {k: arb(fmpq(q.numerator, q.denominator)) for k, q in VALUES.items()}
    s, x = arb(s), arb(x)
    mu = v[MU_MAX] * s / (v[KS] + s + s * s / v[KI])
    return v[D] * (v[S_IN] - s) - mu * x / v[Y], (mu - v[D]) * x


def param_bounds():
    return [iv.enclose_fraction(VALUES[p]) for p in PARAMS]


def boxes_lo_hi(slo, shi, xlo, xhi):
    bounds = param_bounds()
    lo = np.array([[a, c] + [b[0] for b in bounds] for a, c in zip(slo, xlo)])
    hi = np.array([[a, c] + [b[1] for b in bounds] for a, c in zip(shi, xhi)])
    return lo, hi


def test_exact_value_at_a_rational_point():
    # s = 1, x = 2: mu = 1/4, s' = 9/5 - 1 = 4/5, x' = 1/10 (exact arithmetic by hand
    # and by fermenter_exact).
    lo, hi = boxes_lo_hi([1.0], [1.0], [2.0], [2.0])
    rlo, rhi = PROGRAM.interval(lo, hi)
    exact = fermenter_exact(Fraction(1), Fraction(2))
    assert exact == (Fraction(4, 5), Fraction(1, 10))
    for k in range(2):
        assert Fraction(rlo[0, k]) <= exact[k] <= Fraction(rhi[0, k])
        assert rhi[0, k] - rlo[0, k] < 1e-14


@settings(max_examples=300, derandomize=True, deadline=None, database=None)
@given(st.floats(0, 12), st.floats(0, 10), st.floats(0, 1), st.floats(0, 1),
       st.floats(0, 1), st.floats(0, 1))
def test_fermenter_box_encloses_float_and_arb_values(s, x, ws, wx, us, ux):
    slo, shi = s, s + ws
    xlo, xhi = x, x + wx
    lo, hi = boxes_lo_hi([slo], [shi], [xlo], [xhi])
    rlo, rhi = PROGRAM.interval(lo, hi)
    assert np.all(np.isfinite(rlo)) and np.all(np.isfinite(rhi))
    sp = min(slo + us * ws, shi)
    xp = min(xlo + ux * wx, xhi)
    point = np.array([sp, xp] + [float(VALUES[p]) for p in PARAMS])
    fv = PROGRAM.point(point)
    reference = fermenter_arb(sp, xp)
    for k in range(2):
        # the float evaluation runs the same instructions rounded to nearest
        assert rlo[0, k] <= fv[k] <= rhi[0, k]
        assert arb(float(rlo[0, k])) <= reference[k] <= arb(float(rhi[0, k]))


def test_point_evaluation_close_to_exact():
    rng = np.random.default_rng(3)
    pts = np.column_stack([rng.uniform(0, 12, 200), rng.uniform(0, 10, 200)])
    full = np.column_stack([pts, np.tile([float(VALUES[p]) for p in PARAMS], (200, 1))])
    values = PROGRAM.point(full)
    assert values.shape == (200, 2)
    for (s, x), (fs, fx) in zip(pts, values):
        es, ex = fermenter_exact(Fraction(s), Fraction(x))
        assert abs(fs - float(es)) <= 1e-13 * (1 + abs(float(es)))
        assert abs(fx - float(ex)) <= 1e-13 * (1 + abs(float(ex)))
    # one point as a vector gives a vector
    assert PROGRAM.point(full[0]).shape == (2,)
    np.testing.assert_array_equal(PROGRAM.point(full[0]), values[0])
    # the same with the parameter values given once for every row
    np.testing.assert_array_equal(PROGRAM.point_at(pts, full[0, 2:]), values)


def test_parameter_intervals_enclose_every_parameter_value():
    # mu_max in [0.4, 0.6]: each exact value inside gives a value inside the enclosure.
    lo, hi = boxes_lo_hi([2.0], [2.5], [1.0], [1.5])
    lo[:, 2], hi[:, 2] = 0.4, 0.6
    rlo, rhi = PROGRAM.interval(lo, hi)
    for mu_max in (Fraction(2, 5), Fraction(1, 2), Fraction(3, 5), Fraction(47, 100)):
        for s in (Fraction(2), Fraction(9, 4), Fraction(5, 2)):
            for x in (Fraction(1), Fraction(3, 2)):
                v = dict(VALUES)
                v[MU_MAX] = mu_max
                mu = mu_max * s / (v[KS] + s + s * s / v[KI])
                fs = v[D] * (v[S_IN] - s) - mu * x / v[Y]
                fx = (mu - v[D]) * x
                assert Fraction(rlo[0, 0]) <= fs <= Fraction(rhi[0, 0])
                assert Fraction(rlo[0, 1]) <= fx <= Fraction(rhi[0, 1])


def _ops(program):
    return [ins.op for ins in program.instructions]


def test_repeated_subexpression_is_computed_once():
    a, b = sympy.symbols("a b", real=True)
    u = sympy.sin(a * b)
    program = compile_program([u ** 2 + sympy.cos(a * b), sympy.exp(u)], (a, b))
    ops = _ops(program)
    # by hand: 2 inputs, a*b, sin, cos, pow_int, add, exp
    assert ops.count("input") == 2
    assert ops.count("mul") == 1
    assert ops.count("sin") == 1 and ops.count("cos") == 1 and ops.count("exp") == 1
    assert len(program) == 8
    lo, hi = program.interval(np.array([[0.5, 0.25]]), np.array([[0.5, 0.25]]))
    assert lo[0, 0] <= np.sin(0.125) ** 2 + np.cos(0.125) <= hi[0, 0]
    assert lo[0, 1] <= np.exp(np.sin(0.125)) <= hi[0, 1]


def test_fermenter_shares_the_growth_rate_denominator():
    # Ks + s + s^2/Ki occurs in both equations; s^2 must be computed once.
    ops = _ops(PROGRAM)
    assert ops.count("pow_int") == 1
    separate = sum(len(compile_program([f], INPUTS)) - len(INPUTS) for f in FIELD)
    assert len(PROGRAM) - len(INPUTS) < separate


def test_constants_are_shared_and_enclosed():
    a = sympy.Symbol("a", real=True)
    program = compile_program([a + sympy.Rational(1, 3), a * sympy.Rational(1, 3),
                               a + sympy.pi], (a,))
    consts = [ins.extra for ins in program.instructions if ins.op == "const"]
    assert len(consts) == 2
    third = iv.enclose_fraction(Fraction(1, 3))
    assert third in consts
    lo, hi = program.interval(np.zeros((1, 1)), np.zeros((1, 1)))
    assert Fraction(lo[0, 0]) <= Fraction(1, 3) <= Fraction(hi[0, 0])
    assert lo[0, 2] <= 3.141592653589793 <= hi[0, 2] and lo[0, 2] < hi[0, 2]


def test_unknown_symbol_raises_model_error():
    a, b = sympy.symbols("a b", real=True)
    with pytest.raises(ModelError, match="unknown name b"):
        compile_program([a + b], (a,))
    # a symbol with other assumptions is another name
    with pytest.raises(ModelError, match="unknown name a"):
        compile_program([sympy.Symbol("a") * 2], (a,))


def test_unsupported_operation_raises_model_error():
    a = sympy.Symbol("a", real=True)
    with pytest.raises(ModelError, match="cannot be evaluated"):
        compile_program([sympy.gamma(a)], (a,))
    with pytest.raises(ModelError, match="cannot"):
        compile_program([a + sympy.I], (a,))
    with pytest.raises(ModelError, match="cannot evaluate the constant"):
        compile_program([a + sympy.oo], (a,))


def test_parameter_columns_broadcast():
    rng = np.random.default_rng(5)
    n_rows = 64
    slo = rng.uniform(0, 11, n_rows)
    xlo = rng.uniform(0, 9, n_rows)
    shi, xhi = slo + 0.25, xlo + 0.5
    bounds = param_bounds()
    scalars = PROGRAM.interval_columns([slo, xlo] + [b[0] for b in bounds],
                                       [shi, xhi] + [b[1] for b in bounds])
    arrays = PROGRAM.interval_columns([slo, xlo] + [np.full(n_rows, b[0]) for b in bounds],
                                      [shi, xhi] + [np.full(n_rows, b[1]) for b in bounds])
    lo, hi = boxes_lo_hi(slo, shi, xlo, xhi)
    stacked = PROGRAM.interval(lo, hi)
    for k in range(2):
        assert scalars[k][0].shape == (n_rows,)
        np.testing.assert_array_equal(scalars[k][0], arrays[k][0])
        np.testing.assert_array_equal(scalars[k][1], arrays[k][1])
        np.testing.assert_array_equal(scalars[k][0], stacked[0][:, k])
        np.testing.assert_array_equal(scalars[k][1], stacked[1][:, k])


def test_constant_output_broadcasts():
    a = sympy.Symbol("a", real=True)
    program = compile_program([sympy.Integer(3), 2], (a,))
    lo, hi = program.interval(np.zeros((4, 1)), np.ones((4, 1)))
    assert lo.shape == (4, 2)
    np.testing.assert_array_equal(lo, [[3.0, 2.0]] * 4)
    np.testing.assert_array_equal(hi, [[3.0, 2.0]] * 4)


def test_negative_terms_are_subtracted():
    # a - 3 b: rule "a term -c*u is subtracted as |c|*u"; a - b stays exact (TwoSum),
    # a nonzero product is rounded outward by one ulp.
    a, b = sympy.symbols("a b", real=True)
    program = compile_program([a - 3 * b, a - b], (a, b))
    assert _ops(program).count("sub") == 2 and "neg" not in _ops(program)
    lo, hi = program.interval(np.array([[0.5, 0.25]]), np.array([[0.5, 0.25]]))
    assert lo[0, 0] < -0.25 < hi[0, 0] and hi[0, 0] - lo[0, 0] < 1e-15
    assert lo[0, 1] == hi[0, 1] == 0.25


def test_unusable_rows_are_nan_and_others_unaffected():
    a = sympy.Symbol("a", real=True)
    program = compile_program([sympy.log(a), 1 / a], (a,))
    lo, hi = program.interval(np.array([[-1.0], [1.0]]), np.array([[2.0], [2.0]]))
    assert np.isnan(lo[0]).all() and np.isnan(hi[0]).all()
    assert lo[1, 0] <= 0.0 <= hi[1, 0] and lo[1, 1] <= 0.5 and hi[1, 1] >= 1.0
