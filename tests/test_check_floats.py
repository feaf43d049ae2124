"""Tests of the checker's float64 first pass (certify/check/_floats.py).

References named beside the checks:

* the basic operations, powers, the inverse matrix and rational constants against exact
  rational arithmetic (``fractions.Fraction``, sympy's exact matrix inverse);
* the elementary functions and named constants against mpmath at 100 digits;
* whole Taylor programs against python-flint's tightest 53-bit enclosures (EndpointArith);
* a certificate that the arb passes verify verifies with the float pass first, and also
  when the float pass leaves most cells to them (the tamper classes are rejected by the
  tests of test_checker.py, test_soundness_hardening.py and test_certificate_format.py,
  which now run the float pass first).
"""

import itertools
import operator
from fractions import Fraction

import mpmath
import numpy as np
import pytest
import sympy

from certify.certificate import certificate_data, write_certificate
from certify.check import check_certificate
from certify.check._arith import ARITHMETICS, EndpointArith, evaluate
from certify.check._floats import FloatArith, float_down, float_up
from certify.check._programs import derive_programs
from certify.model import load_model
from certify.prove import Method, prove

MAX = np.finfo(float).max
TINY = 5e-324

#: Adversarial ends: zeros of both signs, subnormals, the normal boundary, huge values,
#: ends whose products and sums round, and ordinary values of both signs.
SPECIAL = [0.0, -0.0, TINY, -TINY, 3 * TINY, 2.0 ** -1022, -(2.0 ** -1022), 1e-300, -1e-300,
           1e300, -1e300, MAX, -MAX, 1.0, -1.0, 0.1, -0.1, 1 / 3, -2 / 3, 3.0, -7.5,
           2.0 ** 52 + 1, 1 + 2.0 ** -52]


def _intervals(count, stream):
    """Random and adversarial intervals as two float arrays (lo <= hi)."""
    rng = np.random.default_rng(stream)
    pick = rng.choice(SPECIAL, (count, 2))
    scale = 10.0 ** rng.integers(-310, 308, (count, 2))
    rough = rng.uniform(-1, 1, (count, 2)) * scale
    use_special = rng.random((count, 2)) < 0.4
    ends = np.where(use_special, pick, rough)
    point = rng.random(count) < 0.15
    ends[point, 1] = ends[point, 0]
    return np.minimum(ends[:, 0], ends[:, 1]), np.maximum(ends[:, 0], ends[:, 1])


def _enclosed(lo, hi, values):
    """Assert that each end of [lo, hi] is NaN or a true bound of the exact values
    (Fractions), and that both are numbers when the values lie within the float range."""
    assert lo != np.inf and hi != -np.inf
    if all(abs(v) <= MAX for v in values):
        assert not (np.isnan(lo) or np.isnan(hi))
    for v in values:
        assert np.isnan(lo) or lo == -np.inf or Fraction(lo) <= v
        assert np.isnan(hi) or hi == np.inf or v <= Fraction(hi)


def _tight(lo, hi, low, high, ulps=4):
    """The ends are at most `ulps` floats outside the exact range [low, high] (rounding
    to nearest and a step of one or two floats, three just above 2^-1022)."""
    with np.errstate(over="ignore"):
        up, down = lo, hi
        for _ in range(ulps):
            up, down = np.nextafter(up, np.inf), np.nextafter(down, -np.inf)
    if np.isfinite(lo) and np.isfinite(up):
        assert Fraction(up) >= low or up >= hi
    if np.isfinite(hi) and np.isfinite(down):
        assert Fraction(down) <= high or down <= lo


@pytest.mark.parametrize("op", ["add", "sub", "mul", "div"])
def test_basic_operations_enclose_the_exact_range(op):
    # reference: exact rational arithmetic (fractions.Fraction) at the corners, which hold
    # the extremes of +, -, * and of / over a divisor of one strict sign
    ar = FloatArith()
    a_lo, a_hi = _intervals(1500, 1)
    b_lo, b_hi = _intervals(1500, 2)
    with np.errstate(all="ignore"):
        lo, hi = getattr(ar, op)(ar.box(a_lo, a_hi), ar.box(b_lo, b_hi))
    exact = getattr(operator, {"div": "truediv"}.get(op, op))
    for j, (a, b) in enumerate(zip(zip(a_lo, a_hi), zip(b_lo, b_hi))):
        if op == "div" and b[0] <= 0 <= b[1]:
            assert np.isnan(lo[j]) and np.isnan(hi[j])     # a divisor reaching 0
            continue
        corners = [exact(Fraction(x), Fraction(y)) for x, y in itertools.product(a, b)]
        _enclosed(lo[j], hi[j], corners)
        _tight(lo[j], hi[j], min(corners), max(corners))


