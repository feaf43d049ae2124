"""Equations are evaluated as written: no silent rewrite that removes a singularity.

sympy simplifies while it builds an expression (``x/x`` becomes 1). The reader
(certify/expr.py, certify/model.py) refuses an expression, a definition or an equation
with its definitions substituted when that simplification makes it defined where the
written text is not; forms that sympy keeps (``(x^2 - 1)/(x - 1)``) stay singular in
the prover's programs and in the checker's alike.

References: Python's float arithmetic and math module (IEEE 754; a division by zero and
log/sqrt outside their domain raise) decide where a written expression is undefined;
sympy's own parser (``sympy.sympify``) shows that it rewrites the text.
"""

from __future__ import annotations

import json
import math
import re
from pathlib import Path

import numpy as np
import pytest
import sympy

from certify.check._arith import BallArith, evaluate
from certify.check._programs import derive_programs
from certify.cli import main
from certify.errors import ModelError
from certify.evaluate import evaluate_boxes, parameter_enclosures
from certify.expr import parse_expression
from certify.model import load_model, parse_model
from certify.taylor import flow_programs

ROOT = Path(__file__).resolve().parent.parent
MODELS = sorted((ROOT / "models").glob("*.toml"))
X, Y = sympy.symbols("x y", real=True)
WHERE = "m.toml: [equations] x"

MODEL = """\
[model]
name = "one state"
[states]
x = {{ range = [{lo}, {hi}] }}
[definitions]
{definitions}
[equations]
x = "{equation}"
[constraints]
cap = "{limit}"
"""


def model_text(equation, definitions="", limit="x <= 10", lo=-1, hi=4):
    return MODEL.format(equation=equation, definitions=definitions, limit=limit, lo=lo, hi=hi)


# (text, the same expression in Python, a point where Python finds it undefined,
#  the 1-based column certify names, the operation it names)
REWRITTEN = [
    ("x/x - 2", lambda x: x / x - 2, 0.0, 3, "the division by x is undefined where x = 0"),
    ("exp(log(x))", lambda x: math.exp(math.log(x)), 0.0, 5, "log(x) is undefined where x <= 0"),
    ("sqrt(x)^2", lambda x: math.sqrt(x) ** 2, -1.0, 1, "sqrt(x) is undefined where x < 0"),
    ("x^2/x", lambda x: x**2 / x, 0.0, 5, "the division by x is undefined where x = 0"),
    ("1/(1/x)", lambda x: 1 / (1 / x), 0.0, 6, "the division by x is undefined where x = 0"),
    ("x*(1/x)", lambda x: x * (1 / x), 0.0, 6, "the division by x is undefined where x = 0"),
    ("0*log(x)", lambda x: 0 * math.log(x), 0.0, 3, "log(x) is undefined where x <= 0"),
    ("1/(x+1) - 1/(x+1) + 1", lambda x: 1 / (x + 1) - 1 / (x + 1) + 1, -1.0, 4,
     "the division by x + 1 is undefined where x + 1 = 0"),
]


@pytest.mark.parametrize(("text", "python", "point", "column", "what"), REWRITTEN,
                         ids=[case[0] for case in REWRITTEN])
def test_rewrite_that_removes_a_singularity_is_refused(text, python, point, column, what):
    with pytest.raises((ZeroDivisionError, ValueError)):
        python(point)  # the written expression is undefined at the point
    rewritten = sympy.sympify(text.replace("^", "**"), locals={"x": X})
    assert math.isfinite(float(rewritten.subs(X, point)))  # sympy's form is defined there
    with pytest.raises(ModelError) as caught:
        parse_expression(text, {"x": X}, where=WHERE)
    message = str(caught.value)
    assert "\n" not in message
    assert message.startswith(f"{WHERE}: column {column}: {what}, but automatic simplification")


