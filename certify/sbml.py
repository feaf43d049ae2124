"""Models from SBML files: ``certify import``, ``certify.import_sbml`` and ``prove MODEL.xml``.

An SBML document (Level 2 or 3, read with python-libsbml) is translated into the text
of a certify model file (TOML), and that text is read by
:func:`certify.model.parse_model` like any model file: the :class:`~certify.model.Model`
of an SBML file is exactly the one its imported TOML gives, its ``text`` (stored in
certificates) carries the derived equations and a header with the SBML file's sha256.
The rules (amounts and concentrations, compartment volumes, what is refused) are in
``docs/sbml.md``.
"""

import hashlib
import itertools
import keyword
import re
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

import libsbml

from certify.conservation import conserved_caps
from certify.errors import ModelError, UsageError
from certify.expr import RESERVED_NAMES, format_number, is_number_in_range
from certify.model import TEXT_LENGTHS, looks_like_xml, parse_model, read_file_start
from certify.sbml_math import MathContext, exact_number, math_text, names_in

__all__ = ["MAX_SBML_BYTES", "Imported", "ImportedState", "import_sbml", "is_sbml",
           "load_model_file", "read_sbml", "toml_text"]

#: Largest SBML file accepted, in bytes.
MAX_SBML_BYTES = 20_000_000
#: File name endings read as SBML.
SBML_SUFFIXES = (".xml", ".sbml")
_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]{0,63}")
#: libsbml error codes below this one are about the XML, not the SBML in it.
_FIRST_SBML_ERROR = 10000
#: libsbml's error for an XML declaration without an encoding: harmless, UTF-8 is read.
_NO_ENCODING = 1002


@dataclass(frozen=True)
class ImportedState:
    """A state of an imported model: its range, and whether the range is a guess."""

    name: str
    lo: Fraction
    hi: Fraction
    guess: bool
    unit: str
    about: str


@dataclass(frozen=True)
class Imported:
    """An SBML model translated into the parts of a certify model file.

    ``parameters`` maps each name to ``(lo, hi, unit)``; ``definitions`` and
    ``equations`` map names to expression text; ``notes`` are header lines saying
    what was renamed or guessed.
    """

    label: str
    sha256: str
    model_id: str
    model_name: str
    time_unit: str
    states: tuple[ImportedState, ...]
    parameters: dict
    definitions: dict
    equations: dict
    notes: tuple[str, ...]


def is_sbml(path):
    """Tell whether a model file is SBML: by its ending, else by starting with ``<``.

    Parameters
    ----------
    path : str or os.PathLike

    Returns
    -------
    bool
    """
    if Path(path).suffix.lower() in SBML_SUFFIXES:
        return True
    try:
        return looks_like_xml(read_file_start(path, 256))
    except ModelError:
        return False  # the model reader names the problem


def load_model_file(path, *, ranges=None, limits=(), params=None):
    """Read a model file, TOML or SBML (:func:`is_sbml`), as commands do.

    Parameters
    ----------
    path : str or os.PathLike
    ranges, limits, params
        As for :func:`import_sbml`; only an SBML file takes them.

    Returns
    -------
    certify.model.Model

    Raises
    ------
    ModelError, UsageError
    """
    if is_sbml(path):
        return import_sbml(path, ranges=ranges, limits=limits, params=params)
    if ranges or limits or params:
        raise UsageError(f"{path}: --range and --limit apply to SBML models; edit the "
                         "model file instead")
    from certify.model import load_model
    return load_model(path)


