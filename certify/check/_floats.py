"""The checker's first pass: intervals as two float64 numpy arrays, rounded outward.

Why it is sound (the trust base of this pass)
--------------------------------------------
An interval is a pair ``(lo, hi)`` of float64 arrays (0-d for constants and parameters).
Every operation returns ends that enclose the exact range of the operation over the
exact input intervals:

* ``+ - * /`` and ``sqrt`` are IEEE 754 binary64 operations, correctly rounded to
  nearest (numpy's float64 loops on x86-64 use the SSE2/AVX instructions, which are, in
  the default mode that :func:`ieee_defaults` tests; elsewhere arb balls take this pass's
  place): the rounded result is within half a float spacing of the exact one. Each end is then
  stepped outward by at least one spacing (``x -+ (|x| 2^-52 + 2^-1074)``, see
  :func:`_step`; it does what ``np.nextafter`` does, sometimes a float or two further,
  at a sixth of its cost), which reaches a float on the far side of the exact value.
  Sums keep their rounded value where Knuth's TwoSum error term shows it is already on
  the right side (the error term is exact for finite sums; an overflow gives NaN there,
  and the sum is stepped). A product or quotient that rounded to 0 keeps 0 as its lower
  (upper) end when no input combination can make it negative (positive); otherwise it
  is stepped to the smallest subnormal. Products of intervals are the min and max of the
  four end products, quotients likewise for a divisor of one strict sign (a divisor that
  reaches 0 gives NaN).
* Nothing else comes from numpy's libm (``exp``, ``log``, ``sin``... are not guaranteed
  correctly rounded there). ``sin`` and ``cos`` are computed from the operations above
  (argument reduction and Taylor polynomials with their remainders,
  :mod:`certify.check._trig`); the other elementary functions, real powers and constants
  are computed by python-flint (arb) through :class:`certify.check._arith.EndpointArith`,
  whose ends are exact 53-bit numbers; they are turned into floats by exact comparison (a
  lower end becomes the largest float not above it, an upper end the smallest float not
  below).
  Rationals (the cells, the parameter boxes) are rounded outward the same way.
* No reduction whose rounding is not controlled (``np.sum``, ``np.dot``, ``@``): sums of
  products are folded left with the outward-rounded add, in the prover's order
  (docs/method.md, "Exact order of operations").

NaN marks an unusable interval, as in the other arithmetics; comparisons with NaN are
False, so nothing is proven from it, and ``finite`` (which every image, coordinate box
and intersection must pass) needs both ends finite. Entry points (``exact``, ``box``)
turn infinite input floats into NaN. Each end is either NaN or a true bound: an end
computed from a NaN end is NaN (``+ * min max`` propagate it; the few ``where`` choices
are written so), ``0 * inf`` and ``inf - inf`` give NaN, and an end that overflowed
towards the wrong side (a lower end ``+inf``, an upper end ``-inf``) becomes NaN with its
outward step. A remaining infinite end is a true, useless bound and proves nothing.

So this pass rests on IEEE 754 correct rounding of the basic operations plus python-flint;
like the rest of the checker it imports no prover code. Cells whose claims do not verify
here are recomputed by the arb passes (:data:`certify.check._arith.ARITHMETICS`).
"""

from __future__ import annotations

from fractions import Fraction
from functools import reduce

import numpy as np
from flint import arb

from ._arith import EndpointArith, PairStorage, Pieces, float_inverse

__all__ = ["FloatArith", "float_down", "float_up", "ieee_defaults"]

_NEG = -np.inf
_POS = np.inf
#: Integers below ``_EXACT`` are exact floats, and so are their quotients by powers of 2
#: up to ``_NORMAL`` (normal numbers; ``int / int`` is correctly rounded in Python).
_EXACT = 1 << 53
_NORMAL = 1 << 1022
_SPACING = 2.0 ** -52
_TINY = 2.0 ** -1074
_MAX_ARB = arb(np.finfo(float).max)
_TINY_ARB = arb(_TINY)


