"""Tests of model files (certify/model.py) and the demo models in models/."""

import doctest
import hashlib
import math
import re
from fractions import Fraction
from pathlib import Path

import pytest
import sympy

import certify.model
from certify.errors import ModelError, UsageError
from certify.model import load_model, parse_model

MODELS = sorted((Path(__file__).resolve().parent.parent / "models").glob("*.toml"))
FERMENTER = Path(__file__).resolve().parent.parent / "models" / "fermenter.toml"

BASE = """\
[model]
name = "decay"
time_unit = "s"

[states]
x = { range = [1, 4], unit = "m" }

[parameters]
k = 0.5

[equations]
x = "-k*x"

[constraints]
floor = "x >= 0.5"
"""


def write(tmp_path, text, name="m.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def replace(old, new):
    assert old in BASE
    return BASE.replace(old, new)


# ---------------------------------------------------------------- the demo models


@pytest.mark.parametrize("path", MODELS, ids=[path.name for path in MODELS])
def test_every_model_in_models_loads_cleanly(path):
    model = load_model(path)
    assert model.name and len(model.states) == len(model.equations)
    assert model.warnings == ()
    # Source: hashlib over the file's bytes, read independently of the loader.
    assert model.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()


def andrews_rates(s, x, mu_max=0.5, Ks=0.5, Ki=2.0, D=0.2, s_in=10.0, Y=0.5):
    """Chemostat with Andrews (1968) substrate-inhibition kinetics (mem), written out by hand."""
    mu = mu_max * s / (Ks + s + s * s / Ki)
    return D * (s_in - s) - mu * x / Y, (mu - D) * x


def test_fermenter_equations_match_the_hand_written_kinetics():
    model = load_model(FERMENTER)
    assert [state.name for state in model.states] == ["s", "x"]
    values = {p.symbol: p.lo for p in model.parameters}
    rates = sympy.lambdify(model.state_symbols, [eq.subs(values) for eq in model.equations])
    midpoint = [float((lo + hi) / 2) for lo, hi in model.window]
    assert midpoint == [6.0, 5.0]
    for got, expected in zip(rates(*midpoint), andrews_rates(*midpoint)):
        assert got == pytest.approx(expected, rel=1e-14)


def test_fermenter_operating_point_is_an_equilibrium():
    # Source: chemostat steady state, mu(s*) = D and x* = Y (s_in - s*) (Smith & Waltman 1995, ch. 1 (mem)).
    # With these numbers mu(s) = D is s^2 - 3 s + 1 = 0, so s* = (3 - sqrt 5)/2 (exact).
    model = load_model(FERMENTER)
    s_star = (3 - sympy.sqrt(5)) / 2
    x_star = sympy.Rational(1, 2) * (10 - s_star)
    point = {**{p.symbol: p.lo for p in model.parameters}, **dict(zip(model.state_symbols, (s_star, x_star)))}
    for equation in model.equations:
        assert sympy.simplify(equation.subs(point)) == 0


def test_fermenter_limits_are_closed_margins():
    model = load_model(FERMENTER)
    s, x = model.state_symbols
    margins = {limit.name: limit.g for limit in model.constraints}
    assert margins == {"biomass_floor": x - 1, "aeration_cap": 9 - x, "discharge_limit": 9 - s}
    # A state exactly on a limit satisfies it: g = 0 there.
    assert margins["biomass_floor"].subs(x, 1) == 0


def test_fermenter_fields():
    model = load_model(FERMENTER)
    assert model.time_unit == "h"
    assert model.window == ((0, 12), (0, 10))
    assert all(isinstance(bound, Fraction) for pair in model.window for bound in pair)
    assert model.parameters[0].name == "mu_max" and model.parameters[0].lo == Fraction(1, 2)
    assert not any(p.is_interval for p in model.parameters)
    assert set(model.definitions) == {"mu"}
    assert not model.uses_kinks
    assert model.path == str(FERMENTER)


# ---------------------------------------------------------------- reading


def test_numbers_are_exact(tmp_path):
    model = load_model(write(tmp_path, replace("k = 0.5", "k = 0.1").replace("[1, 4]", "[0.1, 1e3]")))
    # Source: decimal notation (exact): 0.1 = 1/10 and 1e3 = 1000.
    assert model.parameters[0].lo == Fraction(1, 10)
    assert model.states[0].lo == Fraction(1, 10) and model.states[0].hi == 1000
    k_value = {model.parameter_symbols[0]: model.parameters[0].lo}
    assert model.equations[0].subs(k_value) == -sympy.Rational(1, 10) * model.state_symbols[0]


@pytest.mark.parametrize(
    "form", ["k = [0.25, 0.75]", 'k = { range = [0.25, 0.75], unit = "1/s" }', 'k = { value = 0.5, unit = "1/s" }']
)
def test_parameter_forms(tmp_path, form):
    model = load_model(write(tmp_path, replace("k = 0.5", form)))
    (k,) = model.parameters
    if "value" in form:
        assert (k.lo, k.hi, k.is_interval) == (Fraction(1, 2), Fraction(1, 2), False)
    else:
        assert (k.lo, k.hi, k.is_interval) == (Fraction(1, 4), Fraction(3, 4), True)
    assert k.unit == ("1/s" if "unit" in form else "")


def test_definitions_are_substituted_in_dependency_order(tmp_path):
    text = replace('[equations]\nx = "-k*x"', '[definitions]\na = "b + 1"\nb = "c*x"\nc = "k^2"\n[equations]\nx = "-a"')
    model = load_model(write(tmp_path, text))
    x, k = model.state_symbols[0], model.parameter_symbols[0]
    assert model.equations[0] == -(k**2 * x + 1)
    a, b = sympy.Symbol("a", real=True), sympy.Symbol("b", real=True)
    assert model.definitions["a"] == b + 1  # definitions are kept as written
    assert a not in model.equations[0].free_symbols


def test_definitions_may_be_used_in_limits(tmp_path):
    text = replace('[equations]', '[definitions]\nrate = "k*x"\n[equations]').replace('"x >= 0.5"', '"rate <= 1"')
    model = load_model(write(tmp_path, text))
    x, k = model.state_symbols[0], model.parameter_symbols[0]
    assert model.constraints[0].g == 1 - k * x


def test_settings(tmp_path):
    text = BASE + "[settings]\norder = 3\nmax_depth = 10\nstep = 0.125\nmin_horizon = 0.5\n"
    model = load_model(write(tmp_path, text))
    assert model.settings == {"order": 3, "max_depth": 10, "step": 0.125, "min_horizon": 0.5}


def test_uses_kinks(tmp_path):
    model = load_model(write(tmp_path, replace('"-k*x"', '"-k*abs(x)"')))
    assert model.uses_kinks


def test_bom_and_crlf_are_read_and_hashed_as_written(tmp_path):
    path = tmp_path / "m.toml"
    path.write_bytes(("\ufeff" + BASE).replace("\n", "\r\n").encode("utf-8"))
    model = load_model(path)
    assert model.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()


def test_warnings(tmp_path):
    text = replace("k = 0.5", "k = 0.5\nunused = 3").replace("[equations]", '[definitions]\nlonely = "x"\n[equations]')
    text = text.replace('x = { range = [1, 4], unit = "m" }', 'x = { range = [1, 4] }\ny = [0, 1]')
    text = text.replace('x = "-k*x"', 'x = "-k*x"\ny = "1"').replace('floor = "x >= 0.5"', 'floor = "x >= 0.5"\nc = "k <= 1"')
    model = load_model(write(tmp_path, text))
    assert model.warnings == (
        "state 'y' appears in no equation and no limit",
        "parameter 'unused' appears in no equation and no limit",
        "definition 'lonely' is not used",
        "limit 'c' involves no state: it holds everywhere or nowhere",
    )


def test_with_parameters(tmp_path):
    model = load_model(write(tmp_path, BASE))
    wider = model.with_parameters({"k": (Fraction(1, 4), Fraction(3, 4))})
    assert (wider.parameters[0].lo, wider.parameters[0].hi) == (Fraction(1, 4), Fraction(3, 4))
    assert wider.parameters[0].is_interval and not model.parameters[0].is_interval
    assert wider.sha256 == model.sha256 and wider.equations == model.equations
    assert model.with_parameters({"k": "1/3"}).parameters[0].lo == Fraction(1, 3)
    with pytest.raises(UsageError, match=re.escape("unknown parameter 'kk' (did you mean 'k'?)")):
        model.with_parameters({"kk": (1, 2)})
    with pytest.raises(UsageError, match=re.escape("parameter 'k': lo 2 is above hi 1")):
        model.with_parameters({"k": (2, 1)})
    with pytest.raises(UsageError, match=re.escape("parameter 'k': nan is not a number")):
        model.with_parameters({"k": float("nan")})


# ---------------------------------------------------------------- the bad-input battery

BAD_MODELS = [
    # (model text, the key part of the exact message)
    ("[model\nname = 'x'", "m.toml: TOML syntax error: "),
    (BASE + "[model]\nname = 'again'\n", "(a key or table is written twice)"),
    (replace('name = "decay"', 'name = "decay"\nname = "twice"'), "TOML syntax error: Cannot overwrite a value"),
    (replace("[constraints]", "[constrains]"), "m.toml: unknown section [constrains] (did you mean [constraints]?)"),
    (BASE.replace('[model]\nname = "decay"\ntime_unit = "s"\n', ""), "m.toml: missing section [model]"),
    (replace('[equations]\nx = "-k*x"\n', ""), "m.toml: missing section [equations]"),
    (replace('name = "decay"', 'title = "decay"'), "m.toml: [model]: unknown key 'title'"),
    (replace('name = "decay"', 'name = ""'), "m.toml: [model] name: must not be empty"),
    (replace("[1, 4]", "[4, 4]"), "m.toml: [states] x: the range [4, 4] is empty (lo must be below hi)"),
    (replace("[1, 4]", "[4, 1]"), "m.toml: [states] x: the range [4, 1] is reversed"),
    (replace("[1, 4]", "[nan, 4]"), "m.toml: [states] x: range: must be a finite number, got nan"),
    (replace("[1, 4]", "[1, inf]"), "m.toml: [states] x: range: must be a finite number, got infinity"),
    (replace("[1, 4]", '["1", 4]'), "expected a number, got the text '1' (numbers are written without quotes)"),
    (replace("[1, 4]", "[1, 2, 3]"), "m.toml: [states] x: range: expected a range [lo, hi], got a list"),
    (replace("[1, 4]", "[true, 4]"), "expected a number, got true/false"),
    (replace("k = 0.5", "k = [0.7, 0.2]"), "m.toml: [parameters] k: the range [0.7, 0.2] is reversed"),
    (replace("k = 0.5", "k = 1e999"), "m.toml: [parameters] k: number out of range"),
    (replace("k = 0.5", "k = { value = 1, range = [0, 1] }"), "[parameters] k: give exactly one of 'value' and 'range'"),
    (replace('x = "-k*x"', 'x = "-k*x"\ny = "1"'), "m.toml: [equations] y: there is no state of this name; states: x"),
    (replace('x = { range = [1, 4], unit = "m" }', 'x = [1, 4]\nz = [0, 1]'), "m.toml: [equations]: state 'z' has no equation"),
    (replace('"-k*x"', '"-k*q"'), "m.toml: [equations] x: column 4: unknown name 'q'"),
    (replace('"-k*x"', '"-kk*x"'), "column 2: unknown name 'kk' (did you mean 'k'?)"),
    (replace('"-k*x"', '"-k*x*t"'), "[equations] x: column 6: time 't' may not appear"),
    (replace('"-k*x"', "-1"), "m.toml: [equations] x: expected text in quotes, got the number -1"),
    (replace("k = 0.5", "x = 0.5"), "m.toml: [parameters] x: the name is already declared in [states]"),
    (replace("k = 0.5", "pi = 3"), "m.toml: [parameters] pi: is a reserved name (the constant pi)"),
    (replace("k = 0.5", "exp = 3"), "[parameters] exp: is a reserved name (the function exp())"),
    (replace("k = 0.5", "t = 3"), "m.toml: [parameters] t: is reserved for time"),
    (replace("k = 0.5", '"2k" = 3'), "m.toml: [parameters] '2k': not a valid name"),
    (replace("k = 0.5", "lambda = 3"), "[parameters] lambda: is a reserved word of the expression syntax"),
    (replace("[equations]", '[definitions]\na = "b"\nb = "a*x"\n[equations]'), "[definitions]: definitions refer to each other in a cycle: a -> b -> a"),
    (replace('"x >= 0.5"', '"x > 0.5"'), "[constraints] floor: column 3: strict '<' and '>' are not allowed"),
    (replace('"x >= 0.5"', '"0.5 <= x <= 4"'), "[constraints] floor: column 5: write one comparison per limit"),
    (replace('"x >= 0.5"', '"abs(x) <= 3"'), "[constraints] floor: abs, min and max are not allowed in limits"),
    (replace('floor = "x >= 0.5"\n', ""), "m.toml: [constraints]: no limits are declared"),
    (replace('x = { range = [1, 4], unit = "m" }', ""), "m.toml: [states]: no states are declared"),
    (replace('x = { range = [1, 4], unit = "m" }', "\n".join(f"x{i} = [0, 1]" for i in range(7))), "7 states are declared; at most 6 are allowed"),
    (BASE + "[settings]\norder = 9\n", "m.toml: [settings] order: must be a whole number from 1 to 8, got 9"),
    (BASE + "[settings]\nstep = -1\n", "m.toml: [settings] step: must be a number above 0, got -1"),
    (BASE + "[settings]\nordr = 3\n", "m.toml: [settings]: unknown key 'ordr' (did you mean 'order'?)"),
    (BASE + "[settings]\nmin_horizon = 2\nmax_horizon = 1\n", "[settings]: min_horizon is above max_horizon"),
    (replace('"-k*x"', '"' + "x+" * 5001 + 'x"'), "the expression is 10,003 characters long; at most 10,000 are allowed"),
    (replace('"-k*x"', '"x/(x - x)"'), "[equations] x: column 4: division by zero"),
    (replace("[equations]", '[definitions]\nz = "x - x"\n[equations]').replace('"-k*x"', '"1/z"'), "[equations] x: undefined once the definitions are substituted"),
    ("states = 3\n" + replace('[states]\nx = { range = [1, 4], unit = "m" }\n', ""), "m.toml: [states]: must be a section (a table), not the number 3"),
]


@pytest.mark.parametrize(("text", "message"), BAD_MODELS, ids=[f"bad{i:02d}" for i in range(len(BAD_MODELS))])
def test_bad_models_are_rejected_with_a_one_line_message(tmp_path, text, message):
    path = write(tmp_path, text)
    with pytest.raises(ModelError, match=re.escape(message)) as caught:
        load_model(path)
    assert "\n" not in str(caught.value)
    assert str(caught.value).startswith(str(path))


@pytest.mark.parametrize(
    "expression",
    [
        "__import__('os').system('touch PWNED')",
        "(lambda: __import__('os').system('touch PWNED'))()",
        "().__class__.__bases__[0].__subclasses__()",
        "open('PWNED', 'w')",
    ],
)
def test_hostile_expressions_do_not_run(tmp_path, monkeypatch, expression):
    monkeypatch.chdir(tmp_path)
    path = write(tmp_path, replace('"-k*x"', '"' + expression.replace('"', '\\"') + '"'))
    with pytest.raises(ModelError, match=re.escape("m.toml: [equations] x: column ")):
        load_model(path)
    assert not (tmp_path / "PWNED").exists()


def test_unreadable_files(tmp_path):
    with pytest.raises(ModelError, match=re.escape(f"{tmp_path / 'missing.toml'}: no such file")):
        load_model(tmp_path / "missing.toml")
    with pytest.raises(ModelError, match=re.escape(f"{tmp_path}: is a directory, not a model file")):
        load_model(tmp_path)
    latin = tmp_path / "latin.toml"
    latin.write_bytes(BASE.replace("decay", "d\xe9cay").encode("latin-1"))
    with pytest.raises(ModelError, match=re.escape("latin.toml: not UTF-8 text (invalid byte at offset 17)")):
        load_model(latin)
    big = tmp_path / "big.toml"
    big.write_text(BASE + "#" * 1_000_001)
    with pytest.raises(ModelError, match=re.escape("big.toml: the file is larger than 1,000,000 bytes")):
        load_model(big)


def test_parse_model_without_a_path_names_the_text():
    with pytest.raises(ModelError, match=re.escape("<model text>: missing section [model]")):
        parse_model("")


def test_numbers_keep_their_meaning_at_the_range_edges(tmp_path):
    # Source: decimal notation (exact); 1e-300 is the smallest magnitude accepted.
    model = load_model(write(tmp_path, replace("k = 0.5", "k = 1e-300")))
    assert model.parameters[0].lo == Fraction(1, 10**300)
    assert math.isfinite(float(model.parameters[0].lo))


def test_doctests():
    assert doctest.testmod(certify.model).failed == 0
