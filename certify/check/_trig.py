"""Sine and cosine of float intervals from IEEE 754 operations (the float pass).

Why it is sound
---------------
Every operation below is one of :class:`certify.check._floats.FloatArith`'s outward-
rounded ones, except two products that are exact by construction. For an end ``x`` with
``|x| <= REDUCE_LIMIT``:

* Reduction. ``k`` is an integer near ``x / (pi/2)`` (any integer would do: the bounds
  below hold for the ``r`` obtained, and ``|r|`` is checked). ``pi/2 = P1 + P2 + p3`` with
  ``P1`` and ``P2`` floats of at most 26 significant bits and ``p3`` in a float interval
  (from python-flint's ``pi``). ``|k| < 2^25``, so ``k P1`` and ``k P2`` need at most 51
  bits and IEEE 754 multiplication gives them exactly. ``r = (x - k P1) - (k P2 + k p3)``
  is then an interval holding the exact ``x - k pi/2``.
* Polynomials. Where ``|r| <= 0.8``: ``sin r = r (1 - r^2/3! + ... + r^16/17!)`` within
  ``|r|^19/19! <= |r| 1.5e-19`` and ``cos r = 1 - r^2/2! + ... + r^18/18!`` within
  ``r^20/20! <= r^2 7.5e-21`` (Lagrange remainders: every derivative of sin and cos lies
  in ``[-1, 1]``), evaluated by Horner's rule in ``r^2`` on intervals, with coefficients
  ``1/n!`` rounded outward.
* Quadrant. ``sin x`` is ``sin r, cos r, -sin r, -cos r`` and ``cos x`` is
  ``cos r, -sin r, -cos r, sin r`` for ``k = 0, 1, 2, 3 (mod 4)``.

Over ``[a, b]`` the range is the hull of the two end values, widened to ``1`` (``-1``)
where the interval may hold a maximum (minimum) ``c + 2 pi j``: where an integer lies
between a lower bound of ``(a - c) / 2pi`` and an upper bound of ``(b - c) / 2pi``.
Rows with an end beyond ``REDUCE_LIMIT`` (or ``|r| > 0.8``) are flagged for the caller,
which computes them with python-flint; NaN stays NaN.
"""

from __future__ import annotations

from fractions import Fraction
from math import factorial

import numpy as np
from flint import arb, ctx

from ._floats import float_down, float_up

__all__ = ["periodic", "REDUCE_LIMIT"]

#: Largest ``|x|`` reduced here: keeps ``|k| < 2^25``, so ``k P1`` and ``k P2`` are exact.
REDUCE_LIMIT = 2.0 ** 24
#: Largest ``|r|`` the polynomials serve, and their remainders' factors.
_R_MAX = 0.8
_SIN_REST, _COS_REST = 1.5e-19, 7.5e-21
assert Fraction(4, 5) ** 18 / factorial(19) < Fraction(_SIN_REST)
assert Fraction(4, 5) ** 18 / factorial(20) < Fraction(_COS_REST)


def _half_pi():
    """Exact rational bounds of ``pi/2`` from python-flint (a 300-bit ball)."""
    old = ctx.prec
    ctx.prec = 300
    try:
        ball = arb.pi() / 2
        man, exp = (int(v) for v in ball.mid().man_exp())
        mid = Fraction(man) * Fraction(2) ** exp
        rman, rexp = (int(v) for v in arb(ball.rad()).mid().man_exp())
        rad = Fraction(rman) * Fraction(2) ** rexp
    finally:
        ctx.prec = old
    return mid - rad, mid + rad


def _split(lo, hi):
    """``P1, P2`` (floats of at most 26 significant bits) and float bounds of the rest."""
    parts, rest_lo, rest_hi = [], lo, hi
    for _ in range(2):
        m, e = np.frexp(float(rest_lo))
        part = float(np.ldexp(np.floor(np.ldexp(m, 26)), int(e) - 26))
        parts.append(part)
        rest_lo, rest_hi = rest_lo - Fraction(part), rest_hi - Fraction(part)
    return parts[0], parts[1], (np.float64(float_down(rest_lo)), np.float64(float_up(rest_hi)))


def _coefficients(first, count):
    """Intervals of ``(-1)^i / (first + 2 i)!`` for i < count, highest degree first."""
    out = []
    for i in reversed(range(count)):
        q = Fraction((-1) ** i, factorial(first + 2 * i))
        out.append((np.float64(float_down(q)), np.float64(float_up(q))))
    return out