def test_exact_results_stay_exact_and_zero_products_keep_their_sign():
    # reference: exact rational arithmetic; 1 + 2 and 0.5 * 3 are floats, a product of
    # nonnegative intervals is nonnegative even where it underflows to 0
    ar = FloatArith()
    one, two = ar.exact(np.array([1.0])), ar.exact(np.array([2.0]))
    assert ar.add(one, two) == (3.0, 3.0)
    assert ar.sub(one, two) == (-1.0, -1.0)
    lo, hi = ar.mul(ar.box([0.0], [1e-200]), ar.box([0.0], [1e-200]))
    assert lo[0] == 0.0 and hi[0] >= TINY        # 1e-400 underflows: upper end stepped
    lo, hi = ar.mul(ar.box([-1e-200], [0.0]), ar.box([1e-200], [1e-200]))
    assert hi[0] == 0.0 and lo[0] <= -TINY


def test_infinite_inputs_and_overflow():
    # reference: IEEE 754 overflow; an infinite input is unusable, an end that overflowed
    # is a true bound beyond the largest float or NaN, never a finite interval
    ar = FloatArith()
    lo, hi = ar.exact(np.array([np.inf, -np.inf, np.nan, 1.0]))
    assert np.isnan(lo[:3]).all() and np.isnan(hi[:3]).all() and lo[3] == 1.0
    with np.errstate(all="ignore"):
        for a, b, op in ((MAX, 2.0, "mul"), (-MAX, -MAX, "add"), (1.0, TINY, "div"),
                         (MAX, -MAX, "sub")):
            out = getattr(ar, op)(ar.exact(np.array([a])), ar.exact(np.array([b])))
            assert not ar.finite(out)[0]
            assert out[0][0] != np.inf and out[1][0] != -np.inf
            assert np.isnan(out[0][0]) or out[0][0] < 0 or op != "mul"
    assert not ar.finite(ar.box([1.0], [np.inf]))[0]


@pytest.mark.parametrize("n", [2, 3, 4, 5, 7])
def test_integer_powers_enclose_the_exact_range(n):
    # reference: exact rational arithmetic; x^n is monotone for odd n, and for even n
    # its minimum over an interval containing 0 is 0
    ar = FloatArith()
    lo_in, hi_in = _intervals(800, 3 + n)
    with np.errstate(all="ignore"):
        lo, hi = ar.pow_int(ar.box(lo_in, hi_in), n)
    for j in range(len(lo)):
        a, b = Fraction(lo_in[j]), Fraction(hi_in[j])
        values = [a ** n, b ** n] + ([Fraction(0)] if a <= 0 <= b else [])
        low = Fraction(0) if n % 2 == 0 and a <= 0 <= b else min(values)
        _enclosed(lo[j], hi[j], values)
        _enclosed(lo[j], hi[j], [low])
        if n % 2 == 0:
            assert np.isnan(lo[j]) or lo[j] >= 0


def test_sqrt_and_domain_errors():
    # reference: exact rational arithmetic (sqrt(lo)^2 <= lo, hi <= sqrt(hi)^2 up to the
    # outward step); sqrt of an interval reaching below 0 is unusable
    ar = FloatArith()
    lo_in, hi_in = _intervals(600, 11)
    with np.errstate(all="ignore"):
        lo, hi = ar.function("sqrt", ar.box(lo_in, hi_in))
    for j in range(len(lo)):
        if lo_in[j] < 0:
            assert np.isnan(lo[j]) and np.isnan(hi[j])
            continue
        assert lo[j] >= 0 and Fraction(lo[j]) ** 2 <= Fraction(lo_in[j])
        assert hi[j] == np.inf or Fraction(hi[j]) ** 2 >= Fraction(hi_in[j])


MP = mpmath.mp.clone()
MP.dps = 100

FUNCTIONS = {"exp": MP.exp, "log": MP.log, "sin": MP.sin, "cos": MP.cos, "tan": MP.tan,
             "atan": MP.atan, "tanh": MP.tanh, "sinh": MP.sinh, "cosh": MP.cosh}


def _function_boxes(name):
    """Intervals across the function's shape: extrema, poles, the domain edge, tiny."""
    rng = np.random.default_rng(len(name))
    lo = np.concatenate([rng.uniform(-8, 8, 60), [-1e-300, 0.0, 1.5, 4.0, 1e-8, -3.2, 600.0]])
    width = np.concatenate([rng.uniform(0, 3, 60), [2e-300, 0.0, 0.2, 2.0, 0.0, 0.1, 100.0]])
    if name == "log":
        lo = np.abs(lo)
    return lo, lo + width