def import_sbml(path, *, ranges=None, limits=(), params=None):
    """Read an SBML model as a certify model.

    Parameters
    ----------
    path : str or os.PathLike
        The SBML file (Level 2 or 3).
    ranges : dict[str, tuple], optional
        ``(lo, hi)`` per state name: the analysis window. States not given get a
        guessed range, marked as such (``certify show`` warns).
    limits : sequence of str
        The limits, e.g. ``["S1 <= 2"]``, named ``limit_1``, ``limit_2``, ...;
        at least one (SBML has no limits).
    params : dict[str, tuple], optional
        ``(lo, hi)`` per parameter name, replacing the SBML value.

    Returns
    -------
    certify.model.Model
        The model of the TOML text ``certify import`` writes (``Model.text``), with
        ``path`` the SBML file.

    Raises
    ------
    ModelError
        One line naming the file and the SBML element, for an unreadable file or what
        certify cannot honour (events, delays, algebraic rules, ``time``, ...).
    UsageError
        For no limits, or ranges or parameters of unknown names.
    """
    imported = read_sbml(path, ranges=ranges, params=params)
    if not limits:
        example = f"{imported.states[0].name} <= {format_number(imported.states[0].hi)}"
        raise UsageError(f"{path}: an SBML model has no limits; give at least one "
                         f"(--limit \"EXPR\", e.g. --limit \"{example}\")")
    return parse_model(toml_text(imported, limits), path=str(path))


def toml_text(imported, limits=()):
    """Write an imported model as the text of a certify model file.

    Parameters
    ----------
    imported : Imported
    limits : sequence of str
        Limit texts, named ``limit_1``, ... ; when empty, ``[limits]`` holds a
        commented example and the text is not yet a complete model.

    Returns
    -------
    str
    """
    lines = [f"# Imported by 'certify import' from the SBML file {Path(imported.label).name}",
             f"# SBML model id: {imported.model_id or '(none)'}; name: "
             f"{_one_line(imported.model_name) or '(none)'}",
             f"# SBML sha256: {imported.sha256}"]
    lines += [f"# {note}" for note in imported.notes]
    lines += ["", "[model]", f"name = {_quote(_model_name(imported))}"]
    if imported.time_unit:
        lines.append(f"time_unit = {_quote(imported.time_unit)}")
    lines += ["", "[states]"]
    for state in imported.states:
        fields = [f"range = [{format_number(state.lo)}, {format_number(state.hi)}]"]
        fields += [f"guess = true"] if state.guess else []
        fields += [f"unit = {_quote(state.unit)}"] if state.unit else []
        fields += [f"about = {_quote(state.about)}"] if state.about else []
        lines.append(f"{state.name} = {{ {', '.join(fields)} }}")
    lines += ["", "[parameters]"]
    for name, (lo, hi, unit) in imported.parameters.items():
        value = (f"value = {format_number(lo)}" if lo == hi
                 else f"range = [{format_number(lo)}, {format_number(hi)}]")
        lines.append(f"{name} = {{ {value}" + (f", unit = {_quote(unit)}" if unit else "") + " }")
    if imported.definitions:
        lines += ["", "[definitions]"]
        lines += [f"{name} = {_quote(text)}" for name, text in imported.definitions.items()]
    lines += ["", "[equations]"]
    lines += [f"{name} = {_quote(text)}" for name, text in imported.equations.items()]
    lines += ["", "[limits]"]
    if limits:
        lines += [f"limit_{i} = {_quote(text)}" for i, text in enumerate(limits, 1)]
    else:
        first = imported.states[0]
        lines += ["# certify needs at least one limit before it proves anything; for example:",
                  f"# {first.name}_cap = {_quote(f'{first.name} <= {format_number(first.hi)}')}"]
    return "\n".join(lines) + "\n"


def read_sbml(path, *, ranges=None, params=None):
    """Translate an SBML file into the parts of a certify model file.

    Parameters
    ----------
    path : str or os.PathLike
    ranges, params
        As for :func:`import_sbml`.

    Returns
    -------
    Imported

    Raises
    ------
    ModelError, UsageError
        As for :func:`import_sbml`.
    """
    label = str(path)
    data = _read_bytes(label)
    document = _parse_document(label, data)
    return _Translation(label, document.getModel()).run(
        hashlib.sha256(data).hexdigest(), dict(ranges or {}), dict(params or {}))


