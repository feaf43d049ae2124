"""Symbolic Taylor coefficients of the flow and Lie derivatives of the limits.

For ``x' = f(x)`` the Taylor coefficients of a solution are ``f^[0] = x`` and
``f^[k+1] = (D f^[k] . f) / (k + 1)``, so ``x(t + h) = sum_k h^k f^[k](x(t))``.
They are derived once per model with sympy and compiled into interval programs.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from functools import lru_cache

import numpy as np
import sympy

from .expr import branch_equations, kink_sites, substitute, switch_expressions
from .program import Program, compile_program

__all__ = ["FlowPrograms", "Branches", "taylor_coefficients", "flow_programs",
           "fixed_parameters", "jacobian_is_cut", "centered_entries", "chosen_arguments"]


def taylor_coefficients(equations, states, order):
    """Return ``[f^[0], ..., f^[order]]`` as sympy column matrices.

    Parameters
    ----------
    equations : sequence of sympy.Expr
        Right-hand sides in state order.
    states : sequence of sympy.Symbol
    order : int
        Highest coefficient wanted (>= 1).

    Returns
    -------
    list of sympy.Matrix, each shape (n, 1)
    """
    x = sympy.Matrix(states)
    f = sympy.Matrix(equations)
    coeffs = [x, f]
    for k in range(1, order):
        coeffs.append((coeffs[-1].jacobian(x) * f) / (k + 1))
    return coeffs[: order + 1]


@dataclass(frozen=True)
class FlowPrograms:
    """Compiled programs for one model and one Taylor order.

    Inputs of every program are the states followed by the parameters.

    Attributes
    ----------
    order : int
    n : int
        Number of states.
    field : Program
        ``f`` (n outputs).
    coefficients : Program or None
        ``f^[1], ..., f^[order-1]`` stacked (``n * (order - 1)`` outputs); None for order 1.
    jacobian : Program or None
        Row-major Jacobian of ``f^[1] = f`` (``n * n`` outputs); None for order 1.
    higher_jacobians : Program or None
        Row-major Jacobians of ``f^[2], ..., f^[order-1]`` (``n * n * (order - 2)``
        outputs); None for order <= 2.
    remainder : Program
        ``f^[order]`` (n outputs).
    cut_jacobian : bool
        Evaluate ``jacobian`` on the ``2^n`` parts into which the point ``m`` cuts the
        mean-value box (see :func:`jacobian_is_cut`).
    centered : tuple of int
        Row-major indices of the Jacobian entries that the mean-value step also encloses
        by their centered form (see :func:`centered_entries`); empty for none.
    hessian : Program or None
        ``d Df_e / d x_l`` for each entry ``e`` of `centered` and each state ``l`` in
        that order (``len(centered) * n`` outputs); None when `centered` is empty.
    limits : Program
        ``g_j`` (one output per constraint; satisfied where ``g_j >= 0``).
    limit_rates : Program
        ``grad g_j . f`` (one output per constraint).
    limit_curvatures : Program or None
        ``grad(grad g_j . f) . f``, the second derivative of ``g_j`` along a solution (one
        output per constraint); None for models with ``abs``, ``min`` or ``max``.
    branches : Branches or None
        For models with ``abs``, ``min`` or ``max`` stepped at a higher order: the smooth
        branches a step may use where its a-priori box keeps every kink on one side;
        None otherwise (these programs are then stepped at their own order).
    """

    order: int
    n: int
    field: Program
    coefficients: Program | None
    jacobian: Program | None
    higher_jacobians: Program | None
    cut_jacobian: bool
    centered: tuple
    hessian: Program | None
    remainder: Program
    limits: Program
    limit_rates: Program
    limit_curvatures: Program | None
    branches: "Branches | None" = None


def chosen_arguments(sites, lo, hi):
    """Per box and site, the argument the site equals on the whole box, -1 where none
    is known.

    Parameters
    ----------
    sites : tuple
        :func:`certify.expr.kink_sites`.
    lo, hi : ndarray, shape (N, D)
        Enclosures of :func:`certify.expr.switch_expressions` on the boxes.

    Returns
    -------
    ndarray of int, shape (N, len(sites))
        A maximum equals ``a_i`` where ``a_i - a_j >= 0`` for every ``j`` (a minimum
        where ``<= 0``); the first such ``i``.
    """
    out = np.full((len(lo), len(sites)), -1)
    column = 0
    for s, (_, args, is_max) in enumerate(sites):
        k = len(args)
        above = np.ones((len(lo), k), bool)  # a_i is the site's value so far
        for i in range(k):
            for j in range(i + 1, k):
                i_wins = lo[:, column] >= 0 if is_max else hi[:, column] <= 0
                j_wins = hi[:, column] <= 0 if is_max else lo[:, column] >= 0
                above[:, i] &= i_wins
                above[:, j] &= j_wins
                column += 1
        for i in reversed(range(k)):
            out[above[:, i], s] = i
    return out


@dataclass(frozen=True, eq=False)
class Branches:
    """The smooth branches of a model with kinks (docs/method.md, "Models with kinks").

    On a box where every site keeps one argument (the signs of the switches), the
    right-hand side is the branch with those arguments, a smooth function there, and a
    step may use its Taylor coefficients of full order.

    Attributes
    ----------
    sites : list
        :func:`certify.expr.kink_sites` of the equations.
    switches : Program
        :func:`certify.expr.switch_expressions` of the sites.
    equations, states, parameters, limits : tuple
        What the branch programs are compiled from.
    order : int
        Their Taylor order.
    """

    sites: list
    switches: Program
    equations: tuple
    states: tuple
    parameters: tuple
    limits: tuple
    order: int
    _built: dict = field(default_factory=dict, compare=False, repr=False)

    def programs(self, choice):
        """The programs of the branch `choice` (a tuple: the argument of each site)."""
        if choice not in self._built:
            equations = branch_equations(self.equations, self.sites, choice)
            self._built[choice] = _build(equations, self.states, self.parameters,
                                         self.limits, self.order, True)
        return self._built[choice]


def lie_derivatives(functions, equations, states):
    """``grad g . f`` of each function ``g``: its rate along the solutions of ``x' = f``."""
    return [sum((sympy.diff(g, s) * f for s, f in zip(states, equations)), sympy.Integer(0))
            for g in functions]


