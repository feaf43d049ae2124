"""Safe parser and printer for model expressions.

Expressions in model files are parsed by walking Python's syntax tree through a
whitelist and building sympy objects directly. User text is never evaluated:
no ``eval``, ``exec``, ``sympify`` or ``parse_expr``.

Grammar (see ``docs/model-format.md``): numbers, declared names, ``+ - * /``,
``^`` or ``**`` for powers, unary ``-``/``+``, parentheses, calls of the
functions in :data:`FUNCTION_NAMES`, and the constants ``pi`` and ``e``. Number
literals are exact: ``0.1`` is the rational 1/10, not the nearest double.

sympy simplifies while it builds (``x/x`` becomes ``1``, ``exp(log(x))`` becomes ``x``),
and such a rewrite can remove a point where the written expression is undefined. The
parser records where every written division, power, ``log``, ``sqrt`` and ``tan`` is
defined (:class:`DomainCondition`) and refuses an expression whose built form no longer
keeps all of these conditions (:func:`check_conditions`): certify evaluates exactly the
built form, so it must be undefined wherever the written one is.
"""

import ast
import dataclasses
import difflib
import re
from dataclasses import dataclass
from decimal import Decimal, localcontext
from fractions import Fraction

import sympy
from sympy.printing.str import StrPrinter

from certify.errors import ModelError

__all__ = [
    "CONSTANTS",
    "FUNCTION_NAMES",
    "MAX_DEPTH",
    "MAX_EXPONENT",
    "MAX_LENGTH",
    "NUMBER_RANGE_MESSAGE",
    "RESERVED_NAMES",
    "TIME_NAME",
    "DomainCondition",
    "check_conditions",
    "format_expression",
    "substitute",
    "format_number",
    "is_number_in_range",
    "kink_sites",
    "branch_equations",
    "switch_expressions",
    "parse_constraint",
    "parse_expression",
]

_ONE_ARGUMENT = {
    "exp": sympy.exp,
    "log": sympy.log,
    "sqrt": sympy.sqrt,
    "sin": sympy.sin,
    "cos": sympy.cos,
    "tan": sympy.tan,
    "atan": sympy.atan,
    "tanh": sympy.tanh,
    "sinh": sympy.sinh,
    "cosh": sympy.cosh,
    "abs": sympy.Abs,
}
_TWO_OR_MORE = {"min": sympy.Min, "max": sympy.Max}

#: Functions an expression may call.
FUNCTION_NAMES = frozenset(_ONE_ARGUMENT) | frozenset(_TWO_OR_MORE)
#: Named constants an expression may use.
CONSTANTS = {"pi": sympy.pi, "e": sympy.E}
#: Time; models are autonomous, so it may not appear.
TIME_NAME = "t"
#: Names a model may not declare.
RESERVED_NAMES = FUNCTION_NAMES | frozenset(CONSTANTS) | {TIME_NAME}
#: Longest expression text accepted, in characters.
MAX_LENGTH = 10_000
#: Deepest nesting of operations accepted.
MAX_DEPTH = 100
#: Largest absolute value of a numeric exponent.
MAX_EXPONENT = 64

_MAX_DECIMAL_EXPONENT = 300  # nonzero numbers lie in [1e-300, 1e301) in absolute value
_MAX_EXACT_BITS = 20_000  # largest exact power (numerator plus denominator bits)
_UNDEFINED = (sympy.zoo, sympy.nan, sympy.oo, -sympy.oo)
_OPERATOR_TEXT = {
    ast.Mod: "%",
    ast.FloorDiv: "//",
    ast.MatMult: "@",
    ast.LShift: "<<",
    ast.RShift: ">>",
    ast.BitOr: "|",
    ast.BitAnd: "&",
    ast.BitXor: "^",
    ast.Not: "not",
    ast.Invert: "~",
}
_FORBIDDEN = {
    "Subscript": "subscripts ('[...]') are not allowed",
    "Lambda": "lambda is not allowed",
    "Compare": "comparisons are not allowed inside an expression",
    "BoolOp": "'and' and 'or' are not allowed",
    "IfExp": "conditional expressions ('... if ... else ...') are not allowed",
    "Tuple": "tuples are not allowed (a ',' outside a function call?)",
    "List": "lists ('[...]') are not allowed",
    "Set": "sets ('{...}') are not allowed",
    "Dict": "tables ('{...}') are not allowed",
    "JoinedStr": "text in quotes is not allowed",
    "NamedExpr": "':=' is not allowed",
    "Starred": "'*' unpacking is not allowed",
    "ListComp": "comprehensions are not allowed",
    "SetComp": "comprehensions are not allowed",
    "DictComp": "comprehensions are not allowed",
    "GeneratorExp": "comprehensions are not allowed",
    "Await": "'await' is not allowed",
    "Yield": "'yield' is not allowed",
    "YieldFrom": "'yield' is not allowed",
    "Slice": "slices are not allowed",
}


