"""Model files: reading, validating, and the :class:`Model` they describe.

A model file is TOML with the sections ``[model]``, ``[states]``, ``[parameters]``,
``[definitions]``, ``[equations]``, ``[limits]`` (also read under its older name
``[constraints]``), ``[controls]`` and ``[settings]``; the format
is documented in ``docs/model-format.md``. Every number is kept exact: TOML numbers
become :class:`fractions.Fraction` and number literals inside expressions become
``sympy.Rational``.
"""

import dataclasses
import difflib
import graphlib
import hashlib
import keyword
import re
import tomllib
from dataclasses import dataclass
from decimal import Decimal
from fractions import Fraction
from pathlib import Path

import sympy

from certify.errors import ModelError, UsageError
from certify.expr import (
    CONSTANTS,
    FUNCTION_NAMES,
    NUMBER_RANGE_MESSAGE,
    TIME_NAME,
    DomainCondition,
    check_conditions,
    format_number,
    is_number_in_range,
    parse_constraint,
    parse_expression,
)

__all__ = [
    "MAX_FILE_BYTES",
    "MAX_STATES",
    "SECTIONS",
    "SETTINGS",
    "Constraint",
    "Control",
    "Model",
    "Parameter",
    "Setting",
    "State",
    "load_model",
    "parse_model",
]

#: Largest number of states a model may have.
MAX_STATES = 6
#: Largest model file accepted, in bytes.
MAX_FILE_BYTES = 1_000_000
#: Sections of a model file, in their usual order.
SECTIONS = ("model", "states", "parameters", "definitions", "equations", "constraints", "controls",
            "settings")
#: Most settings one control may list, and most combinations of settings of all controls.
MAX_SETTINGS = 64
_REQUIRED_SECTIONS = ("model", "states", "equations", "constraints")
#: Longest free texts, in characters: a model names and describes, it is not a document.
TEXT_LENGTHS = {"name": 200, "description": 5000, "time_unit": 40, "unit": 40, "about": 300}
_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]{0,63}")
_KINKS = (sympy.Abs, sympy.Min, sympy.Max)
_UNDEFINED = (sympy.zoo, sympy.nan, sympy.oo, -sympy.oo)


@dataclass(frozen=True)
class Setting:
    """The rule for one key of ``[settings]``.

    ``kind`` is ``"int"`` (a whole number in ``[lo, hi]``, stored as int) or ``"real"``
    (a finite number above 0, stored as float; ``lo`` and ``hi`` are None).
    """

    kind: str
    about: str
    lo: int | None = None
    hi: int | None = None


#: Keys allowed in ``[settings]``: method knobs a model may suggest to the prover.
SETTINGS = {
    "max_depth": Setting("int", "deepest bisection level of a cell, per state", 0, 60),
    "max_cells": Setting("int", "largest number of leaf cells", 1, 10**9),
    "time_limit": Setting("real", "wall-clock budget of a proof, in seconds"),
    "order": Setting("int", "order q of the Taylor steps", 1, 8),
    "min_horizon": Setting("real", "shortest horizon of a cell, in model time units"),
    "max_horizon": Setting("real", "longest horizon of a cell, in model time units"),
    "step": Setting("real", "initial step size h, in model time units"),
    "max_step": Setting("real", "largest step size h, in model time units"),
    "start_depth": Setting("int", "bisection level of the first round of cells", 0, 12),
}


class _Named:
    """Gives a named model quantity its sympy symbol."""

    @property
    def symbol(self):
        """sympy.Symbol: the symbol of ``self.name`` (``real=True``)."""
        return sympy.Symbol(self.name, real=True)


@dataclass(frozen=True)
class State(_Named):
    """A state variable and its analysis range ``[lo, hi]`` (``lo < hi``)."""

    name: str
    lo: Fraction
    hi: Fraction
    unit: str
    about: str