@lru_cache(maxsize=32)
def _build(equations, states, parameters, limits, order, smooth=True):
    inputs = tuple(states) + tuple(parameters)
    x = sympy.Matrix(states)
    coeffs = taylor_coefficients(equations, states, order)
    middle = coeffs[1:order]
    coefficients = jacobian = higher = None
    df = coeffs[1].jacobian(x)
    if middle:
        coefficients = compile_program([e for c in middle for e in c], inputs)
        jacobian = compile_program(list(df), inputs)
    if len(middle) > 1:
        higher = compile_program([e for c in middle[1:] for e in c.jacobian(x)], inputs)
    rates = lie_derivatives(limits, equations, states)
    curvatures = None
    if smooth:
        curvatures = compile_program(lie_derivatives(rates, equations, states), inputs)
    centered = centered_entries(df, states) if middle else ()
    hessian = (compile_program([sympy.diff(df[e], s) for e in centered for s in states],
                               inputs) if centered else None)
    return FlowPrograms(
        order=order,
        n=len(states),
        field=compile_program(list(equations), inputs),
        coefficients=coefficients,
        jacobian=jacobian,
        higher_jacobians=higher,
        cut_jacobian=jacobian_is_cut(df, states),
        centered=centered,
        hessian=hessian,
        remainder=compile_program(list(coeffs[order]), inputs),
        limits=compile_program(list(limits), inputs),
        limit_rates=compile_program(rates, inputs),
        limit_curvatures=curvatures,
    )