#: Why a number was rejected by :func:`is_number_in_range`.
NUMBER_RANGE_MESSAGE = (
    f"number out of range: nonzero numbers must lie between 1e-{_MAX_DECIMAL_EXPONENT}"
    f" and 1e{_MAX_DECIMAL_EXPONENT + 1} in absolute value"
)


def is_number_in_range(value):
    """Tell whether an exact number is zero or of a magnitude certify accepts.

    Parameters
    ----------
    value : fractions.Fraction
        The number.

    Returns
    -------
    bool
        True for 0 and for ``1e-300 <= |value| < 1e301``: the numbers a model may
        contain, so that every one of them has a finite float64 enclosure.
    """
    magnitude = abs(value)
    return magnitude == 0 or (
        Fraction(1, 10**_MAX_DECIMAL_EXPONENT) <= magnitude < 10 ** (_MAX_DECIMAL_EXPONENT + 1)
    )


def format_number(value):
    """Write an exact number as short exact text.

    Parameters
    ----------
    value : fractions.Fraction or int
        The number.

    Returns
    -------
    str
        A decimal (``"0.25"``, ``"1.5E-7"``) when the number has a finite decimal
        expansion, else ``"p/q"``. Either form parses back to the same number.

    Examples
    --------
    >>> from fractions import Fraction
    >>> format_number(Fraction(1, 4)), format_number(Fraction(1, 3)), format_number(12)
    ('0.25', '1/3', '12')
    """
    value = Fraction(value)
    rest = value.denominator
    twos = fives = 0
    while rest % 2 == 0:
        rest //= 2
        twos += 1
    while rest % 5 == 0:
        rest //= 5
        fives += 1
    if rest != 1:
        return f"{value.numerator}/{value.denominator}"
    places = max(twos, fives)
    scaled = value.numerator * 10**places // value.denominator
    with localcontext() as context:
        context.prec = len(str(abs(scaled))) + 2
        decimal = Decimal(scaled).scaleb(-places).normalize()
    if -6 <= decimal.adjusted() <= 15:
        return format(decimal, "f")
    return str(decimal)


_NONZERO, _POSITIVE, _NONNEGATIVE = "nonzero", "positive", "nonnegative"
_FAILS_WHERE = {_NONZERO: "= 0", _POSITIVE: "<= 0", _NONNEGATIVE: "< 0"}


@dataclass(frozen=True)
class DomainCondition:
    """A written operation that is not defined everywhere, and where it is written.

    Attributes
    ----------
    function : sympy.Pow, sympy.log or sympy.tan
        The operation: a division by ``b`` is the power ``b^-1``, ``sqrt(a)`` is ``a^(1/2)``.
    args : tuple of sympy.Expr
        Its operands as built (base and exponent of a power), in the names of the expression.
    what : str
        The operation in words, e.g. ``"the division by x"``.
    where : str
        File, key and column of the operation, e.g. ``"m.toml: [equations] x: column 3"``.
    """

    function: type
    args: tuple
    what: str
    where: str

    def requirements(self):
        """``(kind, arg)`` pairs: the operation is defined where every ``arg`` is of its kind.

        ``kind`` is ``"nonzero"``, ``"positive"`` or ``"nonnegative"``; the pairs follow
        certify's evaluation of the operands as they are now (an exponent that became a
        number by substitution counts as that number).
        """
        if self.function is sympy.Pow:
            return _power_conditions(*self.args)
        return _call_conditions(self.function, self.args[0])

    def substituted(self, replacements):
        """The same operation with names replaced (``xreplace``) in its operands."""
        return dataclasses.replace(self, args=tuple(arg.xreplace(replacements) for arg in self.args))