@dataclass(frozen=True)
class Parameter(_Named):
    """A parameter: a number (``lo == hi``) or every constant value in ``[lo, hi]``."""

    name: str
    lo: Fraction
    hi: Fraction
    unit: str

    @property
    def is_interval(self):
        """bool: True when the parameter stands for every value of ``[lo, hi]``, ``lo < hi``."""
        return self.lo < self.hi


@dataclass(frozen=True)
class Constraint:
    """A limit as written and its margin ``g``: the limit holds exactly where ``g >= 0``."""

    name: str
    text: str
    g: sympy.Expr


@dataclass(frozen=True)
class Control:
    """A parameter the operator may set: its admissible settings and minimum hold time.

    ``settings`` are exact and distinct, in the order written (a policy prefers the
    earlier ones); a policy holds a chosen setting for at least ``hold`` time units
    before it may switch.
    """

    name: str
    settings: tuple[Fraction, ...]
    hold: Fraction


@dataclass(frozen=True)
class Model:
    """A parsed model: ``x' = f(x, p)`` with limits ``g_i(x, p) >= 0``.

    ``equations`` are the right-hand sides in state order with definitions substituted,
    in state and parameter symbols. ``definitions`` are kept as written (they may use
    each other). ``sha256`` is the hash of the UTF-8 bytes of ``text``. ``conditions``
    maps ``"[equations] x"`` and ``"[constraints] name"`` to the written operations that
    are not defined everywhere (divisions, roots, ``log``, ...), those of the definitions
    used included, in state and parameter symbols: substituting parameter values must
    keep them (:func:`certify.expr.substitute`).
    """

    name: str
    time_unit: str
    description: str
    path: str | None
    text: str
    sha256: str
    states: tuple[State, ...]
    parameters: tuple[Parameter, ...]
    definitions: dict[str, sympy.Expr]
    equations: tuple[sympy.Expr, ...]
    constraints: tuple[Constraint, ...]
    settings: dict
    warnings: tuple[str, ...]
    conditions: dict[str, tuple[DomainCondition, ...]]
    controls: tuple[Control, ...] = ()

    @property
    def state_symbols(self):
        """tuple of sympy.Symbol: the states' symbols, in state order."""
        return tuple(state.symbol for state in self.states)

    @property
    def parameter_symbols(self):
        """tuple of sympy.Symbol: the parameters' symbols, in file order."""
        return tuple(parameter.symbol for parameter in self.parameters)

    @property
    def equation_keys(self):
        """tuple of str: ``"[equations] x"`` per state, in state order (keys of ``conditions``)."""
        return tuple(f"[equations] {state.name}" for state in self.states)

    @property
    def constraint_keys(self):
        """tuple of str: ``"[constraints] name"`` per limit (keys of ``conditions``)."""
        return tuple(f"[constraints] {constraint.name}" for constraint in self.constraints)

    @property
    def window(self):
        """tuple of (Fraction, Fraction): the analysis box, one ``(lo, hi)`` per state."""
        return tuple((state.lo, state.hi) for state in self.states)

    @property
    def uses_kinks(self):
        """bool: True when abs, min or max appear in the equations (the flow is not smooth)."""
        return any(equation.has(*_KINKS) for equation in self.equations)

    def with_parameters(self, overrides):
        """Return a copy of the model with some parameter boxes replaced.

        Parameters
        ----------
        overrides : dict[str, tuple[Fraction, Fraction]]
            New ``(lo, hi)`` per parameter name. A single number ``v`` means ``(v, v)``.
            Numbers may be ints, Fractions, Decimals, finite floats (taken exactly) or
            strings such as ``"0.1"`` or ``"1/3"``.

        Returns
        -------
        Model
            The same model with those parameters; ``text`` and ``sha256`` still describe
            the original file.

        Raises
        ------
        UsageError
            For a name that is not a parameter, or bounds that are not numbers with
            ``lo <= hi``.
        """
        by_name = {parameter.name: parameter for parameter in self.parameters}
        for name, value in overrides.items():
            if name not in by_name:
                close = difflib.get_close_matches(str(name), sorted(by_name), n=1)
                hint = f" (did you mean {close[0]!r}?)" if close else ""
                known = ", ".join(by_name) or "none"
                raise UsageError(f"unknown parameter {name!r}{hint}; the parameters are: {known}")
            lo, hi = _override_bounds(name, value)
            by_name[name] = dataclasses.replace(by_name[name], lo=lo, hi=hi)
        return dataclasses.replace(self, parameters=tuple(by_name.values()))


