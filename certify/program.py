"""Compile sympy expressions into straight-line programs over interval arrays.

A program is a list of elementary operations in which every distinct subexpression
appears once (structural common-subexpression elimination on the expression DAG).
It runs in two ways: with the outward-rounded kernels of :mod:`certify.interval`
(rigorous) and with plain float numpy operations (for simulation and root polishing).

Evaluation rules (the certificate checker follows the same rules, see docs/method.md)
------------------------------------------------------------------------------------
* ``Add``: terms in sympy's argument order, folded left; a term ``-c*u`` with a negative
  number ``c`` is subtracted as ``c*u`` with ``|c|``.
* ``Mul``: the numeric coefficient is split off; the other factors go to a numerator
  (positive exponents) and a denominator (negative exponents, made positive), each folded
  left in argument order; the result is ``num / den`` (or ``num``), then the coefficient
  multiplies it (``-1`` negates).
* ``Pow`` with an integer exponent ``n >= 2`` uses the power kernel; ``n <= -1``: ``1 / b^|n|``;
  exponent ``1/2``: ``sqrt``; ``-1/2``: ``1 / sqrt``; other numbers: ``pow_real``;
  a symbolic exponent ``b^y``: ``exp(y * log(b))``.
"""

from __future__ import annotations

from dataclasses import dataclass
from fractions import Fraction

import numpy as np
import sympy

from . import interval as iv
from . import stacked
from .errors import ModelError

__all__ = ["Program", "compile_program"]

_UNARY = {
    sympy.exp: ("exp", np.exp),
    sympy.log: ("log", np.log),
    sympy.sin: ("sin", np.sin),
    sympy.cos: ("cos", np.cos),
    sympy.tan: ("tan", np.tan),
    sympy.atan: ("atan", np.arctan),
    sympy.tanh: ("tanh", np.tanh),
    sympy.sinh: ("sinh", np.sinh),
    sympy.cosh: ("cosh", np.cosh),
    sympy.Abs: ("iabs", np.abs),
}
_FLOAT_BINARY = {"add": "np.add", "sub": "np.subtract", "mul": "np.multiply",
                 "div": "np.divide", "imin": "np.minimum", "imax": "np.maximum"}


@dataclass(frozen=True)
class Instruction:
    """One operation: ``out = op(*args, *extra)`` where args are slot numbers."""

    op: str
    args: tuple[int, ...]
    extra: tuple = ()