def _power_conditions(base, exponent):
    """``(kind, arg)`` pairs under which certify's evaluation of ``base**exponent`` is defined.

    These follow the evaluation rules of :mod:`certify.program`: a negative integer
    exponent divides, a rational one takes a root (``x >= 0``, ``x > 0`` when negative),
    any other exponent goes through ``exp(exponent*log(base))``.
    """
    if base is sympy.E or (exponent.is_Integer and exponent >= 0):
        return []
    if exponent.is_Integer:
        return [(_NONZERO, base)]
    if exponent.is_Rational:
        return [(_POSITIVE if exponent < 0 else _NONNEGATIVE, base)]
    return [(_POSITIVE, base)]


def _call_conditions(function, arg):
    """``(kind, arg)`` pairs under which a one-argument function call is defined."""
    if function is sympy.log:
        return [(_POSITIVE, arg)]
    if function is sympy.tan:
        return [(_NONZERO, sympy.cos(arg))]
    return []


def _node_conditions(node):
    """``(kind, arg)`` pairs under which one node of a built expression is defined."""
    if node.is_Pow:
        return _power_conditions(node.base, node.exp)
    if isinstance(node, (sympy.log, sympy.tan)):
        return _call_conditions(type(node), node.args[0])
    return []


def _atoms(kind, arg):
    """Simple conditions that together say the same as ``kind(arg)`` where ``arg`` is defined.

    Every rule is an equivalence (given that ``arg`` itself is defined), so the result
    serves both to state what a written operation needs and what a built expression
    guarantees. Products split into factors, positive constant factors drop out, powers
    reduce to their base, and ``exp``, ``cosh``, ``pi``, ``e`` are positive.
    """
    if arg.is_Rational:
        holds = {_NONZERO: arg != 0, _POSITIVE: arg > 0, _NONNEGATIVE: arg >= 0}[kind]
        return set() if holds else {(kind, arg)}
    if arg in (sympy.pi, sympy.E) or isinstance(arg, (sympy.exp, sympy.cosh)):
        return set()
    if isinstance(arg, sympy.Abs):
        return set() if kind == _NONNEGATIVE else _atoms(_NONZERO, arg.args[0])
    coeff, rest = arg.as_coeff_Mul()
    if coeff.is_Rational and coeff != 1 and (kind == _NONZERO or coeff > 0):
        return _atoms(kind, rest)
    if arg.is_Mul and kind == _NONZERO:
        return set().union(*(_atoms(kind, factor) for factor in arg.args))
    if arg.is_Pow:
        base, exponent = arg.base, arg.exp
        if not exponent.is_Rational:  # exp(exponent*log(base)) > 0
            return set()
        even = exponent.is_Integer and exponent % 2 == 0
        if kind == _NONZERO:
            return _atoms(kind, base) if exponent > 0 else set()
        if kind == _POSITIVE:
            return _atoms(_NONZERO if even else _POSITIVE, base)
        return _atoms(kind, base) if exponent.is_Integer and not even else set()
    if arg.is_Add:
        _, arg = arg.as_content_primitive()
    if kind == _NONZERO and arg.could_extract_minus_sign():
        arg = -arg
    return {(kind, arg)}


def _guaranteed(expr):
    """The simple conditions that hold wherever certify's evaluation of ``expr`` is defined."""
    known = set()
    for node in sympy.preorder_traversal(expr):
        for kind, arg in _node_conditions(node):
            for atom in _atoms(kind, arg):
                known.add(atom)
                if atom[0] == _POSITIVE:
                    known |= _atoms(_NONZERO, atom[1]) | {(_NONNEGATIVE, atom[1])}
    return known


def check_conditions(expr, conditions, *, subject):
    """Refuse ``expr`` when it is defined somewhere one of the written conditions fails.

    Parameters
    ----------
    expr : sympy.Expr
        An expression as built (and as certify evaluates it).
    conditions : iterable of DomainCondition
        The conditions of the operations written in its text (and in the definitions
        it uses), in the same names as ``expr``.
    subject : str
        What ``expr`` is, for the message, e.g. ``"the expression"``.

    Raises
    ------
    ModelError
        Naming the first condition that ``expr`` does not keep: sympy's automatic
        simplification removed a point where the written expression is undefined.
        The test is syntactic and errs towards refusing.
    """
    known = None
    for condition, (kind, arg) in ((c, pair) for c in conditions for pair in c.requirements()):
        if known is None:
            known = _guaranteed(expr)
        if not _atoms(kind, arg) <= known:
            fails = f"{format_expression(arg)} {_FAILS_WHERE[kind]}"
            raise ModelError(
                f"{condition.where}: {condition.what} is undefined where {fails}, but automatic "
                f"simplification turns {subject} into '{format_expression(expr)}', which is "
                "defined there; certify does not change a model's equations: remove the "
                "cancelling part or write the simplified form if that is what is meant"
            )