@pytest.mark.parametrize("name", sorted(FUNCTIONS))
def test_elementary_functions_enclose_mpmath(name):
    # reference: mpmath at 100 digits, at the ends, 9 inner points and the function's
    # extrema and poles (pi/2 + k pi) inside each interval
    ar = FloatArith()
    lo_in, hi_in = _function_boxes(name)
    with np.errstate(all="ignore"):
        lo, hi = ar.function(name, ar.box(lo_in, hi_in))
    f = FUNCTIONS[name]
    for j in range(len(lo)):
        a, b = MP.mpf(lo_in[j]), MP.mpf(hi_in[j])
        points = [a + (b - a) * k / 10 for k in range(11)]
        points += [MP.pi * k / 2 for k in range(-6, 7) if a <= MP.pi * k / 2 <= b]
        if name == "log" and a <= 0:
            assert np.isnan(lo[j])
            continue
        if name == "tan" and any(MP.cos(p) == 0 or MP.sign(MP.cos(a)) != MP.sign(MP.cos(p))
                                 for p in points):
            assert np.isnan(lo[j])         # a pole inside (cos changes sign)
            continue
        if np.isnan(lo[j]):
            assert name in ("exp", "sinh", "cosh") and b > 700   # overflow of the arb end
            continue
        for p in points:
            value = f(p)
            assert MP.mpf(lo[j]) <= value <= MP.mpf(hi[j]), (name, j, p)


def test_real_powers_enclose_mpmath():
    # reference: mpmath at 100 digits; x^q is NaN where x reaches below 0, or reaches 0
    # with q < 0
    ar = FloatArith()
    lo_in = np.array([0.0, 0.5, 2.0, 1e-300, -0.1, 0.0, 3.0])
    hi_in = np.array([1.0, 0.5, 9.0, 1e-200, 0.5, 2.0, 3.5])
    for q in (Fraction(1, 3), Fraction(5, 2), Fraction(-3, 4)):
        lo, hi = ar.pow_real(ar.box(lo_in, hi_in), q)
        for j in range(len(lo_in)):
            if lo_in[j] < 0 or (lo_in[j] == 0 and q < 0):
                assert np.isnan(lo[j]) and np.isnan(hi[j])
                continue
            for t in np.linspace(lo_in[j], hi_in[j], 7):
                value = MP.power(MP.mpf(t), MP.mpf(q.numerator) / q.denominator)
                assert MP.mpf(lo[j]) <= value <= MP.mpf(hi[j])


def test_constants_are_the_tightest_float_enclosures():
    # reference: mpmath at 100 digits (pi, e) and exact rationals (1/3, 1/10, 2^-1074 / 3)
    ar = FloatArith()
    for spec, value in ((("named", "pi"), MP.pi), (("named", "e"), MP.e)):
        lo, hi = ar.constant(spec)
        assert MP.mpf(lo) < value < MP.mpf(hi) and np.nextafter(lo, np.inf) == hi
    for q in (Fraction(1, 3), Fraction(1, 10), Fraction(-7, 3), Fraction(1, 3 << 1074),
              Fraction(10) ** 400, Fraction(3, 8)):
        lo, hi = ar.constant(("q", q.numerator, q.denominator))
        assert Fraction(lo) <= q and (hi == np.inf or q <= Fraction(hi))
        if abs(q) < MAX:
            assert Fraction(np.nextafter(lo, np.inf)) > q or lo == q
            assert Fraction(np.nextafter(hi, -np.inf)) < q or hi == q
    assert float_down(Fraction(10) ** 400) == MAX and float_up(Fraction(10) ** 400) == np.inf


def test_inverse_encloses_the_exact_inverse():
    # reference: sympy's exact inverse of the float matrix (rationals)
    rng = np.random.default_rng(7)
    for n in (2, 3):
        Q, _ = np.linalg.qr(rng.normal(size=(40, n, n)))
        Q[0] = np.eye(n)
        Q[1] *= 1.5                        # scaled: still enclosed (C is numpy's inverse)
        Q[2] = np.triu(np.ones((n, n)))    # skewed (a parallelepiped frame)
        Q[3] = 1.0                         # singular: unusable
        B = FloatArith().inverse(Q)
        for row in range(40):
            if row == 3:
                assert all(np.isnan(B[i][j][k][row]) for i in range(n) for j in range(n)
                           for k in range(2))
                continue
            exact = sympy.Matrix(n, n, [sympy.Rational(Fraction(x)) for x in Q[row].ravel()]).inv()
            for i in range(n):
                for j in range(n):
                    lo, hi = B[i][j][0][row], B[i][j][1][row]
                    v = Fraction(str(exact[i, j]))
                    assert Fraction(lo) <= v <= Fraction(hi)
                    assert hi - lo < 1e-12


