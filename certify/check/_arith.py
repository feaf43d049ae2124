"""The checker's two interval arithmetics, both resting on python-flint only.

``BallArith`` (the fast path)
    An interval is a numpy object array of arb balls; numpy applies arb's operators in
    a C loop, so a whole chunk of cells is evaluated per operation. Balls are rigorous
    but looser than endpoint intervals on wide products, and arb keeps radii with 30
    bits, so a claim whose margin is thinner than that may fail to verify here.

``EndpointArith`` (the exact path)
    An interval is a pair ``(lo, hi)`` of object arrays of exact arb numbers with at most
    53 significant bits. Every operation computes its candidate endpoints exactly (sums,
    differences and products of such numbers are exact at 4096 bits) or to 256 bits
    (quotients, 128 for elementary functions), then rounds the lower end down and the
    upper end up to 53 bits. The result is the tightest 53-bit enclosure of the
    operation's exact range, hence contained in any double-precision enclosure of the
    same operation on larger inputs: following the prover's order of operations, every
    inclusion the prover established with outward-rounded doubles also holds here.

A NaN (arb ``nan``) marks an unusable interval (division by an interval containing 0,
a function outside its domain or beyond what arb bounds, such as ``cosh`` of 1e300);
comparisons with NaN are False, so nothing is proven from it. A NaN interval has two NaN
ends on the endpoint path (:func:`_nan_together`): numpy's minimum and maximum of object
arrays drop a NaN first operand, so a lone NaN end would vanish in a later product.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
from flint import arb, ctx, fmpq

__all__ = ["BallArith", "EndpointArith", "Pieces", "evaluate", "ARITHMETICS"]

BALL_PREC = 64
EXACT_PREC = 4096
QUOTIENT_PREC = 256
FUNCTION_PREC = 128
ROUND_PREC = 53

_make = np.frompyfunc(arb, 1, 1)
_lower = np.frompyfunc(arb.lower, 1, 1)
_upper = np.frompyfunc(arb.upper, 1, 1)
_union = np.frompyfunc(arb.union, 2, 1)
_finite = np.frompyfunc(arb.is_finite, 1, 1)
_is_nan = np.frompyfunc(arb.is_nan, 1, 1)
_abs_lower = np.frompyfunc(arb.abs_lower, 1, 1)
_abs_upper = np.frompyfunc(arb.abs_upper, 1, 1)
_min = np.frompyfunc(arb.min, 2, 1)
_max = np.frompyfunc(arb.max, 2, 1)
_to_float = np.frompyfunc(float, 1, 1)
_FUNCTIONS = {name: np.frompyfunc(getattr(arb, name), 1, 1)
              for name in ("exp", "log", "sqrt", "sin", "cos", "tan", "atan", "tanh",
                           "sinh", "cosh")}


def _nan():
    return arb("nan")


def _meet_one(a, b):
    if not (a.is_finite() and b.is_finite()):
        return _nan()
    try:
        return a.intersection(b)
    except ValueError:
        return _nan()


_meet = np.frompyfunc(_meet_one, 2, 1)


def _to_fmpq(q):
    return fmpq(q.numerator, q.denominator)


def _constant_ball(spec):
    """Ball enclosing a constant spec of :mod:`certify.check._programs`."""
    kind = spec[0]
    if kind == "q":
        return arb(fmpq(spec[1], spec[2]))
    if kind == "named":
        return {"pi": arb.pi, "e": arb.const_e, "euler": arb.const_euler,
                "catalan": arb.const_catalan}[spec[1]]()
    value = arb(spec[1])
    return value + abs(value) * arb(0, 1e-70)


def _power(x, n):
    """``x ** n`` for an integer ``n >= 1`` by repeated squaring (elementwise)."""
    result = None
    base = x
    while n:
        if n & 1:
            result = base if result is None else result * base
        n >>= 1
        if n:
            base = base * base
    return result


def _bool(a):
    return np.asarray(a, dtype=object).astype(bool)


@dataclass(frozen=True)
class Pieces:
    """Into how many pieces the step evaluates its wide boxes (see ``BallArith.cover``).

    Attributes
    ----------
    tube : int
        Pieces of the a-priori box for the field and the limit rates.
    jacobians : (int, int)
        Pieces of each of the ``2^n`` parts of the mean-value box (cut at the point
        ``m``, for models whose programs say ``cut_jacobian``; else pieces of the whole
        box) for the Jacobian of ``f^[1]``, and pieces of the whole box for those of
        ``f^[2], f^[3], ...``.
    remainder : int
        Pieces of the a-priori box for the Taylor remainder.
    """

    tube: int = 1
    jacobians: tuple = (1, 1)
    remainder: int = 1


class BallArith:
    """Intervals as object arrays of arb balls (see the module notes).

    Parameters
    ----------
    pieces : Pieces
    """

    name = "ball"

    def __init__(self, pieces=Pieces()):
        self.pieces = pieces
        self.plans = {}
        self._constants = {}
        self.zero = arb(0)
        self.unit = arb(0, 1)

    def enter(self):
        """Set the working precision (call before a batch of operations)."""
        ctx.prec = BALL_PREC

    # -- construction --------------------------------------------------------------------
    def exact(self, x):
        """Point intervals of float values (exact)."""
        return _make(np.asarray(x, dtype=float))

    def box(self, lo, hi):
        """Intervals ``[lo, hi]`` from float bounds."""
        return _union(self.exact(lo), self.exact(hi))

    def rational(self, lo, hi):
        """Interval ``[lo, hi]`` from two Fractions (a scalar)."""
        return arb(_to_fmpq(lo)).union(arb(_to_fmpq(hi)))

    def rationals(self, lo, hi):
        """Intervals from object arrays of Fractions."""
        return np.frompyfunc(self.rational, 2, 1)(lo, hi)

    def constant(self, spec):
        """Interval of a constant spec (cached)."""
        if spec not in self._constants:
            self._constants[spec] = _constant_ball(spec)
        return self._constants[spec]

    def take(self, a, index):
        """Rows `index` of an interval array (scalars pass through)."""
        return a[index] if np.ndim(a) else a

    def put(self, a, index, b):
        """A copy of `a` with rows `index` replaced by `b` (scalars stay scalars)."""
        if not np.ndim(a):
            return a
        out = a.copy()
        out[index] = b
        return out

    # -- bounds and predicates -----------------------------------------------------------
    def lower(self, a):
        """Exact lower bounds (object array of arb)."""
        return _lower(a)

    def upper(self, a):
        """Exact upper bounds."""
        return _upper(a)

    def finite(self, a):
        """Bool array: the interval is usable (finite)."""
        return _bool(_finite(a))

    def sum_lower(self, a, b):
        """Exact lower bounds of the sums of exact numbers."""
        return _lower(a + b)

    def sum_upper(self, a, b):
        """Exact upper bounds of the sums of exact numbers."""
        return _upper(a + b)

    # -- operations ----------------------------------------------------------------------
    def add(self, a, b):
        return a + b

    def sub(self, a, b):
        return a - b

    def mul(self, a, b):
        return a * b

    def div(self, a, b):
        return a / b

    def neg(self, a):
        return -a

    def pow_int(self, a, n):
        # from the ends (odd powers increase, even ones grow with |a|): a ball power
        # of a wide ball would be much looser
        if n % 2:
            return _union(_power(_lower(a), n), _power(_upper(a), n))
        return _union(_power(_abs_lower(a), n), _power(_abs_upper(a), n))

    def pow_real(self, a, q):
        return a ** arb(_to_fmpq(q))

    def iabs(self, a):
        return _union(_abs_lower(a), _abs_upper(a))

    def imin(self, a, b):
        return _min(a, b)

    def imax(self, a, b):
        return _max(a, b)

    def function(self, name, a):
        return _FUNCTIONS[name](a)

    def cover(self, box, pieces):
        """Sub-boxes covering a box (a list of interval arrays, one per axis).

        A range evaluated piecewise and joined is much tighter than one ball
        evaluation of a wide box, whose products overestimate by the product of the
        radii. ``pieces=2`` halves each row along its widest side; ``pieces=4`` halves
        along the two widest sides (quarters the side in one dimension); ``pieces=1``
        is the box itself.
        """
        n = len(box)
        if pieces == 1:
            return [box]
        lo = [_lower(b) for b in box]
        hi = [_upper(b) for b in box]
        if n == 1 and pieces == 4:
            cuts = [lo[0]] + [(lo[0] * (4 - j) + hi[0] * j) / 4 for j in (1, 2, 3)] + [hi[0]]
            return [[_union(cuts[j], cuts[j + 1])] for j in range(4)]
        mid = [(a + b) / 2 for a, b in zip(lo, hi)]
        if n == 1:
            order = np.zeros(np.shape(lo[0]) + (1,), int)
        else:
            widths = np.stack([_to_float(b - a) for a, b in zip(lo, hi)], axis=-1)
            order = np.argsort(-widths.astype(float), axis=-1, kind="stable")
        cuts = [order[..., 0]] if pieces == 2 or n == 1 else [order[..., 0], order[..., 1]]
        out = []
        for bits in itertools.product((0, 1), repeat=len(cuts)):
            piece = []
            for k in range(n):
                upper_half = np.zeros(np.shape(lo[0]), bool)
                lower_half = np.zeros(np.shape(lo[0]), bool)
                for axis, bit in zip(cuts, bits):
                    upper_half |= (axis == k) & (bit == 1)
                    lower_half |= (axis == k) & (bit == 0)
                piece.append(_union(np.where(upper_half, mid[k], lo[k]),
                                    np.where(lower_half, mid[k], hi[k])))
            out.append(piece)
        return out

    def split_at(self, box, point):
        """The ``2^n`` boxes into which an exact point of each box cuts it."""
        lo = [_lower(b) for b in box]
        hi = [_upper(b) for b in box]
        return [[_union(p, h) if bit else _union(l, p)
                 for bit, l, h, p in zip(bits, lo, hi, point)]
                for bits in itertools.product((0, 1), repeat=len(box))]

    def hull(self, a, b):
        return _union(a, b)

    def intersect(self, a, b):
        """Intersection; NaN where it is empty or an operand is not finite."""
        return _meet(a, b)

    def inverse(self, A):
        """Enclosure of ``A^-1`` for invertible float matrices.

        With ``C`` the float inverse of ``A`` (any approximation would do) and
        ``delta = ||I - C A||_inf < 1``, ``|A^-1 - C| <= delta / (1 - delta) ||C||_inf``
        entrywise.

        Parameters
        ----------
        A : ndarray, shape (N, n, n)

        Returns
        -------
        list of list of interval arrays, shape n x n
        """
        n = A.shape[-1]
        exact = [[self.exact(A[:, i, j]) for j in range(n)] for i in range(n)]
        C = _approximate_inverse(self, A)
        delta = None
        norm_c = None
        for i in range(n):
            row = None
            crow = None
            for j in range(n):
                p = _inner(self, C[i], [exact[l][j] for l in range(n)])
                r = (arb(1) if i == j else arb(0)) - p
                term = _abs_upper(r)
                row = term if row is None else row + term
                cterm = abs(C[i][j])
                crow = cterm if crow is None else crow + cterm
            delta = row if delta is None else _max(delta, row)
            norm_c = crow if norm_c is None else _max(norm_c, crow)
        ok = _bool(delta < 1)
        eps = _upper(delta / (1 - delta) * norm_c)
        eps = np.where(ok, eps, _nan())
        spread = eps * self.unit
        return [[C[i][j] + spread for j in range(n)] for i in range(n)]


class PairStorage:
    """Rows, ends and cuts of intervals stored as pairs ``(lo, hi)`` of arrays (0-d or
    scalar ends for constants): shared by EndpointArith and the float pass."""

    def take(self, a, index):
        """Rows `index` of an interval array (scalars pass through)."""
        lo, hi = a
        return lo[index] if np.ndim(lo) else lo, hi[index] if np.ndim(hi) else hi

    def put(self, a, index, b):
        """A copy of `a` with rows `index` replaced by `b` (scalars stay scalars)."""
        if not np.ndim(a[0]):
            return a
        lo, hi = a[0].copy(), a[1].copy()
        lo[index], hi[index] = b
        return lo, hi

    def lower(self, a):
        return a[0]

    def upper(self, a):
        return a[1]

    def split_at(self, box, point):
        """The ``2^n`` boxes into which an exact point of each box cuts it (at the point
        where the prover cut its own, so each piece lies in one of the prover's)."""
        return [[(p[0], b[1]) if bit else (b[0], p[1])
                 for bit, b, p in zip(bits, box, point)]
                for bits in itertools.product((0, 1), repeat=len(box))]


class EndpointArith(PairStorage):
    """Intervals as pairs of exact 53-bit arb endpoints (see the module notes)."""

    name = "endpoint"
    #: The exact path evaluates every box whole, as the prover did.
    pieces = Pieces()

    def __init__(self):
        self.plans = {}
        self._constants = {}
        self.zero = arb(0)
        self.nan = _nan()

    def enter(self):
        """Set the working precision (call before a batch of operations)."""
        ctx.prec = EXACT_PREC

    @staticmethod
    def _down(x):
        ctx.prec = ROUND_PREC
        out = _lower(x)
        ctx.prec = EXACT_PREC
        return out

    @staticmethod
    def _up(x):
        ctx.prec = ROUND_PREC
        out = _upper(x)
        ctx.prec = EXACT_PREC
        return out

    def _enclose(self, ball):
        return self._down(ball), self._up(ball)

    # -- construction --------------------------------------------------------------------
    def exact(self, x):
        v = _make(np.asarray(x, dtype=float))
        return v, v

    def box(self, lo, hi):
        return _make(np.asarray(lo, dtype=float)), _make(np.asarray(hi, dtype=float))

    def rational(self, lo, hi):
        return self._down(arb(_to_fmpq(lo))), self._up(arb(_to_fmpq(hi)))

    def rationals(self, lo, hi):
        make = np.frompyfunc(lambda q: arb(_to_fmpq(q)), 1, 1)
        return self._down(make(lo)), self._up(make(hi))

    def constant(self, spec):
        if spec not in self._constants:
            ctx.prec = EXACT_PREC
            self._constants[spec] = self._enclose(_constant_ball(spec))
        return self._constants[spec]

    # -- bounds and predicates -----------------------------------------------------------
    def finite(self, a):
        return _bool(_finite(a[0])) & _bool(_finite(a[1]))

    def sum_lower(self, a, b):
        return self._down(a + b)

    def sum_upper(self, a, b):
        return self._up(a + b)

    # -- operations ----------------------------------------------------------------------
    def add(self, a, b):
        return self._down(a[0] + b[0]), self._up(a[1] + b[1])

    def sub(self, a, b):
        return self._down(a[0] - b[1]), self._up(a[1] - b[0])

    def neg(self, a):
        return -a[1], -a[0]

    def mul(self, a, b):
        alo, ahi = a
        blo, bhi = b
        if alo is ahi:
            p, q = alo * blo, alo * bhi
            return _nan_together(self._down(np.minimum(p, q)), self._up(np.maximum(p, q)))
        if blo is bhi:
            p, q = alo * blo, ahi * blo
            return _nan_together(self._down(np.minimum(p, q)), self._up(np.maximum(p, q)))
        p1, p2, p3, p4 = alo * blo, alo * bhi, ahi * blo, ahi * bhi
        lo = np.minimum(np.minimum(p1, p2), np.minimum(p3, p4))
        hi = np.maximum(np.maximum(p1, p2), np.maximum(p3, p4))
        return _nan_together(self._down(lo), self._up(hi))

    def div(self, a, b):
        alo, ahi = a
        blo, bhi = b
        positive = _bool(blo > 0)
        bad = ~positive & ~_bool(bhi < 0)
        num_lo = np.where(positive, alo, ahi)
        num_hi = np.where(positive, ahi, alo)
        ctx.prec = QUOTIENT_PREC
        q1, q2, q3, q4 = num_lo / blo, num_lo / bhi, num_hi / blo, num_hi / bhi
        lo = np.minimum(self._down(q1), self._down(q2))
        hi = np.maximum(self._up(q3), self._up(q4))
        # inf / inf gives a NaN candidate at one end (exp of a huge box is infinite)
        return _nan_together(np.where(bad, self.nan, lo), np.where(bad, self.nan, hi))

    def pow_int(self, a, n):
        alo, ahi = a
        if n % 2:
            return self._down(_power(alo, n)), self._up(_power(ahi, n))
        straddle = _bool(alo <= 0) & _bool(ahi >= 0)
        mag_lo = np.where(straddle, self.zero, np.minimum(np.abs(alo), np.abs(ahi)))
        mag_hi = np.maximum(np.abs(alo), np.abs(ahi))
        return self._down(_power(mag_lo, n)), self._up(_power(mag_hi, n))

    def _monotone(self, f, lo, hi, increasing=True):
        ctx.prec = FUNCTION_PREC
        flo, fhi = f(lo), f(hi)
        if not increasing:
            flo, fhi = fhi, flo
        return _nan_together(self._down(flo), self._up(fhi))

    def pow_real(self, a, q):
        alo, ahi = a
        bad = _bool(alo < 0) | (_bool(alo <= 0) & (q < 0))
        ctx.prec = FUNCTION_PREC
        e = arb(_to_fmpq(q))
        lo, hi = self._monotone(lambda x: x ** e, alo, ahi, increasing=q > 0)
        return np.where(bad, self.nan, lo), np.where(bad, self.nan, hi)

    def sqrt(self, a):
        bad = _bool(a[0] < 0)
        lo, hi = self._monotone(_FUNCTIONS["sqrt"], a[0], a[1])
        return np.where(bad, self.nan, lo), np.where(bad, self.nan, hi)

    def log(self, a):
        bad = ~_bool(a[0] > 0)
        lo, hi = self._monotone(_FUNCTIONS["log"], a[0], a[1])
        return np.where(bad, self.nan, lo), np.where(bad, self.nan, hi)

    def iabs(self, a):
        alo, ahi = a
        lo = np.where(_bool(alo >= 0), alo, np.where(_bool(ahi <= 0), -ahi, self.zero))
        hi = np.maximum(np.abs(alo), np.abs(ahi))
        return _keep_nan(lo, alo), _keep_nan(hi, alo)

    def imin(self, a, b):
        return (_keep_nan(np.minimum(a[0], b[0]), a[0], b[0]),
                _keep_nan(np.minimum(a[1], b[1]), a[0], b[0]))

    def imax(self, a, b):
        return (_keep_nan(np.maximum(a[0], b[0]), a[0], b[0]),
                _keep_nan(np.maximum(a[1], b[1]), a[0], b[0]))

    def function(self, name, a):
        if name in ("exp", "atan", "tanh", "sinh"):
            return self._monotone(_FUNCTIONS[name], a[0], a[1])
        if name == "log":
            return self.log(a)
        if name == "sqrt":
            return self.sqrt(a)
        if name == "cosh":
            alo, ahi = a
            straddle = _bool(alo <= 0) & _bool(ahi >= 0)
            ctx.prec = FUNCTION_PREC
            c1, c2 = _FUNCTIONS["cosh"](alo), _FUNCTIONS["cosh"](ahi)
            c1, c2 = _nan_together(c1, c2)      # arb's cosh is NaN beyond about 1e80
            lo = np.where(straddle, arb(1), np.minimum(self._down(c1), self._down(c2)))
            return _nan_together(lo, np.maximum(self._up(c1), self._up(c2)))
        pairs = np.frompyfunc(lambda lo, hi: _periodic(name, lo, hi), 2, 2)(a[0], a[1])
        ctx.prec = EXACT_PREC
        return pairs

    def cover(self, box, pieces):
        """The box itself: the exact path follows the prover's evaluation."""
        return [box]

    def hull(self, a, b):
        return (_keep_nan(np.minimum(a[0], b[0]), a[0], b[0]),
                _keep_nan(np.maximum(a[1], b[1]), a[0], b[0]))

    def intersect(self, a, b):
        lo = _keep_nan(np.maximum(a[0], b[0]), a[0], b[0])
        hi = _keep_nan(np.minimum(a[1], b[1]), a[0], b[0])
        empty = _bool(lo > hi)
        return np.where(empty, self.nan, lo), np.where(empty, self.nan, hi)

    def inverse(self, A):
        """Enclosure of ``A^-1`` in the prover's order of operations (see BallArith)."""
        n = A.shape[-1]
        exact = [[self.exact(A[:, i, j]) for j in range(n)] for i in range(n)]
        C = _approximate_inverse(self, A)
        delta = norm_c = None
        for i in range(n):
            row = crow = None
            for j in range(n):
                p = _inner(self, C[i], [exact[l][j] for l in range(n)])
                one = arb(1) if i == j else arb(0)
                r = self.sub((one, one), p)
                mag = np.maximum(np.abs(r[0]), np.abs(r[1]))
                row = mag if row is None else self._up(row + mag)
                c = np.abs(C[i][j][0])
                crow = c if crow is None else self._up(crow + c)
            delta = row if delta is None else np.maximum(delta, row)
            norm_c = crow if norm_c is None else np.maximum(norm_c, crow)
        ok = _bool(delta < 1)
        one_minus = self._down(1 - delta)
        ctx.prec = QUOTIENT_PREC
        quotient = delta / np.where(ok, one_minus, arb(1))
        eps = self._up(self._up(quotient) * norm_c)
        eps = np.where(ok, eps, self.nan)
        return [[(self._down(C[i][j][0] - eps), self._up(C[i][j][1] + eps)) for j in range(n)]
                for i in range(n)]


def float_inverse(A):
    """Float inverses of a stack of matrices (NaN where one is singular or not finite);
    any approximation serves as ``C`` in the inverse enclosures."""
    with np.errstate(all="ignore"):
        try:
            return np.linalg.inv(A)
        except np.linalg.LinAlgError:
            out = np.full(A.shape, np.nan)
            for k, a in enumerate(A):
                try:
                    out[k] = np.linalg.inv(a)
                except np.linalg.LinAlgError:
                    pass
            return out


def _approximate_inverse(ar, A):
    """Float inverses of a stack of matrices, as exact ``n x n`` entries."""
    C = float_inverse(A)
    n = A.shape[-1]
    return [[ar.exact(C[:, i, j]) for j in range(n)] for i in range(n)]


def _nan_together(lo, hi):
    """Both ends NaN wherever one is. arb returns NaN for some finite arguments (sinh and
    cosh beyond about 1e80), and numpy's minimum and maximum of object arrays return the
    second operand when the first is NaN, so an interval with one NaN end would lose it
    in a later product or hull; a NaN interval has two NaN ends (module notes)."""
    bad = _bool(_is_nan(lo)) | _bool(_is_nan(hi))
    return np.where(bad, _nan(), lo), np.where(bad, _nan(), hi)


def _keep_nan(value, *sources):
    """`value`, made NaN wherever a source is NaN (``x - x`` is 0 or NaN, exactly)."""
    for s in sources:
        value = value + (s - s)
    return value


def _periodic(name, lo, hi):
    """Tight 53-bit enclosure of sin, cos or tan over ``[lo, hi]`` (exact ends)."""
    if not (lo.is_finite() and hi.is_finite()):
        return _nan(), _nan()
    ctx.prec = FUNCTION_PREC
    pi = arb.pi()
    if name == "tan":
        # a pole pi/2 + k pi inside makes the interval unusable; tan increases between
        if _may_contain(lo, hi, pi / 2, pi):
            return _nan(), _nan()
        v_lo, v_hi = lo.tan(), hi.tan()
        if v_lo.is_nan() or v_hi.is_nan():
            return _nan(), _nan()
        ctx.prec = ROUND_PREC
        return v_lo.lower(), v_hi.upper()
    shift = arb(0) if name == "cos" else pi / 2
    f = arb.cos if name == "cos" else arb.sin
    # maxima of f at shift + 2 k pi, minima at shift + pi + 2 k pi
    has_max = _may_contain(lo, hi, shift, 2 * pi)
    has_min = _may_contain(lo, hi, shift + pi, 2 * pi)
    v1, v2 = f(lo), f(hi)
    if v1.is_nan() or v2.is_nan():
        return _nan(), _nan()
    ctx.prec = ROUND_PREC
    lo1, lo2, hi1, hi2 = v1.lower(), v2.lower(), v1.upper(), v2.upper()
    out_lo = arb(-1) if has_min else (lo1 if lo1 < lo2 else lo2)
    out_hi = arb(1) if has_max else (hi1 if hi1 > hi2 else hi2)
    return out_lo, out_hi


def _may_contain(lo, hi, offset, period):
    """Whether ``offset + k period`` may lie in ``[lo, hi]`` for an integer k."""
    k_lo = ((lo - offset) / period).ceil()
    k_hi = ((hi - offset) / period).floor()
    return not (k_lo > k_hi)


def _inner(ar, row, col):
    """``sum_l row[l] * col[l]`` folded left."""
    acc = ar.mul(row[0], col[0])
    for l in range(1, len(row)):
        acc = ar.add(acc, ar.mul(row[l], col[l]))
    return acc


def _float_arith(pieces=Pieces()):
    from ._floats import FloatArith, ieee_defaults  # it builds on EndpointArith, defined here
    if not ieee_defaults():
        # another rounding mode or flush-to-zero in this process: balls instead
        return BallArith(pieces)
    return FloatArith(pieces)


#: The checker's passes, in order: a cell whose claims do not verify in one pass is
#: recomputed in the next (benchmarks/results.md, "Checker", has the rates).
ARITHMETICS = {
    "float": _float_arith,
    "float-pieces": lambda: _float_arith(Pieces(tube=4, jacobians=(2, 1), remainder=1)),
    "ball": lambda: BallArith(Pieces(tube=4, jacobians=(2, 1), remainder=1)),
    "fine": lambda: BallArith(Pieces(tube=4, jacobians=(4, 2), remainder=4)),
    "endpoint": EndpointArith,
}
#: The chain of passes for a certificate's own model: each recomputes what the one
#: before left unverified.
PASSES = ("float", "ball", "fine", "endpoint")


def _plan(program, ar):
    """The program as ``(kind, function, args, extra, release)`` rows bound to `ar`.

    Kinds: 0 input, 1 constant (its interval in ``extra``), 2 power, 3 unary operation,
    4 binary operation, 5 elementary function (its name in ``extra``).
    """
    rows = []
    for (op, args, extra), release in zip(program.instructions, program.release):
        if op == "input":
            rows.append((0, None, args, extra, release))
        elif op == "const":
            rows.append((1, None, args, ar.constant(extra), release))
        elif op in ("pow_int", "pow_real"):
            rows.append((2, getattr(ar, op), args, extra, release))
        elif op in _FUNCTIONS:
            rows.append((5, ar.function, args, op, release))
        elif len(args) == 1:
            rows.append((3, getattr(ar, op), args, extra, release))
        else:
            rows.append((4, getattr(ar, op), args, extra, release))
    return rows


def evaluate(program, ar, inputs):
    """Run a program of :mod:`certify.check._programs` on intervals.

    Parameters
    ----------
    program : certify.check._programs.Program
    ar : BallArith or EndpointArith
    inputs : list of intervals
        One per program input (arrays over cells, or scalars that broadcast).

    Returns
    -------
    list of intervals, one per output
    """
    plan = ar.plans.get(id(program))
    if plan is None:
        plan = ar.plans[id(program)] = _plan(program, ar)
    values = [None] * len(plan)
    for k, (kind, function, args, extra, release) in enumerate(plan):
        if kind == 0:
            values[k] = inputs[extra]
        elif kind == 1:
            values[k] = extra
        elif kind == 2:
            values[k] = function(values[args[0]], extra)
        elif kind == 5:
            values[k] = function(extra, values[args[0]])
        elif kind == 3:
            values[k] = function(values[args[0]])
        else:
            values[k] = function(values[args[0]], values[args[1]])
        for a in release:
            values[a] = None
    return [values[o] for o in program.outputs]