def substitute(expr, conditions, replacements, *, label, key):
    """Substitute numbers for names, refusing a singularity that simplification cancels.

    sympy simplifies again while it substitutes: ``(x - k)/(x - 2)`` with ``k = 2``
    becomes ``1``. Every written operation, with the numbers substituted, must stay
    undefined where it is (:func:`check_conditions`); an exponent that becomes a number
    counts as that number (``x^n`` with ``n = 2`` is ``x^2``, defined for every ``x``).

    Parameters
    ----------
    expr : sympy.Expr
        An expression as built by :func:`parse_expression`.
    conditions : iterable of DomainCondition
        The written operations of ``expr`` (``Model.conditions``).
    replacements : Mapping[sympy.Symbol, sympy.Expr]
        What to substitute (``xreplace``).
    label, key : str
        The file and the key of ``expr`` (``"[equations] x"``), for messages.

    Returns
    -------
    sympy.Expr

    Raises
    ------
    ModelError
        When the result is undefined (``1/(k - 2)`` with ``k = 2``) or defined somewhere
        a written operation is not.
    """
    result = expr.xreplace(replacements)
    if result.has(*_UNDEFINED):
        raise ModelError(f"{label}: {key}: undefined once the parameter values are substituted "
                         "(a division by zero or similar)")
    check_conditions(result, [condition.substituted(replacements) for condition in conditions],
                     subject=f"{key} with the parameter values substituted")
    return result


class _Source:
    """Expression text prepared for ``ast.parse``, with a map back to the original columns.

    ``^`` becomes ``**`` (so it has the precedence and right associativity of a power)
    and leading blanks are dropped (``ast.parse`` rejects them).
    """

    def __init__(self, text, where):
        self.text = text
        self.where = where
        pieces, origin = [], []
        for index, char in enumerate(text):
            if char == "^":
                pieces.append("**")
                origin += [index, index]
            else:
                pieces.append(char)
                origin.append(index)
        full = "".join(pieces)
        lead = len(full) - len(full.lstrip(" \t"))
        self.code = full[lead:]
        self._origin = origin[lead:] + [len(text)]
        self._line_starts = [0] + [i + 1 for i, char in enumerate(self.code) if char == "\n"]

    def index(self, lineno, col):
        """Index into ``self.code`` of a 1-based line and 0-based column, clamped."""
        lineno = min(max(lineno or 1, 1), len(self._line_starts))
        return min(self._line_starts[lineno - 1] + max(col or 0, 0), len(self.code))

    def position(self, code_index):
        """``where`` and the line and column of ``code_index`` in the original text."""
        original = self._origin[min(code_index, len(self._origin) - 1)]
        column = original - (self.text.rfind("\n", 0, original) + 1) + 1
        if "\n" in self.text:
            line = self.text.count("\n", 0, original) + 1
            return f"{self.where}: line {line}, column {column}"
        return f"{self.where}: column {column}"

    def node_position(self, node):
        """:meth:`position` of the start of an ast ``node``."""
        return self.position(self.index(node.lineno, node.col_offset))

    def error(self, code_index, message):
        """A :class:`ModelError` pointing at ``code_index`` in the original text."""
        return ModelError(f"{self.position(code_index)}: {message}")

    def node_error(self, node, message):
        """A :class:`ModelError` pointing at the start of an ast ``node``."""
        return ModelError(f"{self.node_position(node)}: {message}")

    def parse(self):
        """Parse ``self.code`` in eval mode, turning every parser failure into ModelError."""
        if not self.code.strip():
            raise ModelError(f"{self.where}: the expression is empty")
        try:
            return ast.parse(self.code, mode="eval").body
        except SyntaxError as exc:
            if exc.offset:
                at = self.index(exc.lineno, exc.offset - 1)
            else:
                at = len(self.code)
            reason = (exc.msg or "invalid syntax").split(". Maybe you meant")[0]
            if "Exceeds the limit" in reason:
                reason = "a number has too many digits"
            raise self.error(at, f"syntax error: {reason}") from None
        except (RecursionError, MemoryError):
            raise ModelError(f"{self.where}: the expression is too long or nested too deeply to parse") from None
        except ValueError as exc:
            raise ModelError(f"{self.where}: cannot parse the expression: {exc}") from None


