"""The checker's own programs: Taylor coefficients re-derived with sympy, compiled to
straight-line instruction lists that :mod:`certify.check._arith` evaluates.

Nothing here is shared with the proof code. The derivation follows the recipe the
certificate format documents (docs/certificate-format.md): parameters given as numbers
are substituted as exact rationals before any derivative is taken; ``f^[0] = x`` and
``f^[k+1] = (J(f^[k]) f) / (k + 1)`` with the Jacobian ``J`` taken by sympy; the rate of
a limit ``g`` is ``sum_s diff(g, s) * f_s`` over the states in order.

The instruction lists follow the evaluation rules of the format (they fix the order of
operations, so that an endpoint evaluation in the checker encloses no more than the
prover's own evaluation did):

* ``Add``: terms in sympy's argument order, folded left; a term ``-c*u`` with a negative
  number ``c`` is subtracted as ``c*u``.
* ``Mul``: the numeric coefficient is split off; the other factors go to a numerator
  (positive exponents) and a denominator (negative exponents, made positive), each folded
  left in argument order; the result is ``num / den``, then the coefficient multiplies it
  (``-1`` negates).
* ``Pow``: an integer exponent ``n >= 2`` is one power operation, ``n <= -1`` is
  ``1 / b^|n|``; ``1/2`` is ``sqrt``, ``-1/2`` is ``1 / sqrt``; other rational exponents
  are one real-power operation; a symbolic exponent ``b^y`` is ``exp(y * log(b))``.

Instructions are plain tuples, so they travel to worker processes by pickling.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from fractions import Fraction

import numpy as np
import sympy

from ..errors import CertificateError
from ..expr import branch_equations, kink_sites, substitute, switch_expressions

__all__ = ["Program", "CheckPrograms", "CheckBranches", "compile_expressions",
           "derive_programs", "with_one_limit"]

_UNARY = {
    sympy.exp: "exp", sympy.log: "log", sympy.sin: "sin", sympy.cos: "cos",
    sympy.tan: "tan", sympy.atan: "atan", sympy.tanh: "tanh", sympy.sinh: "sinh",
    sympy.cosh: "cosh", sympy.Abs: "iabs",
}
#: Constants that python-flint computes itself (everything else goes through sympy).
_NAMED_CONSTANTS = {sympy.pi: "pi", sympy.E: "e", sympy.EulerGamma: "euler",
                    sympy.Catalan: "catalan"}


@dataclass(frozen=True)
class Program:
    """A straight-line program.

    Attributes
    ----------
    n_inputs : int
    instructions : tuple of tuple
        ``(op, args, extra)``: ``args`` are earlier instruction numbers; ``extra`` holds
        the input number, the constant, or the exponent.
    outputs : tuple of int
        Instruction numbers of the outputs.
    release : tuple of tuple of int
        Per instruction, the earlier values it reads for the last time (never an
        output); lets the evaluator free them.
    """

    n_inputs: int
    instructions: tuple
    outputs: tuple
    release: tuple


class _Compiler:
    def __init__(self, inputs):
        self.instructions = []
        self.slots = {}
        for k, symbol in enumerate(inputs):
            self.slots[symbol] = self._push("input", (), k)

    def _push(self, op, args, extra=None):
        self.instructions.append((op, tuple(args), extra))
        return len(self.instructions) - 1

    def constant(self, value):
        key = ("const", value)
        if key not in self.slots:
            self.slots[key] = self._push("const", (), _constant_spec(value))
        return self.slots[key]

    def emit(self, expr):
        if expr in self.slots:
            return self.slots[expr]
        if expr.is_Number or expr.is_NumberSymbol:
            if not expr.is_real or expr.is_infinite or expr is sympy.nan:
                raise CertificateError(f"cannot evaluate the constant {expr}")
            return self.constant(expr)
        if expr.is_Symbol:
            raise CertificateError(f"unknown name {expr} in an expression")
        if expr.is_Add:
            slot = self._add(expr)
        elif expr.is_Mul:
            slot = self._mul(expr)
        elif expr.is_Pow:
            slot = self._pow(expr)
        elif expr.func in _UNARY:
            slot = self._push(_UNARY[expr.func], (self.emit(expr.args[0]),))
        elif expr.func in (sympy.Min, sympy.Max):
            name = "imin" if expr.func is sympy.Min else "imax"
            slot = self._fold(name, expr.args)
        else:
            raise CertificateError(f"the operation {expr.func} cannot be checked")
        self.slots[expr] = slot
        return slot

    def _fold(self, name, factors):
        acc = self.emit(factors[0])
        for factor in factors[1:]:
            acc = self._push(name, (acc, self.emit(factor)))
        return acc

    def _add(self, expr):
        terms = expr.args
        acc = self.emit(terms[0])
        for term in terms[1:]:
            coeff, _ = term.as_coeff_Mul()
            if coeff.is_Number and coeff < 0:
                acc = self._push("sub", (acc, self.emit(-term)))
            else:
                acc = self._push("add", (acc, self.emit(term)))
        return acc

    def _mul(self, expr):
        coeff, rest = expr.as_coeff_Mul()
        if coeff != 1:
            body = self.emit(rest)
            if coeff == -1:
                return self._push("neg", (body,))
            return self._push("mul", (self.constant(coeff), body))
        factors = rest.args if rest.is_Mul else (rest,)
        num, den = [], []
        for factor in factors:
            if factor.is_Pow and factor.exp.is_Number and factor.exp < 0:
                den.append(factor.base ** (-factor.exp))
            else:
                num.append(factor)
        top = self._fold("mul", num) if num else self.constant(sympy.Integer(1))
        return self._push("div", (top, self._fold("mul", den))) if den else top

    def _pow(self, expr):
        base, e = expr.base, expr.exp
        if base is sympy.E:
            return self._push("exp", (self.emit(e),))
        if e.is_Integer:
            n = int(e)
            b = self.emit(base)
            if n >= 2:
                return self._push("pow_int", (b,), n)
            if n == 1:
                return b
            p = b if n == -1 else self._push("pow_int", (b,), -n)
            return self._push("div", (self.constant(sympy.Integer(1)), p))
        if e == sympy.Rational(1, 2):
            return self._push("sqrt", (self.emit(base),))
        if e == sympy.Rational(-1, 2):
            root = self._push("sqrt", (self.emit(base),))
            return self._push("div", (self.constant(sympy.Integer(1)), root))
        if e.is_Rational:
            return self._push("pow_real", (self.emit(base),), Fraction(int(e.p), int(e.q)))
        logb = self._push("log", (self.emit(base),))
        return self._push("exp", (self._push("mul", (self.emit(e), logb)),))


def _constant_spec(value):
    """A picklable description of a real constant.

    ``("q", p, q)`` is the exact rational ``p/q``; ``("named", name)`` a constant that
    python-flint computes; ``("approx", text)`` a decimal with 80 significant digits that
    the evaluator widens by a relative ``1e-70``.
    """
    if value.is_Rational:
        return ("q", int(value.p), int(value.q))
    if value.is_Float:
        q = sympy.Rational(value)
        return ("q", int(q.p), int(q.q))
    if value in _NAMED_CONSTANTS:
        return ("named", _NAMED_CONSTANTS[value])
    return ("approx", str(sympy.N(value, 80)))


def compile_expressions(exprs, inputs):
    """Compile sympy expressions into one :class:`Program`.

    Parameters
    ----------
    exprs : sequence of sympy.Expr
    inputs : sequence of sympy.Symbol

    Returns
    -------
    Program

    Raises
    ------
    CertificateError
        For a name that is not an input or an operation the checker cannot evaluate.
    """
    compiler = _Compiler(inputs)
    outputs = tuple(compiler.emit(sympy.Integer(e) if isinstance(e, int) else e)
                    for e in exprs)
    n = len(compiler.instructions)
    last = list(range(n))
    for k, (_, args, _) in enumerate(compiler.instructions):
        for a in args:
            last[a] = k
    for out in outputs:
        last[out] = n
    release = [[] for _ in range(n)]
    for a, k in enumerate(last):
        if k < n and k != a:
            release[k].append(a)
    return Program(n_inputs=len(inputs), instructions=tuple(compiler.instructions),
                   outputs=outputs, release=tuple(tuple(r) for r in release))


@dataclass(frozen=True)
class CheckPrograms:
    """Everything the checker evaluates for one model.

    Inputs of every program are the states followed by the parameters.

    Attributes
    ----------
    order : int
        Taylor order ``q`` actually used (1 for models with ``abs``, ``min``, ``max``).
    n : int
        Number of states.
    on_tube : Program
        On an a-priori box: ``f`` (n outputs) and the limit rates (m outputs).
    remainder : Program
        ``f^[q]`` (n outputs).
    coefficients : Program or None
        At a point: ``f^[1..q-1]`` stacked (``n (q-1)`` outputs); None for ``q = 1``.
    jacobian : Program or None
        Row-major Jacobian of ``f^[1] = f`` (``n n`` outputs); None for ``q = 1``.
    higher_jacobians : Program or None
        Row-major Jacobians of ``f^[2], ..., f^[q-1]`` stacked (``n n (q-2)`` outputs; the
        last one contains the others as subexpressions); None for ``q <= 2``.
    limits : Program
        The limits ``g_j`` (m outputs; satisfied where ``g_j >= 0``).
    field : Program
        ``f`` alone (for the window faces).
    field_jacobian : Program or None
        Row-major Jacobian of ``f`` (for invariant faces); None for models with kinks.
    n_limits : int
    cut_jacobian : bool
        The prover evaluates ``jacobian`` on the ``2^n`` parts into which the point
        ``m`` cuts the mean-value box: in at most two dimensions, when some entry is not
        affine in the states (docs/method.md). Cutting is sound either way.
    equations : tuple of sympy.Expr
        ``f`` with the parameters given as numbers substituted.
    states : tuple of sympy.Symbol
    limit_expressions : tuple of sympy.Expr
        The limits ``g_j`` with the parameters given as numbers substituted.
    curvatures : Program or None
        The second derivatives of the limits along the solutions (m outputs); None for
        models with kinks.
    centered : tuple of int
        Row-major indices of the Jacobian entries also enclosed by their centered form
        on the mean-value box (docs/method.md, step 4); empty for none.
    hessian : Program or None
        ``d Df_e / d x_l`` for each entry ``e`` of `centered` and each state ``l``.
    """

    order: int
    n: int
    on_tube: Program
    remainder: Program
    coefficients: Program | None
    jacobian: Program | None
    higher_jacobians: Program | None
    limits: Program
    field: Program
    field_jacobian: Program | None
    n_limits: int
    cut_jacobian: bool
    equations: tuple
    states: tuple
    limit_expressions: tuple = ()
    curvatures: Program | None = None
    branches: "CheckBranches | None" = None
    centered: tuple = ()
    hessian: Program | None = None


@dataclass(frozen=True, eq=False)
class CheckBranches:
    """The smooth branches of a model with ``abs``, ``min`` or ``max``, derived by the
    checker (``method.kinks = "branches"``).

    A site is a ``max`` or ``min`` (``abs(a)``: the maximum of ``a`` and ``-a``) with its
    arguments, innermost sites first. On a box where ``a_i - a_j >= 0`` for every other
    argument ``j`` (a ``min``: ``<= 0``), the site equals ``a_i`` on the whole box; where
    every site is so resolved, ``f`` is the branch with those arguments there, and the
    step uses that branch's Taylor programs of order ``order``.

    Attributes
    ----------
    sites : tuple of (sympy.Expr, tuple, bool)
        Expression, arguments, whether it is a maximum.
    switches : Program
        The differences ``a_i - a_j`` (``i < j``) of every site's arguments, in site order.
    equations : tuple of sympy.Expr
    states, inputs : tuple of sympy.Symbol
    order : int
    limits : tuple of sympy.Expr
        The limits ``g_j`` (for their curvatures along each branch).
    """

    sites: tuple
    switches: Program
    equations: tuple
    states: tuple
    inputs: tuple
    order: int
    limits: tuple = ()
    built: dict = field(default_factory=dict, compare=False, repr=False)

    def choices(self, positive, negative):
        """Per box and site the argument it equals, -1 where none is proven.

        Parameters
        ----------
        positive, negative : ndarray of bool, shape (N, D)
            A switch is ``>= 0`` / ``<= 0`` on the whole box.

        Returns
        -------
        ndarray of int, shape (N, number of sites)
            The first argument that the signs prove to be the site's value.
        """
        out = np.full((len(positive), len(self.sites)), -1)
        column = 0
        for s, (_, args, is_max) in enumerate(self.sites):
            wins = np.ones((len(positive), len(args)), bool)
            for i in range(len(args)):
                for j in range(i + 1, len(args)):
                    wins[:, i] &= positive[:, column] if is_max else negative[:, column]
                    wins[:, j] &= negative[:, column] if is_max else positive[:, column]
                    column += 1
            for i in reversed(range(len(args))):
                out[wins[:, i], s] = i
        return out

    def taylor(self, choice):
        """The Taylor programs of the branch `choice` (one argument index per site):
        ``order``, ``remainder``, ``coefficients``, ``jacobian``, ``higher_jacobians``,
        ``cut_jacobian``, and the limits' ``curvatures`` along it, as in
        :class:`CheckPrograms`."""
        if choice not in self.built:
            equations = branch_equations(self.equations, self.sites, choice)
            programs = _taylor_programs(equations, self.states, self.inputs, self.order)
            rates = _rates(self.limits, equations, self.states)
            programs["curvatures"] = compile_expressions(_rates(rates, equations, self.states),
                                                         self.inputs)
            self.built[choice] = programs
        return self.built[choice]


def _taylor_programs(equations, states, inputs, order):
    """The programs of one Taylor step of ``x' = equations`` at `order` (a dict of the
    :class:`CheckPrograms` fields they fill)."""
    x = sympy.Matrix(states)
    coefficients = taylor_coefficients(equations, states, order)
    middle = coefficients[1:order]
    df = sympy.Matrix(equations).jacobian(x)
    centered = _centered(df, states) if middle else ()
    return {"order": order,
            "remainder": compile_expressions(list(coefficients[order]), inputs),
            "coefficients": compile_expressions([e for c in middle for e in c], inputs)
            if middle else None,
            "jacobian": compile_expressions(list(df), inputs) if middle else None,
            "higher_jacobians": compile_expressions(
                [e for c in middle[1:] for e in c.jacobian(x)], inputs)
            if len(middle) > 1 else None,
            "cut_jacobian": _cut(df, states),
            "centered": centered,
            "hessian": compile_expressions([sympy.diff(df[e], s) for e in centered
                                            for s in states], inputs) if centered else None}


def taylor_coefficients(equations, states, order):
    """``[f^[0], ..., f^[order]]`` as sympy column matrices (the recipe above)."""
    x = sympy.Matrix(states)
    f = sympy.Matrix(equations)
    coefficients = [x, f]
    for k in range(1, order):
        coefficients.append((coefficients[-1].jacobian(x) * f) / (k + 1))
    return coefficients[:order + 1]


def derive_programs(model, order, kinks="order-1"):
    """Derive and compile the checker's programs for a model.

    Parameters
    ----------
    model : certify.model.Model
        With the parameter boxes the certificate states.
    order : int
        The Taylor order the certificate states (``method.order``).
    kinks : {"order-1", "branches"}
        ``method.kinks``: models with ``abs``, ``min`` or ``max`` are stepped at order 1,
        and with ``"branches"`` at `order` on steps whose a-priori box keeps every kink
        on one side (:class:`CheckBranches`).

    Returns
    -------
    CheckPrograms

    Raises
    ------
    ModelError
        When substituting the parameter values cancels a singularity.
    """
    fixed = {p.symbol: sympy.Rational(p.lo.numerator, p.lo.denominator)
             for p in model.parameters if not p.is_interval}
    label = model.path or "<model text>"  # substitution must not cancel a singularity
    equations = tuple(substitute(e, model.conditions[key], fixed, label=label, key=key)
                      for key, e in zip(model.equation_keys, model.equations))
    limits = tuple(substitute(c.g, model.conditions[key], fixed, label=label, key=key)
                   for key, c in zip(model.constraint_keys, model.constraints))
    states = tuple(model.state_symbols)
    inputs = states + tuple(model.parameter_symbols)
    rates = _rates(limits, equations, states)
    on_tube = compile_expressions(list(equations) + rates, inputs)
    field_jacobian = curvatures = branches = None
    if not model.uses_kinks:
        taylor = _taylor_programs(equations, states, inputs, order)
        # Df also serves the invariant faces
        field_jacobian = compile_expressions(list(sympy.Matrix(equations).jacobian(
            sympy.Matrix(states))), inputs)
        curvatures = compile_expressions(_rates(rates, equations, states), inputs)
    else:
        # stepped at order 1 (f^[1] = f), no invariant faces; with branches at `order`
        # where a step's tube keeps every kink on one side
        taylor = {"order": 1, "remainder": compile_expressions(list(equations), inputs),
                  "coefficients": None, "jacobian": None, "higher_jacobians": None,
                  "cut_jacobian": False, "centered": (), "hessian": None}
        if kinks == "branches" and order > 1:
            sites = kink_sites(equations)
            switches = compile_expressions(switch_expressions(sites), inputs)
            branches = CheckBranches(sites=sites, switches=switches, equations=equations,
                                     states=states, inputs=inputs, order=order, limits=limits)
    return CheckPrograms(n=len(states), on_tube=on_tube, **taylor,
                         limits=compile_expressions(list(limits), inputs),
                         field=compile_expressions(list(equations), inputs),
                         field_jacobian=field_jacobian, n_limits=len(limits),
                         equations=equations, states=states, limit_expressions=limits,
                         curvatures=curvatures, branches=branches)


def with_one_limit(programs, model, j):
    """The programs of :func:`derive_programs` with only the limit number `j` of `model`.

    A step end whose box violates the one limit left is then evidence that this limit
    is crossed (:func:`certify.check._cells.cell_facts` reports any limit).
    """
    g = programs.limit_expressions[j]
    inputs = programs.states + tuple(model.parameter_symbols)
    rates = _rates((g,), programs.equations, programs.states)
    curvatures = None if programs.curvatures is None else \
        compile_expressions(_rates(rates, programs.equations, programs.states), inputs)
    branches = None if programs.branches is None else \
        replace(programs.branches, limits=(g,), built={})
    return replace(programs, on_tube=compile_expressions(list(programs.equations) + rates,
                                                         inputs), branches=branches,
                   limits=compile_expressions([g], inputs), n_limits=1, limit_expressions=(g,),
                   curvatures=curvatures)


def _rates(limits, equations, states):
    """The rate ``sum_s diff(g, s) f_s`` of each function ``g`` along the flow."""
    return [sum((sympy.diff(g, s) * f for s, f in zip(states, equations)), sympy.Integer(0))
            for g in limits]


def _cut(df, states):
    """The prover's rule for cutting the mean-value box (docs/method.md, step 4)."""
    if len(states) > 2:
        return False
    return any(not entry.is_polynomial(*states) or sympy.Poly(entry, *states).total_degree() > 1
               for entry in df)


def _centered(df, states):
    """The prover's rule for the Jacobian entries it also encloses by their centered
    form (docs/method.md, step 4): in three or more states, the entries that are not
    constant in the states. Using the form is sound either way."""
    if len(states) <= 2:
        return ()
    return tuple(e for e, entry in enumerate(df)
                 if any(sympy.diff(entry, s) != 0 for s in states))
