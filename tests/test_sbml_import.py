"""SBML import (certify/sbml.py): published models typed in as SBML, one small SBML per
feature (compartment sizes, local parameters, assignment rules, function definitions), the
``certify import`` and ``certify prove MODEL.xml`` commands, and bad input.

References are named beside each check; the SBML rules are those of the SBML Level 3
core specification (Hucka et al., section on kinetic laws: a reaction rate is in
substance per time, a species symbol is a concentration unless hasOnlySubstanceUnits).
"""

import gzip
import hashlib
import json
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
import sympy
from scipy.integrate import solve_ivp

from certify import import_sbml, load_model
from certify.cli import main
from certify.errors import ModelError

DATA = Path(__file__).resolve().parent / "data" / "sbml"
RNG = np.random.default_rng(1991)


def _rhs(model):
    """The imported right-hand side as a numpy function f(y) (parameters substituted)."""
    values = {p.symbol: sympy.Rational(p.lo) for p in model.parameters}
    equations = [eq.xreplace(values) for eq in model.equations]
    function = sympy.lambdify(model.state_symbols, equations, "numpy")
    return lambda y: np.array(function(*y), dtype=float)


# -- Goldbeter 1991 minimal mitotic oscillator (PNAS 88:9107), equations from memory -----
GOLDBETER = dict(vi=0.025, vd=0.25, Kd=0.02, kd=0.01, VM1=3.0, Kc=0.5, V2=1.5, VM3=1.0,
                 V4=0.5, K1=0.005, K2=0.005, K3=0.005, K4=0.005)  # (mem)


def goldbeter_published(y, p=GOLDBETER):
    """Goldbeter 1991, equations (1)-(3) with V1 = VM1*C/(Kc + C), V3 = VM3*M (mem)."""
    C, M, X = y
    V1 = p["VM1"] * C / (p["Kc"] + C)
    V3 = p["VM3"] * M
    return np.array([
        p["vi"] - p["vd"] * X * C / (p["Kd"] + C) - p["kd"] * C,
        V1 * (1 - M) / (p["K1"] + 1 - M) - p["V2"] * M / (p["K2"] + M),
        V3 * (1 - X) / (p["K3"] + 1 - X) - p["V4"] * X / (p["K4"] + X),
    ])


def lotka_volterra_published(y, k1=1.0, k2=0.8, k3=0.6):
    """Lotka 1925 / Volterra 1926: dX/dt = k1 X - k2 X Y, dY/dt = k2 X Y - k3 Y."""
    X, Y = y
    return np.array([k1 * X - k2 * X * Y, k2 * X * Y - k3 * Y])


PUBLISHED = [
    ("goldbeter_1991.xml", goldbeter_published, ["C <= 1"], [0.01, 0.01, 0.01], 100.0),
    ("lotka_volterra.xml", lotka_volterra_published, ["Y <= 3"], [1.5, 0.75], 30.0),
]


@pytest.mark.parametrize("name, published, limits, start, horizon", PUBLISHED,
                         ids=[case[0] for case in PUBLISHED])
def test_published_model_imports_to_its_equations(name, published, limits, start, horizon):
    model = import_sbml(DATA / name, limits=limits)
    rhs = _rhs(model)
    for _ in range(50):  # the right-hand sides agree at random points of [0, 1]^n
        y = RNG.random(len(model.states))
        np.testing.assert_allclose(rhs(y), published(y), rtol=1e-12, atol=1e-15)
    # a short simulation of each agrees (scipy solve_ivp, DOP853, tight tolerances)
    times = np.linspace(0, horizon, 11)
    runs = [solve_ivp(lambda t, y, f=f: f(y), (0, horizon), start, method="DOP853",
                      t_eval=times, rtol=1e-11, atol=1e-13) for f in (rhs, published)]
    assert all(run.success for run in runs)
    np.testing.assert_allclose(runs[0].y, runs[1].y, rtol=1e-8, atol=1e-10)