class _Emitter:
    def __init__(self, inputs):
        self.instructions: list[Instruction] = []
        self.slots: dict = {}
        self.constants: dict[int, tuple[float, float]] = {}
        for k, sym in enumerate(inputs):
            self._push(Instruction("input", (), (k,)), sym)

    def _push(self, instruction, key=None):
        self.instructions.append(instruction)
        slot = len(self.instructions) - 1
        if key is not None:
            self.slots[key] = slot
        return slot

    def constant(self, value):
        key = ("const", value)
        if key in self.slots:
            return self.slots[key]
        if isinstance(value, sympy.Rational):
            lo, hi = iv.enclose_fraction(Fraction(int(value.p), int(value.q)))
        else:
            lo, hi = iv.enclose_constant(value.evalf(60))
        slot = self._push(Instruction("const", (), (lo, hi)), key)
        self.constants[slot] = (lo, hi)
        return slot

    def op(self, name, args, extra=(), key=None):
        if key is not None and key in self.slots:
            return self.slots[key]
        return self._push(Instruction(name, tuple(args), tuple(extra)), key)

    def emit(self, expr):
        if expr in self.slots:
            return self.slots[expr]
        if expr.is_Number or expr.is_NumberSymbol:
            if not expr.is_real or expr.is_infinite or expr is sympy.nan:
                raise ModelError(f"cannot evaluate the constant {expr}")
            return self.constant(expr)
        if expr.is_Symbol:
            raise ModelError(f"unknown name {expr} in an expression")
        if expr.is_Add:
            return self._add(expr)
        if expr.is_Mul:
            return self._mul(expr)
        if expr.is_Pow:
            return self._pow(expr)
        func = expr.func
        if func in _UNARY:
            slot = self.emit(expr.args[0])
            return self.op(_UNARY[func][0], (slot,), key=expr)
        if func in (sympy.Min, sympy.Max):
            name = "imin" if func is sympy.Min else "imax"
            acc = self.emit(expr.args[0])
            for arg in expr.args[1:]:
                acc = self.op(name, (acc, self.emit(arg)))
            self.slots[expr] = acc
            return acc
        raise ModelError(f"the operation {func} cannot be evaluated in interval arithmetic")

    def _add(self, expr):
        terms = expr.args
        acc = self.emit(terms[0])
        for term in terms[1:]:
            coeff, rest = term.as_coeff_Mul()
            if coeff.is_Number and coeff < 0:
                acc = self.op("sub", (acc, self.emit(-term)))
            else:
                acc = self.op("add", (acc, self.emit(term)))
        self.slots[expr] = acc
        return acc

    def _fold(self, name, factors):
        acc = self.emit(factors[0])
        for factor in factors[1:]:
            acc = self.op(name, (acc, self.emit(factor)))
        return acc

    def _mul(self, expr):
        coeff, rest = expr.as_coeff_Mul()
        if coeff == 1:
            factors = rest.args if rest.is_Mul else (rest,)
            num, den = [], []
            for f in factors:
                if f.is_Pow and f.exp.is_Number and f.exp < 0:
                    den.append(f.base ** (-f.exp))
                else:
                    num.append(f)
            top = self._fold("mul", num) if num else self.constant(sympy.Integer(1))
            slot = self.op("div", (top, self._fold("mul", den))) if den else top
        else:
            body = self.emit(rest)
            if coeff == -1:
                slot = self.op("neg", (body,))
            else:
                slot = self.op("mul", (self.constant(coeff), body))
        self.slots[expr] = slot
        return slot

    def _pow(self, expr):
        base, e = expr.base, expr.exp
        if base is sympy.E:
            slot = self.op("exp", (self.emit(e),))
        elif e.is_Integer:
            n = int(e)
            b = self.emit(base)
            if n >= 2:
                slot = self.op("pow_int", (b,), (n,))
            elif n == 1:
                slot = b
            else:
                p = b if n == -1 else self.op("pow_int", (b,), (-n,))
                slot = self.op("div", (self.constant(sympy.Integer(1)), p))
        elif e == sympy.Rational(1, 2):
            slot = self.op("sqrt", (self.emit(base),))
        elif e == sympy.Rational(-1, 2):
            root = self.op("sqrt", (self.emit(base),))
            slot = self.op("div", (self.constant(sympy.Integer(1)), root))
        elif e.is_Rational:
            slot = self.op("pow_real", (self.emit(base),), (Fraction(int(e.p), int(e.q)),))
        else:
            logb = self.op("log", (self.emit(base),))
            slot = self.op("exp", (self.op("mul", (self.emit(e), logb)),))
        self.slots[expr] = slot
        return slot


def _interval_line(k, ins):
    out = f"p{k}"
    a = [f"p{j}" for j in ins.args]
    if ins.op == "input":
        return f"{out} = IN[{ins.extra[0]}]"
    if ins.op == "const":
        return f"{out} = CONST[{k}]"
    if ins.op in ("pow_int", "pow_real"):
        return f"{out} = K_{ins.op}({a[0]}, X[{k}])"
    return f"{out} = K_{ins.op}({', '.join(a)})"


def _point_line(k, ins):
    a = [f"v{j}" for j in ins.args]
    if ins.op == "input":
        return f"v{k} = XS[{ins.extra[0]}]"
    if ins.op == "const":
        return f"v{k} = {(ins.extra[0] + ins.extra[1]) / 2!r}"
    if ins.op in _FLOAT_BINARY:
        return f"v{k} = {_FLOAT_BINARY[ins.op]}({a[0]}, {a[1]})"
    if ins.op == "neg":
        return f"v{k} = -{a[0]}"
    if ins.op in ("pow_int", "pow_real"):
        return f"v{k} = np.power({a[0]}, float(X[{k}]))"
    if ins.op == "sqrt":
        return f"v{k} = np.sqrt({a[0]})"
    names = {name: fn.__name__ for name, fn in _UNARY.values()}
    return f"v{k} = np.{names[ins.op]}({a[0]})"