#: Directions of rounding: ``toward`` arguments.
DOWN, UP = -1.0, 1.0


def ieee_defaults():
    """Whether float64 arithmetic in this process has the IEEE 754 defaults this pass
    relies on: rounding to nearest (TwoSum's exact error term) and subnormal numbers
    (the ``2^-1074`` in :func:`_step`). A library may set another rounding mode or
    flush-to-zero for the whole process; numpy's own loops are tested here."""
    one, tiny = np.array([1.0, -1.0]), np.array([_TINY, 2.0 ** -1022])
    nearest = np.array_equal(one + one * 2.0 ** -53, one) and \
        np.array_equal(one + one * (3 * 2.0 ** -54), one * (1 + 2.0 ** -52))
    subnormal = bool(np.all(tiny + 0.0 > 0)) and bool(np.all(tiny[1:] * 0.5 > 0))
    return nearest and subnormal


def _step(x, toward):
    """A float at least one ulp beyond each entry of `x`, toward -inf (DOWN) or +inf (UP).

    ``d = |x| 2^-52 + 2^-1074`` is at least the spacing of the floats at ``x`` (rounding
    is monotone and ``2^-52`` times the binade's lower power of two is that spacing; at 0
    and among subnormals the spacing is ``2^-1074``), and ``x -+ d`` rounded to nearest
    cannot land nearer to ``x`` than the next float that way. An infinity stepped back
    towards the finite floats gives NaN. Five vector operations take about a sixth of
    ``np.nextafter``'s time on the checker's arrays.
    """
    return x + toward * (np.abs(x) * _SPACING + _TINY)


def _sum(a, b, toward):
    """``a + b`` rounded toward -inf (DOWN) or +inf (UP).

    The rounded sum is kept where Knuth's TwoSum error term (exact for finite sums) shows
    that it already lies on that side of the exact one; an overflow makes the error term
    NaN, and the sum is stepped.
    """
    s = a + b
    back = s - a
    error = (a - (s - back)) + (b - back)
    return np.where(toward * error <= 0, s, _step(s, toward))


def _settle(lo, hi, may_be_negative, may_be_positive):
    """Round the min and max of rounded products (or quotients) outward.

    An end that rounded to 0 stays 0 where the exact range cannot have the other sign
    (the masks are computed only when some end is 0).
    """
    down, up = _step(lo, DOWN), _step(hi, UP)
    zero = lo == 0
    if zero.any():
        down = np.where(zero & ~may_be_negative(), 0.0, down)
    zero = hi == 0
    if zero.any():
        up = np.where(zero & ~may_be_positive(), 0.0, up)
    return down, up


def _nan_where(bad, lo, hi):
    return np.where(bad, np.nan, lo), np.where(bad, np.nan, hi)


def _usable(x):
    """Float array with infinite entries made NaN (the entry points' inputs)."""
    x = np.asarray(x, dtype=float)
    return np.where(np.isfinite(x), x, np.nan)


def float_down(q):
    """The largest float not above an exact number (Fraction, int or exact arb).

    Non-finite arb numbers give NaN; numbers beyond the float range give the largest
    float (or ``-inf``).
    """
    if type(q) is not Fraction:
        if isinstance(q, arb):
            v = float(q)
            if arb(v) == q:     # arb's == holds only for equal exact numbers
                return v
            beyond = _beyond_floats(q)
            if beyond is not None:
                return beyond
        q = _exact_fraction(q)
        if q is None:
            return np.nan
    num, den = q.numerator, q.denominator
    if den & (den - 1) == 0 and den <= _NORMAL and -_EXACT < num < _EXACT:
        return num / den        # a dyadic number with at most 53 bits: exact
    try:
        v = float(q)
    except OverflowError:
        return np.finfo(float).max if q > 0 else _NEG
    if v == _POS:
        return np.finfo(float).max
    return v if Fraction(v) <= q else float(np.nextafter(v, _NEG))