def _override_bounds(name, value):
    pair = tuple(value) if isinstance(value, (tuple, list)) else (value, value)
    if len(pair) != 2:
        raise UsageError(f"parameter {name!r}: expected (lo, hi) or one number, got {value!r}")
    try:
        lo, hi = (Fraction(bound) for bound in pair)
    except (TypeError, ValueError, ZeroDivisionError, OverflowError):
        raise UsageError(f"parameter {name!r}: {value!r} is not a number or a pair of numbers") from None
    if not (is_number_in_range(lo) and is_number_in_range(hi)):
        raise UsageError(f"parameter {name!r}: {NUMBER_RANGE_MESSAGE}")
    if lo > hi:
        raise UsageError(f"parameter {name!r}: lo {format_number(lo)} is above hi {format_number(hi)}")
    return lo, hi


def read_file_start(path, n_bytes):
    """The first `n_bytes` bytes of a model file (all of it when shorter).

    Raises
    ------
    ModelError
        Naming the file, when it is missing, a directory or unreadable.
    """
    label = str(path)
    try:
        with open(path, "rb") as handle:
            return handle.read(n_bytes)
    except FileNotFoundError:
        raise ModelError(f"{label}: no such file") from None
    except IsADirectoryError:
        raise ModelError(f"{label}: is a directory, not a model file") from None
    except PermissionError:
        raise ModelError(f"{label}: cannot read the file (permission denied)") from None
    except OSError as exc:
        raise ModelError(f"{label}: cannot read the file ({exc.strerror or exc})") from None


def looks_like_xml(start):
    """Whether the first bytes of a file are XML: ``<`` after an optional UTF-8 byte
    order mark and blanks."""
    return start.removeprefix(b"\xef\xbb\xbf").lstrip().startswith(b"<")


def load_model(path):
    """Read and validate a model file.

    Parameters
    ----------
    path : str or os.PathLike
        The TOML model file (UTF-8, at most :data:`MAX_FILE_BYTES` bytes).

    Returns
    -------
    Model

    Raises
    ------
    ModelError
        One line naming the file, for an unreadable file or any mistake in it.

    See Also
    --------
    parse_model : the same from text.
    """
    label = str(path)
    data = read_file_start(path, MAX_FILE_BYTES + 1)
    if data[:2] == b"\x1f\x8b":
        raise ModelError(f"{label}: a gzip-compressed file (a certificate?), not a model "
                         "file; expected TOML text (see docs/model-format.md)")
    if looks_like_xml(data):
        raise ModelError(f"{label}: XML, not a certify model file (TOML); for SBML, run "
                         f"'certify import {label}' or 'certify prove {label} --limit ...' "
                         "(see docs/sbml.md)")
    if len(data) > MAX_FILE_BYTES:
        raise ModelError(f"{label}: the file is larger than {MAX_FILE_BYTES:,} bytes; a "
                         "model file is TOML text (see docs/model-format.md)")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ModelError(f"{label}: not UTF-8 text (invalid byte at offset {exc.start})") from None
    return parse_model(text, path=label)