def _check_text(text, where):
    if not isinstance(text, str):
        raise TypeError(f"{where}: the expression must be a str, not {type(text).__name__}")
    if len(text) > MAX_LENGTH:
        raise ModelError(
            f"{where}: the expression is {len(text):,} characters long; at most {MAX_LENGTH:,} are allowed"
        )
    for index, char in enumerate(text):
        if not char.isascii() or char == "#" or (not char.isprintable() and char not in " \t\n\r"):
            source = _Source(text[:index], where)
            what = "'#' (comments go outside the quotes)" if char == "#" else repr(char)
            raise source.error(len(source.code), f"character {what} is not allowed")


def _check_names(names, where):
    for name in names:
        if name in RESERVED_NAMES:
            raise ModelError(f"{where}: {name!r} is a reserved name and cannot be declared")


def _or_list(words):
    quoted = [repr(word) for word in words]
    return quoted[0] if len(quoted) == 1 else ", ".join(quoted[:-1]) + " or " + quoted[-1]


class _Builder:
    """Walks an ast through the whitelist and builds the sympy expression.

    ``conditions`` collects a :class:`DomainCondition` for every written operation that
    is not defined everywhere, ``used`` the names of ``names`` the text refers to.
    """

    def __init__(self, source, names):
        self.source = source
        self.names = names
        self.conditions = []
        self.used = set()

    def note(self, node, function, args, what):
        """Record the operation ``function(*args)`` written at ``node``, if it has a condition."""
        condition = DomainCondition(function, tuple(args), what, self.source.node_position(node))
        if condition.requirements():
            self.conditions.append(condition)

    def fail(self, node, message):
        return self.source.node_error(node, message)

    def build(self, node, depth):
        if depth > MAX_DEPTH:
            raise self.fail(node, f"the expression is nested deeper than {MAX_DEPTH} levels")
        method = getattr(self, "_build_" + type(node).__name__, None)
        if method is None:
            message = _FORBIDDEN.get(type(node).__name__, "this syntax is not allowed")
            if isinstance(node, ast.Attribute):
                message = f"attribute access ('.{node.attr}') is not allowed"
            raise self.fail(node, message)
        return self._defined(node, method(node, depth))

    def _defined(self, node, value):
        """``value``, unless it is undefined (zoo, nan, an infinity) at its top."""
        if value in _UNDEFINED or any(arg in _UNDEFINED for arg in value.args):
            raise self.fail(node, "this part is undefined (a division by zero, log(0) or similar)")
        return value

    def _build_Constant(self, node, depth):
        value = node.value
        if isinstance(value, bool) or value is None or value is Ellipsis:
            raise self.fail(node, f"{value!r} is not a number")
        if isinstance(value, (str, bytes)):
            raise self.fail(node, "text in quotes is not allowed")
        if isinstance(value, complex):
            raise self.fail(node, "imaginary numbers are not allowed")
        if isinstance(value, int):
            exact = Fraction(value)
        else:
            segment = ast.get_source_segment(self.source.code, node)
            exact = Fraction(Decimal(segment.replace("_", "")))
        if not is_number_in_range(exact):
            raise self.fail(node, NUMBER_RANGE_MESSAGE)
        return sympy.Rational(exact.numerator, exact.denominator)

    def _build_Name(self, node, depth):
        name = node.id
        if name in self.names:
            self.used.add(name)
            return self.names[name]
        if name in CONSTANTS:
            return CONSTANTS[name]
        if name == TIME_NAME:
            raise self.fail(
                node,
                f"time {TIME_NAME!r} may not appear: models are autonomous "
                "(right-hand sides depend on states and parameters only)",
            )
        if name in FUNCTION_NAMES:
            raise self.fail(node, f"{name!r} is a function: write {name}(...)")
        known = sorted(self.names) + sorted(CONSTANTS)
        close = difflib.get_close_matches(name, known, n=3)
        if close:
            hint = f" (did you mean {_or_list(close)}?)"
        elif known:
            hint = " (names in scope: " + ", ".join(known[:12]) + (", ..." if len(known) > 12 else "") + ")"
        else:
            hint = ""
        raise self.fail(node, f"unknown name {name!r}{hint}")

    def _build_UnaryOp(self, node, depth):
        if isinstance(node.op, ast.USub):
            return -self.build(node.operand, depth + 1)
        if isinstance(node.op, ast.UAdd):
            return self.build(node.operand, depth + 1)
        raise self.fail(node, f"operator {_OPERATOR_TEXT[type(node.op)]!r} is not allowed")

    def _chain(self, node, ops):
        """Operands of a left-nested chain of ``ops``, left to right, with their operators."""
        chain = []
        while isinstance(node, ast.BinOp) and isinstance(node.op, ops):
            chain.append((node.op, node.right))
            node = node.left
        chain.append((None, node))
        return reversed(chain)

    def _build_BinOp(self, node, depth):
        if isinstance(node.op, (ast.Add, ast.Sub)):
            terms = []
            for op, operand in self._chain(node, (ast.Add, ast.Sub)):
                value = self.build(operand, depth + 1)
                terms.append(-value if isinstance(op, ast.Sub) else value)
            return sympy.Add(*terms)
        if isinstance(node.op, (ast.Mult, ast.Div)):
            factors = []
            for op, operand in self._chain(node, (ast.Mult, ast.Div)):
                value = self.build(operand, depth + 1)
                if isinstance(op, ast.Div):
                    if value == 0:
                        raise self.fail(operand, "division by zero")
                    self.note(operand, sympy.Pow, (value, sympy.S.NegativeOne),
                              f"the division by {format_expression(value)}")
                    value = sympy.Pow(value, -1)
                factors.append(value)
            return sympy.Mul(*factors)
        if isinstance(node.op, ast.Pow):
            return self._power(node, depth)
        raise self.fail(node, f"operator {_OPERATOR_TEXT[type(node.op)]!r} is not allowed")

    def _power(self, node, depth):
        base = self.build(node.left, depth + 1)
        exponent = self.build(node.right, depth + 1)
        if exponent.is_Number and abs(exponent) > MAX_EXPONENT:
            shown = f" {exponent}" if len(str(exponent)) <= 20 else ""
            raise self.fail(node.right, f"the exponent{shown} is larger than {MAX_EXPONENT} in absolute value")
        if base.is_Rational and exponent.is_Rational:
            bits = base.p.bit_length() + base.q.bit_length()
            if bits * abs(exponent) > _MAX_EXACT_BITS:
                raise self.fail(node, "this power of a number is too large to keep exactly")
        self.note(node, sympy.Pow, (base, exponent),
                  f"the power ({format_expression(base)})^({format_expression(exponent)})")
        return self._real(node, sympy.Pow(base, exponent))

    def _real(self, node, value):
        """``value``, unless it is a constant that is not real (powers and functions can make one)."""
        self._defined(node, value)
        if value.has(sympy.I) or (value.is_number and value.is_extended_real is False):
            raise self.fail(node, "this part is not a real number (e.g. sqrt or log of a negative constant)")
        return value

    def _build_Call(self, node, depth):
        if not isinstance(node.func, ast.Name):
            self.build(node.func, depth + 1)
            raise self.fail(node, "only named functions can be called")
        name = node.func.id
        if node.keywords:
            raise self.fail(node.keywords[0], "keyword arguments are not allowed")
        if name in _ONE_ARGUMENT or name in _TWO_OR_MORE:
            count = len(node.args)
            if name in _ONE_ARGUMENT and count != 1:
                raise self.fail(node, f"{name}() takes exactly one argument, got {count}")
            if name in _TWO_OR_MORE and count < 2:
                raise self.fail(node, f"{name}() takes two or more arguments, got {count}")
            args = [self.build(arg, depth + 1) for arg in node.args]
            function = _ONE_ARGUMENT.get(name) or _TWO_OR_MORE[name]
            if name in _ONE_ARGUMENT:
                operation = (sympy.Pow, (args[0], sympy.S.Half)) if name == "sqrt" else (function, args)
                self.note(node, *operation, f"{name}({format_expression(args[0])})")
            return self._real(node, function(*args))
        if name in self.names or name in CONSTANTS:
            raise self.fail(node, f"{name!r} is not a function")
        close = difflib.get_close_matches(name, sorted(FUNCTION_NAMES), n=3)
        hint = f"did you mean {_or_list(close)}? " if close else ""
        allowed = ", ".join(sorted(FUNCTION_NAMES))
        raise self.fail(node.func, f"unknown function {name!r} ({hint}allowed: {allowed})")