def float_up(q):
    """The smallest float not below an exact number (see :func:`float_down`)."""
    if isinstance(q, arb):
        return -float_down(-q)
    if type(q) is not Fraction:
        q = _exact_fraction(q)
    return -float_down(-q)


def _beyond_floats(q):
    """:func:`float_down` of an exact arb number beyond the float range (above the
    largest float, below its negative, or nearer to 0 than the smallest subnormal), or
    None. Such numbers (``exp`` of a wide box) can have exponents of any size, too large
    to turn into a Fraction; arb compares exact numbers exactly."""
    if not q.is_finite():
        return None
    if q > _MAX_ARB:
        return np.finfo(float).max
    if q < -_MAX_ARB:
        return _NEG
    if abs(q) < _TINY_ARB:
        return 0.0 if q > 0 else -_TINY
    return None


def _exact_fraction(q):
    if isinstance(q, arb):
        if not q.is_finite():
            return None
        m, e = q.man_exp()
        m, e = int(m), int(e)
        return Fraction(m << e) if e >= 0 else Fraction(m, 1 << -e)
    return Fraction(q)


_DOWN = np.frompyfunc(float_down, 1, 1)
_UP = np.frompyfunc(float_up, 1, 1)


def _floats_down(values):
    return np.asarray(_DOWN(values), dtype=float)


def _floats_up(values):
    return np.asarray(_UP(values), dtype=float)


def _row_sums_up(M):
    """``max_i sum_j M[:, i, j]`` for nonnegative entries, each row folded left and
    rounded up (an upper bound of the infinity norm), shape (N,)."""
    rows = M[:, :, 0]
    for j in range(1, M.shape[2]):
        rows = _sum(rows, M[:, :, j], UP)
    return np.max(rows, axis=1)


def _power_down(x, n):
    """``x^n`` rounded down for ``x >= 0`` and an integer ``n >= 1`` (repeated squaring)."""
    return _power(x, n, lambda p: np.maximum(_step(p, DOWN), 0.0))


def _power_up(x, n):
    """``x^n`` rounded up for ``x >= 0``; exactly 0 where ``x = 0``."""
    return np.where(x == 0, 0.0, _power(x, n, lambda p: _step(p, UP)))


def _power(x, n, rounded):
    result, base = None, x
    while True:
        if n & 1:
            result = base if result is None else rounded(result * base)
        n >>= 1
        if not n:
            return result
        base = rounded(base * base)


