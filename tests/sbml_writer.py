"""Test helper: write a certify model as an SBML Level 3 document with libsbml.

Used by the round-trip tests (tests/test_sbml_roundtrip.py). Each state becomes a species
of amount semantics (hasOnlySubstanceUnits) in a compartment of size 1; states of even
index get their equation as the kinetic law of a reaction producing them (stoichiometry
1), states of odd index as a rate rule. Definitions become assignment rules of
non-constant parameters. An interval parameter is written as its lower end (SBML
parameters are numbers). The expressions are taken as written in the TOML file and
spelled for libsbml's formula parser (``^`` for powers, ``ln`` for the natural log).
"""

import re
import tomllib

import libsbml

__all__ = ["model_to_sbml", "sbml_formula"]


def sbml_formula(text):
    """A certify expression as libsbml's Level 3 formula text."""
    text = text.replace("**", "^")
    text = re.sub(r"\blog\(", "ln(", text)
    return re.sub(r"\be\b", "exponentiale", text)


def _check(status):
    assert status == libsbml.LIBSBML_OPERATION_SUCCESS, libsbml.OperationReturnValue_toString(status)


def _math(formula):
    node = libsbml.parseL3Formula(sbml_formula(formula))
    assert node is not None, libsbml.getLastParseL3Error()
    return node


def model_to_sbml(model):
    """Return the SBML text of a certify model (see the module docstring).

    Parameters
    ----------
    model : certify.model.Model
        Read from a TOML file (its ``text`` gives the expressions as written).

    Returns
    -------
    str
    """
    written = tomllib.loads(model.text)
    equations = written["equations"]
    definitions = written.get("definitions", {})
    document = libsbml.SBMLDocument(3, 1)
    sbml = document.createModel()
    _check(sbml.setId("roundtrip"))
    compartment = sbml.createCompartment()
    for call in (compartment.setId("box"), compartment.setSize(1), compartment.setConstant(True)):
        _check(call)
    for state in model.states:
        species = sbml.createSpecies()
        for call in (species.setId(state.name), species.setCompartment("box"),
                     species.setInitialAmount(float(state.lo + state.hi) / 2),
                     species.setHasOnlySubstanceUnits(True), species.setBoundaryCondition(False),
                     species.setConstant(False)):
            _check(call)
    for parameter in model.parameters:
        item = sbml.createParameter()
        for call in (item.setId(parameter.name), item.setValue(float(parameter.lo)),
                     item.setConstant(True)):
            _check(call)
    for name, text in definitions.items():
        item = sbml.createParameter()
        _check(item.setId(name))
        _check(item.setConstant(False))
        rule = sbml.createAssignmentRule()
        _check(rule.setVariable(name))
        _check(rule.setMath(_math(text)))
    for index, state in enumerate(model.states):
        if index % 2:
            rule = sbml.createRateRule()
            _check(rule.setVariable(state.name))
            _check(rule.setMath(_math(equations[state.name])))
            continue
        reaction = sbml.createReaction()
        for call in (reaction.setId(f"make_{state.name}"), reaction.setReversible(True),
                     reaction.setFast(False)):
            _check(call)
        product = reaction.createProduct()
        for call in (product.setSpecies(state.name), product.setStoichiometry(1),
                     product.setConstant(True)):
            _check(call)
        law = reaction.createKineticLaw()
        _check(law.setMath(_math(equations[state.name])))
    return libsbml.writeSBMLToString(document)