def test_refused_in_a_model_file_with_file_equation_and_position(tmp_path, capsys):
    path = tmp_path / "cancel.toml"
    path.write_text(model_text("x/x - 2"))
    with pytest.raises(ModelError, match=r"cancel\.toml: \[equations\] x: column 3: the division by x"):
        load_model(path)
    # the command line shows one line, no traceback
    assert main(["show", str(path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("certify: error: ")
    assert "cancel.toml: [equations] x: column 3" in err[0]


@pytest.mark.parametrize(("definitions", "equation", "named"), [
    ('d = "1/x"', "x*d - 2", "[definitions] d: column 3: the division by x"),
    ('d = "1/x"', "d - d + 1", "[definitions] d: column 3: the division by x"),
    ('d = "x^2"', "d/x", "[equations] x: column 3: the division by x"),
    ('d = "log(x)"\nd2 = "exp(d)"', "d2", "[definitions] d: column 1: log(x)"),
    ('d = "1/x"\nd2 = "d - d + 1"', "d2 - 2", "[definitions] d: column 3: the division by x"),
])
def test_substituting_definitions_does_not_cancel_a_singularity(definitions, equation, named):
    # d = 1/x is undefined at x = 0, and so is every equation written with d
    with pytest.raises(ModelError) as caught:
        parse_model(model_text(equation, definitions), path="m.toml")
    message = str(caught.value)
    assert message.startswith(f"m.toml: {named}")
    assert "with the definitions substituted" in message and "\n" not in message


def test_limit_that_cancels_a_singularity_is_refused():
    with pytest.raises(ModelError, match=r"m\.toml: \[constraints\] cap: column 3: the division by x"):
        parse_model(model_text("-x", limit="x/x <= 2"), path="m.toml")


@pytest.mark.parametrize(("text", "python"), [
    # identities that keep the domain are fine (math: log(exp(x)) = x, sqrt(x^2) = |x|,
    # exp(-x)/exp(-x) = 1, sqrt(4x) = 2 sqrt(x) for x >= 0)
    ("log(exp(x))", lambda x: math.log(math.exp(x))),
    ("sqrt(x^2)", lambda x: math.sqrt(x**2)),
    ("exp(-x)/exp(-x)", lambda x: math.exp(-x) / math.exp(-x)),
    ("sqrt(4*x)", lambda x: math.sqrt(4 * x)),
    ("1/(2*x)", lambda x: 1 / (2 * x)),
])
def test_rewrite_that_keeps_the_domain_is_accepted(text, python):
    expr = parse_expression(text, {"x": X}, where=WHERE)
    for point in (0.25, 0.5, 1.5, 3.0):
        assert float(expr.subs(X, point)) == pytest.approx(python(point), rel=1e-14)


def test_kept_singularity_is_unusable_for_prover_and_checker():
    # (x^2 - 1)/(x - 1) = x + 1 for x != 1 (algebra) and is undefined at x = 1
    model = parse_model(model_text("(x^2 - 1)/(x - 1) - 3", lo=0, hi=4), path="m.toml")
    assert model.equations[0] == (X**2 - 1) / (X - 1) - 3
    lo = np.array([[0.5], [1.5], [0.0]])
    hi = np.array([[1.5], [2.5], [0.5]])
    prover = flow_programs(model, 4).field
    plo, phi = evaluate_boxes(prover, lo, hi, parameter_enclosures(model))
    checker = derive_programs(model, 4).field
    ar = BallArith()
    ar.enter()
    (ball,) = evaluate(checker, ar, [ar.box(lo[:, 0], hi[:, 0])])
    finite = ar.finite(ball)
    # the box around x = 1: no usable bound on either side
    assert not np.all(np.isfinite([plo[0, 0], phi[0, 0]])) and not finite[0]
    # boxes away from x = 1: both enclose x + 1 - 3 = x - 2 at sample points
    for row in (1, 2):
        assert finite[row] and np.all(np.isfinite([plo[row, 0], phi[row, 0]]))
        for x in np.linspace(lo[row, 0], hi[row, 0], 5):
            assert plo[row, 0] <= x - 2 <= phi[row, 0]
            assert float(ar.lower(ball)[row]) <= x - 2 <= float(ar.upper(ball)[row])


@pytest.mark.parametrize("path", MODELS, ids=[path.name for path in MODELS])
def test_show_prints_the_equations_certify_evaluates(path, capsys):
    # the printed text reads back to exactly the expressions the programs are built from
    model = load_model(path)
    assert main(["show", "--json", str(path)]) == 0
    shown = json.loads(capsys.readouterr().out)
    names = {symbol.name: symbol for symbol in model.state_symbols + model.parameter_symbols}
    for state, expr in zip(model.states, model.equations):
        printed = shown["equations"][state.name]
        assert parse_expression(printed, names, where="shown") == expr
    for limit, data in zip(model.constraints, shown["constraints"]):
        assert parse_expression(data["g"], names, where="shown") == limit.g


PARAMETER_CANCELS = """\
[model]
name = "a pole that a parameter value cancels"
[states]
x = [0, 4]
[parameters]
k = 2
[equations]
x = "(x - k)/(x - 2) - x"
[constraints]
cap = "x <= 3"
"""


def test_parameter_value_that_cancels_a_singularity_is_refused_by_prover_and_checker():
    # with k = 2 the written right-hand side is undefined at x = 2 (a division by 0)
    k = sympy.Symbol("k", real=True)
    assert ((X - k) / (X - 2)).xreplace({k: 2}) == 1  # sympy cancels on substitution
    model = parse_model(PARAMETER_CANCELS, path="m.toml")
    expected = (r"m\.toml: \[equations\] x: column 10: the division by x - 2 is undefined where "
                r"x - 2 = 0, but automatic simplification turns \[equations\] x with the parameter "
                r"values substituted into '1 - x'")
    with pytest.raises(ModelError, match=expected):
        flow_programs(model, 4)
    with pytest.raises(ModelError, match=expected):
        derive_programs(model, 4)
    # another value keeps the pole, which both sides then see
    other = model.with_parameters({"k": 3})
    lo, hi = np.array([[1.5]]), np.array([[2.5]])
    plo, phi = evaluate_boxes(flow_programs(other, 4).field, lo, hi, parameter_enclosures(other))
    assert not np.all(np.isfinite([plo[0, 0], phi[0, 0]]))
    ar = BallArith()
    ar.enter()
    (ball,) = evaluate(derive_programs(other, 4).field, ar, [ar.box(lo[:, 0], hi[:, 0]), ar.box(3.0, 3.0)])
    assert not ar.finite(ball)[0]


@pytest.mark.parametrize(("value", "equation", "refused"), [
    # x^n/x is x^(n-1) for x != 0 and undefined at x = 0
    ("1", "x^n/x - x", "column 5: the division by x"),
    ("2", "x^n/x - x", "column 5: the division by x"),
    ("2", "x^n*x^(-2) - x", "column 5: the power (x)^(-2)"),
    # an exponent given as a number is that number: x^2/(1 + x^2) is defined for every x
    ("2", "x^n/(1 + x^n) - x", None),
    # a range of exponents keeps x^(n-1) = exp((n-1) log x), undefined for x <= 0
    ("[1, 3]", "x^n/x - x", None),
])
def test_parameter_exponents(value, equation, refused):
    text = PARAMETER_CANCELS.replace("k = 2", f"n = {value}").replace(
        '"(x - k)/(x - 2) - x"', f'"{equation}"')
    model = parse_model(text, path="m.toml")
    if refused is None:
        assert flow_programs(model, 4).field is not None
        assert derive_programs(model, 4).field is not None
        return
    for derive in (flow_programs, derive_programs):
        with pytest.raises(ModelError, match=re.escape(f"m.toml: [equations] x: {refused}")):
            derive(model, 4)