def test_goldbeter_keeps_its_structure():
    """Level 2 local parameters of the same id in four reactions are renamed apart, the
    function definition is expanded, the assignment rules are definitions (Goldbeter 1991)."""
    model = import_sbml(DATA / "goldbeter_1991.xml", limits=["C <= 1"])
    names = {p.name for p in model.parameters}
    assert {"activation_K", "inactivation_K", "protease_activation_K",
            "protease_inactivation_K", "kd"} <= names and "K" not in names
    assert {"V1", "V3"} <= set(model.definitions)
    assert "# SBML sha256: " + hashlib.sha256((DATA / "goldbeter_1991.xml").read_bytes()) \
        .hexdigest() in model.text


# -- one small SBML per feature ---------------------------------------------------------
def _exact(model):
    values = {p.symbol: sympy.Rational(p.lo) for p in model.parameters}
    return [sympy.simplify(eq.xreplace(values)) for eq in model.equations]


def test_compartment_sizes_divide_concentration_rates():
    """SBML L3 core: d[S]/dt = (sum of stoichiometry x rate) / V for a concentration,
    d(amount)/dt = the sum itself with hasOnlySubstanceUnits; an initial amount of 4 in a
    compartment of size 2 is a concentration of 2 (guess range [0, 4])."""
    model = import_sbml(DATA / "compartments.xml", limits=["A <= 5"])
    A = sympy.Symbol("A", real=True)
    k = sympy.Rational(3, 10)
    rate = k * sympy.Rational(1, 2) * A  # k * nucleus * A, amount per second
    assert _exact(model) == [-rate / sympy.Rational(1, 2), rate / 2, 2 * rate]
    # guessed ranges from conserved amounts (amount = concentration x size): 0.5*A + 2*B
    # = 0.5*3 + 2*2 = 5.5 caps B at 5.5/2; 0.5*A + P/2 = 1.5 + 0.5 = 2 caps A at 2/0.5
    # = 4 and P at 4
    assert dict(zip([s.name for s in model.states], model.window)) == \
        {"A": (0, 4), "B": (0, Fraction(11, 4)), "P": (0, 4)}
    assert [s.unit for s in model.states] == ["mole/litre", "mole/litre", "mole"]


def test_guessed_ranges_end_at_conserved_totals():
    """E + S <-> ES -> E + P keeps E + ES (= 1) and S + ES + P (= 10) constant
    (Michaelis & Menten 1913 scheme; common practice), so these cap the guessed ranges."""
    model = import_sbml(DATA / "enzyme_mass_action.xml", limits=["P <= 9"])
    assert dict(zip([s.name for s in model.states], model.window)) == \
        {"E": (0, 1), "S": (0, 10), "ES": (0, 1), "P": (0, 10)}
    assert "conserved total of S + ES + P" in model.text
    assert sum(1 for w in model.warnings if "is a guess" in w) == 4


def test_local_parameter_shadows_the_global():
    """SBML L3 core: a local parameter hides the global of the same id in its kinetic law."""
    model = import_sbml(DATA / "local_shadow.xml", limits=["A <= 2"])
    A, B = (sympy.Symbol(n, real=True) for n in "AB")
    assert _exact(model) == [-3 * A, 3 * A - B]
    assert {p.name: p.lo for p in model.parameters} == {"k": 1, "R1_k": 3}
    assert "local parameter 'k' of reaction 'R1' is named 'R1_k'" in model.text


def test_assignment_rules_rate_rules_and_boundary_species():
    """Our own enzyme example: E = Etot - ES (assignment rule on a species), ES by a rate
    rule, S a boundary species held as a parameter, P by a reaction."""
    model = import_sbml(DATA / "assignment_rule.xml", limits=["ES <= 1"])
    ES = sympy.Symbol("ES", real=True)
    kon, koff, kcat, S, Etot = 2, sympy.Rational(1, 2), sympy.Rational(3, 2), 2, 1
    assert [s.name for s in model.states] == ["ES", "P"]
    assert "E" in model.definitions and "S" in {p.name for p in model.parameters}
    expected = [kon * (Etot - ES) * S - (koff + kcat) * ES, kcat * ES]
    assert [sympy.simplify(a - b) for a, b in zip(_exact(model), expected)] == [0, 0]


