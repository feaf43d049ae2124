"""Tests of the safe expression parser and printer (certify/expr.py)."""

import doctest
import math
import re
from decimal import Decimal
from fractions import Fraction

import mpmath
import pytest
import sympy
from hypothesis import given, settings
from hypothesis import strategies as st

import certify.expr
from certify.errors import ModelError
from certify.expr import format_expression, format_number, parse_constraint, parse_expression

X, Y = sympy.symbols("x y", real=True)
NAMES = {"x": X, "y": Y}


def parse(text):
    return parse_expression(text, NAMES, where="m.toml: [equations] x")


# ---------------------------------------------------------------- exact numbers


@pytest.mark.parametrize(
    ("text", "exact"),
    [
        # Source: the meaning of decimal notation (exact): 0.1 = 1/10, 1e-3 = 1/1000.
        ("0.1", sympy.Rational(1, 10)),
        ("1e-3", sympy.Rational(1, 1000)),
        ("2.5E2", sympy.Integer(250)),
        ("1_000.5", sympy.Rational(2001, 2)),
        (".5", sympy.Rational(1, 2)),
        ("3", sympy.Integer(3)),
        ("0x10", sympy.Integer(16)),
    ],
)
def test_number_literals_are_exact_rationals(text, exact):
    value = parse(text)
    assert isinstance(value, sympy.Rational)
    assert value == exact


def test_decimal_literal_is_not_the_nearest_double():
    # Source: IEEE 754 binary64; Fraction(0.1) is the exact value of the double nearest 0.1,
    # 3602879701896397/2^55, which differs from 1/10.
    assert parse("0.1") != sympy.Rational(Fraction(0.1).numerator, Fraction(0.1).denominator)
    assert Fraction(0.1) == Fraction(3602879701896397, 2**55)


@settings(max_examples=60, deadline=None, derandomize=True, database=None)
@given(st.decimals(min_value=Decimal("-1e12"), max_value=Decimal("1e12"), allow_nan=False, places=6))
def test_every_decimal_text_parses_to_its_exact_value(value):
    # Source: Python's decimal module, which keeps decimal text exactly.
    text = str(abs(value))
    exact = Fraction(Decimal(text))
    parsed = parse(text)
    assert Fraction(int(parsed.p), int(parsed.q)) == exact


@pytest.mark.parametrize(
    ("value", "text"),
    [(Fraction(1, 4), "0.25"), (Fraction(1, 3), "1/3"), (Fraction(-12), "-12"), (Fraction(3, 10**9), "3E-9")],
)
def test_format_number_is_exact_and_reads_back(value, text):
    assert format_number(value) == text
    # Source: Python's Fraction parses both decimal and p/q text exactly.
    assert Fraction(text) == value


# ---------------------------------------------------------------- grammar


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        # Source: usual mathematical precedence (mem): ^ binds tighter than * and unary minus,
        # and is right-associative.
        ("2*x^2 + 1", 2 * X**2 + 1),
        ("x^2 + 1", X**2 + 1),
        ("2^3^2", sympy.Integer(512)),
        ("-x^2", -(X**2)),
        ("x**-1", 1 / X),
        ("x^-1", 1 / X),
        ("x/2/y", X / (2 * Y)),
        ("x - y - 1", X - Y - 1),
        ("+x", X),
        ("  x + 1", X + 1),
        ("(x\n + y)", X + Y),
        ("abs(x)", sympy.Abs(X)),
        ("min(x, y, 1)", sympy.Min(X, Y, 1)),
        ("max(x, 0)", sympy.Max(X, 0)),
    ],
)
def test_grammar_builds_the_expected_expression(text, expected):
    assert parse(text) == expected


def test_constants_pi_and_e():
    # Source: mpmath's constants, to 15 digits.
    assert parse("pi") == sympy.pi and float(parse("pi")) == pytest.approx(float(mpmath.pi), rel=1e-15)
    assert parse("e") == sympy.E and float(parse("e")) == pytest.approx(float(mpmath.e), rel=1e-15)


@pytest.mark.parametrize(
    ("name", "reference"),
    [
        # Source: Python's math module.
        ("exp", math.exp),
        ("log", math.log),
        ("sqrt", math.sqrt),
        ("sin", math.sin),
        ("cos", math.cos),
        ("tan", math.tan),
        ("atan", math.atan),
        ("tanh", math.tanh),
        ("sinh", math.sinh),
        ("cosh", math.cosh),
        ("abs", abs),
    ],
)
def test_each_function_means_the_math_function(name, reference):
    function = sympy.lambdify([X], parse(f"{name}(x)"), "math")
    for point in (0.3, 1.7):
        assert function(point) == pytest.approx(reference(point), rel=1e-14)


def test_declared_definitions_stand_for_their_expressions():
    mu = sympy.Symbol("mu", real=True)
    assert parse_expression("mu*x", {"x": X, "mu": mu}, where="w") == mu * X
    assert parse_expression("k*x", {"x": X, "k": 2 * Y}, where="w") == 2 * Y * X


# ---------------------------------------------------------------- limits


@pytest.mark.parametrize(
    ("text", "g"),
    [("x <= 9", 9 - X), ("x >= 1", X - 1), ("x + y <= 2*x", 2 * X - X - Y), ("(x) >= y", X - Y)],
)
def test_constraint_margin(text, g):
    # Source: definition in docs/model-format.md: g = rhs - lhs for <=, lhs - rhs for >=.
    assert parse_constraint(text, NAMES, where="w") == g


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("0 <= x <= 9", "w: column 3: write one comparison per limit"),
        ("x < 1", "w: column 3: strict '<' and '>' are not allowed: limits are closed"),
        ("x == 1", "w: column 3: only '<=' and '>=' may compare the two sides of a limit"),
        ("x = 1", "w: column 3: a single '=' is not a comparison: write '<=' or '>='"),
        ("x", "w: column 1: a limit must compare two sides with '<=' or '>='"),
        ("x <= z", "w: column 6: unknown name 'z'"),
    ],
)
def test_bad_constraints(text, message):
    with pytest.raises(ModelError, match=re.escape(message)):
        parse_constraint(text, NAMES, where="w")


