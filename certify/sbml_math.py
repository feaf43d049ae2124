"""SBML math (libsbml syntax trees) written as certify expression text.

:func:`math_text` walks a libsbml ``ASTNode`` and writes the same mathematics in the
grammar of model files (``docs/model-format.md``), fully parenthesised, with function
definitions expanded and SBML ids replaced by certify names. What that grammar cannot
say, or what would make the model non-autonomous or discontinuous (``time``,
``delay``, ``piecewise``, comparisons, ``floor``, ...), is refused with a
:class:`~certify.errors.ModelError` naming the element. The text is then read by
:func:`certify.expr.parse_expression` like any model file, so nothing here decides
what a number or an operation means beyond the spelling.
"""

import math
from fractions import Fraction

import libsbml

from certify.errors import ModelError
from certify.expr import format_number

__all__ = ["MathContext", "exact_number", "math_text", "names_in"]

#: libsbml node types written as a certify function of one argument.
_ONE_ARGUMENT = {
    libsbml.AST_FUNCTION_EXP: "exp",
    libsbml.AST_FUNCTION_LN: "log",
    libsbml.AST_FUNCTION_ABS: "abs",
    libsbml.AST_FUNCTION_SIN: "sin",
    libsbml.AST_FUNCTION_COS: "cos",
    libsbml.AST_FUNCTION_TAN: "tan",
    libsbml.AST_FUNCTION_ARCTAN: "atan",
    libsbml.AST_FUNCTION_SINH: "sinh",
    libsbml.AST_FUNCTION_COSH: "cosh",
    libsbml.AST_FUNCTION_TANH: "tanh",
}
_MIN_MAX = {libsbml.AST_FUNCTION_MIN: "min", libsbml.AST_FUNCTION_MAX: "max"}
_ARITHMETIC = {libsbml.AST_PLUS: "+", libsbml.AST_TIMES: "*"}
_POWERS = (libsbml.AST_POWER, libsbml.AST_FUNCTION_POWER)
#: Precedence levels of written terms: a term is parenthesised as an operand that needs
#: a higher level (``a - b`` needs ``b`` above a sum, ``a / b`` needs ``b`` above a product).
_SUM, _PRODUCT, _NEGATIVE, _POWER, _ATOM = range(5)
_NUMBERS = (libsbml.AST_INTEGER, libsbml.AST_REAL, libsbml.AST_REAL_E, libsbml.AST_RATIONAL)
#: Why some SBML math is refused, by node type.
_REFUSED = {
    libsbml.AST_NAME_TIME: "uses time, so the model is not autonomous (certify proves "
                           "properties of autonomous models only)",
    libsbml.AST_FUNCTION_DELAY: "uses delay(), a delay equation, which certify cannot follow",
    libsbml.AST_FUNCTION_PIECEWISE: "uses piecewise(), a right-hand side that may jump, "
                                    "which certify cannot follow",
    libsbml.AST_NAME_AVOGADRO: "uses the avogadro constant, which certify does not carry",
    libsbml.AST_FUNCTION_RATE_OF: "uses rateOf(), which certify cannot follow",
}


class MathContext:
    """What a formula may refer to, and where it stands (for messages).

    Parameters
    ----------
    label : str
        The SBML file, as named in messages.
    names : dict[str, str]
        SBML id -> certify name of every quantity the formula may use.
    functions : dict[str, libsbml.ASTNode]
        Function definition id -> its lambda.
    """

    def __init__(self, label, names, functions):
        self.label = label
        self.names = names
        self.functions = functions

    def error(self, element, message):
        """A ModelError naming the file and the SBML element."""
        return ModelError(f"{self.label}: {element}: {message}")


def exact_number(value):
    """The exact number an SBML attribute wrote: the shortest decimal of the double.

    libsbml hands numbers over as doubles; SBML files write them in decimal, and the
    shortest decimal that rounds to the double is the one written in every usual case
    (``0.1`` gives 1/10, not the double nearest to it).

    Parameters
    ----------
    value : float

    Returns
    -------
    fractions.Fraction
    """
    return Fraction(repr(float(value)))