def test_cover_and_split_cover_the_box():
    # reference: elementary geometry; every sampled point of the box lies in a piece
    ar = FloatArith()
    rng = np.random.default_rng(3)
    lo = rng.uniform(-5, 5, (50, 2))
    hi = lo + rng.uniform(0, 3, (50, 2))
    box = [ar.box(lo[:, k], hi[:, k]) for k in range(2)]
    mid = [ar.exact(0.5 * (lo[:, k] + hi[:, k])) for k in range(2)]
    for pieces in (ar.cover(box, 1), ar.cover(box, 2), ar.cover(box, 4),
                   ar.split_at(box, mid)):
        for _ in range(20):
            t = lo + rng.random((50, 2)) * (hi - lo)
            inside = np.zeros(50, bool)
            for piece in pieces:
                inside |= np.all([(piece[k][0] <= t[:, k]) & (t[:, k] <= piece[k][1])
                                  for k in range(2)], axis=0)
            assert inside.all()


def test_hull_intersect_and_abs():
    # reference: set operations on intervals; an empty intersection is unusable
    ar = FloatArith()
    a, b = ar.box([0.0, 0.0, -2.0], [1.0, 1.0, 3.0]), ar.box([0.5, 2.0, -1.0], [2.0, 3.0, 1.0])
    lo, hi = ar.intersect(a, b)
    assert (lo[0], hi[0]) == (0.5, 1.0) and np.isnan(lo[1]) and np.isnan(hi[1])
    assert ar.hull(a, b)[0][2] == -2.0 and ar.hull(a, b)[1][1] == 3.0
    lo, hi = ar.iabs(ar.box([-2.0, 1.0, -3.0, np.nan], [3.0, 2.0, -1.0, 1.0]))
    assert list(lo[:3]) == [0.0, 1.0, 1.0] and list(hi[:3]) == [3.0, 2.0, 3.0]
    assert np.isnan(lo[3]) and np.isnan(hi[3])


def test_float_pass_verifies_the_demo_certificate(tmp_path):
    # reference: the arb passes verify the prover's certificates (tests/test_checker.py);
    # the float pass is first and every cell it cannot verify goes on to them
    proof = prove(load_model("models/fermenter.toml"), max_depth=6)
    path = tmp_path / "fermenter.json.gz"
    write_certificate(path, certificate_data(proof, {}))
    result = check_certificate(path, jobs=1)
    assert result.valid, result.message
    assert 0 <= result.ball_cells < result.cells_checked
    assert result.refined_cells <= result.ball_cells


def _fermenter_programs():
    model = load_model("models/fermenter.toml")
    return model, derive_programs(model, 4)


def test_whole_programs_contain_the_tightest_double_enclosure():
    # reference: python-flint exact endpoints (EndpointArith: every operation's tightest
    # 53-bit enclosure). Evaluated in the same order, each float operation encloses the
    # exact range over wider inputs with float ends, hence contains the tightest one
    model, programs = _fermenter_programs()
    rng = np.random.default_rng(11)
    lo = np.stack([rng.uniform(0, 11, 300), rng.uniform(0, 9, 300)], 1)
    hi = lo + rng.uniform(0, 0.5, (300, 2)) * (rng.random((300, 1)) < 0.8)
    params = [(p.lo, p.hi) for p in model.parameters]
    floats, ends = FloatArith(), EndpointArith()
    ends.enter()
    for program in (programs.remainder, programs.higher_jacobians, programs.on_tube):
        out_f = evaluate(program, floats, [floats.box(lo[:, k], hi[:, k]) for k in range(2)]
                         + [floats.rational(a, b) for a, b in params])
        out_e = evaluate(program, ends, [ends.box(lo[:, k], hi[:, k]) for k in range(2)]
                         + [ends.rational(a, b) for a, b in params])
        for (f_lo, f_hi), (e_lo, e_hi) in zip(out_f, out_e):
            usable = np.isfinite(f_lo) & np.isfinite(f_hi)
            assert usable.mean() > 0.5
            for j in np.flatnonzero(usable):
                assert Fraction(f_lo[j]) <= _fraction(e_lo[j])
                assert _fraction(e_hi[j]) <= Fraction(f_hi[j])


