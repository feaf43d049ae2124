"""Outward-rounded interval kernels on endpoint arrays.

Every kernel takes endpoint arrays (``lo``, ``hi``; float64, broadcasting like numpy)
and returns a ``(lo, hi)`` pair that encloses the exact range of the operation.

Rounding rules
--------------
* ``+`` and ``-``: IEEE 754 rounds to nearest; the error-free TwoSum transformation
  tells on which side the exact sum lies, so a bound moves one ulp only in the
  direction needed and exact sums stay exact.
* ``*`` and ``/``: each endpoint product or quotient moves one ulp outward unless a
  factor (or the numerator) is exactly zero, which makes it exact.
* ``sqrt``: correctly rounded by IEEE 754; bounds move one ulp outward (0 stays 0).
* ``exp, log, sin, cos, tan, atan, tanh, sinh, cosh`` and real powers: library
  functions are not correctly rounded; bounds move outward by ``|v| * 2**-49``
  (at least 8 ulps) plus ``2**-1000`` and then one more ulp. This covers the documented
  accuracy of glibc and numpy's vectorised routines (a few ulps) with a wide margin.

Unusable results
----------------
NaN marks an unusable bound: division by an interval containing 0, log or sqrt of
an interval reaching below the domain, tan over a pole, ``0 * inf``. Kernels keep NaN
flowing; callers treat any row with a NaN bound as unusable. Infinite bounds are valid
extended bounds (``[1, inf]`` encloses everything at least 1).
"""

from __future__ import annotations

from fractions import Fraction

import mpmath
import numpy as np

__all__ = [
    "add", "sub", "neg", "mul", "div", "scale", "shift", "sqr", "pow_int", "pow_real",
    "sqrt", "exp", "log", "sin", "cos", "tan", "atan", "tanh", "sinh", "cosh",
    "iabs", "imin", "imax", "hull", "intersect", "enclose_fraction", "enclose_constant",
    "certainly_lt", "certainly_le", "possibly_lt", "possibly_le", "is_usable",
    "round_down", "round_up", "outward_single", "short_bounds", "outward_pair",
    "sum_error",
]

_INF = np.inf
_MAX = float(np.finfo(float).max)
_ULP = 2.0 ** -52
_SINGLE_MAX = float(np.finfo(np.float32).max)
_TINY = 2.0 ** -1074
_REL = 2.0 ** -49
_ABS = 2.0 ** -1000
_PI_LO = float(mpmath.mpf(3.141592653589793))  # nearest double, below pi
_PI_HI = float(np.nextafter(_PI_LO, _INF))
_HALF_PI_HI = _PI_HI / 2
_TWO_PI_LO = 2 * _PI_LO
_TWO_PI_HI = 2 * _PI_HI


def round_down(x):
    """Move each entry of `x` at least one ulp down (``+inf`` becomes NaN).

    ``x - (|x| 2**-52 + 2**-1074)``: the subtracted amount is at least one ulp of `x`
    (and the smallest subnormal at 0), and round-to-nearest of a value at or below
    the float ``x - ulp`` cannot land above it. Four plain operations are much cheaper
    than ``np.nextafter``.
    """
    d = np.abs(x)
    d *= _ULP
    d += _TINY
    return x - d


def round_up(x):
    """Move each entry of `x` at least one ulp up (``-inf`` becomes NaN)."""
    d = np.abs(x)
    d *= _ULP
    d += _TINY
    return x + d


def outward_single(lo, hi):
    """Widen ``[lo, hi]`` to the nearest bounds that binary32 holds exactly.

    A certificate stores such bounds in half the bytes (docs/certificate-format.md).
    Bounds beyond binary32's range, and NaN, are returned unchanged.

    Returns
    -------
    lo, hi : ndarray
        ``lo' <= lo`` and ``hi' >= hi``, both float64 arrays.
    """
    with np.errstate(over="ignore", invalid="ignore"):
        down, up = lo.astype(np.float32), hi.astype(np.float32)
        down = np.where(down > lo, np.nextafter(down, np.float32(-_INF)), down)
        up = np.where(up < hi, np.nextafter(up, np.float32(_INF)), up)
    down, up = down.astype(float), up.astype(float)
    return (np.where(np.isfinite(down) & (np.abs(lo) <= _SINGLE_MAX), down, lo),
            np.where(np.isfinite(up) & (np.abs(hi) <= _SINGLE_MAX), up, hi))