_HALF_PI_Q = _half_pi()
_P1, _P2, _P3 = _split(*_HALF_PI_Q)
_HALF_PI = (np.float64(float_down(_HALF_PI_Q[0])), np.float64(float_up(_HALF_PI_Q[1])))
_PI = (np.float64(float_down(2 * _HALF_PI_Q[0])), np.float64(float_up(2 * _HALF_PI_Q[1])))
_TWO_PI = (np.float64(float_down(4 * _HALF_PI_Q[0])), np.float64(float_up(4 * _HALF_PI_Q[1])))
_SIN = _coefficients(1, 9)   # 1/1!, -1/3!, ..., 1/17!, highest first
_COS = _coefficients(0, 10)  # 1/0!, -1/2!, ..., 1/18!, highest first
#: Where the maxima and minima of each function lie (``c + 2 pi j``).
_EXTREMA = {"sin": (_HALF_PI, (-_HALF_PI[1], -_HALF_PI[0])),
            "cos": ((np.float64(0.0), np.float64(0.0)), _PI)}


def _horner(ar, coefficients, s):
    p = coefficients[0]
    for c in coefficients[1:]:
        p = ar.add(c, ar.mul(s, p))
    return p


def _at_points(ar, name, x):
    """Enclosures of ``name(x)`` at float points (`x` finite, ``|x| <= REDUCE_LIMIT``).

    Returns ``(lo, hi, ok)``; ``ok`` is False where the reduced argument is too wide.
    """
    k = np.round(x / _HALF_PI[0])
    point = (x, x)
    tail = ar.add((k * _P2, k * _P2), ar.mul((k, k), _P3))
    r = ar.sub(ar.sub(point, (k * _P1, k * _P1)), tail)
    size = np.maximum(np.abs(r[0]), np.abs(r[1]))
    ok = size <= _R_MAX
    s = ar.pow_int(r, 2)
    sin_r = ar.mul(r, _horner(ar, _SIN, s))
    cos_r = _horner(ar, _COS, s)
    sin_rest = ar.mul((size, size), (np.float64(_SIN_REST), np.float64(_SIN_REST)))[1]
    cos_rest = ar.mul(s, (np.float64(_COS_REST), np.float64(_COS_REST)))[1]
    sin_r = ar.add(sin_r, (-sin_rest, sin_rest))
    cos_r = ar.add(cos_r, (-cos_rest, cos_rest))
    quadrant = np.mod(k, 4).astype(int)
    if name == "cos":
        quadrant = (quadrant + 1) % 4  # cos x = sin(x + pi/2)
    choices_lo = [sin_r[0], cos_r[0], -sin_r[1], -cos_r[1]]
    choices_hi = [sin_r[1], cos_r[1], -sin_r[0], -cos_r[0]]
    lo = np.choose(quadrant, choices_lo)
    hi = np.choose(quadrant, choices_hi)
    return lo, hi, ok


def _may_hold(ar, lo, hi, at):
    """Whether ``[lo, hi]`` may hold ``at + 2 pi j`` for an integer j (conservative)."""
    first = ar.div(ar.sub((lo, lo), at), _TWO_PI)[0]
    last = ar.div(ar.sub((hi, hi), at), _TWO_PI)[1]
    return ~(np.ceil(first) > np.floor(last))


def periodic(ar, name, a):
    """``sin`` or ``cos`` of float intervals `a` in the float pass.

    Parameters
    ----------
    ar : certify.check._floats.FloatArith
    name : {"sin", "cos"}
    a : (ndarray, ndarray)

    Returns
    -------
    lo, hi : ndarray
        Enclosures (NaN where `a` is NaN).
    left : ndarray of bool
        Rows not computed here (an end beyond ``REDUCE_LIMIT``): the caller's to fill.
    """
    alo, ahi = np.broadcast_arrays(*a)
    alo, ahi = alo.astype(float), ahi.astype(float)
    nan = np.isnan(alo) | np.isnan(ahi)
    near = ~nan & (np.abs(alo) <= REDUCE_LIMIT) & (np.abs(ahi) <= REDUCE_LIMIT)
    xl, xh = np.where(near, alo, 0.0), np.where(near, ahi, 0.0)
    l1, h1, ok1 = _at_points(ar, name, xl)
    l2, h2, ok2 = _at_points(ar, name, xh)
    top, bottom = _EXTREMA[name]
    lo = np.where(_may_hold(ar, xl, xh, bottom), -1.0, np.maximum(np.minimum(l1, l2), -1.0))
    hi = np.where(_may_hold(ar, xl, xh, top), 1.0, np.minimum(np.maximum(h1, h2), 1.0))
    done = near & ok1 & ok2
    lo, hi = np.where(nan, np.nan, lo), np.where(nan, np.nan, hi)
    return lo, hi, ~nan & ~done
