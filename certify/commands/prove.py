"""``certify prove MODEL``: prove a map of fates and write its certificate."""

import json
import sys

from certify.errors import UsageError

__all__ = ["HELP", "add_arguments", "run", "parse_param", "run_proof"]

HELP = "prove which starting states stay within the limits, which must cross, and write a certificate"


def add_arguments(parser):
    """Add the options of ``certify prove`` to ``parser``."""
    parser.add_argument("model", metavar="MODEL", help="model file (TOML)")
    add_budget_arguments(parser)


def add_budget_arguments(parser):
    """Options shared by ``prove`` and ``demo``."""
    parser.add_argument("--out", metavar="DIR",
                        help="output folder (default: proofs_out/<model file stem>/)")
    parser.add_argument("--max-depth", type=int, metavar="D",
                        help="deepest bisection level of a cell (cells of 1/2^D of each side)")
    parser.add_argument("--max-cells", type=int, metavar="N", help="largest number of cells")
    parser.add_argument("--time-limit", type=float, metavar="S",
                        help="stop refining after S seconds (the last finished round is kept)")
    parser.add_argument("--param", action="append", default=[], metavar="NAME=VALUE|NAME=LO:HI",
                        help="override a parameter by a number or an interval (repeatable)")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON on stdout")
    parser.add_argument("--quiet", action="store_true", help="no progress bar, no table")


def parse_param(text):
    """Parse ``NAME=VALUE`` or ``NAME=LO:HI`` into ``(name, (lo, hi))`` with exact Fractions.

    Raises
    ------
    UsageError
    """
    from fractions import Fraction

    name, sep, value = text.partition("=")
    name = name.strip()
    if not sep or not name:
        raise UsageError(f"--param {text!r}: write NAME=VALUE or NAME=LO:HI")
    parts = value.split(":")
    if len(parts) not in (1, 2):
        raise UsageError(f"--param {text!r}: write NAME=VALUE or NAME=LO:HI")
    try:
        nums = [Fraction(p.strip()) for p in parts]
    except (ValueError, ZeroDivisionError):
        raise UsageError(f"--param {text!r}: {value!r} is not a number or LO:HI") from None
    lo, hi = nums[0], nums[-1]
    if lo > hi:
        raise UsageError(f"--param {text!r}: LO is above HI")
    return name, (lo, hi)


def _check_budget(args):
    if args.max_depth is not None and not 0 <= args.max_depth <= 30:
        raise UsageError("--max-depth must be between 0 and 30")
    if args.max_cells is not None and args.max_cells < 1:
        raise UsageError("--max-cells must be at least 1")
    if args.time_limit is not None and not args.time_limit > 0:
        raise UsageError("--time-limit must be a positive number of seconds")


def run_proof(model_path, args, default_out=None):
    """Load, prove, write outputs; shared by ``prove`` and ``demo``. Returns exit code."""
    from pathlib import Path

    from certify.model import load_model
    from certify.prove import prove, write_proof
    from certify.report import summary_table

    _check_budget(args)
    model = load_model(model_path)
    if args.param:
        model = model.with_parameters(dict(parse_param(p) for p in args.param))
    out = Path(args.out or default_out or Path("proofs_out") / Path(model_path).stem)
    progress = None if args.quiet else _progress_bar()
    proof = prove(model, max_depth=args.max_depth, max_cells=args.max_cells,
                  time_limit=args.time_limit, progress=progress)
    if progress is not None:
        progress.close()
    summary = write_proof(proof, out)
    if args.json:
        print(json.dumps(summary, indent=2))
    elif not args.quiet:
        print(summary_table(summary))
    if proof.interrupted:
        print("certify: interrupted; wrote the proof of the last finished round", file=sys.stderr)
        return 130
    return 0


class _progress_bar:
    """Progress on stderr: rounds, cells, decided fraction."""

    def __init__(self):
        from tqdm import tqdm

        self.bar = tqdm(total=100, unit="%", file=sys.stderr, leave=False,
                        bar_format="{desc} |{bar}| {n:.1f}% decided [{elapsed}]")

    def __call__(self, rounds, n_leaves, decided, seconds):
        self.bar.set_description(f"round {rounds}, {n_leaves} cells")
        self.bar.n = 100 * decided
        self.bar.refresh()

    def close(self):
        self.bar.close()


def run(args):
    """Prove the model named by ``args.model``."""
    return run_proof(args.model, args)