def _read_bytes(label):
    data = read_file_start(label, MAX_SBML_BYTES + 1)
    if len(data) > MAX_SBML_BYTES:
        raise ModelError(f"{label}: the file is larger than {MAX_SBML_BYTES:,} bytes")
    return data


def _parse_document(label, data):
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ModelError(f"{label}: not UTF-8 text (invalid byte at offset {exc.start})") from None
    document = libsbml.readSBMLFromString(text)
    errors = [document.getError(i) for i in range(document.getNumErrors())
              if document.getError(i).getSeverity() >= libsbml.LIBSBML_SEV_ERROR
              and document.getError(i).getErrorId() != _NO_ENCODING]
    if not errors and document.getModel() is not None:
        return document
    first = errors[0] if errors else None
    why = f"line {first.getLine()}: {_one_line(first.getShortMessage())}" if first \
        else "the document has no <model>"
    if first is not None and first.getErrorId() < _FIRST_SBML_ERROR:
        raise ModelError(f"{label}: not well-formed XML ({why})")
    if document.getLevel() == 0:
        raise ModelError(f"{label}: not an SBML document ({why})")
    raise ModelError(f"{label}: not a valid SBML document ({why})")


def _one_line(text):
    return " ".join(str(text).split())


def _quote(text):
    """A TOML basic string of `text`."""
    escaped = "".join(f"\\u{ord(c):04x}" if ord(c) < 32 or ord(c) == 127 else c
                      for c in text.replace("\\", "\\\\").replace('"', '\\"'))
    return f'"{escaped}"'


def _model_name(imported):
    name = _one_line(imported.model_name) or imported.model_id or Path(imported.label).stem
    return name[:TEXT_LENGTHS["name"]]


def _usable(name):
    return bool(_NAME.fullmatch(name)) and not keyword.iskeyword(name) \
        and name not in RESERVED_NAMES


def _free_name(wanted, taken):
    """`wanted` if it is a usable name not in `taken`, else it (cut short) with ``_1``, ``_2``..."""
    if _usable(wanted) and wanted not in taken:
        return wanted
    return next(name for name in (f"{wanted[:56]}_{i}" for i in itertools.count(1))
                if name not in taken)


def _limited(text, field):
    text = _one_line(text)
    return text if len(text) <= TEXT_LENGTHS[field] else ""