def math_text(node, context, element):
    """Write SBML math as certify expression text.

    Parameters
    ----------
    node : libsbml.ASTNode
        The formula (a kinetic law, rule or initial assignment).
    context : MathContext
        Names and function definitions in scope.
    element : str
        The SBML element the formula belongs to, e.g. ``"reaction 'R1' kinetic law"``.

    Returns
    -------
    str
        The formula in the model-file grammar.

    Raises
    ------
    ModelError
        One line naming the file and `element`, for math certify cannot honour.
    """
    if node is None:
        raise context.error(element, "has no math")
    return _Writer(context, element).text(node, {}, ())


def names_in(node, functions):
    """The SBML ids a formula refers to, through the function definitions it calls.

    Parameters
    ----------
    node : libsbml.ASTNode or None
    functions : dict[str, libsbml.ASTNode]
        Function definition id -> its lambda.

    Returns
    -------
    set of str
    """
    found, seen, todo = set(), set(), [(node, frozenset())]
    while todo:
        item, bound = todo.pop()
        if item is None:
            continue
        if item.getType() == libsbml.AST_NAME and item.getName() not in bound:
            found.add(item.getName())
        name = item.getName()
        if item.getType() == libsbml.AST_FUNCTION and name in functions and name not in seen:
            seen.add(name)
            lam = functions[name]
            variables = frozenset(lam.getChild(i).getName() for i in range(lam.getNumBvars()))
            todo.append((lam.getChild(lam.getNumChildren() - 1), variables))
        todo.extend((item.getChild(i), bound) for i in range(item.getNumChildren()))
    return found


