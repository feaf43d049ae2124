"""Proven equilibria, their stability, and how the flow meets each limit.

Three results explain a map of fates (docs/design.md, section 7):

* **Equilibria** (:func:`find_equilibria`): every zero of ``f(x, p)`` in the window,
  each in a box proven (Krawczyk) to hold exactly one for every parameter value, the
  rest of the window proven free of them or listed as unresolved.
* **Stability** (:func:`classify_stability`): Routh-Hurwitz conditions on the
  characteristic polynomial of the interval Jacobian over the equilibrium's box (with
  interval parameters, over the boxes that enclose it on pieces of the parameter box).
* **Limit surfaces** (:func:`analyse_limits`): on each ``g = 0`` the boxes where the
  flow provably leaves the limits (``dg/dt < 0``) or returns (``dg/dt > 0``), and the
  tangency set ``g = 0, dg/dt = 0`` with the sign of ``d2g/dt2``.

:func:`explaining_curves` adds numerical estimates (not proofs) of the curves that
usually bound the safe set in 2D: stable manifolds of saddles and the trajectories
through tangency points where the flow turns back into the limits.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from functools import lru_cache
from itertools import combinations

import numpy as np
import sympy

from . import interval as iv
from .krawczyk import RootSystem, evaluate, find_roots, merge_boxes, split_boxes
from .program import compile_program
from .taylor import lie_derivatives
from .evaluate import parameter_enclosures

__all__ = [
    "Equilibrium", "EquilibriumResult", "Tangency", "LimitResult", "PointsResult", "Curve",
    "find_equilibria", "classify_stability", "analyse_limits", "analyse_points",
    "explaining_curves", "points_summary", "STABILITIES", "TANGENCY_KINDS",
]

#: Stability words, in the order tables list them.
STABILITIES = ("stable", "unstable", "saddle", "undetermined")
#: Kinds of a tangency point: the sign of ``d2g/dt2`` there.
TANGENCY_KINDS = ("returns", "leaves", "undetermined")


@dataclass(frozen=True)
class _LimitPrograms:
    rate: object          # (g, dg/dt)
    rate_exprs: tuple
    tangency_jacobian: object
    tangency_param_jacobian: object
    curvature: object     # d2g/dt2, or None without derivatives of f


@dataclass(frozen=True)
class _Programs:
    inputs: tuple
    field_exprs: tuple
    field: object
    jacobian: object
    param_jacobian: object
    margins: object
    limits: tuple


def _rows(matrix):
    return [matrix[i, j] for i in range(matrix.rows) for j in range(matrix.cols)]


@lru_cache(maxsize=16)
def _compile(equations, states, parameters, limits, fixed, interval_symbols, smooth):
    inputs = tuple(states) + tuple(parameters)
    values = dict(fixed)
    f = [e.xreplace(values) for e in equations]
    gs = [g.xreplace(values) for g in limits]
    x = sympy.Matrix(states)
    field = sympy.Matrix(f)
    p = sympy.Matrix(interval_symbols)

    def jac(rows, wrt):
        return compile_program(_rows(rows.jacobian(wrt)), inputs) if smooth and len(wrt) else None

    limit_programs = []
    for g in gs:
        rate, = lie_derivatives([g], f, states)
        pair = sympy.Matrix([g, rate])
        square = len(states) == 2
        curvature = None
        if smooth:
            curvature = compile_program(lie_derivatives([rate], f, states), inputs)
        limit_programs.append(_LimitPrograms(
            rate=compile_program([g, rate], inputs), rate_exprs=(g, rate),
            tangency_jacobian=jac(pair, x) if square else None,
            tangency_param_jacobian=jac(pair, p) if square else None,
            curvature=curvature))
    return _Programs(inputs=inputs, field_exprs=tuple(f),
                     field=compile_program(f, inputs), jacobian=jac(field, x),
                     param_jacobian=jac(field, p), margins=compile_program(gs, inputs),
                     limits=tuple(limit_programs))


def _programs(model):
    fixed = tuple((q.symbol, sympy.Rational(q.lo.numerator, q.lo.denominator))
                  for q in model.parameters if not q.is_interval)
    interval_symbols = tuple(q.symbol for q in model.parameters if q.is_interval)
    return _compile(tuple(model.equations), tuple(model.state_symbols),
                    tuple(model.parameter_symbols), tuple(c.g for c in model.constraints),
                    fixed, interval_symbols, not model.uses_kinks)


def _params(model):
    return np.array(parameter_enclosures(model), float).reshape(-1, 2)


def _interval_positions(model):
    return tuple(k for k, q in enumerate(model.parameters) if q.is_interval)


def _window(model):
    lo = np.array([iv.enclose_fraction(a)[0] for a, _ in model.window])
    hi = np.array([iv.enclose_fraction(b)[1] for _, b in model.window])
    return lo, hi


def _boxes(lo, hi):
    """Stack ``lo, hi`` (k, n) into boxes (k, n, 2)."""
    return np.stack([lo, hi], -1)


# ----------------------------------------------------------------------------- stability


class _Minors:
    """Interval determinants of square submatrices (Laplace along the first row, memoized).

    ``entry(r, c)`` returns the ``(lo, hi)`` arrays of an entry, or None for an entry that
    is exactly zero (its terms are skipped). A determinant that is exactly zero is None.
    """

    def __init__(self, entry, shape):
        self.entry = entry
        self.one = (np.ones(shape), np.ones(shape))
        self.memo = {}

    def det(self, rows, cols):
        """Determinant of the submatrix ``rows x cols`` (tuples of equal length)."""
        if not rows:
            return self.one
        key = (rows, cols)
        if key not in self.memo:
            total = None
            for k, c in enumerate(cols):
                e = self.entry(rows[0], c)
                sub = None if e is None else self.det(rows[1:], cols[:k] + cols[k + 1:])
                if sub is None:
                    continue
                term = iv.mul(*e, *sub)
                if total is None:
                    total = term if k % 2 == 0 else iv.neg(*term)
                else:
                    total = iv.add(*total, *term) if k % 2 == 0 else iv.sub(*total, *term)
            self.memo[key] = total
        return self.memo[key]


def _characteristic(jlo, jhi):
    """Coefficients ``a_1..a_n`` of ``det(lambda I - J) = lambda^n + a_1 lambda^(n-1) + ...``.

    ``a_k = (-1)^k`` times the sum of the principal minors of order ``k``.
    """
    count, n = jlo.shape[:2]
    zero = (jlo == 0).all(axis=0) & (jhi == 0).all(axis=0)
    minors = _Minors(lambda r, c: None if zero[r, c] else (jlo[:, r, c], jhi[:, r, c]), count)
    coeffs = []
    for k in range(1, n + 1):
        total = (np.zeros(count), np.zeros(count))
        for rows in combinations(range(n), k):
            minor = minors.det(rows, rows)
            if minor is not None:
                total = iv.add(*total, *minor)
        coeffs.append(total if k % 2 == 0 else iv.neg(*total))
    return coeffs


def _hurwitz(coeffs):
    """Leading principal minors ``Delta_1..Delta_n`` of the Hurwitz matrix of a monic polynomial."""
    n = len(coeffs)
    shape = np.shape(coeffs[0][0])
    a = [(np.ones(shape), np.ones(shape))] + list(coeffs)

    def entry(i, j):  # 0-based rows and columns: H_ij = a_(2i - j + 1)
        k = 2 * i - j + 1
        return a[k] if 0 <= k <= n else None

    minors = _Minors(entry, shape)
    zero = (np.zeros(shape), np.zeros(shape))
    out = []
    for k in range(1, n + 1):
        d = minors.det(tuple(range(k)), tuple(range(k)))
        out.append(zero if d is None else d)
    return out


def _has_right_root(coeffs):
    """True where some root certainly has a positive real part.

    If every root had real part ``<= 0`` the monic polynomial would be a product of
    factors ``lambda + c`` and ``lambda^2 + 2 a lambda + a^2 + b^2`` with ``a, c >= 0``, so
    every coefficient would be ``>= 0``; and every Hurwitz minor would be ``>= 0`` as a
    limit of positive ones (shift the roots left). A certainly negative one refutes it.
    """
    hits = [hi < 0 for _, hi in coeffs] + [hi < 0 for _, hi in _hurwitz(coeffs)]
    return np.any(hits, axis=0)


def _stability_flags(jlo, jhi):
    """Per matrix: (all roots certainly left, some root certainly right, some certainly left)."""
    coeffs = _characteristic(jlo, jhi)
    stable = np.all([lo > 0 for lo, _ in _hurwitz(coeffs)], axis=0)
    right = _has_right_root(coeffs)
    mirrored = [c if k % 2 == 0 else iv.neg(*c) for k, c in enumerate(coeffs, start=1)]
    left = _has_right_root(mirrored)
    return stable, right, left


def _stability_words(stable, right, left):
    out = np.full(len(stable), "undetermined", dtype=object)
    out[right] = "unstable"
    out[right & left] = "saddle"
    out[stable] = "stable"
    return out


def classify_stability(jlo, jhi):
    """Stability of equilibria from interval Jacobians (Routh-Hurwitz).

    Parameters
    ----------
    jlo, jhi : ndarray, shape (N, n, n)
        Enclosures of the Jacobian over each equilibrium's box and parameter box.

    Returns
    -------
    ndarray of str, shape (N,)
        ``stable``: every Hurwitz minor is certainly positive, so every eigenvalue lies
        in the open left half plane. ``saddle``: some eigenvalue certainly has a positive
        and some a negative real part (the test below applied to ``p(lambda)`` and to
        ``p(-lambda)``; in 2D exactly a negative determinant). ``unstable``: some
        eigenvalue certainly has a positive real part (a coefficient or a Hurwitz minor
        is certainly negative). ``undetermined`` otherwise.

    Notes
    -----
    Routh 1877, Hurwitz 1895 (from memory): a real monic polynomial has all roots in the open
    left half plane iff the leading principal minors of its Hurwitz matrix
    ``H_ij = a_(2i-j)`` are positive. NaN bounds make every test fail (undetermined).

    Examples
    --------
    >>> import numpy as np
    >>> j = np.array([[[0.0, 1.0], [-2.0, -3.0]], [[0.0, 1.0], [1.0, 0.0]]])
    >>> classify_stability(j, j).tolist()
    ['stable', 'saddle']
    """
    return _stability_words(*_stability_flags(jlo, jhi))


def _box_stability(jacobian, lo, hi, params, interval_params, scale, max_pieces=4096):
    """Stability over each box and parameter box, decided piece by piece.

    The sides wider than ``1e-9`` of their scale (the window side for states, the
    parameter's size for interval parameters; a moving equilibrium's box is wide) are
    halved level by level until the pieces agree on a word or there would be more than
    `max_pieces`; every piece must then carry the same flag.
    """
    n = lo.shape[1]
    which = list(interval_params)
    sizes = np.concatenate([scale, np.abs(params[which]).max(axis=1)])
    words = []
    for box_lo, box_hi in zip(lo, hi):
        full_lo = np.concatenate([box_lo, params[which, 0]])
        full_hi = np.concatenate([box_hi, params[which, 1]])
        wide = np.flatnonzero(full_hi - full_lo > 1e-9 * sizes)
        word = "undetermined"
        level = 0
        while 2 ** (level * len(wide)) <= max_pieces:
            cut_lo, cut_hi = full_lo[None, wide], full_hi[None, wide]
            for _ in range(level):
                cut_lo, cut_hi = split_boxes(cut_lo, cut_hi)
            plo, phi = np.tile(full_lo, (len(cut_lo), 1)), np.tile(full_hi, (len(cut_lo), 1))
            plo[:, wide], phi[:, wide] = cut_lo, cut_hi
            pparams = np.tile(params, (len(plo), 1, 1))
            pparams[:, which, 0], pparams[:, which, 1] = plo[:, n:], phi[:, n:]
            jlo, jhi = evaluate(jacobian, plo[:, :n], phi[:, :n], pparams)
            flags = _stability_flags(jlo.reshape(-1, n, n), jhi.reshape(-1, n, n))
            word = _stability_words(*(np.array([f.all()]) for f in flags))[0]
            if word != "undetermined" or not len(wide):
                break
            level += 1
        words.append(word)
    return np.array(words, dtype=object)


def _stability_by_parameter_pieces(system, lo, hi, scale, max_pieces=64):
    """Stability of the equilibrium in ``[lo, hi]``, decided on pieces of the box of
    the interval parameters.

    Over the whole parameter box the equilibrium's box is as wide as the equilibrium
    moves, and :func:`_box_stability` pairs every state in it with every parameter
    value, most of them far from any equilibrium. Here the parameter box is halved
    level by level (at most `max_pieces` pieces); on each piece the equilibrium is
    enclosed again in ``[lo, hi]`` (:func:`find_roots`, which must clear the rest of
    the box), and every box found must carry the same word with that piece's
    parameters. A word that two pieces disagree on ends the search: the stability
    changes inside the parameter box (or cannot be told apart from a change).
    """
    which = list(system.interval_params)
    if not which or system.jacobian is None:
        return "undetermined"
    plo, phi = system.params[which, 0][None], system.params[which, 1][None]
    while len(plo) * 2 ** len(which) <= max_pieces:
        plo, phi = split_boxes(plo, phi)
        words = set()
        for piece_lo, piece_hi in zip(plo, phi):
            params = system.params.copy()
            params[which, 0], params[which, 1] = piece_lo, piece_hi
            search = find_roots(replace(system, params=params), lo, hi)
            if not search.complete:
                return "undetermined"
            words.update(_box_stability(system.jacobian, search.lo, search.hi, params,
                                        which, scale))
        if len(words - {"undetermined"}) > 1:
            return "undetermined"
        if len(words) == 1 and "undetermined" not in words:
            return words.pop()
    return "undetermined"


# ---------------------------------------------------------------------------- equilibria


@dataclass(frozen=True)
class Equilibrium:
    """An equilibrium proven to be the only one in its box.

    Attributes
    ----------
    box : ndarray, shape (n, 2)
        Rows are ``[lo, hi]``. For interval parameters the box holds the equilibrium for
        every parameter value (it moves inside the box).
    stability : str
        One of :data:`STABILITIES`.
    limits : str
        ``inside`` (every limit holds on the whole box), ``outside`` (some limit is
        violated on the whole box) or ``straddles``.
    """

    box: np.ndarray
    stability: str
    limits: str

    @property
    def centre(self):
        """ndarray, shape (n,): the midpoint of the box (a float estimate of the point)."""
        return 0.5 * (self.box[:, 0] + self.box[:, 1])


@dataclass(frozen=True)
class EquilibriumResult:
    """All equilibria in the window.

    Attributes
    ----------
    equilibria : tuple of Equilibrium
        Distinct equilibria, sorted by their boxes.
    unresolved : ndarray, shape (u, n, 2)
        Boxes of the window not proven free of other equilibria.
    n_boxes : int
        Boxes examined by the search.
    """

    equilibria: tuple
    unresolved: np.ndarray
    n_boxes: int

    @property
    def complete(self):
        """bool: True when the window outside the reported boxes is proven free of equilibria."""
        return len(self.unresolved) == 0


def _limit_position(model, lo, hi):
    glo, ghi = evaluate(_programs(model).margins, lo, hi, _params(model))
    out = np.full(len(lo), "straddles", dtype=object)
    out[(glo >= 0).all(1)] = "inside"
    out[(ghi < 0).any(1)] = "outside"
    return out


def find_equilibria(model, *, max_depth=12, max_boxes=20_000):
    """Enclose every equilibrium of a model in its window, with stability.

    Parameters
    ----------
    model : certify.model.Model
    max_depth : int
        Deepest halving of the window.
    max_boxes : int
        Largest number of boxes in one level of the search.

    Returns
    -------
    EquilibriumResult

    Notes
    -----
    Interval parameters enter as interval inputs, so every claim holds for every
    parameter value. A model with abs, min or max has no Jacobian: its equilibria can
    only be excluded, and whatever remains is listed as unresolved. An equilibrium on
    the edge of the window may have a box reaching slightly beyond it.

    Examples
    --------
    >>> from certify.model import parse_model
    >>> model = parse_model('''
    ... [model]
    ... name = "harvest"
    ... [states]
    ... x = { range = [0, 1.2] }
    ... [equations]
    ... x = "x*(1 - x) - 0.16"
    ... [constraints]
    ... floor = "x >= 0.1"
    ... ''')
    >>> result = find_equilibria(model)
    >>> [(round(float(e.centre[0]), 12), e.stability) for e in result.equilibria]
    [(0.2, 'unstable'), (0.8, 'stable')]
    >>> result.complete
    True
    """
    programs = _programs(model)
    params = _params(model)
    system = RootSystem(values=programs.field, jacobian=programs.jacobian,
                        param_jacobian=programs.param_jacobian, params=params,
                        interval_params=_interval_positions(model),
                        exprs=programs.field_exprs if programs.jacobian else (),
                        inputs=programs.inputs)
    lo, hi = _window(model)
    with np.errstate(all="ignore"):
        search = find_roots(system, lo, hi, max_depth=max_depth, max_boxes=max_boxes)
        if len(search.lo) and programs.jacobian is not None:
            stability = _box_stability(programs.jacobian, search.lo, search.hi, params,
                                       system.interval_params, hi - lo)
            for k in np.flatnonzero(stability == "undetermined"):
                stability[k] = _stability_by_parameter_pieces(
                    system, search.lo[k], search.hi[k], hi - lo)
        else:
            stability = np.full(len(search.lo), "undetermined", dtype=object)
        position = _limit_position(model, search.lo, search.hi)
    boxes = _boxes(search.lo, search.hi)
    equilibria = tuple(Equilibrium(box=b, stability=str(s), limits=str(p))
                       for b, s, p in zip(boxes, stability, position))
    return EquilibriumResult(equilibria=equilibria,
                             unresolved=_boxes(search.unresolved_lo, search.unresolved_hi),
                             n_boxes=search.n_boxes)


# -------------------------------------------------------------------------------- limits


@dataclass(frozen=True)
class Tangency:
    """A box of the tangency set ``g = 0, dg/dt = 0`` of one limit.

    Attributes
    ----------
    box : ndarray, shape (n, 2)
    kind : str
        ``returns`` (``d2g/dt2 > 0`` on the box: the tangent trajectory stays within the
        limit nearby), ``leaves`` (``d2g/dt2 < 0``: it is outside on both sides) or
        ``undetermined``.
    unique : bool
        True when the box is proven (Krawczyk, 2D) to hold exactly one tangency point;
        False for a box that only covers part of the tangency set (higher dimension, or
        where the proof failed). Either way every tangency point lies in some box.
    """

    box: np.ndarray
    kind: str
    unique: bool


@dataclass(frozen=True)
class LimitResult:
    """How the flow meets the surface ``g = 0`` of one limit inside the window.

    Attributes
    ----------
    name : str
        The limit's name.
    leaves, returns : ndarray, shape (k, n, 2)
        Boxes meeting ``g = 0`` on which ``dg/dt < 0`` (the flow leaves the limits) or
        ``dg/dt > 0`` (it comes back), certainly, for every parameter value.
    tangencies : tuple of Tangency
        Boxes covering the tangency set in the window.
    """

    name: str
    leaves: np.ndarray
    returns: np.ndarray
    tangencies: tuple


def _arcs(program, lo, hi, params, depth, max_boxes):
    """Boxes meeting ``g = 0`` with a proven sign of ``dg/dt`` (adaptive subdivision)."""
    n = len(lo)
    box_lo, box_hi = lo[None], hi[None]
    found = {"leaves": [], "returns": []}
    for level in range(depth + 1):
        vlo, vhi = evaluate(program, box_lo, box_hi, params)
        meets = ~((vlo[:, 0] > 0) | (vhi[:, 0] < 0))
        leave = meets & (vhi[:, 1] < 0)
        back = meets & (vlo[:, 1] > 0)
        found["leaves"].append((box_lo[leave], box_hi[leave]))
        found["returns"].append((box_lo[back], box_hi[back]))
        rest = meets & ~leave & ~back
        box_lo, box_hi = box_lo[rest], box_hi[rest]
        if level == depth or not len(box_lo) or len(box_lo) * 2 ** n > max_boxes:
            break
        box_lo, box_hi = split_boxes(box_lo, box_hi)
    out = {}
    for key, parts in found.items():
        a = np.concatenate([p[0] for p in parts])
        b = np.concatenate([p[1] for p in parts])
        out[key] = _boxes(*merge_boxes(a, b)) if len(a) else np.empty((0, n, 2))
    return out


def _kinds(curvature, lo, hi, params):
    if curvature is None or not len(lo):
        return np.full(len(lo), "undetermined", dtype=object)
    clo, chi = evaluate(curvature, lo, hi, params)
    out = np.full(len(lo), "undetermined", dtype=object)
    out[clo[:, 0] > 0] = "returns"
    out[chi[:, 0] < 0] = "leaves"
    return out


def analyse_limits(model, *, arc_depth=8, tangency_depth=12, cover_depth=6, max_boxes=20_000):
    """Divide each limit surface in the window by the direction of the flow.

    Parameters
    ----------
    model : certify.model.Model
    arc_depth : int
        Deepest halving of the window for the leaving and returning boxes.
    tangency_depth : int
        Deepest halving for the 2D tangency search (Krawczyk on ``g = dg/dt = 0``).
    cover_depth : int
        Depth of the box cover of the tangency set in other dimensions.
    max_boxes : int
        Largest number of boxes in one level of any subdivision.

    Returns
    -------
    tuple of LimitResult
        One per constraint, in model order.

    Notes
    -----
    ``dg/dt = grad g . f`` and ``d2g/dt2 = grad(dg/dt) . f`` (Lie derivatives) are derived
    symbolically. Models with abs, min or max have no second derivative: their tangency
    boxes are a cover with kind ``undetermined``.
    """
    programs = _programs(model)
    params = _params(model)
    positions = _interval_positions(model)
    lo, hi = _window(model)
    results = []
    with np.errstate(all="ignore"):
        for constraint, prog in zip(model.constraints, programs.limits):
            arcs = _arcs(prog.rate, lo, hi, params, arc_depth, max_boxes)
            system = RootSystem(values=prog.rate, jacobian=prog.tangency_jacobian,
                                param_jacobian=prog.tangency_param_jacobian, params=params,
                                interval_params=positions,
                                exprs=prog.rate_exprs if prog.tangency_jacobian else (),
                                inputs=programs.inputs)
            depth = tangency_depth if system.jacobian is not None else cover_depth
            search = find_roots(system, lo, hi, max_depth=depth, max_boxes=max_boxes)
            tangencies = []
            for tlo, thi, unique in ((search.lo, search.hi, True),
                                     (search.unresolved_lo, search.unresolved_hi, False)):
                kinds = _kinds(prog.curvature, tlo, thi, params)
                tangencies += [Tangency(box=b, kind=str(k), unique=unique)
                               for b, k in zip(_boxes(tlo, thi), kinds)]
            results.append(LimitResult(name=constraint.name, leaves=arcs["leaves"],
                                       returns=arcs["returns"], tangencies=tuple(tangencies)))
    return tuple(results)


# ------------------------------------------------------------------------------ together


@dataclass(frozen=True)
class PointsResult:
    """Equilibria and limit surfaces of one model.

    Attributes
    ----------
    equilibria : EquilibriumResult
    limits : tuple of LimitResult
    """

    equilibria: EquilibriumResult
    limits: tuple

    def summary(self):
        """The JSON-ready structure printed by ``certify points --json``.

        Returns
        -------
        dict
            ``{"equilibria": [{"box", "stability", "limits"}], "complete", "unresolved",
            "limits": {name: {"leaves", "returns", "tangencies": [{"box", "kind"}]}}}``;
            boxes are lists of ``[lo, hi]`` per state.
        """
        eq = self.equilibria
        return {
            "equilibria": [{"box": _box_list(e.box), "stability": e.stability, "limits": e.limits}
                           for e in eq.equilibria],
            "complete": bool(eq.complete),
            "unresolved": [_box_list(b) for b in eq.unresolved],
            "limits": {r.name: {"leaves": [_box_list(b) for b in r.leaves],
                                "returns": [_box_list(b) for b in r.returns],
                                "tangencies": [{"box": _box_list(t.box), "kind": t.kind}
                                               for t in r.tangencies]}
                       for r in self.limits},
        }


def _box_list(box):
    return [[float(a), float(b)] for a, b in box]


def analyse_points(model, *, max_depth=12, max_boxes=20_000, arc_depth=8):
    """Equilibria with stability, and the limit surfaces, of a model.

    Parameters
    ----------
    model : certify.model.Model
    max_depth : int
        Deepest halving of the window in the searches for equilibria and tangencies.
    max_boxes : int
        Largest number of boxes in one level of any search.
    arc_depth : int
        Deepest halving for the leaving and returning boxes of the limits.

    Returns
    -------
    PointsResult

    See Also
    --------
    find_equilibria, analyse_limits
    """
    return PointsResult(
        equilibria=find_equilibria(model, max_depth=max_depth, max_boxes=max_boxes),
        limits=analyse_limits(model, arc_depth=arc_depth, tangency_depth=max_depth,
                              max_boxes=max_boxes))


def points_summary(model):
    """The equilibria and limit surfaces of a model for a proof's ``summary.json``.

    Uses budgets small enough for a few seconds at most; the keys are those of
    :meth:`PointsResult.summary`.

    Parameters
    ----------
    model : certify.model.Model

    Returns
    -------
    dict
    """
    return analyse_points(model, **SUMMARY_BUDGET).summary()


#: Search budgets of :func:`points_summary` and of the curves drawn on proof maps.
SUMMARY_BUDGET = {"max_depth": 10, "max_boxes": 4_000, "arc_depth": 7}


# -------------------------------------------------------------------------------- curves


@dataclass(frozen=True)
class Curve:
    """A numerically integrated curve that explains part of a map (an estimate, not a proof).

    Attributes
    ----------
    kind : str
        ``stable manifold`` (of a saddle) or ``tangent trajectory`` (the trajectory
        through a tangency point of kind ``returns``).
    points : ndarray, shape (k, n)
        Points along the curve, in order.
    through : ndarray, shape (n,)
        The saddle or tangency point it starts from.
    """

    kind: str
    points: np.ndarray
    through: np.ndarray


def _margin_function(model):
    """Float margin: negative once a point is outside the limits or the window."""
    programs = _programs(model)
    p = _params(model).mean(axis=1)
    lo, hi = _window(model)
    scale = hi - lo

    def margin(x):
        g = programs.margins.point(np.concatenate([x, p]))
        return min(float(np.min(g)), float(np.min((x - lo) / scale)),
                   float(np.min((hi - x) / scale)))

    def field(t, x):
        return programs.field.point(np.concatenate([x, p]))

    return margin, field, p, scale


def _trace(field, margin, start, t_max, direction, scale):
    """Integrate from `start` (forwards for direction +1) until leaving the limits or the window.

    Returns the points and whether the curve stayed within the limits and the window.
    """
    from scipy.integrate import solve_ivp

    def leaves(t, x):
        return margin(x) + 1e-9

    def settles(t, x):  # close to an equilibrium: nothing more to draw
        return np.linalg.norm(field(t, x) / scale) - 1e-6

    for event in (leaves, settles):
        event.terminal = True
        event.direction = -1
    sol = solve_ivp(lambda t, x: direction * field(t, x), (0.0, t_max), start, method="LSODA",
                    events=(leaves, settles), rtol=1e-9, atol=1e-12 * scale, dense_output=True)
    t_end = sol.t[-1]
    times = np.linspace(0.0, t_end, 400)
    stays = len(sol.t_events[0]) == 0
    return (sol.sol(times).T if t_end > 0 else start[None]), stays


def explaining_curves(model, result, *, t_max=200.0, offset=1e-5):
    """Stable manifolds of saddles and trajectories through ``returns`` tangencies (2D).

    These are float estimates (scipy ``solve_ivp``), labelled as such wherever they are
    shown: the boundary of the safe set is usually made of them. A trajectory through a
    tangency point is kept only when its forward part stays within the limits; otherwise
    starts on both sides of it cross a limit and it bounds nothing.

    Parameters
    ----------
    model : certify.model.Model
    result : PointsResult
    t_max : float
        Longest integration time, in model time units, in each direction.
    offset : float
        Start distance from a saddle along its stable eigenvector, relative to the
        window's diagonal.

    Returns
    -------
    tuple of Curve
        Empty unless the model has two states. Each curve stops where it leaves the
        limits or the window (at the midpoint parameter values).
    """
    if len(model.states) != 2:
        return ()
    margin, field, p, scale = _margin_function(model)
    programs = _programs(model)
    curves = []
    with np.errstate(all="ignore"):
        for eq in result.equilibria.equilibria:
            if eq.stability != "saddle" or eq.limits == "outside" or programs.jacobian is None:
                continue
            c = eq.centre
            jac = programs.jacobian.point(np.concatenate([c, p])).reshape(2, 2)
            values, vectors = np.linalg.eig(jac)
            v = np.real(vectors[:, int(np.argmin(np.real(values)))])
            step = offset * np.linalg.norm(scale) * v / np.linalg.norm(v)
            for sign in (1.0, -1.0):
                if margin(c + sign * step) < 0:
                    continue
                branch, _ = _trace(field, margin, c + sign * step, t_max, -1.0, scale)
                curves.append(Curve("stable manifold", np.vstack([c[None], branch]), c))
        for limit in result.limits:
            for tangency in limit.tangencies:
                if tangency.kind != "returns" or not tangency.unique:
                    continue
                c = 0.5 * (tangency.box[:, 0] + tangency.box[:, 1])
                ahead, stays = _trace(field, margin, c, t_max, 1.0, scale)
                if not stays:
                    continue
                back, _ = _trace(field, margin, c, t_max, -1.0, scale)
                curves.append(Curve("tangent trajectory", np.vstack([back[::-1], ahead[1:]]), c))
    return tuple(curves)