# ---------------------------------------------------------------- rejections


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("", "m.toml: [equations] x: the expression is empty"),
        ("x +", "column 4: syntax error: invalid syntax"),
        ("t*x", "column 1: time 't' may not appear: models are autonomous"),
        ("mu_mx", "column 1: unknown name 'mu_mx'"),
        ("xx", "unknown name 'xx' (did you mean 'x'?)"),
        ("x.real", "column 1: attribute access ('.real') is not allowed"),
        ("x[0]", "column 1: subscripts ('[...]') are not allowed"),
        ("foo(x)", "column 1: unknown function 'foo'"),
        ("x(2)", "column 1: 'x' is not a function"),
        ("exp", "'exp' is a function: write exp(...)"),
        ("exp(x, y)", "exp() takes exactly one argument, got 2"),
        ("min(x)", "min() takes two or more arguments, got 1"),
        ("exp(x=1)", "column 5: keyword arguments are not allowed"),
        ("lambda: 1", "column 1: lambda is not allowed"),
        ("'x'", "column 1: text in quotes is not allowed"),
        ("x < y", "comparisons are not allowed inside an expression"),
        ("x and y", "'and' and 'or' are not allowed"),
        ("x if y else 1", "conditional expressions ('... if ... else ...') are not allowed"),
        ("x % 2", "operator '%' is not allowed"),
        ("x^65", "column 3: the exponent 65 is larger than 64 in absolute value"),
        ("x^(-65)", "the exponent -65 is larger than 64 in absolute value"),
        ("x^(2*40)", "the exponent 80 is larger than 64 in absolute value"),
        ("2^2^2^2^2", "the exponent 65536 is larger than 64 in absolute value"),
        ("1e999", "column 1: number out of range"),
        ("1j", "imaginary numbers are not allowed"),
        ("True", "True is not a number"),
        ("1/0", "column 3: division by zero"),
        ("x/(x - x)", "column 4: division by zero"),
        ("log(0)", "this part is undefined"),
        ("sqrt(-1)", "this part is not a real number"),
        ("x # note", "column 3: character '#' (comments go outside the quotes) is not allowed"),
        ("\u00b5*x", "column 1: character '\u00b5' is not allowed"),
        ("x,y", "tuples are not allowed"),
        ("-" * 150 + "x", "column 101: the expression is nested deeper than 100 levels"),
        ("(" * 300 + "x" + ")" * 300, "syntax error: too many nested parentheses"),
        ("+".join(["x"] * 3000), "the expression is too long or nested too deeply to parse"),
        ("9" * 5000, "syntax error: a number has too many digits"),
        ("x" * 10_001, "the expression is 10,001 characters long; at most 10,000 are allowed"),
        ("x y\n+ 1", "line 1, column 3: syntax error"),
        ("(x\n+ z)", "line 2, column 3: unknown name 'z'"),
    ],
)
def test_rejections_name_location_and_column(text, message):
    with pytest.raises(ModelError, match=re.escape(message)):
        parse(text)


def test_reserved_names_cannot_be_declared():
    with pytest.raises(ModelError, match=re.escape("w: 'pi' is a reserved name and cannot be declared")):
        parse_expression("x", {"pi": X}, where="w")


def test_code_in_an_expression_never_runs(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    attempts = [
        "__import__('os').system('touch PWNED')",
        "(lambda: __import__('os').system('touch PWNED'))()",
        "().__class__.__base__.__subclasses__()",
        "exec('open(\"PWNED\", \"w\")')",
        "eval('1')",
    ]
    for text in attempts:
        with pytest.raises(ModelError):
            parse(text)
    assert not (tmp_path / "PWNED").exists()


# ---------------------------------------------------------------- printing


_ATOMS = st.sampled_from(["x", "y", "2", "0.5", "3/4", "pi", "e"])


def _expressions():
    def extend(inner):
        return st.one_of(
            st.tuples(inner, st.sampled_from(["+", "-", "*", "/"]), inner).map(lambda t: f"({t[0]} {t[1]} {t[2]})"),
            st.tuples(inner, st.sampled_from(["2", "3", "-1", "1/2"])).map(lambda t: f"({t[0]})^{t[1]}"),
            st.tuples(st.sampled_from(["exp", "sin", "atan", "abs", "tanh"]), inner).map(lambda t: f"{t[0]}({t[1]})"),
            st.tuples(st.sampled_from(["min", "max"]), inner, inner).map(lambda t: f"{t[0]}({t[1]}, {t[2]})"),
        )

    return st.recursive(_ATOMS, extend, max_leaves=8)


@settings(max_examples=80, deadline=None, derandomize=True, database=None)
@given(_expressions())
def test_printed_expressions_read_back_to_the_same_expression(text):
    try:
        expr = parse(text)
    except ModelError:  # e.g. a division by an expression that is exactly 0
        return
    assert parse(format_expression(expr)) == expr


def test_printer_uses_the_model_grammar():
    assert format_expression(parse("x^2/2 + abs(x) + e^x + min(x, y)")) == "x^2/2 + exp(x) + abs(x) + min(x, y)"


def test_doctests():
    assert doctest.testmod(certify.expr).failed == 0