def test_function_definitions_are_expanded():
    """Nested function definitions (a Hill function, Hill 1910 form), log with a base and
    a cube root: dY/dt = V X^n/(K^n + X^n) - d Y, dZ/dt = log2(1 + Y) - (Z + 1)^(1/3)."""
    model = import_sbml(DATA / "function_definition.xml", limits=["Y <= 3"])
    Y, Z = (sympy.Symbol(n, real=True) for n in "YZ")
    X, V, K, n, d = sympy.Rational(3, 2), 2, 1, 4, sympy.Rational(1, 2)
    expected = [V * X**n / (K**n + X**n) - d * Y,
                sympy.log(1 + Y) / sympy.log(2) - (Z + 1) ** sympy.Rational(1, 3)]
    assert [sympy.simplify(a - b) for a, b in zip(_exact(model), expected)] == [0, 0]


# -- commands ---------------------------------------------------------------------------
def test_import_writes_a_model_file_show_warns_about_guesses(tmp_path, capsys):
    out = tmp_path / "lv.toml"
    source = DATA / "lotka_volterra.xml"
    assert main(["import", str(source), "--out", str(out), "--range", "X=0:4",
                 "--limit", "Y <= 3", "--param", "k2=0.7:0.9"]) == 0
    text = out.read_text()
    assert hashlib.sha256(source.read_bytes()).hexdigest() in text
    model = load_model(out)
    assert model.window[0] == (0, 4)  # given
    assert model.equations == import_sbml(source, ranges={"X": (0, 4)}, limits=["Y <= 3"],
                                          params={"k2": ("0.7", "0.9")}).equations
    assert {p.name: (p.lo, p.hi) for p in model.parameters}["k2"] == (Fraction(7, 10),
                                                                       Fraction(9, 10))
    capsys.readouterr()
    assert main(["show", str(out)]) == 0
    shown = capsys.readouterr().out
    assert "state 'Y': the range [0, 1.5] is a guess" in shown  # 2 x the initial 0.75
    assert "state 'X'" not in shown.split("warnings:")[1]


def test_import_without_a_limit_leaves_an_example(tmp_path, capsys):
    out = tmp_path / "g.toml"
    assert main(["import", str(DATA / "goldbeter_1991.xml"), "--out", str(out)]) == 0
    assert "add at least one limit" in capsys.readouterr().err
    assert '# C_cap = "C <= 0.02"' in out.read_text()
    assert main(["import", str(DATA / "goldbeter_1991.xml"), "--out", str(out)]) == 2  # exists


def test_prove_reads_sbml_and_the_certificate_records_it(tmp_path, capsys):
    source = DATA / "lotka_volterra.xml"
    out = tmp_path / "proof"
    assert main(["prove", str(source), "--range", "X=0.5:2", "--range", "Y=0.5:2",
                 "--limit", "Y <= 2.5", "--max-depth", "3", "--time-limit", "60",
                 "--out", str(out), "--quiet"]) == 0
    stored = json.loads(gzip.decompress((out / "certificate.json.gz").read_bytes()))["model"]
    assert stored["file"] == str(source)
    assert f"# SBML sha256: {hashlib.sha256(source.read_bytes()).hexdigest()}" in stored["text"]
    assert '[equations]\nX = "(birth - predation) / cell"' in stored["text"]
    assert main(["check", str(out), "--quiet"]) == 0