def flow_programs(model, order, kinks="branches"):
    """Compile (once, cached) the programs a validated step of `model` needs.

    Parameters
    ----------
    model : certify.model.Model
    order : int
        Taylor order, 1..8. Models with ``abs``, ``min`` or ``max`` are stepped at order
        1, which needs no derivative of the right-hand side, except where a step's
        a-priori box keeps every kink on one side: with `kinks` ``"branches"`` such a
        step uses the smooth branch there at `order` (:class:`Branches`).
    kinks : {"branches", "order-1"}

    Returns
    -------
    FlowPrograms

    Raises
    ------
    ModelError
        When substituting the parameter values cancels a singularity (see
        :func:`certify.expr.substitute`).

    Notes
    -----
    Parameters given as numbers are substituted as exact rationals before any
    derivative is taken (sympy then merges constants); interval parameters stay
    inputs. Every program still takes all parameters as inputs, in model order.
    """
    smooth = not model.uses_kinks
    values = dict(fixed_parameters(model))
    label = model.path or "<model text>"
    equations = tuple(substitute(e, model.conditions[key], values, label=label, key=key)
                      for key, e in zip(model.equation_keys, model.equations))
    limits = tuple(substitute(c.g, model.conditions[key], values, label=label, key=key)
                   for key, c in zip(model.constraint_keys, model.constraints))
    states, parameters = tuple(model.state_symbols), tuple(model.parameter_symbols)
    if smooth:
        return _build(equations, states, parameters, limits, int(order), True)
    if kinks != "branches" or order == 1:
        return _build(equations, states, parameters, limits, 1, False)
    return _with_branches(equations, states, parameters, limits, int(order))


@lru_cache(maxsize=32)
def _with_branches(equations, states, parameters, limits, order):
    programs = _build(equations, states, parameters, limits, 1, False)
    sites = kink_sites(equations)
    switches = compile_program(switch_expressions(sites), tuple(states) + tuple(parameters))
    return replace(programs, branches=Branches(sites, switches, equations, states,
                                               parameters, limits, order))


def fixed_parameters(model):
    """``((symbol, Rational), ...)`` for the parameters given as numbers."""
    return tuple((p.symbol, sympy.Rational(p.lo.numerator, p.lo.denominator))
                 for p in model.parameters if not p.is_interval)


def centered_entries(df, states):
    """Row-major indices of the entries of the Jacobian ``df`` of ``f`` that the
    mean-value step also encloses by their centered form on ``J``.

    ``Df_e(J)`` lies in ``Df_e(m) + sum_l (d Df_e / d x_l)(J) (J_l - m_l)`` for any point
    ``m`` of ``J`` (mean-value theorem), and the step uses the intersection of that with
    the natural interval extension. The centered form's excess over the true range
    shrinks with the square of ``J``'s width, the natural extension's only with its
    width: on the 3D food chain at cells of 1/64, the natural ``Df(J)`` was about 3.5
    times as wide as the range of ``Df`` over ``J``, and the enclosure of a cell grew to
    15 times the width of its true image within four time scales (4.5 times with the
    centered form). Chosen for three or more states (in two, the Jacobian is cut where
    that pays, see :func:`jacobian_is_cut`) and for the entries that are not constant in
    the states.

    Measured (prover CPU, same machine): the food chain at depth 5 goes from 21.1 % to
    15.1 % undecided for 2 % more CPU, the lake at depth 6 from 13.6 % to 11.5 % for 1 %.
    The Jacobian of ``f^[2]`` in the same form as well (tried, not kept) gave 12.2 % and
    10.7 %, but for 40 % more CPU, and the lake at its 300 s budget then followed a
    quarter of its undecided tubes instead of four fifths: 6.5 % undecided, against 5.3 %.
    """
    if len(states) <= 2:
        return ()
    return tuple(e for e, entry in enumerate(df)
                 if any(sympy.diff(entry, s) != 0 for s in states))


def jacobian_is_cut(df, states):
    """Whether the mean-value step evaluates the Jacobian ``df`` of ``f`` on cut parts.

    Cutting pays where natural interval extensions overestimate: on Jacobian entries
    that are not affine in the states (on affine ones interval evaluation is exact up
    to rounding), and in at most two dimensions (``2^n`` evaluations). On the demo
    fermenter it proves a quarter of the window safe at cells of 1/128 where the whole
    box proves nothing; on the 3D food chain it costs 45 % more time for no gain.
    """
    if len(states) > 2:
        return False
    return not all(e.is_polynomial(*states) and sympy.Poly(e, *states).total_degree() <= 1
                   for e in df)