def parse_model(text, path=None):
    """Parse and validate model text.

    Parameters
    ----------
    text : str
        The TOML text of a model.
    path : str, optional
        Where the text came from; used in messages and kept as ``Model.path``.

    Returns
    -------
    Model

    Raises
    ------
    ModelError
        One line naming the file, the section and key and, for expressions, the column.

    Examples
    --------
    >>> model = parse_model('''
    ... [model]
    ... name = "decay"
    ... [states]
    ... x = { range = [1, 4] }
    ... [parameters]
    ... k = 0.5
    ... [equations]
    ... x = "-k*x"
    ... [constraints]
    ... floor = "x >= 0.5"
    ... ''')
    >>> model.equations, model.constraints[0].g
    ((-k*x,), x - 1/2)
    >>> parse_model('[model]\\nname = "decay"\\n[states]\\nx = { range = [1, 4] }')
    Traceback (most recent call last):
    ...
    certify.errors.ModelError: <model text>: missing section [equations]
    """
    label = path if path is not None else "<model text>"
    if len(text) > MAX_FILE_BYTES:
        raise ModelError(f"{label}: the text is longer than {MAX_FILE_BYTES:,} characters")
    try:
        digest = hashlib.sha256(text.encode("utf-8")).hexdigest()
    except UnicodeEncodeError as exc:
        raise ModelError(f"{label}: the text cannot be encoded as UTF-8 ({exc.reason})") from None
    try:
        data = tomllib.loads(text.removeprefix("\ufeff"), parse_float=Decimal)
    except tomllib.TOMLDecodeError as exc:
        hint = ""
        if any(word in str(exc) for word in ("overwrite", "twice", "Duplicate")):
            hint = " (a key or table is written twice)"
        raise ModelError(f"{label}: TOML syntax error: {exc}{hint}") from None
    except ValueError as exc:
        raise ModelError(f"{label}: cannot read the file as TOML: {exc}") from None
    return _Reader(label).read(data, path=path, text=text, sha256=digest)


