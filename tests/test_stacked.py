"""The kernels on stacked bounds (certify.stacked) against the kernels on separate bounds.

Compiled programs run on stacked bounds; the flow, the trapping regions and the points
use :mod:`certify.interval` directly, and the docs promise both give the same floats.
Compared here bit for bit (NaN with NaN) on random intervals with special values
(signed zeros, subnormals, infinities, NaN, huge and tiny magnitudes), every operand
also as a point (one array for both bounds). The enclosures themselves are checked
against exact rational arithmetic (:class:`fractions.Fraction`; binary64 values are
dyadic rationals) on finite operands.
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import pytest

from certify import interval as iv
from certify import stacked

pytestmark = pytest.mark.filterwarnings("ignore::RuntimeWarning")

SPECIALS = np.array([0.0, -0.0, 1.0, -1.0, np.inf, -np.inf, np.nan, 5e-324, -5e-324,
                     1e-310, 1e308, -1e308, 1e-200, -1e-200, 0.1, 3.0])


def _intervals(rng, n):
    """Random ``lo <= hi`` with about a third special values and a fifth points."""
    a = np.where(rng.random(n) < 0.3, rng.choice(SPECIALS, n),
                 rng.standard_normal(n) * 10.0 ** rng.integers(-300, 300, n))
    b = np.where(rng.random(n) < 0.3, rng.choice(SPECIALS, n),
                 a + np.abs(rng.standard_normal(n)) * 10.0 ** rng.integers(-300, 300, n))
    b = np.where(rng.random(n) < 0.2, a, b)
    return np.minimum(a, b), np.maximum(a, b)


def _same_floats(x, y):
    x, y = np.asarray(x, float), np.asarray(y, float)
    nan = np.isnan(x)
    return (np.array_equal(nan, np.isnan(y))
            and np.array_equal(np.where(nan, 0.0, x).view(np.int64),
                               np.where(nan, 0.0, y).view(np.int64)))


def _operands(rng, n):
    lo, hi = _intervals(rng, n)
    return [(lo, hi), (lo, lo)]          # an interval and a point (one array)


@pytest.mark.parametrize("stream", range(20))
def test_binary_kernels_give_the_floats_of_the_interval_kernels(stream):
    rng = np.random.default_rng(stream)
    n = int(rng.integers(1, 300))
    for a in _operands(rng, n):
        for b in _operands(rng, n):
            for name in ("add", "sub", "mul", "div", "imin", "imax"):
                expected = getattr(iv, name)(*a, *b)
                got = stacked.bounds(stacked.KERNELS[name](stacked.stack(*a),
                                                           stacked.stack(*b)))
                for e, g in zip(expected, got):
                    assert _same_floats(np.broadcast_to(e, (n,)), np.broadcast_to(g, (n,))), name


@pytest.mark.parametrize("stream", range(10))
def test_unary_kernels_give_the_floats_of_the_interval_kernels(stream):
    rng = np.random.default_rng(100 + stream)
    n = int(rng.integers(1, 300))
    for a in _operands(rng, n):
        s = stacked.stack(*a)
        cases = [(name, getattr(iv, name)(*a), stacked.KERNELS[name](s))
                 for name in ("neg", "exp", "log", "sqrt", "sin", "cos", "atan", "iabs")]
        cases += [(f"pow {k}", iv.pow_int(*a, k), stacked.KERNELS["pow_int"](s, k))
                  for k in (2, 3, 4, -1, -2)]
        for name, expected, got in cases:
            for e, g in zip(expected, stacked.bounds(got)):
                assert _same_floats(np.broadcast_to(e, (n,)), np.broadcast_to(g, (n,))), name


def test_a_point_is_one_row_and_stays_one_under_negation():
    values = np.array([2.0, -3.0])
    p = stacked.stack(values, values)
    assert p.shape == (1, 2)
    assert np.array_equal(stacked.neg(p), [[-2.0, 3.0]])
    product = stacked.mul(p, stacked.stack(np.array([1.0, 1.0]), np.array([2.0, 2.0])))
    assert product.shape == (2, 2)
    # 2 * [1, 2] = [2, 4] and -3 * [1, 2] = [-6, -3], one ulp outward
    assert product[0, 0] < 2.0 < 4.0 < product[1, 0] and product[0, 1] < -6.0 < -3.0 < product[1, 1]


@pytest.mark.parametrize("stream", range(5))
def test_enclosures_hold_in_exact_rational_arithmetic(stream):
    # Fraction of each float is exact; the true result set of [a] op [b] has its
    # extremes at endpoint combinations for +, -, * and / (divisor of one sign)
    rng = np.random.default_rng(200 + stream)
    n = 200
    lo, hi = np.sort(rng.standard_normal((2, n)) * 10.0 ** rng.integers(-5, 5, (2, n)), 0)
    blo, bhi = np.sort(rng.standard_normal((2, n)) * 10.0 ** rng.integers(-5, 5, (2, n)), 0)
    a, b = stacked.stack(lo, hi), stacked.stack(blo, bhi)
    ops = {"add": lambda x, y: x + y, "sub": lambda x, y: x - y,
           "mul": lambda x, y: x * y, "div": lambda x, y: x / y}
    for name, op in ops.items():
        out_lo, out_hi = stacked.bounds(stacked.KERNELS[name](a, b))
        for i in range(n):
            if name == "div" and blo[i] <= 0 <= bhi[i]:
                assert np.isnan(out_lo[i]) and np.isnan(out_hi[i])
                continue
            values = [op(Fraction(x), Fraction(y)) for x in (lo[i], hi[i])
                      for y in (blo[i], bhi[i])]
            assert Fraction(out_lo[i]) <= min(values) and max(values) <= Fraction(out_hi[i])