def short_bounds(lo, hi, inner_lo, inner_hi, bits=8):
    """Bounds near ``lo, hi`` that binary32 holds with trailing zero bits.

    Each bound moves to the nearest multiple of the largest power of two at most
    ``(hi - lo) / 2**bits``, or to the next multiple outward where the nearest one would
    cut into ``[inner_lo, inner_hi]`` (which ``[lo, hi]`` holds); the certificate's
    compression stores such bounds almost for free (docs/certificate-format.md). A
    bound may so move inward by up to half that power of two: the caller verifies
    whatever the box must satisfy. Empty, point, infinite and NaN intervals, and those
    whose power of two would be subnormal, are only widened by :func:`outward_single`.

    Returns
    -------
    lo, hi : ndarray
        Float64 arrays with ``lo' <= inner_lo`` and ``hi' >= inner_hi``.
    """
    lo, hi = np.asarray(lo, float), np.asarray(hi, float)
    with np.errstate(invalid="ignore", over="ignore"):
        width = hi - lo
        _, e = np.frexp(width)
        power = e - 1 - bits
        usable = np.isfinite(width) & (width > 0) & (power > -1000)
        power = np.where(usable, power, 0)
        # scaling by a power of two is exact unless it underflows; the comparisons with
        # the inner box keep it inside in that case too
        down = np.ldexp(np.round(np.ldexp(lo, -power)), power)
        down = np.where(down > inner_lo, np.ldexp(np.floor(np.ldexp(inner_lo, -power)), power),
                        down)
        up = np.ldexp(np.round(np.ldexp(hi, -power)), power)
        up = np.where(up < inner_hi, np.ldexp(np.ceil(np.ldexp(inner_hi, -power)), power), up)
        usable &= np.isfinite(down) & np.isfinite(up) & (down <= inner_lo) & (up >= inner_hi)
    return outward_single(np.where(usable, down, lo), np.where(usable, up, hi))


def sum_error(a, b):
    """The float sum and the sign-carrying error of TwoSum (NaN when not finite)."""
    s = a + b
    bb = s - a
    return s, (a - (s - bb)) + (b - bb)


def _sum_down(a, b):
    """``a + b`` rounded down; exact sums stay exact (TwoSum)."""
    s, err = sum_error(a, b)
    # err is NaN when s overflowed or is infinite: then widen, which is sound
    return np.where(err >= 0, s, round_down(s))


def _sum_up(a, b):
    """``a + b`` rounded up; exact sums stay exact (TwoSum)."""
    s, err = sum_error(a, b)
    return np.where(err <= 0, s, round_up(s))


def add(alo, ahi, blo, bhi):
    """Interval sum ``[a] + [b]``."""
    return _sum_down(alo, blo), _sum_up(ahi, bhi)


def sub(alo, ahi, blo, bhi):
    """Interval difference ``[a] - [b]``."""
    return _sum_down(alo, -bhi), _sum_up(ahi, -blo)


def neg(alo, ahi):
    """Interval negation (exact)."""
    return -ahi, -alo


def shift(alo, ahi, c):
    """Sum of an interval and an exactly representable float `c`."""
    return _sum_down(alo, c), _sum_up(ahi, c)


def _pair(*shapes):
    """An empty ``(2, *shape)`` array for the lower and upper bounds of a result of the
    broadcast shape of `shapes`, and that shape (a scalar result has shape ``(1,)`` in
    the pair, so that its rows are views numpy can write into)."""
    shape = shapes[0]
    for other in shapes[1:]:
        if other != shape:
            shape = np.broadcast_shapes(*shapes)
            break
    return np.empty((2,) + (shape or (1,))), shape


def _unpair(out, shape):
    """The two bounds held by a pair of :func:`_pair` (scalars for shape ``()``)."""
    return (out[0], out[1]) if shape else (out[0, 0], out[1, 0])


