"""``certify show MODEL``: print a model as certify reads it."""

import json

from certify.expr import format_expression, format_number
from certify.faces import window_sides
from certify.model import load_model

__all__ = ["HELP", "EXITS", "add_arguments", "describe_model", "run"]

HELP = "print a model as certify reads it: states, parameters, equations, limits, warnings"
EXITS = "0 done, 2 usage or input error, 130 interrupted"

_KINK_NOTE = (
    "abs/min/max make the right-hand side non-smooth: a step whose tube may hold a kink "
    "is taken at order 1 (no derivative is taken through a kink), the others on the "
    "smooth side they keep to"
)


def add_arguments(parser):
    """Add the options of ``certify show`` to ``parser``."""
    parser.add_argument("model", metavar="MODEL", help="model file (TOML), e.g. models/fermenter.toml")
    parser.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def run(args):
    """Print the model named by ``args.model``; return 0."""
    model = load_model(args.model)
    if args.json:
        print(json.dumps(describe_model(model), indent=2))
    else:
        print(_text(model))
    return 0


def describe_model(model):
    """Describe a model as plain data (what ``certify show --json`` prints).

    Parameters
    ----------
    model : certify.model.Model

    Returns
    -------
    dict
        JSON-ready data. Exact numbers are strings (``"12"``, ``"0.5"``, ``"1/3"``);
        expressions are text in the model-file grammar.
    """
    state_names = [state.name for state in model.states]
    return {
        "name": model.name,
        "description": model.description,
        "time_unit": model.time_unit,
        "path": model.path,
        "sha256": model.sha256,
        "states": [
            {
                "name": state.name,
                "lo": format_number(state.lo),
                "hi": format_number(state.hi),
                "unit": state.unit,
                "about": state.about,
            }
            for state in model.states
        ],
        "parameters": [
            {
                "name": parameter.name,
                "lo": format_number(parameter.lo),
                "hi": format_number(parameter.hi),
                "unit": parameter.unit,
                "is_interval": parameter.is_interval,
            }
            for parameter in model.parameters
        ],
        "definitions": {name: format_expression(expr) for name, expr in model.definitions.items()},
        "equations": {name: format_expression(expr) for name, expr in zip(state_names, model.equations)},
        "constraints": [
            {"name": limit.name, "text": limit.text, "g": format_expression(limit.g)}
            for limit in model.constraints
        ],
        "settings": model.settings,
        "controls": [{"name": c.name, "settings": [format_number(v) for v in c.settings],
                      "hold": format_number(c.hold)} for c in model.controls],
        "warnings": list(model.warnings),
        "uses_kinks": model.uses_kinks,
        "sides": [dict(side, value=format_number(side["value"])) for side in window_sides(model)],
    }


def _unit(unit):
    return f" {unit}" if unit else ""


def _text(model):
    lines = [f"model: {model.name}"]
    if model.path is not None:
        lines.append(f"file: {model.path}")
    lines.append(f"sha256: {model.sha256}")
    lines.append(f"time unit: {model.time_unit or '(not given)'}")
    if model.description:
        lines.append(f"description: {model.description}")

    lines += ["", "states (analysis window):"]
    width = max(len(state.name) for state in model.states)
    for state in model.states:
        about = f"  ({state.about})" if state.about else ""
        window = f"[{format_number(state.lo)}, {format_number(state.hi)}]"
        lines.append(f"  {state.name:<{width}} in {window}{_unit(state.unit)}{about}")

    lines += ["", "parameters:"]
    for parameter in model.parameters:
        if parameter.is_interval:
            value = f"for every value in [{format_number(parameter.lo)}, {format_number(parameter.hi)}]"
        else:
            value = f"= {format_number(parameter.lo)}"
        lines.append(f"  {parameter.name} {value}{_unit(parameter.unit)}")
    if not model.parameters:
        lines.append("  (none)")

    if model.definitions:
        lines += ["", "definitions:"]
        lines += [f"  {name} = {format_expression(expr)}" for name, expr in model.definitions.items()]

    lines += ["", "equations (definitions substituted):"]
    for state, expr in zip(model.states, model.equations):
        lines.append(f"  {state.name}' = {format_expression(expr)}")

    lines += ["", "limits (closed; each holds where g >= 0):"]
    for limit in model.constraints:
        lines.append(f"  {limit.name}: {limit.text}    g = {format_expression(limit.g)} >= 0")

    lines += ["", "window sides (trajectories may leave the window only at open sides; "
                  "widen it there when cells stay undecided):"]
    lines += [f"  {side['state']} = {format_number(side['value'])}: {side['kind']}"
              for side in window_sides(model)]

    if model.controls:
        lines += ["", "controls (certify prove proves a policy map):"]
        lines += [f"  {c.name} in {{{', '.join(format_number(v) for v in c.settings)}}}, "
                  f"each held at least {format_number(c.hold)}" for c in model.controls]

    lines += ["", "settings:"]
    lines += [f"  {key} = {value}" for key, value in model.settings.items()] or ["  (defaults)"]

    if model.warnings:
        lines += ["", "warnings:"]
        lines += [f"  warning: {warning}" for warning in model.warnings]
    if model.uses_kinks:
        lines += ["", f"note: {_KINK_NOTE}"]
    return "\n".join(lines)
