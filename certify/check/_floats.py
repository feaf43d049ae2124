"""The checker's first pass: intervals as two float64 numpy arrays, rounded outward.

Why it is sound (the trust base of this pass)
--------------------------------------------
An interval is a pair ``(lo, hi)`` of float64 arrays (0-d for constants and parameters).
Every operation returns ends that enclose the exact range of the operation over the
exact input intervals:

* ``+ - * /`` and ``sqrt`` are IEEE 754 binary64 operations, correctly rounded to
  nearest (numpy's float64 loops on x86-64 use the SSE2 instructions, which are): the
  rounded result is within half a float spacing of the exact one. Each end is then
  stepped outward by at least one spacing (``x -+ (|x| 2^-52 + 2^-1074)``, see
  :func:`_lower_step`; it does what ``np.nextafter`` does, sometimes one float further,
  at an eighth of its cost), which reaches a float on the far side of the exact value.
  Sums keep their rounded value where Knuth's TwoSum error term shows it is already on
  the right side (the error term is exact for finite sums; an overflow gives NaN there,
  and the sum is stepped). A product or quotient that rounded to 0 keeps 0 as its lower
  (upper) end when no input combination can make it negative (positive); otherwise it
  is stepped to the smallest subnormal. Products of intervals are the min and max of the
  four end products, quotients likewise for a divisor of one strict sign (a divisor that
  reaches 0 gives NaN).
* Nothing else comes from numpy's libm (``exp``, ``log``, ``sin``... are not guaranteed
  correctly rounded there): elementary functions, real powers and constants are computed
  by python-flint (arb) through :class:`certify.check._arith.EndpointArith`, whose ends are
  exact 53-bit numbers; they are turned into floats by exact comparison (a lower end
  becomes the largest float not above it, an upper end the smallest float not below).
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

import itertools
from fractions import Fraction

import numpy as np
from flint import arb

from ._arith import EndpointArith, Pieces

__all__ = ["FloatArith", "float_down", "float_up"]

_NEG = -np.inf
_POS = np.inf
#: Integers below ``_EXACT`` are exact floats, and so are their quotients by powers of 2
#: up to ``_NORMAL`` (normal numbers; ``int / int`` is correctly rounded in Python).
_EXACT = 1 << 53
_NORMAL = 1 << 1022
_SPACING = 2.0 ** -52
_TINY = 2.0 ** -1074


def _lower_step(x):
    """A float at least one ulp below each entry of `x` (``+inf`` gives NaN).

    ``d = |x| 2^-52 + 2^-1074`` is at least the spacing of the floats at ``x`` (and the
    smallest subnormal at 0), and ``x - d`` rounded to nearest cannot land above the float
    one spacing below ``x``. Five vector operations cost an eighth of ``np.nextafter``.
    """
    return x - (np.abs(x) * _SPACING + _TINY)


def _upper_step(x):
    """A float at least one ulp above each entry of `x` (``-inf`` gives NaN)."""
    return x + (np.abs(x) * _SPACING + _TINY)


def _two_sum(a, b):
    """The rounded sum and its exact error ``(a + b) - s`` (Knuth; NaN on overflow)."""
    s = a + b
    back = s - a
    return s, (a - (s - back)) + (b - back)


def _add_down(a, b):
    s, err = _two_sum(a, b)
    return np.where(err >= 0, s, _lower_step(s))


def _add_up(a, b):
    s, err = _two_sum(a, b)
    return np.where(err <= 0, s, _upper_step(s))


def _settle(lo, hi, may_be_negative, may_be_positive):
    """Round the min and max of rounded products (or quotients) outward.

    An end that rounded to 0 stays 0 where the exact range cannot have the other sign
    (the masks are computed only when some end is 0).
    """
    down, up = _lower_step(lo), _upper_step(hi)
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
    if type(q) is not Fraction:
        q = _exact_fraction(q)
        if q is None:
            return np.nan
    return -float_down(-q)


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


def _power_down(x, n):
    """``x^n`` rounded down for ``x >= 0`` and an integer ``n >= 1`` (repeated squaring)."""
    return _power(x, n, lambda p: np.maximum(_lower_step(p), 0.0))


def _power_up(x, n):
    """``x^n`` rounded up for ``x >= 0``; exactly 0 where ``x = 0``."""
    return np.where(x == 0, 0.0, _power(x, n, _upper_step))


def _power(x, n, rounded):
    result, base = None, x
    while True:
        if n & 1:
            result = base if result is None else rounded(result * base)
        n >>= 1
        if not n:
            return result
        base = rounded(base * base)


class FloatArith:
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

    def take(self, a, index):
        lo, hi = a
        return (lo[index] if np.ndim(lo) else lo), (hi[index] if np.ndim(hi) else hi)

    def put(self, a, index, b):
        if not np.ndim(a[0]):
            return a
        lo, hi = a[0].copy(), a[1].copy()
        lo[index], hi[index] = b
        return lo, hi

    # -- bounds and predicates -----------------------------------------------------------
    def lower(self, a):
        return a[0]

    def upper(self, a):
        return a[1]

    def finite(self, a):
        return np.isfinite(a[0]) & np.isfinite(a[1])

    def sum_lower(self, a, b):
        """``a + b`` rounded down, for float arrays."""
        return _add_down(a, b)

    def sum_upper(self, a, b):
        return _add_up(a, b)

    # -- operations ----------------------------------------------------------------------
    def add(self, a, b):
        return _add_down(a[0], b[0]), _add_up(a[1], b[1])

    def sub(self, a, b):
        return _add_down(a[0], -b[1]), _add_up(a[1], -b[0])

    def neg(self, a):
        return -a[1], -a[0]

    def mul(self, a, b):
        alo, ahi = a
        blo, bhi = b
        if blo is bhi:
            alo, ahi, blo, bhi = blo, bhi, alo, ahi
        if alo is ahi:
            p, q = alo * blo, alo * bhi
            lo, hi = np.minimum(p, q), np.maximum(p, q)
        else:
            p, q, r, s = alo * blo, alo * bhi, ahi * blo, ahi * bhi
            lo = np.minimum(np.minimum(p, q), np.minimum(r, s))
            hi = np.maximum(np.maximum(p, q), np.maximum(r, s))
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
        lo = np.maximum(_lower_step(np.sqrt(np.maximum(alo, 0.0))), 0.0)
        return _nan_where(bad, lo, _upper_step(np.sqrt(np.maximum(ahi, 0.0))))

    def iabs(self, a):
        alo, ahi = a
        lo = np.where(alo >= 0, alo, np.where(ahi <= 0, -ahi, 0.0))
        return _nan_where(np.isnan(alo), lo, np.maximum(np.abs(alo), np.abs(ahi)))

    def imin(self, a, b):
        return np.minimum(a[0], b[0]), np.minimum(a[1], b[1])

    def imax(self, a, b):
        return np.maximum(a[0], b[0]), np.maximum(a[1], b[1])

    def function(self, name, a):
        """An elementary function: ``sqrt`` in floats, the others by python-flint."""
        if name == "sqrt":
            return self.sqrt(a)
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

    def split_at(self, box, point):
        """The ``2^n`` boxes into which an exact point of each box cuts it."""
        return [[(p[0], b[1]) if bit else (b[0], p[1]) for bit, b, p in zip(bits, box, point)]
                for bits in itertools.product((0, 1), repeat=len(box))]

    def hull(self, a, b):
        return np.minimum(a[0], b[0]), np.maximum(a[1], b[1])

    def intersect(self, a, b):
        """Intersection; NaN where it is empty or an end is not finite."""
        lo, hi = np.maximum(a[0], b[0]), np.minimum(a[1], b[1])
        good = (lo <= hi) & np.isfinite(lo) & np.isfinite(hi)
        return _nan_where(~good, lo, hi)

    def inverse(self, A):
        """Enclosure of ``A^-1`` for float matrices close to orthogonal.

        ``C = A^T``; with ``delta = ||I - C A||_inf < 1``,
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
        point = [[self.exact(A[:, i, j]) for j in range(n)] for i in range(n)]
        C = [[point[j][i] for j in range(n)] for i in range(n)]
        delta = norm_c = None
        for i in range(n):
            row = crow = None
            for j in range(n):
                p = self.mul(C[i][0], point[0][j])
                for l in range(1, n):
                    p = self.add(p, self.mul(C[i][l], point[l][j]))
                one = np.float64(i == j)
                r = _add_down(one, -p[1]), _add_up(one, -p[0])
                size = np.maximum(np.abs(r[0]), np.abs(r[1]))
                row = size if row is None else _add_up(row, size)
                c = np.abs(C[i][j][0])
                crow = c if crow is None else _add_up(crow, c)
            delta = row if delta is None else np.maximum(delta, row)
            norm_c = crow if norm_c is None else np.maximum(norm_c, crow)
        ok = delta < 1
        room = _add_down(np.float64(1.0), -np.where(ok, delta, 0.0))
        eps = _upper_step(_upper_step(delta / room) * norm_c)
        eps = np.where(ok, eps, np.nan)
        return [[(_add_down(C[i][j][0], -eps), _add_up(C[i][j][1], eps)) for j in range(n)]
                for i in range(n)]