class _Reader:
    """Validates the TOML data of one model file; ``label`` names the file in messages."""

    def __init__(self, label):
        self.label = label
        self.declared = {}  # name -> section that declared it
        self.referenced = set()  # symbols used by expressions as written
        self.conditions = {}  # expression location -> DomainConditions of its written operations
        self.used = {}  # expression location -> symbols its text refers to
        self.carried = {}  # definition symbol -> DomainConditions it brings along, substituted
        self.kept = {}  # expression location -> its DomainConditions, definitions substituted
        self.warnings = []

    def error(self, where, message):
        return ModelError(f"{self.label}: {where}: {message}")

    def read(self, data, *, path, text, sha256):
        data = self.limits_section(data)
        for key in data:
            if key not in SECTIONS:
                shown = SECTIONS[:5] + ("limits",) + SECTIONS[5:]  # both names are read
                raise ModelError(f"{self.label}: {_unknown('section', key, shown, brackets=True)}")
        for section in _REQUIRED_SECTIONS:
            if section not in data:
                shown = "limits" if section == "constraints" else section
                raise ModelError(f"{self.label}: missing section [{shown}]")
        tables = {section: self.table(data, section) for section in SECTIONS}
        header = self.header(tables["model"])
        states = self.states(tables["states"])
        parameters = self.parameters(tables["parameters"])
        symbols = {item.name: item.symbol for item in states + parameters}
        definitions = self.definitions(tables["definitions"], symbols)
        scope = symbols | {name: sympy.Symbol(name, real=True) for name in definitions}
        expand = self.expansion(definitions)
        written = self.equations(tables["equations"], states, scope)
        equations = tuple(
            self.substituted(eq, expand, f"[equations] {state.name}") for state, eq in zip(states, written)
        )
        constraints = self.constraints(tables["constraints"], scope, expand)
        settings = self.settings(tables["settings"])
        controls = self.controls(tables["controls"], parameters)
        self.check_use(states, parameters, definitions, equations, constraints)
        return Model(
            name=header["name"],
            time_unit=header["time_unit"],
            description=header["description"],
            path=path,
            text=text,
            sha256=sha256,
            states=states,
            parameters=parameters,
            definitions=definitions,
            equations=equations,
            constraints=constraints,
            settings=settings,
            warnings=tuple(self.warnings),
            conditions={_canonical(where): self.kept[where] for where in self.kept
                        if where.startswith(("[equations]", "[constraints]", "[limits]"))},
            controls=controls,
        )

    def limits_section(self, data):
        """Read ``[limits]`` (the documented name) as ``[constraints]`` (the older one)."""
        self.limits_name = "limits" if "limits" in data else "constraints"  # for messages
        if "limits" not in data:
            return data
        if "constraints" in data:
            raise ModelError(f"{self.label}: [limits] and [constraints] are the same section; "
                             "write the limits once, under [limits]")
        return {("constraints" if key == "limits" else key): v for key, v in data.items()}

    def table(self, data, section):
        value = data.get(section, {})
        if not isinstance(value, dict):
            raise self.error(f"[{section}]", f"must be a section (a table), not {_describe(value)}")
        return value

    def keys(self, table, allowed, where):
        for key in table:
            if key not in allowed:
                raise self.error(where, _unknown("key", key, allowed))

    def text(self, value, where, *, required=False, field=None):
        if not isinstance(value, str):
            raise self.error(where, f"expected text in quotes, got {_describe(value)}")
        if required and not value.strip():
            raise self.error(where, "must not be empty")
        if field is not None and len(value) > TEXT_LENGTHS[field]:
            raise self.error(where, f"is {len(value):,} characters long; at most "
                                    f"{TEXT_LENGTHS[field]:,} are allowed")
        return value

    def number(self, value, where):
        if isinstance(value, bool) or not isinstance(value, (int, Decimal)):
            hint = " (numbers are written without quotes)" if isinstance(value, str) else ""
            raise self.error(where, f"expected a number, got {_describe(value)}{hint}")
        if isinstance(value, Decimal) and not value.is_finite():
            raise self.error(where, f"must be a finite number, got {str(value).lower()}")
        exact = Fraction(value)
        if not is_number_in_range(exact):
            raise self.error(where, NUMBER_RANGE_MESSAGE)
        return exact

    def pair(self, value, where):
        if not isinstance(value, list) or len(value) != 2:
            raise self.error(where, f"expected a range [lo, hi], got {_describe(value)}")
        return self.number(value[0], where), self.number(value[1], where)

    def name(self, name, section):
        where = f"[{section}] {_key(name)}"
        if not _NAME.fullmatch(name):
            raise self.error(
                where, "not a valid name (use up to 64 ASCII letters, digits and '_', not starting with a digit)"
            )
        if keyword.iskeyword(name):
            raise self.error(where, "is a reserved word of the expression syntax; choose another name")
        if name == TIME_NAME:
            raise self.error(where, "is reserved for time, which may not appear (models are autonomous)")
        if name in CONSTANTS:
            raise self.error(where, f"is a reserved name (the constant {name}); choose another name")
        if name in FUNCTION_NAMES:
            raise self.error(where, f"is a reserved name (the function {name}()); choose another name")
        if section not in ("constraints", "limits"):  # limits have names of their own
            if name in self.declared:
                raise self.error(where, f"the name is already declared in [{self.declared[name]}]")
            self.declared[name] = section

    def header(self, table):
        self.keys(table, ("name", "time_unit", "description"), "[model]")
        if "name" not in table:
            raise self.error("[model]", "missing key 'name'")
        return {
            "name": self.text(table["name"], "[model] name", required=True, field="name"),
            "time_unit": self.text(table.get("time_unit", ""), "[model] time_unit",
                                   field="time_unit"),
            "description": self.text(table.get("description", ""), "[model] description",
                                     field="description"),
        }

    def states(self, table):
        if not table:
            raise self.error("[states]", "no states are declared (a model needs 1 to 6)")
        if len(table) > MAX_STATES:
            raise self.error("[states]", f"{len(table)} states are declared; at most {MAX_STATES} are allowed")
        states = []
        for name, value in table.items():
            self.name(name, "states")
            where = f"[states] {name}"
            if isinstance(value, list):
                value = {"range": value}
            if not isinstance(value, dict):
                raise self.error(where, f"expected {{ range = [lo, hi], unit = ... }}, got {_describe(value)}")
            self.keys(value, ("range", "guess", "unit", "about"), where)
            if "range" not in value:
                raise self.error(where, "missing key 'range'")
            lo, hi = self.pair(value["range"], f"{where}: range")
            if lo == hi:
                raise self.error(where, f"the range {_range(lo, hi)} is empty (lo must be below hi)")
            if lo > hi:
                raise self.error(where, f"the range {_range(lo, hi)} is reversed (write [lo, hi] with lo < hi)")
            unit = self.text(value.get("unit", ""), f"{where}: unit", field="unit")
            about = self.text(value.get("about", ""), f"{where}: about", field="about")
            if value.get("guess", False) is not False:
                if value["guess"] is not True:
                    raise self.error(f"{where}: guess", f"expected true or false, got {_describe(value['guess'])}")
                self.warnings.append(f"state {name!r}: the range {_range(lo, hi)} is a guess "
                                     "(guess = true, written by certify import); set the "
                                     "range you mean to study and remove the mark")
            states.append(State(name, lo, hi, unit, about))
        return tuple(states)

    def parameters(self, table):
        parameters = []
        for name, value in table.items():
            self.name(name, "parameters")
            where = f"[parameters] {name}"
            unit = ""
            if isinstance(value, dict):
                self.keys(value, ("value", "range", "unit"), where)
                if ("value" in value) == ("range" in value):
                    raise self.error(where, "give exactly one of 'value' and 'range'")
                unit = self.text(value.get("unit", ""), f"{where}: unit", field="unit")
                value = value.get("value", value.get("range"))
            if isinstance(value, list):
                lo, hi = self.pair(value, where)
                if lo > hi:
                    raise self.error(where, f"the range {_range(lo, hi)} is reversed (write [lo, hi] with lo <= hi)")
            else:
                lo = hi = self.number(value, where)
            parameters.append(Parameter(name, lo, hi, unit))
        return tuple(parameters)

    def definitions(self, table, symbols):
        for name in table:
            self.name(name, "definitions")
        scope = symbols | {name: sympy.Symbol(name, real=True) for name in table}
        return {name: self.parse(text, scope, f"[definitions] {name}") for name, text in table.items()}

    def expansion(self, definitions):
        """Map each definition symbol to its expression in states and parameters."""
        symbols = {name: sympy.Symbol(name, real=True) for name in definitions}
        graph = {  # as written: a reference that simplification cancels still counts
            name: [other for other, symbol in symbols.items() if symbol in self.used[f"[definitions] {name}"]]
            for name in definitions
        }
        try:
            order = list(graphlib.TopologicalSorter(graph).static_order())
        except graphlib.CycleError as exc:
            cycle = " -> ".join(reversed(exc.args[1]))
            raise self.error("[definitions]", f"definitions refer to each other in a cycle: {cycle}") from None
        expand = {}
        for name in order:
            where = f"[definitions] {name}"
            expand[symbols[name]] = self.substituted(definitions[name], expand, where)
            self.carried[symbols[name]] = self.kept[where]
        return expand

    def parse(self, text, scope, where, *, limit=False):
        """Parse one expression (or limit) of the file, noting which names and conditions it uses."""
        self.text(text, where, required=limit)
        parse = parse_constraint if limit else parse_expression
        self.conditions[where], names = [], set()
        expr = parse(text, scope, where=f"{self.label}: {where}", conditions=self.conditions[where], used=names)
        self.used[where] = {scope[name] for name in names}
        self.referenced |= self.used[where]
        return expr

    def kept_conditions(self, where, expand):
        """The conditions of the expression parsed at ``where`` and of the definitions it uses."""
        own = [condition.substituted(expand) for condition in self.conditions[where]]
        used = [symbol for symbol in self.carried if symbol in self.used[where]]
        return own + [condition for symbol in used for condition in self.carried[symbol]]

    def substituted(self, expr, expand, where):
        """``expr`` with the definitions substituted, refused when that removes a singularity.

        Substitution simplifies as it builds (a definition ``d = 1/x`` in ``x*d`` gives
        ``1``): every condition of the written operations, here and in the definitions
        used, must still hold wherever the result is defined.
        """
        result = expr.xreplace(expand)
        if result.has(*_UNDEFINED):
            raise self.error(where, "undefined once the definitions are substituted (a division by zero or similar)")
        self.kept[where] = tuple(self.kept_conditions(where, expand))
        if expand:
            subject = f"{where} (with the definitions substituted)"
            check_conditions(result, self.kept[where], subject=subject)
        return result

    def equations(self, table, states, scope):
        names = [state.name for state in states]
        for key in table:
            if key not in names:
                close = difflib.get_close_matches(key, names, n=1)
                hint = f" (did you mean {close[0]!r}?)" if close else ""
                states = ", ".join(names)
                raise self.error(f"[equations] {_key(key)}", f"there is no state of this name{hint}; states: {states}")
        for name in names:
            if name not in table:
                raise self.error("[equations]", f"state {name!r} has no equation")
        return tuple(self.parse(table[name], scope, f"[equations] {name}") for name in names)

    def constraints(self, table, scope, expand):
        if not table:
            raise self.error(f"[{self.limits_name}]",
                             "no limits are declared (a model needs at least one)")
        constraints = []
        for name, text in table.items():
            self.name(name, self.limits_name)
            where = f"[{self.limits_name}] {name}"
            g = self.substituted(self.parse(text, scope, where, limit=True), expand, where)
            if g.has(*_KINKS):
                raise self.error(where, "abs, min and max are not allowed in limits; write each case as a limit")
            constraints.append(Constraint(name, text, g))
        return tuple(constraints)

    def settings(self, table):
        settings = {}
        for key, value in table.items():
            if key not in SETTINGS:
                raise self.error("[settings]", _unknown("key", key, SETTINGS))
            rule = SETTINGS[key]
            where = f"[settings] {key}"
            exact = self.number(value, where)
            if rule.kind == "int":
                if exact.denominator != 1 or not rule.lo <= exact <= rule.hi:
                    got = format_number(exact)
                    raise self.error(where, f"must be a whole number from {rule.lo} to {rule.hi:,}, got {got}")
                settings[key] = int(exact)
            else:
                if exact <= 0:
                    raise self.error(where, f"must be a number above 0, got {format_number(exact)}")
                settings[key] = float(exact)
        if settings.get("min_horizon", 0) > settings.get("max_horizon", float("inf")):
            raise self.error("[settings]", "min_horizon is above max_horizon")
        return settings

    def controls(self, table, parameters):
        """Read ``[controls]``: ``NAME = { settings = [...], hold = T }`` or
        ``NAME = { range = [lo, hi], settings = n, hold = T }``."""
        names = [parameter.name for parameter in parameters]
        controls, combinations = [], 1
        for name, value in table.items():
            where = f"[controls] {_key(name)}"
            if name not in names:
                close = difflib.get_close_matches(str(name), names, n=1)
                hint = f" (did you mean {close[0]!r}?)" if close else ""
                raise self.error(where, f"is not a parameter{hint}; a control sets a parameter "
                                        f"of [parameters] ({', '.join(names) or 'none declared'})")
            if not isinstance(value, dict):
                raise self.error(where, f"expected {{ settings = [...], hold = ... }}, "
                                        f"got {_describe(value)}")
            self.keys(value, ("settings", "range", "hold"), where)
            if "settings" not in value:
                raise self.error(where, "missing key 'settings'")
            if "range" in value:
                settings = self.control_range(value, where)
            else:
                settings = self.control_list(value["settings"], f"{where}: settings")
            hold = self.number(value.get("hold", 0), f"{where}: hold")
            if hold < 0:
                raise self.error(f"{where}: hold", f"must be 0 or more (a time), got "
                                                   f"{format_number(hold)}")
            combinations *= len(settings)
            if combinations > MAX_SETTINGS:
                raise self.error("[controls]", f"the controls have {combinations} combinations "
                                               f"of settings; at most {MAX_SETTINGS} are allowed")
            controls.append(Control(name, settings, hold))
        return tuple(controls)

    def control_list(self, value, where):
        if not isinstance(value, list):
            raise self.error(where, f"expected a list of numbers [a, b, ...], got {_describe(value)}")
        if not value:
            raise self.error(where, "is empty (list at least one setting)")
        if len(value) > MAX_SETTINGS:
            raise self.error(where, f"{len(value)} settings; at most {MAX_SETTINGS} are allowed")
        settings = [self.number(v, where) for v in value]
        if len(set(settings)) < len(settings):
            raise self.error(where, "lists a setting twice")
        return tuple(settings)

    def control_range(self, value, where):
        lo, hi = self.pair(value["range"], f"{where}: range")
        if not lo < hi:
            raise self.error(f"{where}: range", f"{_range(lo, hi)} must have lo below hi")
        n = value["settings"]
        if isinstance(n, bool) or not isinstance(n, int) or not 2 <= n <= MAX_SETTINGS:
            raise self.error(f"{where}: settings", f"with a range, the number of settings: a "
                                                   f"whole number from 2 to {MAX_SETTINGS}, got "
                                                   f"{_describe(n)}")
        return tuple(lo + (hi - lo) * Fraction(k, n - 1) for k in range(n))

    def check_use(self, states, parameters, definitions, equations, constraints):
        """Record warnings for things that are declared but play no part."""
        used = set().union(*(expr.free_symbols for expr in equations + tuple(c.g for c in constraints)))
        for state in states:
            if state.symbol not in used:
                self.warnings.append(f"state {state.name!r} appears in no equation and no limit")
        for parameter in parameters:
            if parameter.symbol not in used:
                self.warnings.append(f"parameter {parameter.name!r} appears in no equation and no limit")
        for name in definitions:
            if sympy.Symbol(name, real=True) not in self.referenced:
                self.warnings.append(f"definition {name!r} is not used")
        state_symbols = {state.symbol for state in states}
        for constraint in constraints:
            if not constraint.g.free_symbols & state_symbols:
                self.warnings.append(f"limit {constraint.name!r} involves no state: it holds everywhere or nowhere")


def _key(name):
    """A key as shown in messages: plain when it is a valid name, quoted otherwise."""
    return name if _NAME.fullmatch(name) else repr(name)


def _range(lo, hi):
    return f"[{format_number(lo)}, {format_number(hi)}]"


def _describe(value):
    if isinstance(value, bool):
        return "true/false"
    if isinstance(value, (int, Decimal)):
        return f"the number {value}"
    if isinstance(value, str):
        return "text" if len(value) > 40 else f"the text {value!r}"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "a table"
    return f"a {type(value).__name__}"


def _unknown(kind, key, allowed, *, brackets=False):
    def wrap(word):
        return f"[{word}]" if brackets and _NAME.fullmatch(str(word)) else repr(word)

    close = difflib.get_close_matches(str(key), list(allowed), n=1)
    hint = f" (did you mean {wrap(close[0])}?)" if close else ""
    return f"unknown {kind} {wrap(key)}{hint}; allowed: {', '.join(wrap(word) for word in allowed)}"


def _canonical(where):
    """Key of ``Model.conditions``: limits under ``[constraints]``, whichever name the file used."""
    return "[constraints]" + where[len("[limits]"):] if where.startswith("[limits]") else where