def _stacked_input(lo, hi, axes):
    """The interval array of one input column with `axes` axes after the bound axis (one
    array for both bounds: a point)."""

    def padded(c):
        c = np.asarray(c, float)
        return c.reshape((1,) * (axes - c.ndim) + c.shape) if c.ndim < axes else c

    low = padded(lo)
    return stacked.stack(low, low if hi is lo else padded(hi))


def _dead_after(instructions, outputs):
    """Per instruction, the slots it uses for the last time (outputs excepted).

    Deleting them there keeps only the live values of a long program in memory, not
    every intermediate (a program of a thousand steps on 60,000 boxes: 1 GB).
    """
    last = {}
    for k, ins in enumerate(instructions):
        for j in ins.args:
            last[j] = k
    keep = set(outputs)
    dead = [[] for _ in instructions]
    for j, k in sorted(last.items()):
        if j not in keep:
            dead[k].append(j)
    return dead


class Program:
    """A compiled straight-line program evaluating several expressions at once.

    Use :func:`compile_program` to build one.

    Attributes
    ----------
    inputs : tuple of sympy.Symbol
        Input order.
    n_outputs : int
    instructions : list of Instruction
    """

    def __init__(self, inputs, exprs, emitter, outputs):
        self.inputs = tuple(inputs)
        self.exprs = tuple(exprs)
        self.instructions = emitter.instructions
        self.n_outputs = len(outputs)
        self._outputs = outputs
        extras = {k: ins.extra[0] for k, ins in enumerate(self.instructions)
                  if ins.op in ("pow_int", "pow_real")}
        ret_i = ", ".join(f"p{k}" for k in outputs)
        ret_p = ", ".join(f"v{k}" for k in outputs)
        dead = _dead_after(self.instructions, outputs)
        body_i = "\n    ".join(_interval_line(k, ins)
                              + "".join(f"; del p{j}" for j in dead[k])
                              for k, ins in enumerate(self.instructions))
        body_p = "\n    ".join(_point_line(k, ins) + "".join(f"; del v{j}" for j in dead[k])
                              for k, ins in enumerate(self.instructions))
        src = (f"def run_interval(IN, CONST):\n    {body_i}\n    return [{ret_i}]\n\n"
               f"def run_point(XS):\n    {body_p}\n    return [{ret_p}]\n")
        # The source is generated from our own instruction list, never from user text.
        namespace = {"np": np, "X": extras,
                     **{f"K_{name}": kernel for name, kernel in stacked.KERNELS.items()}}
        exec(compile(src, "<certify program>", "exec"), namespace)
        self._run_interval = namespace["run_interval"]
        self._run_point = namespace["run_point"]
        self._constants = {}

    def __len__(self):
        return len(self.instructions)

    def interval_columns(self, lo_cols, hi_cols):
        """Evaluate on input columns (each broadcastable to a common shape).

        Parameters
        ----------
        lo_cols, hi_cols : sequence of array_like, length ``len(inputs)``

        Returns
        -------
        list of (lo, hi)
            One pair of arrays per output, outward-rounded; NaN marks unusable rows.
        """
        shape = np.broadcast_shapes(*(np.shape(c) for c in lo_cols)) if lo_cols else ()
        axes = max(len(shape), 1)
        inputs = [_stacked_input(lo, hi, axes) for lo, hi in zip(lo_cols, hi_cols)]
        return [tuple(np.broadcast_to(b, shape) if shape else b.reshape(())
                      for b in stacked.bounds(o)) for o in self.stacked(inputs)]

    def stacked(self, inputs):
        """Evaluate on interval arrays (:mod:`certify.stacked`).

        Parameters
        ----------
        inputs : sequence of ndarray, length ``len(inputs)``
            Each of shape ``(2, ...)`` or ``(1, ...)`` (a point), the trailing axes
            broadcasting together (at least one).

        Returns
        -------
        list of ndarray
            One interval array per output (trailing axes: those of the inputs, or fewer
            where an output does not depend on all of them); NaN marks unusable rows.
        """
        axes = max(np.ndim(i) for i in inputs) - 1 if inputs else 1
        with np.errstate(invalid="ignore", over="ignore"):
            return self._run_interval(inputs, self._constants_for(axes))

    def _constants_for(self, axes):
        """The program's constants as interval arrays with `axes` axes after the bound
        axis (exact constants as points)."""
        if axes not in self._constants:
            self._constants[axes] = {
                k: np.array([ins.extra[0]] if ins.extra[0] == ins.extra[1] else
                            list(ins.extra)).reshape((-1,) + (1,) * axes)
                for k, ins in enumerate(self.instructions) if ins.op == "const"}
        return self._constants[axes]

    def interval(self, lo, hi):
        """Evaluate on boxes.

        Parameters
        ----------
        lo, hi : ndarray, shape (N, n_inputs)

        Returns
        -------
        lo, hi : ndarray, shape (N, n_outputs)
        """
        lo = np.asarray(lo, dtype=float)
        hi = np.asarray(hi, dtype=float)
        out = self.interval_columns(list(lo.T), list(hi.T))
        return (np.stack([o[0] for o in out], axis=-1),
                np.stack([o[1] for o in out], axis=-1))

    def point(self, x):
        """Plain float evaluation (not rigorous).

        Parameters
        ----------
        x : ndarray, shape (N, n_inputs) or (n_inputs,)

        Returns
        -------
        ndarray, shape (N, n_outputs) or (n_outputs,)
        """
        x = np.asarray(x, dtype=float)
        with np.errstate(all="ignore"):
            out = self._run_point(list(np.moveaxis(x, -1, 0)))
        shape = x.shape[:-1]
        return np.stack([np.broadcast_to(o, shape) for o in out], axis=-1)

    def point_at(self, states, params):
        """Plain float evaluation at state points, all with the same parameter values.

        Parameters
        ----------
        states : ndarray, shape (N, n_states)
            The leading inputs of each row.
        params : sequence of float
            The remaining inputs (for flow programs, the parameters), shared by every row.

        Returns
        -------
        ndarray, shape (N, n_outputs)
        """
        states = np.asarray(states, dtype=float)
        params = np.asarray(params, dtype=float).ravel()
        inputs = np.empty((len(states), states.shape[1] + len(params)))
        inputs[:, :states.shape[1]] = states
        inputs[:, states.shape[1]:] = params
        return self.point(inputs)

    def point_jacobian(self, states, params, steps):
        """Central-difference Jacobian in the leading inputs (plain floats, not rigorous).

        Parameters
        ----------
        states : ndarray, shape (N, n_states)
        params : sequence of float
            As for :meth:`point_at`.
        steps : ndarray, shape (n_states,)
            The difference step of each state.

        Returns
        -------
        ndarray, shape (N, n_outputs, n_states)
        """
        states = np.asarray(states, dtype=float)
        n = states.shape[1]
        out = np.empty((len(states), self.n_outputs, n))
        for k in range(n):
            d = np.zeros(n)
            d[k] = steps[k]
            out[:, :, k] = (self.point_at(states + d, params)
                            - self.point_at(states - d, params)) / (2 * steps[k])
        return out


def compile_program(exprs, inputs):
    """Compile expressions into one program.

    Parameters
    ----------
    exprs : sequence of sympy.Expr
    inputs : sequence of sympy.Symbol
        Every free symbol of `exprs` must be among them.

    Returns
    -------
    Program

    Raises
    ------
    ModelError
        When an expression uses a name that is not an input or an unsupported operation.
    """
    exprs = [sympy.Integer(e) if isinstance(e, int) else e for e in exprs]
    emitter = _Emitter(inputs)
    outputs = [emitter.emit(e) for e in exprs]
    return Program(inputs, exprs, emitter, outputs)