def parse_expression(text, names, *, where, conditions=None, used=None):
    """Parse one model expression into a sympy expression.

    Parameters
    ----------
    text : str
        The expression as written, e.g. ``"mu_max*s/(Ks + s + s^2/Ki)"``.
    names : Mapping[str, sympy.Basic]
        Identifiers the expression may use and what they stand for (state and
        parameter symbols, already-parsed definitions). Must not contain a name
        of :data:`RESERVED_NAMES`.
    where : str
        Location used in error messages, e.g. ``"models/x.toml: [equations] s"``.
    conditions : list, optional
        When given, the :class:`DomainCondition` of every written operation that is not
        defined everywhere is appended to it (in the names of ``names``), so that a
        caller substituting names can check them again with :func:`check_conditions`.
    used : set, optional
        When given, the names of ``names`` that the text refers to are added to it
        (also those that simplification cancels, as in ``d - d``).

    Returns
    -------
    sympy.Expr
        The expression. Number literals are exact rationals of their decimal text.

    Raises
    ------
    ModelError
        One line naming ``where`` and the column, for any text outside the grammar,
        and for an expression that sympy's automatic simplification would make defined
        where the written one is not (``x/x``, ``exp(log(x))``, ``sqrt(x)^2``).

    Examples
    --------
    >>> import sympy
    >>> x = sympy.Symbol("x", real=True)
    >>> parse_expression("0.1*x^2", {"x": x}, where="demo")
    x**2/10
    >>> parse_expression("x + y", {"x": x}, where="demo")
    Traceback (most recent call last):
    ...
    certify.errors.ModelError: demo: column 5: unknown name 'y' (names in scope: x, e, pi)
    """
    _check_text(text, where)
    _check_names(names, where)
    source = _Source(text, where)
    builder = _Builder(source, names)
    return _kept(builder.build(source.parse(), 1), builder, conditions, used)