def _extremes(pair, p, q, r=None, s=None):
    """Fill `pair` with ``min(min(p, q), min(r, s))`` and the max likewise (``min(p, q)``
    and ``max(p, q)`` without `r`, `s`)."""
    lo, hi = pair[0], pair[1]
    np.minimum(p, q, out=lo)
    np.maximum(p, q, out=hi)
    if r is not None:
        np.minimum(lo, np.minimum(r, s), out=lo)
        np.maximum(hi, np.maximum(r, s), out=hi)


def outward_pair(pair, neg_possible, pos_possible):
    """Round ``pair[0]`` down and ``pair[1]`` up in place, each by at least one ulp (see
    :func:`round_down`).

    A bound that came out exactly 0 stays 0 when no result of the other sign is
    possible: then 0 is either exact (a zero factor) or a valid bound of a value that
    underflowed towards 0 from the right side. The sign tests run only on the (rare)
    entries that came out 0; ``neg_possible()`` and ``pos_possible()`` return masks.

    Parameters
    ----------
    pair : ndarray, shape (2, ...)
        Lower and upper results, exact or rounded to nearest; rounded in place.
    neg_possible, pos_possible : callable
        Masks (broadcasting to ``pair.shape[1:]``) where an exact result below (above)
        0 is possible.
    """
    zero = pair == 0
    d = np.abs(pair)
    d *= _ULP
    d += _TINY
    pair[0] -= d[0]
    pair[1] += d[1]
    if np.count_nonzero(zero):  # much cheaper than zero.any() on small arrays
        zero[0] &= np.logical_not(neg_possible())
        zero[1] &= np.logical_not(pos_possible())
        np.copyto(pair, 0.0, where=zero)


def _outward(pair, shape, neg_possible, pos_possible):
    """:func:`outward_pair`, then the bounds (see :func:`_unpair`)."""
    outward_pair(pair, neg_possible, pos_possible)
    return _unpair(pair, shape)


def mul(alo, ahi, blo, bhi):
    """Interval product ``[a] * [b]`` (``0 * inf`` gives NaN, hence unusable).

    The bounds are the min and max of the four endpoint products (folded as
    ``min(min(p1, p2), min(p3, p4))``); a factor passed as one array for both bounds
    (a point) has two equal products, which are computed once.
    """
    if blo is bhi:
        p1 = alo * blo
        p3 = p1 if alo is ahi else ahi * blo
        pair, shape = _pair(np.shape(p1), np.shape(p3))
        _extremes(pair, p1, p3)
    elif alo is ahi:
        p1 = alo * blo
        p2 = alo * bhi
        pair, shape = _pair(np.shape(p1), np.shape(p2))
        _extremes(pair, p1, p2)
    else:
        p1 = alo * blo
        p4 = ahi * bhi
        pair, shape = _pair(np.shape(p1), np.shape(p4))
        _extremes(pair, p1, alo * bhi, ahi * blo, p4)
    return _outward(pair, shape,
                    lambda: ((alo < 0) & (bhi > 0)) | ((ahi > 0) & (blo < 0)),
                    lambda: ((alo < 0) & (blo < 0)) | ((ahi > 0) & (bhi > 0)))


def scale(alo, ahi, c):
    """Product of an interval and a float `c` (scalar or array)."""
    return mul(alo, ahi, c, c)


def sqr(alo, ahi):
    """Interval square (tighter than ``mul(a, a)``: never negative)."""
    mag_lo = np.where((alo <= 0) & (ahi >= 0), 0.0, np.minimum(np.abs(alo), np.abs(ahi)))
    mag_hi = np.maximum(np.abs(alo), np.abs(ahi))
    lo = np.maximum(round_down(mag_lo * mag_lo), 0.0)
    hi = np.where(mag_hi == 0, 0.0, round_up(mag_hi * mag_hi))
    lo = np.where(mag_lo == 0, 0.0, lo)
    nan = np.isnan(alo) | np.isnan(ahi)
    return np.where(nan, np.nan, lo), np.where(nan, np.nan, hi)


