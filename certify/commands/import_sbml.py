"""``certify import MODEL.xml``: write a certify model file from an SBML model."""

import sys
from pathlib import Path

from certify.errors import UsageError

__all__ = ["HELP", "EXITS", "add_arguments", "add_sbml_arguments", "sbml_options", "run"]

HELP = "write a certify model file (TOML) from an SBML model (Level 2 or 3)"
EXITS = "0 done, 2 usage or input error, 130 interrupted"


def add_arguments(parser):
    """Add the options of ``certify import`` to ``parser``."""
    parser.add_argument("model", metavar="MODEL.xml", help="SBML file, e.g. tests/data/sbml/"
                                                          "lotka_volterra.xml")
    parser.add_argument("--out", metavar="MODEL.toml",
                        help="where to write the model file (default: MODEL.toml beside MODEL.xml)")
    parser.add_argument("--force", action="store_true", help="overwrite an existing --out file")
    add_sbml_arguments(parser)
    parser.add_argument("--param", action="append", default=[], metavar="NAME=VALUE|NAME=LO:HI",
                        help="write a parameter as this number or interval (repeatable)")


def add_sbml_arguments(parser):
    """Options that complete an SBML model: ``--range`` and ``--limit`` (``import``, ``prove``)."""
    parser.add_argument("--range", action="append", default=[], metavar="NAME=LO:HI",
                        help="SBML models: the analysis range of a state (repeatable; default: "
                             "a guess, marked as such)")
    parser.add_argument("--limit", action="append", default=[], metavar="EXPR",
                        help="SBML models: a limit such as \"X <= 2\" (repeatable)")


def sbml_options(args):
    """``(ranges, limits)`` of ``--range`` and ``--limit`` (none for commands without them)."""
    from certify.commands.prove import parse_param

    ranges = {}
    for text in getattr(args, "range", []):
        name, (lo, hi) = parse_param(text, option="--range")
        if lo >= hi:
            raise UsageError(f"--range {text!r}: write NAME=LO:HI with LO below HI")
        ranges[name] = (lo, hi)
    return ranges, list(getattr(args, "limit", []))


def run(args):
    """Import the SBML file ``args.model`` and write its model file; return 0."""
    from certify.commands.prove import parse_param
    from certify.files import write_atomic
    from certify.model import parse_model
    from certify.sbml import read_sbml, toml_text

    ranges, limits = sbml_options(args)
    params = dict(parse_param(text) for text in args.param)
    out = Path(args.out) if args.out else Path(args.model).with_suffix(".toml")
    if out.exists() and not args.force:
        raise UsageError(f"{out}: exists already; choose another --out or add --force")
    imported = read_sbml(args.model, ranges=ranges, params=params)
    # the written file is read back as certify will read it (with an example limit if none)
    trial = limits or [f"{imported.states[0].name} <= 0"]
    model = parse_model(toml_text(imported, trial), path=str(args.model))
    try:
        write_atomic(out, toml_text(imported, limits).encode("utf-8"))
    except OSError as exc:
        raise UsageError(f"{out}: cannot write the model file ({exc.strerror or exc})") from None
    guessed = [state.name for state in imported.states if state.guess]
    print(f"wrote {out}: {len(model.states)} states, {len(model.parameters)} parameters, "
          f"{len(model.definitions)} definitions")
    if guessed:
        print(f"note: the ranges of {', '.join(guessed)} are guesses (guess = true); set "
              "the ranges you mean to study", file=sys.stderr)
    if not limits:
        print(f"note: add at least one limit under [limits] in {out} (or pass --limit) "
              "before 'certify prove'", file=sys.stderr)
    return 0