class _Translation:
    """The translation of one SBML model; ``label`` names the file in messages.

    Every global SBML id first gets its role (state, parameter or definition) and its
    certify name; then the math is written, with every name known.
    """

    def __init__(self, label, model):
        self.label = label
        self.model = model
        self.level3 = model.getLevel() >= 3
        self.notes = []
        self.parameters = {}  # certify name -> (lo, hi, unit)
        self.values = {}  # certify name -> exact value, of parameters and compartment sizes
        self.definitions = {}  # certify name -> (SBML math, element)
        self.sizes = {}  # certify name -> size of a compartment (a number), as text
        self.rated = {}  # SBML id of a state with a rate rule -> the rule
        self.states = []  # SBML species or parameters that are states, in file order

    def error(self, element, message):
        return ModelError(f"{self.label}: {element}: {message}")

    def run(self, sha256, ranges, params):
        model = self.model
        self.refuse_unsupported()
        self.functions = {f.getId(): self.lambda_of(f) for f in model.getListOfFunctionDefinitions()}
        self.rules = {rule.getVariable(): rule for rule in model.getListOfRules()}
        self.initial = {a.getSymbol(): a for a in model.getListOfInitialAssignments()}
        self.names = self.global_names()
        for compartment in model.getListOfCompartments():
            self.compartment(compartment)
        for parameter in model.getListOfParameters():
            self.quantity(parameter, f"parameter {parameter.getId()!r}", parameter.getUnits())
        for species in model.getListOfSpecies():
            self.species(species)
        if not self.states:
            raise self.error(f"model {model.getId() or '(no id)'!r}", "nothing in it changes "
                             "in time (no species or parameter becomes a state)")
        rates = self.reaction_rates()
        context = MathContext(self.label, self.declared(), self.functions)
        self.check_initial_assignments()
        definitions = {name: math_text(math, context, element)
                       for name, (math, element) in self.definitions.items()}
        definitions.update(rates)
        equations = {self.names[item.getId()]: self.equation(item, context) for item in self.states}
        texts = " ".join([*definitions.values(), *equations.values()])
        sizes = {name: size for name, size in self.sizes.items()
                 if re.search(rf"\b{name}\b", texts)}
        definitions = sizes | definitions
        if sizes:
            self.notes.append("Compartment sizes are definitions (fixed numbers); equations of "
                              "concentrations divide by them.")
        self.apply_params(params)
        states = self.state_ranges(ranges)
        return Imported(
            label=self.label, sha256=sha256, model_id=model.getId(), model_name=model.getName(),
            time_unit=_limited(model.getTimeUnits() if self.level3 else "", "time_unit"),
            states=states,
            parameters=self.parameters, definitions=definitions, equations=equations,
            notes=tuple(self.notes),
        )

    # -- what certify refuses ---------------------------------------------------------
    def refuse_unsupported(self):
        model = self.model
        if model.getNumEvents():
            event = model.getEvent(0)
            raise self.error(f"event {event.getId() or '(no id)'!r}", "events change the state "
                             "at discrete times, which certify cannot follow; remove the events")
        for rule in model.getListOfRules():
            if rule.isAlgebraic():
                raise self.error("algebraic rule", "algebraic rules (equations the states must "
                                 "satisfy) are not supported; write the model as ODEs")
        for reaction in model.getListOfReactions():
            if reaction.isSetFast() and reaction.getFast():
                raise self.error(f"reaction {reaction.getId()!r}", "fast reactions (an "
                                 "equilibrium assumption) are not supported")
            if reaction.getKineticLaw() is None:
                raise self.error(f"reaction {reaction.getId()!r}", "has no kinetic law")

    def lambda_of(self, function):
        lam = function.getMath()
        if lam is None or not lam.isLambda():
            raise self.error(f"function definition {function.getId()!r}", "has no lambda")
        return lam

    def check_initial_assignments(self):
        """Refuse an initial assignment of a constant that uses what changes in time.

        Such a constant becomes a definition, evaluated at every time, so its math may
        use only constants (numbers, parameters, sizes and other such definitions).
        """
        changing = {item.getId() for item in self.states} | \
            {sid for sid, rule in self.rules.items() if rule.isAssignment()}
        for sid, assignment in self.initial.items():
            if self.names.get(sid) not in self.definitions or sid in self.rules:
                continue
            used = sorted(names_in(assignment.getMath(), self.functions) & changing)
            if used:
                raise self.error(f"initial assignment for {sid!r}", f"uses {used[0]!r}, which "
                                 "changes in time; certify reads initial assignments of "
                                 "constants from constants only")

    # -- names --------------------------------------------------------------------------
    def global_names(self):
        model = self.model
        ids = [item.getId() for items in (model.getListOfCompartments(), model.getListOfSpecies(),
                                          model.getListOfParameters(), model.getListOfReactions())
               for item in items]
        self.taken, names = set(ids), {}
        for sid in ids:
            names[sid] = sid if _usable(sid) else _free_name(sid, self.taken)
            if names[sid] != sid:
                self.taken.add(names[sid])
                self.notes.append(f"SBML id {sid!r} is named {names[sid]!r} here "
                                  "(the id is reserved in certify's expressions)")
        return names

    def declared(self):
        """SBML id -> certify name of what math may refer to."""
        known = set(self.parameters) | set(self.definitions) | set(self.sizes) \
            | {self.names[item.getId()] for item in self.states}
        return {sid: name for sid, name in self.names.items() if name in known}

    def local_parameters(self, law):
        return law.getListOfLocalParameters() if self.level3 else law.getListOfParameters()

    def local_names(self, reaction):
        """SBML id -> certify name of a kinetic law's local parameters (declared here).

        A local parameter keeps its id unless the id is also global or local to another
        reaction; then it is named ``<reaction id>_<id>``.
        """
        everywhere = [p.getId() for r in self.model.getListOfReactions()
                      for p in self.local_parameters(r.getKineticLaw())]
        names = {}
        for parameter in self.local_parameters(reaction.getKineticLaw()):
            pid = parameter.getId()
            clash = pid in self.names or everywhere.count(pid) > 1
            name = _free_name(f"{reaction.getId()}_{pid}" if clash else pid, self.taken)
            self.taken.add(name)
            if name != pid:
                self.notes.append(f"local parameter {pid!r} of reaction {reaction.getId()!r} "
                                  f"is named {name!r} here")
            names[pid] = name
            self.value(parameter, name, f"reaction {reaction.getId()!r} local parameter "
                                        f"{pid!r}", parameter.getUnits())
        return names

    # -- roles --------------------------------------------------------------------------
    def value(self, item, name, element, unit):
        """Declare `item` (a parameter) a certify parameter holding its SBML value."""
        if not item.isSetValue() or not _finite(item.getValue()):
            raise self.error(element, "has no value")
        self.parameter(name, exact_number(item.getValue()), element, unit)

    def parameter(self, name, value, element, unit):
        self.parameters[name] = (self.number(value, element), value, _limited(unit or "", "unit"))
        self.values[name] = value

    def number(self, value, element):
        """`value`, refused when certify cannot hold it."""
        if not is_number_in_range(value):
            raise self.error(element, f"the value {float(value)!r} is out of certify's range "
                             "(1e-300 to 1e301 in absolute value, or 0)")
        return value

    def quantity(self, item, element, unit):
        """A compartment or parameter: a state (rate rule), a definition or a parameter."""
        sid = item.getId()
        rule = self.rules.get(sid)
        if rule is not None and rule.isRate():
            self.rated[sid] = rule
            self.states.append(item)
        elif rule is not None:
            self.definitions[self.names[sid]] = (rule.getMath(), f"assignment rule for {sid!r}")
        elif sid in self.initial:
            self.definitions[self.names[sid]] = (self.initial[sid].getMath(),
                                                 f"initial assignment for {sid!r}")
        else:
            self.value(item, self.names[sid], element, unit)

    def compartment(self, compartment):
        element = f"compartment {compartment.getId()!r}"
        if compartment.getId() in self.rules:
            raise self.error(element, "a rule changes its size; certify imports compartments "
                             "of constant size only")
        if compartment.getId() in self.initial:
            self.quantity(compartment, element, "")
        elif compartment.isSetSize() and _finite(compartment.getSize()):
            name = self.names[compartment.getId()]
            self.values[name] = self.number(exact_number(compartment.getSize()), element)
            self.sizes[name] = format_number(self.values[name])

    def species(self, species):
        sid = species.getId()
        element = f"species {sid!r}"
        if species.getId() in self.rules:
            self.quantity(species, element, "")
        elif species.getBoundaryCondition() or species.getConstant():
            if sid in self.initial:
                self.quantity(species, element, "")
            else:
                self.parameter(self.names[sid], self.initial_value(species, element), element,
                               self.species_unit(species))
        else:
            self.states.append(species)
        if (self.level3 and species.isSetConversionFactor()) or \
                (self.level3 and self.model.isSetConversionFactor()):
            raise self.error(element, "conversion factors are not supported")

    def amount_symbol(self, species):
        """True when the species' symbol is its amount (SBML: hasOnlySubstanceUnits)."""
        compartment = self.model.getCompartment(species.getCompartment())
        dimensionless = compartment is not None and compartment.isSetSpatialDimensions() \
            and compartment.getSpatialDimensionsAsDouble() == 0
        return species.getHasOnlySubstanceUnits() or dimensionless

    def volume(self, species, element):
        """The certify name of the species' compartment (its size), for concentrations."""
        cid = species.getCompartment()
        name = self.names.get(cid)
        if name not in self.sizes and name not in self.definitions:
            raise self.error(element, f"its compartment {cid!r} has no size, so its "
                             "concentration is undefined")
        return name

    def initial_value(self, species, element):
        """The species' initial value in the units of its symbol (refused when unset)."""
        if species.isSetInitialAmount():
            value, amount = species.getInitialAmount(), True
        elif species.isSetInitialConcentration():
            value, amount = species.getInitialConcentration(), False
        else:
            raise self.error(element, "has no initial value (initialAmount or "
                             "initialConcentration); give its range with --range")
        value = exact_number(value)
        if amount == self.amount_symbol(species):
            return value
        size = self.values.get(self.volume(species, element))
        if size is None or size == 0:
            raise self.error(element, "its initial value needs its compartment's size, "
                             "which is not a number; give its range with --range")
        return value / size if amount else value * size

    def species_unit(self, species):
        substance = species.getSubstanceUnits() or \
            (self.model.getSubstanceUnits() if self.level3 else "")
        if self.amount_symbol(species) or not substance:
            return substance
        compartment = self.model.getCompartment(species.getCompartment())
        volume = (compartment.getUnits() if compartment else "") or \
            (self.model.getVolumeUnits() if self.level3 else "")
        return f"{substance}/{volume}" if volume else ""

    # -- equations ----------------------------------------------------------------------
    def reaction_rates(self):
        """Reaction rate texts by certify name (the reaction id), and the stoichiometry.

        Sets ``self.changes``: SBML species id -> list of (stoichiometry, rate name).
        """
        self.changes = {item.getId(): [] for item in self.states}
        reactions = self.model.getListOfReactions()
        local = [self.local_names(reaction) for reaction in reactions]
        declared = self.declared()
        rates = {}
        for reaction, names in zip(reactions, local):
            element = f"reaction {reaction.getId()!r}"
            name = self.names[reaction.getId()]
            for sid, coefficient in self.stoichiometry(reaction, element).items():
                if sid in self.changes and sid not in self.rated and coefficient != 0:
                    self.changes[sid].append((coefficient, name))
            context = MathContext(self.label, {**declared, **names}, self.functions)
            rates[name] = math_text(reaction.getKineticLaw().getMath(), context,
                                    f"{element} kinetic law")
        used = {name for changes in self.changes.values() for _, name in changes}
        return {name: text for name, text in rates.items() if name in used}

    def stoichiometry(self, reaction, element):
        """Net stoichiometry per species id of one reaction (products minus reactants)."""
        net = {}
        for sign, references in ((-1, reaction.getListOfReactants()),
                                 (1, reaction.getListOfProducts())):
            for reference in references:
                sid = reference.getSpecies()
                where = f"{element} species reference {sid!r}"
                if not self.level3 and reference.isSetStoichiometryMath():
                    raise self.error(where, "stoichiometryMath is not supported")
                if reference.isSetId() and (reference.getId() in self.rules
                                            or reference.getId() in self.initial):
                    raise self.error(where, "a variable stoichiometry is not supported")
                value = reference.getStoichiometry()
                if not _finite(value):
                    raise self.error(where, "has no stoichiometry")
                net[sid] = net.get(sid, 0) + sign * exact_number(value)
        return net

    def equation(self, item, context):
        """The right-hand side of a state: its rate rule, or its reactions' net rate."""
        sid = item.getId()
        if sid in self.rated:
            return math_text(self.rated[sid].getMath(), context, f"rate rule for {sid!r}")
        changes = self.changes[sid]
        if not changes:
            return "0"
        total = "".join(_signed_term(c, name, first=i == 0) for i, (c, name) in enumerate(changes))
        if self.amount_symbol(item):
            return total
        total = total if len(changes) == 1 else f"({total})"
        return f"{total} / {self.volume(item, f'species {sid!r}')}"

    # -- ranges and overrides -----------------------------------------------------------
    def state_ranges(self, ranges):
        self.caps = self.conserved_caps()
        states = tuple(self.state_range(item, ranges) for item in self.states)
        if ranges:
            known = ", ".join(state.name for state in states) or "none"
            raise UsageError(f"{self.label}: --range {next(iter(ranges))}: no state of this "
                             f"name; the states are: {known}")
        if any(state.guess for state in states):
            self.notes += ["Ranges marked 'guess = true' are guesses: [0, the conserved total]",
                           "where a conservation law caps the state, else [0, 2 x the initial",
                           "value] ([0, 1] when it is 0). Set the states you mean to study."]
        return states

    def conserved_caps(self):
        """State SBML id -> (cap, the conserved sum as text), from conservation laws."""
        rows = [item for item in self.states if item.getId() in self.changes
                and item.getId() not in self.rated]
        columns = sorted({name for item in rows for _, name in self.changes[item.getId()]})
        matrix = [[sum((c for c, rate in self.changes[item.getId()] if rate == column),
                       Fraction(0)) for column in columns] for item in rows]
        weights, starts = [], []
        for item in rows:
            size = self.values.get(self.names.get(item.getCompartment()))
            weights.append(Fraction(1) if self.amount_symbol(item) else size)
            try:
                starts.append(None if item.getId() in self.initial
                              else self.initial_value(item, ""))
            except ModelError:
                starts.append(None)
        caps = conserved_caps(matrix, weights, starts)
        return {rows[i].getId(): (cap.value, " + ".join(
                    _signed_term(c, self.names[rows[j].getId()], first=True)
                    for j, c in cap.law.items()))
                for i, cap in caps.items()}

    def state_range(self, item, ranges):
        sid = item.getId()
        name = self.names[sid]
        element = f"species {sid!r}" if isinstance(item, libsbml.Species) else f"{sid!r}"
        about = _limited(item.getName(), "about") if item.isSetName() else ""
        unit = self.species_unit(item) if isinstance(item, libsbml.Species) \
            else _limited(item.getUnits() if isinstance(item, libsbml.Parameter) else "", "unit")
        unit = _limited(unit, "unit")
        given = ranges.pop(name, None) or ranges.pop(sid, None)
        if given is not None:
            return ImportedState(name, Fraction(given[0]), Fraction(given[1]), False, unit, about)
        if sid in self.initial:
            raise self.error(element, "its initial value is an initialAssignment; give its "
                             "range with --range")
        if isinstance(item, libsbml.Species):
            start = self.initial_value(item, element)
        elif item.isSetValue() and _finite(item.getValue()):
            start = exact_number(item.getValue())
        else:
            raise self.error(element, "has no initial value; give its range with --range")
        if sid in self.caps and start >= 0:
            cap, law = self.caps[sid]
            self.notes.append(f"The range of {name} ends at the conserved total of {law}.")
            return ImportedState(name, Fraction(0), cap, True, unit, about)
        lo, hi = sorted((Fraction(0), 2 * start)) if start else (Fraction(0), Fraction(1))
        return ImportedState(name, lo, hi, True, unit, about)

    def apply_params(self, params):
        for name, bounds in params.items():
            if name not in self.parameters:
                known = ", ".join(self.parameters) or "none"
                raise UsageError(f"{self.label}: --param {name}: no parameter of this name; "
                                 f"the parameters are: {known}")
            lo, hi = (Fraction(b) for b in bounds)
            if lo > hi:
                raise UsageError(f"{self.label}: --param {name}: lo is above hi")
            self.parameters[name] = (lo, hi, self.parameters[name][2])


def _finite(value):
    return value == value and value not in (float("inf"), float("-inf"))


def _signed_term(coefficient, name, *, first):
    """``coefficient*name`` written as one term of a sum (``- 2*R1``, ``+ R2``)."""
    size = abs(coefficient)
    term = name if size == 1 else f"{format_number(size)}*{name}"
    if first:
        return f"-{term}" if coefficient < 0 else term
    return f" - {term}" if coefficient < 0 else f" + {term}"