class FloatArith(PairStorage):
    """Intervals as pairs of float64 arrays rounded outward (see the module notes).

    Parameters
    ----------
    pieces : Pieces
        How wide boxes are cut (:class:`certify.check._arith.Pieces`); the default
        evaluates them whole, as the prover does.
    """

    name = "float"

    def __init__(self, pieces=Pieces()):
        self.pieces = pieces
        self.plans = {}
        self._constants = {}
        self._flint = EndpointArith()
        self.zero = (0.0, 0.0)

    def enter(self):
        """Nothing to set: float64 operations need no working precision."""

    # -- construction --------------------------------------------------------------------
    def exact(self, x):
        """Point intervals of float values (infinite values are unusable)."""
        v = _usable(x)
        return v, v

    def box(self, lo, hi):
        """Intervals ``[lo, hi]`` from float bounds (the hull when they are swapped)."""
        lo, hi = _usable(lo), _usable(hi)
        bad = np.isnan(lo) | np.isnan(hi)
        return _nan_where(bad, np.minimum(lo, hi), np.maximum(lo, hi))

    def rational(self, lo, hi):
        """Interval ``[lo, hi]`` from two Fractions (0-d, rounded outward)."""
        return np.float64(float_down(lo)), np.float64(float_up(hi))

    def rationals(self, lo, hi):
        """Intervals from object arrays of Fractions (rounded outward)."""
        return _floats_down(lo), _floats_up(hi)

    def constant(self, spec):
        """Interval of a constant spec of :mod:`certify.check._programs` (cached)."""
        if spec not in self._constants:
            self._flint.enter()
            lo, hi = self._flint.constant(spec)
            self._constants[spec] = np.float64(float_down(lo)), np.float64(float_up(hi))
        return self._constants[spec]

    # -- bounds and predicates -----------------------------------------------------------
    def finite(self, a):
        return np.isfinite(a[0]) & np.isfinite(a[1])

    def sum_lower(self, a, b):
        """``a + b`` rounded down, for float arrays."""
        return _sum(a, b, DOWN)

    def sum_upper(self, a, b):
        return _sum(a, b, UP)

    # -- operations ----------------------------------------------------------------------
    def add(self, a, b):
        return _sum(a[0], b[0], DOWN), _sum(a[1], b[1], UP)

    def sub(self, a, b):
        return _sum(a[0], -b[1], DOWN), _sum(a[1], -b[0], UP)

    def neg(self, a):
        return -a[1], -a[0]

    def mul(self, a, b):
        if b[0] is b[1]:
            a, b = b, a
        # the extremes of x * y lie at the corners; a point factor has two
        products = [x * y for x in (a[:1] if a[0] is a[1] else a) for y in b]
        lo, hi = reduce(np.minimum, products), reduce(np.maximum, products)
        (alo, ahi), (blo, bhi) = a, b
        return _settle(lo, hi,
                       lambda: ((alo < 0) & (bhi > 0)) | ((ahi > 0) & (blo < 0)),
                       lambda: ((alo < 0) & (blo < 0)) | ((ahi > 0) & (bhi > 0)))

    def div(self, a, b):
        alo, ahi = a
        blo, bhi = b
        positive = blo > 0
        bad = ~positive & ~(bhi < 0)
        # over a positive divisor the quotient grows with the numerator and the lowest
        # value has the numerator's lower end; over a negative one the upper end
        top, bottom = np.where(positive, ahi, alo), np.where(positive, alo, ahi)
        lo = np.minimum(bottom / blo, bottom / bhi)
        hi = np.maximum(top / blo, top / bhi)
        lo, hi = _settle(lo, hi,
                         lambda: ((alo < 0) & positive) | ((ahi > 0) & ~positive),
                         lambda: ((ahi > 0) & positive) | ((alo < 0) & ~positive))
        # inf / inf: NaN in one candidate; the interval is unusable
        return _nan_where(bad | np.isnan(lo) | np.isnan(hi), lo, hi)

    def pow_int(self, a, n):
        alo, ahi = a
        if n % 2:
            lo = np.where(alo >= 0, _power_down(np.abs(alo), n), -_power_up(np.abs(alo), n))
            hi = np.where(ahi >= 0, _power_up(np.abs(ahi), n), -_power_down(np.abs(ahi), n))
            return lo, hi
        small, large = np.minimum(np.abs(alo), np.abs(ahi)), np.maximum(np.abs(alo), np.abs(ahi))
        small = np.where((alo <= 0) & (ahi >= 0), 0.0, small)
        return _nan_where(np.isnan(alo), _power_down(small, n), _power_up(large, n))

    def _by_flint(self, compute, a):
        """Apply an EndpointArith operation to exact arb copies of the ends."""
        ends = [np.asarray(np.frompyfunc(arb, 1, 1)(np.asarray(x, dtype=float)), dtype=object)
                for x in a]
        self._flint.enter()
        lo, hi = compute(tuple(ends))
        lo, hi = _floats_down(lo), _floats_up(hi)
        bad = np.isnan(lo) | np.isnan(hi)
        return _nan_where(bad, lo, hi)

    def pow_real(self, a, q):
        return self._by_flint(lambda e: self._flint.pow_real(e, q), a)

    def sqrt(self, a):
        alo, ahi = a
        bad = ~(alo >= 0)
        lo = np.maximum(_step(np.sqrt(np.maximum(alo, 0.0)), DOWN), 0.0)
        return _nan_where(bad, lo, _step(np.sqrt(np.maximum(ahi, 0.0)), UP))

    def iabs(self, a):
        alo, ahi = a
        lo = np.where(alo >= 0, alo, np.where(ahi <= 0, -ahi, 0.0))
        return _nan_where(np.isnan(alo), lo, np.maximum(np.abs(alo), np.abs(ahi)))

    def imin(self, a, b):
        return np.minimum(a[0], b[0]), np.minimum(a[1], b[1])

    def imax(self, a, b):
        return np.maximum(a[0], b[0]), np.maximum(a[1], b[1])

    def function(self, name, a):
        """An elementary function: ``sqrt``, ``sin`` and ``cos`` in floats
        (:mod:`certify.check._trig`), the others by python-flint."""
        if name == "sqrt":
            return self.sqrt(a)
        if name in ("sin", "cos"):
            from ._trig import periodic     # it builds on this module's rounding
            lo, hi, left = periodic(self, name, a)
            if left.any():
                ends = [np.broadcast_to(x, lo.shape)[left] for x in a]
                lo[left], hi[left] = self._by_flint(
                    lambda e: self._flint.function(name, e), ends)
            return lo, hi
        return self._by_flint(lambda e: self._flint.function(name, e), a)

    def cover(self, box, pieces):
        """Sub-boxes covering a box: each row halved ``log2(pieces)`` times, every time
        along its widest side (any float cut point inside a side gives a cover)."""
        out = [box]
        while pieces > 1:
            out = [half for piece in out for half in self._halves(piece)]
            pieces //= 2
        return out

    @staticmethod
    def _halves(box):
        widths = np.stack([np.broadcast_to(hi - lo, np.shape(box[0][0]))
                           for lo, hi in box], axis=-1)
        widest = np.argmax(np.nan_to_num(widths, nan=0.0), axis=-1)
        left, right = [], []
        for k, (lo, hi) in enumerate(box):
            mid = np.minimum(np.maximum(0.5 * lo + 0.5 * hi, lo), hi)
            cut = widest == k
            left.append((lo, np.where(cut, mid, hi)))
            right.append((np.where(cut, mid, lo), hi))
        return [left, right]

    def hull(self, a, b):
        return np.minimum(a[0], b[0]), np.maximum(a[1], b[1])

    def intersect(self, a, b):
        """Intersection; NaN where it is empty or an end is not finite."""
        lo, hi = np.maximum(a[0], b[0]), np.minimum(a[1], b[1])
        good = (lo <= hi) & np.isfinite(lo) & np.isfinite(hi)
        return _nan_where(~good, lo, hi)

    def inverse(self, A):
        """Enclosure of ``A^-1`` for invertible float matrices.

        ``C`` the float inverse of ``A``; with ``delta = ||I - C A||_inf < 1``,
        ``|A^-1 - C| <= delta / (1 - delta) ||C||_inf`` entrywise (docs/method.md,
        ``interval_inverse``). Norms are folded left, rounded up.

        Parameters
        ----------
        A : ndarray, shape (N, n, n)

        Returns
        -------
        list of list of intervals, n x n
        """
        n = A.shape[-1]
        C = float_inverse(A)
        # C A for all entries at once, the inner index folded left
        P = None
        for l in range(n):
            term = self.mul(self.exact(C[:, :, l, None]), self.exact(A[:, None, l, :]))
            P = term if P is None else self.add(P, term)
        eye = np.eye(n)
        R = _sum(eye, -P[1], DOWN), _sum(eye, -P[0], UP)
        size = np.maximum(np.abs(R[0]), np.abs(R[1]))
        delta, norm_c = _row_sums_up(size), _row_sums_up(np.abs(C))
        ok = delta < 1
        room = _sum(np.float64(1.0), -np.where(ok, delta, 0.0), DOWN)
        eps = np.where(ok, _step(_step(delta / room, UP) * norm_c, UP), np.nan)[:, None, None]
        lo, hi = _sum(C, -eps, DOWN), _sum(C, eps, UP)
        return [[(lo[:, i, j], hi[:, i, j]) for j in range(n)] for i in range(n)]