def div(alo, ahi, blo, bhi):
    """Interval quotient; NaN where the divisor contains 0."""
    bad = (blo <= 0) & (bhi >= 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        q1 = alo / blo
        q4 = ahi / bhi
        pair, shape = _pair(np.shape(q1), np.shape(q4))
        _extremes(pair, q1, alo / bhi, ahi / blo, q4)
    # the divisor has one strict sign where it is usable
    lo, hi = _outward(pair, shape,
                      lambda: ((alo < 0) & (blo > 0)) | ((ahi > 0) & (bhi < 0)),
                      lambda: ((alo < 0) & (bhi < 0)) | ((ahi > 0) & (blo > 0)))
    return np.where(bad, np.nan, lo), np.where(bad, np.nan, hi)


def _pow_mag(x, n, up):
    """``x**n`` for ``x >= 0`` and integer ``n >= 1`` rounded down (or up) by squaring."""
    rnd = round_up if up else round_down

    def product(a, b):
        p = a * b
        return np.where((a == 0) | (b == 0), 0.0, rnd(p))

    result = None
    base = x
    while n:
        if n & 1:
            result = base if result is None else product(result, base)
        n >>= 1
        if n:
            base = product(base, base)
    return np.maximum(result, 0.0)


def pow_int(alo, ahi, n):
    """Interval power with an integer exponent `n` (negative: NaN where ``0 in a``)."""
    n = int(n)
    if n == 0:
        one = np.ones(np.broadcast(alo, ahi).shape)
        nan = np.isnan(alo) | np.isnan(ahi)
        return np.where(nan, np.nan, one), np.where(nan, np.nan, one)
    if n < 0:
        plo, phi = pow_int(alo, ahi, -n)
        return div(np.ones_like(plo), np.ones_like(phi), plo, phi)
    if n == 1:
        return alo, ahi
    if n == 2:
        return sqr(alo, ahi)
    if n % 2 == 0:
        mag_lo = np.where((alo <= 0) & (ahi >= 0), 0.0,
                          np.minimum(np.abs(alo), np.abs(ahi)))
        mag_hi = np.maximum(np.abs(alo), np.abs(ahi))
        lo, hi = _pow_mag(mag_lo, n, False), _pow_mag(mag_hi, n, True)
        nan = np.isnan(alo) | np.isnan(ahi)
        return np.where(nan, np.nan, lo), np.where(nan, np.nan, hi)
    # odd: monotone increasing, sign kept
    lo = np.where(alo >= 0, _pow_mag(np.abs(alo), n, False), -_pow_mag(np.abs(alo), n, True))
    hi = np.where(ahi >= 0, _pow_mag(np.abs(ahi), n, True), -_pow_mag(np.abs(ahi), n, False))
    return lo, hi


def _widen(vlo, vhi):
    """Move library-function results outward (see the module notes)."""
    lo = round_down(vlo - (np.abs(vlo) * _REL + _ABS))
    hi = round_up(vhi + (np.abs(vhi) * _REL + _ABS))
    return lo, hi


def _endpoint_range(func, alo, ahi):
    """Hull of `func` at both endpoints, each value widened both ways.

    For a function that is not increasing, either endpoint value may be the lower or
    the upper bound, so each must be moved down and up before taking min and max.
    """
    va, vb = func(alo), func(ahi)
    d1, u1 = _widen(va, va)
    d2, u2 = _widen(vb, vb)
    return np.minimum(d1, d2), np.maximum(u1, u2)


def sqrt(alo, ahi):
    """Interval square root; NaN where the interval reaches below 0."""
    bad = alo < 0
    with np.errstate(invalid="ignore"):
        vlo = np.sqrt(np.where(bad, 0.0, alo))
        vhi = np.sqrt(np.where(ahi < 0, 0.0, ahi))
    lo = np.where(vlo == 0, 0.0, round_down(vlo))
    hi = np.where((vhi == 0) & (ahi == 0), 0.0, round_up(vhi))
    return np.where(bad, np.nan, lo), np.where(bad, np.nan, hi)


def exp(alo, ahi):
    """Interval exponential (lower bound never below 0)."""
    with np.errstate(over="ignore"):
        lo, hi = _widen(np.exp(alo), np.exp(ahi))
    return np.maximum(lo, 0.0), hi


def log(alo, ahi):
    """Interval natural logarithm; NaN where the interval reaches below 0."""
    bad = alo < 0
    with np.errstate(divide="ignore", invalid="ignore"):
        lo, hi = _widen(np.log(np.where(bad, 1.0, alo)), np.log(np.where(ahi < 0, 1.0, ahi)))
    return np.where(bad, np.nan, lo), np.where(bad, np.nan, hi)


def pow_real(alo, ahi, a):
    """``[x] ** a`` for a real, non-integer exponent `a` (float or Fraction).

    Defined for ``x >= 0`` (``0 ** a = 0`` for ``a > 0``); NaN where the interval
    reaches below 0, or reaches 0 when ``a < 0``.
    """
    a_lo, a_hi = enclose_fraction(Fraction(a))
    llo, lhi = log(alo, ahi)
    plo, phi = mul(llo, lhi, a_lo, a_hi)
    # log(0) = -inf times a > 0 gives -inf, and exp(-inf) = 0: correct.
    lo, hi = exp(plo, phi)
    # [0, 0] ** a = 0 for a > 0; the log route would give -inf + inf = NaN there.
    zero = (a > 0) & (ahi == 0)
    lo, hi = np.where(zero, 0.0, lo), np.where(zero, 0.0, hi)
    bad = (alo < 0) | ((a < 0) & (alo <= 0))
    return np.where(bad, np.nan, lo), np.where(bad, np.nan, hi)


def _monotone(func, alo, ahi, lower=-_INF, upper=_INF):
    with np.errstate(over="ignore", invalid="ignore"):
        lo, hi = _widen(func(alo), func(ahi))
    return np.clip(lo, lower, upper), np.clip(hi, lower, upper)


def atan(alo, ahi):
    """Interval arctangent."""
    return _monotone(np.arctan, alo, ahi, -_HALF_PI_HI, _HALF_PI_HI)


def tanh(alo, ahi):
    """Interval hyperbolic tangent."""
    return _monotone(np.tanh, alo, ahi, -1.0, 1.0)


def sinh(alo, ahi):
    """Interval hyperbolic sine."""
    return _monotone(np.sinh, alo, ahi)


def cosh(alo, ahi):
    """Interval hyperbolic cosine (minimum 1 at 0)."""
    with np.errstate(over="ignore"):
        lo, hi = _endpoint_range(np.cosh, alo, ahi)
    lo = np.where((alo <= 0) & (ahi >= 0), 1.0, lo)
    return np.maximum(lo, 1.0), hi


def _contains_multiple(alo, ahi, offset_lo, offset_hi):
    """Whether ``[a]`` may contain ``offset + 2 k pi`` for some integer k (conservative)."""
    # k ranges over [(a_lo - offset) / 2 pi, (a_hi - offset) / 2 pi]; the float
    # quotients are off by a few ulps at most, far inside the relative slack used.
    with np.errstate(invalid="ignore"):
        klo = (alo - offset_hi) / _TWO_PI_LO
        khi = (ahi - offset_lo) / _TWO_PI_LO
        slack = 1e-9 * (np.abs(klo) + np.abs(khi)) + 1e-9
    return np.floor(khi + slack) >= np.ceil(klo - slack)


def cos(alo, ahi):
    """Interval cosine (extrema inside the interval taken into account)."""
    with np.errstate(invalid="ignore"):
        lo, hi = _endpoint_range(np.cos, alo, ahi)
    wide = ~((ahi - alo) < _TWO_PI_LO)
    has_max = wide | _contains_multiple(alo, ahi, 0.0, 0.0)
    has_min = wide | _contains_multiple(alo, ahi, _PI_LO, _PI_HI)
    hi = np.where(has_max, 1.0, np.minimum(hi, 1.0))
    lo = np.where(has_min, -1.0, np.maximum(lo, -1.0))
    nan = np.isnan(alo) | np.isnan(ahi)
    return np.where(nan, np.nan, lo), np.where(nan, np.nan, hi)


def sin(alo, ahi):
    """Interval sine (extrema inside the interval taken into account)."""
    with np.errstate(invalid="ignore"):
        lo, hi = _endpoint_range(np.sin, alo, ahi)
    wide = ~((ahi - alo) < _TWO_PI_LO)
    has_max = wide | _contains_multiple(alo, ahi, _PI_LO / 2, _PI_HI / 2)
    has_min = wide | _contains_multiple(alo, ahi, -_PI_HI / 2, -_PI_LO / 2)
    hi = np.where(has_max, 1.0, np.minimum(hi, 1.0))
    lo = np.where(has_min, -1.0, np.maximum(lo, -1.0))
    nan = np.isnan(alo) | np.isnan(ahi)
    return np.where(nan, np.nan, lo), np.where(nan, np.nan, hi)


def tan(alo, ahi):
    """Interval tangent; NaN where the interval may contain a pole."""
    pole = _contains_multiple(alo, ahi, _PI_LO / 2, _PI_HI / 2) | _contains_multiple(
        alo, ahi, -_PI_HI / 2, -_PI_LO / 2) | ~((ahi - alo) < _PI_LO)
    lo, hi = _monotone(np.tan, alo, ahi)
    return np.where(pole, np.nan, lo), np.where(pole, np.nan, hi)


def iabs(alo, ahi):
    """Interval absolute value (exact)."""
    lo = np.where(alo >= 0, alo, np.where(ahi <= 0, -ahi, 0.0))
    hi = np.maximum(np.abs(alo), np.abs(ahi))
    nan = np.isnan(alo) | np.isnan(ahi)
    return np.where(nan, np.nan, lo), hi


def imin(alo, ahi, blo, bhi):
    """Interval minimum (exact)."""
    return np.minimum(alo, blo), np.minimum(ahi, bhi)


def imax(alo, ahi, blo, bhi):
    """Interval maximum (exact)."""
    return np.maximum(alo, blo), np.maximum(ahi, bhi)


def hull(alo, ahi, blo, bhi):
    """Smallest interval containing both (exact)."""
    return np.minimum(alo, blo), np.maximum(ahi, bhi)


def intersect(alo, ahi, blo, bhi):
    """Intersection (may be empty: ``lo > hi``)."""
    return np.maximum(alo, blo), np.minimum(ahi, bhi)


def enclose_fraction(q):
    """Tightest float interval ``[lo, hi]`` containing the rational `q`.

    Parameters
    ----------
    q : Fraction or int

    Returns
    -------
    lo, hi : float
        Equal when `q` is exactly representable.
    """
    q = Fraction(q)
    try:
        v = float(q)
    except OverflowError:
        # beyond the float range: a true, one-sided enclosure
        return (_MAX, _INF) if q > 0 else (-_INF, -_MAX)
    exact = Fraction(v)
    if exact == q:
        return v, v
    if exact < q:
        return v, float(np.nextafter(v, _INF))
    return float(np.nextafter(v, -_INF)), v


def enclose_constant(value):
    """Tightest float interval containing a real constant.

    Parameters
    ----------
    value : Fraction, int, or an mpmath-convertible real (``sympy.pi``, ``sympy.E``, ...)

    Returns
    -------
    lo, hi : float
    """
    if isinstance(value, (int, Fraction)):
        return enclose_fraction(value)
    if hasattr(value, "evalf"):
        # a sympy constant: 60 digits decide the bracket far from any float boundary
        value = value.evalf(60)
    with mpmath.workprec(200):
        x = mpmath.mpf(value)
        v = float(x)
        if mpmath.mpf(v) == x:
            return v, v
        if mpmath.mpf(v) < x:
            return v, float(np.nextafter(v, _INF))
        return float(np.nextafter(v, -_INF)), v


def certainly_lt(alo, ahi, blo, bhi):
    """True where every point of ``[a]`` is below every point of ``[b]``."""
    return ahi < blo


def certainly_le(alo, ahi, blo, bhi):
    """True where every point of ``[a]`` is at most every point of ``[b]``."""
    return ahi <= blo


def possibly_lt(alo, ahi, blo, bhi):
    """True unless ``[a] < [b]`` is certainly false (NaN counts as possible)."""
    return ~(alo >= bhi)


def possibly_le(alo, ahi, blo, bhi):
    """True unless ``[a] <= [b]`` is certainly false (NaN counts as possible)."""
    return ~(alo > bhi)


def is_usable(lo, hi):
    """True where both bounds are finite numbers."""
    return np.isfinite(lo) & np.isfinite(hi)