class _Writer:
    def __init__(self, context, element):
        self.context = context
        self.element = element

    def refuse(self, message):
        return self.context.error(self.element, message)

    def text(self, node, bound, calls):
        """``node`` as text; ``bound`` maps lambda variables to argument terms."""
        return self.term(node, bound, calls)[0]

    def term(self, node, bound, calls):
        """``(text, precedence)`` of ``node``; see :data:`_ATOM` and the levels below it."""
        kind = node.getType()
        children = [node.getChild(i) for i in range(node.getNumChildren())]
        if kind in _REFUSED:
            raise self.refuse(_REFUSED[kind])
        if kind in _NUMBERS:
            return self.number(node)
        if kind == libsbml.AST_NAME:
            return self.name(node.getName(), bound)
        if kind == libsbml.AST_CONSTANT_PI:
            return "pi", _ATOM
        if kind == libsbml.AST_CONSTANT_E:
            return "e", _ATOM
        if kind == libsbml.AST_FUNCTION:
            return self.call(node, children, bound, calls)
        args = [self.term(child, bound, calls) for child in children]
        if kind in _ARITHMETIC:
            return self.chain(args, kind)
        if kind == libsbml.AST_MINUS and len(args) == 1:
            return f"-{_wrap(args[0], _POWER)}", _NEGATIVE
        if kind == libsbml.AST_MINUS:
            left, right = self.two(args, "-")
            return f"{_wrap(left, _SUM)} - {_wrap(right, _PRODUCT)}", _SUM
        if kind == libsbml.AST_DIVIDE:
            left, right = self.two(args, "/")
            return f"{_wrap(left, _PRODUCT)} / {_wrap(right, _NEGATIVE)}", _PRODUCT
        if kind in _POWERS:
            base, exponent = self.two(args, "^")
            return f"{_wrap(base, _ATOM)}^{_wrap(exponent, _ATOM)}", _POWER
        texts = [text for text, _ in args]
        if kind in _ONE_ARGUMENT:
            return f"{_ONE_ARGUMENT[kind]}({self.one(texts)})", _ATOM
        if kind in _MIN_MAX:
            return (args[0] if len(args) == 1
                    else (f"{_MIN_MAX[kind]}({', '.join(texts)})", _ATOM))
        if kind == libsbml.AST_FUNCTION_ROOT:
            return self.root(args)
        if kind == libsbml.AST_FUNCTION_LOG:
            base = "10" if len(texts) == 1 else texts[0]
            return f"log({texts[-1]}) / log({base})", _PRODUCT
        return self.unknown(node)

    def chain(self, args, kind):
        """An n-ary sum or product (empty: 0 or 1)."""
        if not args:
            return ("0", _ATOM) if kind == libsbml.AST_PLUS else ("1", _ATOM)
        level = _SUM if kind == libsbml.AST_PLUS else _PRODUCT
        operand = _SUM if kind == libsbml.AST_PLUS else _NEGATIVE
        joined = f" {_ARITHMETIC[kind]} ".join(
            _wrap(arg, level if i == 0 else operand) for i, arg in enumerate(args))
        return joined, (level if len(args) > 1 else args[0][1])

    def root(self, args):
        if len(args) == 1 or args[0][0] == "2":
            return f"sqrt({args[-1][0]})", _ATOM
        return f"{_wrap(args[-1], _ATOM)}^(1 / {_wrap(args[0], _NEGATIVE)})", _POWER

    def unknown(self, node):
        shown = node.getName() or libsbml.formulaToL3String(node)
        if node.isRelational() or node.isLogical() or node.isBoolean():
            raise self.refuse(f"uses the comparison or logic {shown!r}, which certify's "
                              "smooth right-hand sides cannot follow")
        raise self.refuse(f"uses {shown!r}, which certify's expressions do not have "
                          "(see docs/sbml.md for the SBML math certify reads)")

    def number(self, node):
        kind = node.getType()
        if kind == libsbml.AST_INTEGER:
            value = Fraction(node.getInteger())
        elif kind == libsbml.AST_RATIONAL:
            value = Fraction(node.getNumerator(), node.getDenominator())
        elif kind == libsbml.AST_REAL_E:
            value = exact_number(node.getMantissa()) * Fraction(10) ** node.getExponent()
        elif math.isfinite(node.getReal()):
            value = exact_number(node.getReal())
        else:
            raise self.refuse(f"uses the number {node.getReal()}, which is not finite")
        return format_number(value), (_NEGATIVE if value < 0 else _ATOM)

    def one(self, texts):
        if len(texts) != 1:
            raise self.refuse(f"a function has {len(texts)} arguments where one is expected")
        return texts[0]

    def two(self, args, operator):
        if len(args) != 2:
            raise self.refuse(f"'{operator}' has {len(args)} operands where two are expected")
        return args

    def name(self, name, bound):
        """``(text, precedence)`` of a name: a lambda variable's argument, or a certify name."""
        if name in bound:
            return bound[name]
        if name not in self.context.names:
            raise self.refuse(f"refers to {name!r}, which is no species, compartment or "
                              "parameter certify can read here")
        return self.context.names[name], _ATOM

    def call(self, node, children, bound, calls):
        """Expand a call of a function definition (its lambda) with the arguments given."""
        name = node.getName()
        lam = self.context.functions.get(name)
        if lam is None:
            raise self.refuse(f"calls {name!r}, which is no function definition of the model")
        if name in calls:
            raise self.refuse(f"function definition {name!r} calls itself")
        variables = [lam.getChild(i).getName() for i in range(lam.getNumBvars())]
        if len(variables) != len(children):
            raise self.refuse(f"calls {name!r} with {len(children)} arguments; it takes "
                              f"{len(variables)}")
        values = [self.term(child, bound, calls) for child in children]
        body = lam.getChild(lam.getNumChildren() - 1)
        element, self.element = self.element, f"{self.element} (in function definition {name!r})"
        try:
            return self.term(body, dict(zip(variables, values)), calls + (name,))
        finally:
            self.element = element


def _wrap(term, level):
    """The text of ``term``, in parentheses when its precedence is below ``level``."""
    text, precedence = term
    return text if precedence >= level else f"({text})"