def _fraction(x):
    m, e = x.man_exp()
    return Fraction(int(m)) * Fraction(2) ** int(e)


class _Loose(FloatArith):
    """A float arithmetic that widens every sum by a relative 1e-6: sound, too loose."""

    def add(self, a, b):
        lo, hi = super().add(a, b)
        return lo - 1e-6 * (np.abs(lo) + 1), hi + 1e-6 * (np.abs(hi) + 1)


@pytest.mark.parametrize("model, depth", [("fermenter", 4), ("microbial_food_chain", 3)])
def test_cells_the_float_pass_leaves_go_on_to_the_ball_pass(tmp_path, monkeypatch, model,
                                                            depth):
    # reference: the arb passes verify the prover's certificates (tests/test_checker.py):
    # with a first pass too loose to verify most cells, the check still holds, through them
    # (the unscaled lengths of time give steps tight enough that the loose pass fails some;
    # the 3D model's steps use the Jacobian's centered form, docs/method.md, step 4)
    proof = prove(load_model(f"models/{model}.toml"), method=Method(), max_depth=depth)
    path = tmp_path / f"{model}.json.gz"
    write_certificate(path, certificate_data(proof, {}))
    monkeypatch.setitem(ARITHMETICS, "float", _Loose)
    result = check_certificate(path, jobs=1)
    assert result.valid, result.message
    assert result.ball_cells > 0


def _near_multiples_of_half_pi(rng):
    """Floats within a few ulps of k pi/2 (where the reduced argument loses the most
    digits), for k up to 10^7, with random and tiny values."""
    k = np.concatenate([np.arange(-8, 9), rng.integers(-10**7, 10**7, 40)])
    centre = np.array([float(MP.pi * int(j) / 2) for j in k])
    offsets = np.array([-3, -1, 0, 1, 3])
    points = [np.nextafter(c, np.sign(o) * np.inf) if o else c
              for c in centre for o in offsets]
    points = np.array([p for p in points])
    return np.concatenate([points, rng.uniform(-2.0**24, 2.0**24, 100),
                           rng.uniform(-10, 10, 100), [5e-324, -5e-324, 1e-300, 2.0**24]])


@pytest.mark.parametrize("name", ["sin", "cos"])
def test_sine_and_cosine_from_float_operations_enclose_mpmath(name):
    # reference: mpmath at 100 digits; the float pass computes these by argument
    # reduction and Taylor polynomials (certify/check/_trig.py), not by libm
    ar = FloatArith()
    x = _near_multiples_of_half_pi(np.random.default_rng(11))
    lo, hi = ar.function(name, ar.box(x, x))
    f = FUNCTIONS[name]
    for j in range(len(x)):
        value = f(MP.mpf(x[j]))
        assert MP.mpf(lo[j]) <= value <= MP.mpf(hi[j]), (name, x[j])
        # no wider than the prover's libm-based enclosures (|v| 2^-49 each way), so cells
        # the prover proves verify in this pass
        assert MP.mpf(hi[j]) - MP.mpf(lo[j]) <= 2.0 ** -48 * abs(value) + 2.0 ** -1000 \
            or hi[j] - lo[j] <= 4e-16, (name, x[j], lo[j], hi[j])


def test_sine_and_cosine_of_wide_and_far_intervals():
    # reference: mpmath at 100 digits at the ends, inner points and the extrema inside
    ar = FloatArith()
    rng = np.random.default_rng(12)
    lo_in = np.concatenate([rng.uniform(-1e6, 1e6, 30), [1.0, 2.0**24 - 1, 1e300, -0.5]])
    hi_in = lo_in + np.concatenate([rng.uniform(0, 7, 30), [1e-12, 2.0, 1.0, 1.0]])
    for name in ("sin", "cos"):
        lo, hi = ar.function(name, ar.box(lo_in, hi_in))
        f = FUNCTIONS[name]
        for j in range(len(lo_in)):
            a, b = MP.mpf(lo_in[j]), MP.mpf(hi_in[j])
            points = [a + (b - a) * k / 10 for k in range(11)]
            first = int(MP.ceil(a / (MP.pi / 2)))
            points += [MP.pi * k / 2 for k in range(first, first + 5) if MP.pi * k / 2 <= b]
            for p in points:
                assert MP.mpf(lo[j]) <= f(p) <= MP.mpf(hi[j]), (name, j, p)
        assert np.isnan(ar.function(name, ar.box(np.array([np.nan]), np.array([1.0])))[0][0])