@pytest.mark.parametrize("argv, message", [
    (["prove", "{lv}", "--max-depth", "2"], "has no limits"),
    (["prove", "{lv}", "--limit", "Y <= 2", "--range", "Q=0:1"], "--range Q: no state"),
    (["prove", "{lv}", "--limit", "Y <= 2", "--range", "X=2:1"], "--range 'X=2:1'"),
    (["import", "{lv}", "--param", "kk=1"], "--param kk: no parameter"),
    (["prove", "{toml}", "--limit", "x <= 2"], "--range and --limit apply to SBML models"),
])
def test_option_mistakes_exit_2(argv, message, tmp_path, capsys):
    toml = Path(__file__).resolve().parent / "data" / "prove_decay.toml"
    argv = [a.format(lv=DATA / "lotka_volterra.xml", toml=toml) for a in argv]
    assert main(argv + ["--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert message in err and len(err.strip().splitlines()) == 1


# -- bad input --------------------------------------------------------------------------
HEAD = ('<?xml version="1.0" encoding="UTF-8"?>\n<sbml xmlns="http://www.sbml.org/sbml/'
        'level3/version1/core" level="3" version="1"><model id="bad">')
COMPARTMENT = ('<listOfCompartments><compartment id="c" size="1" spatialDimensions="3" '
               'constant="true"/></listOfCompartments>')
SPECIES = ('<listOfSpecies><species id="A" compartment="c" {initial} '
           'hasOnlySubstanceUnits="true" boundaryCondition="false" constant="false"/>'
           '</listOfSpecies>')
MATH = '<math xmlns="http://www.w3.org/1998/Math/MathML">{}</math>'


def _decay(law, initial='initialAmount="1"', extra=""):
    """A one-species SBML model A -> 0 with the kinetic law `law` (MathML content)."""
    reaction = ('<listOfReactions><reaction id="R1" reversible="false" fast="false">'
                '<listOfReactants><speciesReference species="A" stoichiometry="1" '
                f'constant="true"/></listOfReactants><kineticLaw>{MATH.format(law)}'
                '</kineticLaw></reaction></listOfReactions>')
    return (HEAD + COMPARTMENT + SPECIES.format(initial=initial) + extra + reaction
            + "</model></sbml>")


A = "<ci>A</ci>"
TIME = '<csymbol encoding="text" definitionURL="http://www.sbml.org/sbml/symbols/time">t</csymbol>'
DELAY = '<csymbol encoding="text" definitionURL="http://www.sbml.org/sbml/symbols/delay">delay</csymbol>'
EVENT = ('<listOfEvents><event id="dose" useValuesFromTriggerTime="true"><trigger '
         'initialValue="true" persistent="true">' + MATH.format(
             f"<apply><gt/>{TIME}<cn>5</cn></apply>") + '</trigger><listOfEventAssignments>'
         '<eventAssignment variable="A">' + MATH.format("<cn>1</cn>") +
         '</eventAssignment></listOfEventAssignments></event></listOfEvents>')
ALGEBRAIC = '<listOfRules><algebraicRule>' + MATH.format(
    "<apply><minus/><ci>A</ci><cn>1</cn></apply>") + '</algebraicRule></listOfRules>'
PIECEWISE = f"<piecewise><piece>{A}<apply><gt/>{A}<cn>1</cn></apply></piece><otherwise><cn>0</cn></otherwise></piecewise>"

def _initial(symbol, math):
    """Parameters k = 2 and `symbol` (no value), and an initial assignment of `symbol`."""
    return (f'<listOfParameters><parameter id="k" value="2" constant="true"/><parameter '
            f'id="{symbol}" constant="true"/></listOfParameters><listOfInitialAssignments>'
            f'<initialAssignment symbol="{symbol}">{MATH.format(math)}</initialAssignment>'
            '</listOfInitialAssignments>')


BAD = [  # (file text, words of the one-line message)
    ("just some text, no markup\n", "not well-formed XML"),
    ("<html><body>a web page</body></html>\n", "not an SBML document"),
    (HEAD + "</sbml>", "not well-formed XML"),  # <model> is never closed
    (_decay(A).replace(' compartment="c"', ""), "not a valid SBML document (line 2: Missing"),
    (_decay(A, extra=EVENT), "event 'dose': events change the state"),
    (_decay(f"<apply>{DELAY}{A}<cn>1</cn></apply>"), "reaction 'R1' kinetic law: uses delay()"),
    (_decay(A, extra=ALGEBRAIC), "algebraic rule: algebraic rules"),
    (_decay(f"<apply><times/>{A}{TIME}</apply>"), "reaction 'R1' kinetic law: uses time"),
    (_decay(A, initial=""), "species 'A': has no initial value"),
    (_decay(PIECEWISE), "reaction 'R1' kinetic law: uses piecewise()"),
    (_decay(f"<apply><times/>{A}<ci>q</ci></apply>"), "refers to 'q'"),
    (_decay(A).replace('fast="false"', 'fast="true"'), "reaction 'R1': fast reactions"),
    (_decay(A).replace('boundaryCondition="false"', 'boundaryCondition="true"'),
     "model 'bad': nothing in it changes in time"),
    (_decay(f"<apply><times/><ci>k0</ci>{A}</apply>", extra=_initial("k0", A)),
     "initial assignment for 'k0': uses 'A', which changes in time"),
]


@pytest.mark.parametrize("text, message", BAD, ids=[
    "not_xml", "not_sbml", "bad_xml", "invalid_sbml", "event", "delay", "algebraic_rule", "time", "no_initial_value",
    "piecewise", "unknown_name", "fast_reaction", "no_state", "initial_assignment_of_a_state"])
def test_bad_input_is_one_clear_line_and_exit_2(text, message, tmp_path, capsys):
    path = tmp_path / "bad.xml"
    path.write_text(text)
    with pytest.raises(ModelError, match="bad.xml: "):
        import_sbml(path, limits=["A <= 2"])
    for argv in (["import", str(path), "--out", str(tmp_path / "bad.toml")],
                 ["prove", str(path), "--limit", "A <= 2", "--out", str(tmp_path / "o")]):
        assert main(argv) == 2
        err = capsys.readouterr().err
        assert len(err.strip().splitlines()) == 1 and message in err, err
        assert f"certify: error: {path}: " in err
    assert not (tmp_path / "bad.toml").exists()


def test_a_given_range_stands_in_for_a_missing_initial_value(tmp_path):
    path = tmp_path / "no_initial.xml"
    path.write_text(_decay(A, initial=""))
    model = import_sbml(path, ranges={"A": (0, 2)}, limits=["A <= 2"])
    assert model.window == ((0, 2),) and not model.warnings


def test_reserved_ids_are_renamed_and_constant_initial_assignments_kept(tmp_path):
    """An id that is a reserved word of certify's expressions (here 'lambda') gets a new
    name; an initial assignment of a constant from constants is a definition: with
    lambda = 2*k and k = 2, A -> 0 at rate lambda*A gives dA/dt = -4*A."""
    path = tmp_path / "renamed.xml"
    path.write_text(_decay(f"<apply><times/><ci>lambda</ci>{A}</apply>",
                           extra=_initial("lambda", "<apply><times/><cn>2</cn><ci>k</ci></apply>")))
    model = import_sbml(path, limits=["A <= 2"])
    assert model.definitions["lambda_1"] == 2 * sympy.Symbol("k", real=True)
    assert _exact(model) == [-4 * sympy.Symbol("A", real=True)]
    assert "SBML id 'lambda' is named 'lambda_1' here" in model.text


def test_an_xml_declaration_without_encoding_is_read_as_utf8(tmp_path):
    path = tmp_path / "plain.xml"
    path.write_text(_decay(A).replace(' encoding="UTF-8"', ""))
    assert import_sbml(path, limits=["A <= 2"]).equations == (-sympy.Symbol("A", real=True),)


def test_other_commands_point_an_sbml_file_to_import(capsys):
    source = DATA / "lotka_volterra.xml"
    assert main(["show", str(source)]) == 2
    err = capsys.readouterr().err
    assert f"XML, not a certify model file (TOML); for SBML, run 'certify import {source}'" in err


def test_names_with_quotes_and_backslashes_survive_the_toml(tmp_path):
    path = tmp_path / "named.xml"
    path.write_text(_decay(A).replace('<model id="bad">',
                                      '<model id="bad" name="Say &quot;hi&quot; \\ there">'))
    assert import_sbml(path, limits=["A <= 2"]).name == 'Say "hi" \\ there'