def _kept(expr, builder, conditions, used):
    """``expr`` after :func:`check_conditions`, reporting what ``builder`` found."""
    check_conditions(expr, builder.conditions, subject="the expression")
    if conditions is not None:
        conditions += builder.conditions
    if used is not None:
        used |= builder.used
    return expr


def parse_constraint(text, names, *, where, conditions=None, used=None):
    """Parse a limit ``lhs <= rhs`` or ``lhs >= rhs`` into its margin ``g``.

    Parameters
    ----------
    text : str
        The limit as written, e.g. ``"x >= 1"``. Exactly one comparison, ``<=`` or ``>=``.
    names : Mapping[str, sympy.Basic]
        As for :func:`parse_expression`.
    where : str
        Location used in error messages.
    conditions, used : list and set, optional
        As for :func:`parse_expression`.

    Returns
    -------
    sympy.Expr
        ``g = rhs - lhs`` for ``<=`` and ``g = lhs - rhs`` for ``>=``; the limit holds
        exactly where ``g >= 0`` (limits are closed).

    Raises
    ------
    ModelError
        For text outside the grammar, strict or chained comparisons, no comparison, or
        sides that automatic simplification would make defined where they are not.

    Examples
    --------
    >>> import sympy
    >>> x = sympy.Symbol("x", real=True)
    >>> parse_constraint("x <= 9", {"x": x}, where="demo")
    9 - x
    """
    _check_text(text, where)
    _check_names(names, where)
    source = _Source(text, where)
    try:
        node = source.parse()
    except ModelError:
        single = re.search(r"(?<![<>=!])=(?!=)", source.code)
        if single:
            raise source.error(single.start(), "a single '=' is not a comparison: write '<=' or '>='") from None
        raise
    if not isinstance(node, ast.Compare):
        raise source.node_error(node, "a limit must compare two sides with '<=' or '>=' (e.g. 'x <= 9')")
    end = source.index(node.left.end_lineno, node.left.end_col_offset)
    while end < len(source.code) and source.code[end] in " \t\r\n)":
        end += 1
    if len(node.ops) > 1:
        raise source.error(end, "write one comparison per limit (split a chained comparison into two limits)")
    op = node.ops[0]
    if isinstance(op, (ast.Lt, ast.Gt)):
        raise source.error(end, "strict '<' and '>' are not allowed: limits are closed, write '<=' or '>='")
    if not isinstance(op, (ast.LtE, ast.GtE)):
        raise source.error(end, "only '<=' and '>=' may compare the two sides of a limit")
    builder = _Builder(source, names)
    lhs = builder.build(node.left, 2)
    rhs = builder.build(node.comparators[0], 2)
    return _kept(rhs - lhs if isinstance(op, ast.LtE) else lhs - rhs, builder, conditions, used)


class _TidyPrinter(StrPrinter):
    """sympy's string printer with the spellings of our expression grammar."""

    def _print_Exp1(self, expr):
        return "e"

    def _print_Abs(self, expr):
        return f"abs({self._print(expr.args[0])})"

    def _print_Min(self, expr):
        return "min(" + ", ".join(self._print(arg) for arg in expr.args) + ")"

    def _print_Max(self, expr):
        return "max(" + ", ".join(self._print(arg) for arg in expr.args) + ")"

    def _print_Mul(self, expr):
        # sympy folds a number into a denominator ("1/(2*(x + y))"), which reads back
        # as 1/(2*x + 2*y): print such a number as a separate factor instead
        coeff, rest = expr.as_coeff_Mul()
        if coeff.is_Rational and abs(coeff) != 1 and any(
                f.is_Pow and f.exp.is_negative for f in sympy.Mul.make_args(rest)):
            sign = "-" if coeff < 0 else ""
            return f"{sign}{self._print(abs(coeff))}*({self._print(rest)})"
        return super()._print_Mul(expr)


def kink_sites(equations):
    """The ``max``, ``min`` and ``abs`` of `equations`, innermost first, each once.

    The prover and the checker both step a model with kinks on the smooth branches
    these sites leave (docs/method.md, "Models with kinks").

    Returns
    -------
    tuple of (sympy.Expr, tuple of sympy.Expr, bool)
        Per site: the expression, its arguments (``abs(a)``: ``a`` and ``-a``) and
        whether it is a maximum (``abs`` is the maximum of its two).
    """
    sites, seen = [], set()
    for equation in equations:
        for node in sympy.postorder_traversal(equation):
            if node in seen or not isinstance(node, (sympy.Max, sympy.Min, sympy.Abs)):
                continue
            seen.add(node)
            if isinstance(node, sympy.Abs):
                sites.append((node, (node.args[0], -node.args[0]), True))
            else:
                sites.append((node, tuple(node.args), isinstance(node, sympy.Max)))
    return tuple(sites)


def switch_expressions(sites):
    """The differences ``a_i - a_j`` (``i < j``) of the arguments of every site, in site
    order: their signs on a box say which argument a site equals there."""
    return [args[i] - args[j] for _, args, _ in sites
            for i in range(len(args)) for j in range(i + 1, len(args))]


def branch_equations(equations, sites, choice):
    """`equations` with site ``s`` of :func:`kink_sites` replaced by its argument
    ``choice[s]`` (inner sites inside the chosen arguments replaced too): the smooth
    branch that the equations are where every site keeps that argument."""
    replacement = {}
    for (expr, args, _), k in zip(sites, choice):
        replacement[expr] = args[k].xreplace(replacement)
    return tuple(e.xreplace(replacement) for e in equations)


def format_expression(expr):
    """Print a sympy expression in the model-file grammar (``^`` for powers).

    Parameters
    ----------
    expr : sympy.Expr
        An expression built by :func:`parse_expression` (or from the same functions).

    Returns
    -------
    str
        Text that :func:`parse_expression` reads back to the same expression.

    Examples
    --------
    >>> import sympy
    >>> x = sympy.Symbol("x", real=True)
    >>> format_expression(sympy.Rational(1, 2) * x**2 + sympy.Abs(x))
    'x^2/2 + abs(x)'
    """
    return _TidyPrinter().doprint(expr).replace("**", "^")
