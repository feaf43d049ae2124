"""``certify prove MODEL``: prove a map of fates and write its certificate."""

import json
import math
import sys
import time

from certify.errors import UsageError
from certify.executors import MOST_FLOW_WORKERS

__all__ = ["HELP", "EXITS", "add_arguments", "run", "parse_param", "run_proof",
           "add_budget_arguments", "add_depth_argument", "check_depth", "progress_bar"]

HELP = "prove which starting states stay within the limits, which must cross, and write a certificate"
EXITS = "0 done, 2 usage or input error, 130 interrupted (the last finished round is written)"


def add_arguments(parser):
    """Add the options of ``certify prove`` to ``parser``."""
    from certify.commands.import_sbml import add_sbml_arguments

    parser.add_argument("model", metavar="MODEL", help="model file (TOML), or an SBML file "
                                                       "(.xml) with --limit")
    add_budget_arguments(parser)
    add_sbml_arguments(parser)
    parser.add_argument("--executor", choices=["local", "dask"], default="local",
                        help="where each round's flow batches run: this machine (default) "
                             "or a Dask cluster; the certificate is the same")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help="address of a running Dask scheduler, e.g. tcp://HOST:8786 "
                             "(default with --executor dask: a LocalCluster on 127.0.0.1)")
    parser.add_argument("--workers", type=int, metavar="N",
                        help="processes of the LocalCluster (default: all cores); with "
                             "--executor local, a process pool of N processes (default: "
                             "for models of 3 or more states one per core, at most "
                             f"{MOST_FLOW_WORKERS}; otherwise none, the flows run in "
                             "this process)")


def add_budget_arguments(parser):
    """Options shared by ``prove`` and ``demo``."""
    parser.add_argument("--out", metavar="DIR",
                        help="output folder (default: proofs_out/<model file stem>/)")
    add_depth_argument(parser, "deepest bisection level of a cell (cells of 1/2^D of each side)",
                       "max_depth")
    parser.add_argument("--max-cells", type=int, metavar="N",
                        help=f"largest number of cells (default: the model's [settings] "
                             f"max_cells, else {_budget_default('max_cells'):,})")
    parser.add_argument("--time-limit", type=float, metavar="S",
                        help=f"stop refining after S seconds, keeping the last finished round "
                             f"(default: the model's [settings] time_limit, else "
                             f"{_budget_default('time_limit'):g})")
    parser.add_argument("--param", action="append", default=[], metavar="NAME=VALUE|NAME=LO:HI",
                        help="override a parameter by a number or an interval (repeatable)")
    parser.add_argument("--slice", metavar="NAME=V[,V...]",
                        help="models of 3 or more states: draw the slices at these levels "
                             "of state NAME (default: 3 levels of the third state)")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON on stdout")
    parser.add_argument("--quiet", action="store_true", help="no progress bar, no table")


def _budget_default(key):
    from certify.prove import Budget
    return getattr(Budget(), key)


def add_depth_argument(parser, what, key=None):
    """Add ``--max-depth`` with the range of the model's ``[settings] max_depth``."""
    from certify.model import SETTINGS

    rule = SETTINGS["max_depth"]
    default = (f"the model's [settings] max_depth, else {_budget_default(key)}" if key
               else "the model's [settings] max_depth, else the command's own")
    parser.add_argument("--max-depth", type=int, metavar="D",
                        help=f"{what}; {rule.lo} to {rule.hi} (default: {default})")


def check_depth(depth):
    """Raise UsageError unless `depth` is None or in the range ``[settings]`` accepts."""
    from certify.model import SETTINGS

    rule = SETTINGS["max_depth"]
    if depth is not None and not rule.lo <= depth <= rule.hi:
        raise UsageError(f"--max-depth must be between {rule.lo} and {rule.hi}")


def parse_param(text, option="--param"):
    """Parse ``NAME=VALUE`` or ``NAME=LO:HI`` into ``(name, (lo, hi))`` with exact Fractions.

    ``option`` names the command-line option in messages.

    Raises
    ------
    UsageError
    """
    from fractions import Fraction

    name, sep, value = text.partition("=")
    name = name.strip()
    if not sep or not name:
        raise UsageError(f"{option} {text!r}: write NAME=VALUE or NAME=LO:HI")
    parts = value.split(":")
    if len(parts) not in (1, 2):
        raise UsageError(f"{option} {text!r}: write NAME=VALUE or NAME=LO:HI")
    try:
        nums = [Fraction(p.strip()) for p in parts]
    except (ValueError, ZeroDivisionError):
        raise UsageError(f"{option} {text!r}: {value!r} is not a number or LO:HI") from None
    lo, hi = nums[0], nums[-1]
    if lo > hi:
        raise UsageError(f"{option} {text!r}: LO is above HI")
    return name, (lo, hi)


def _check_budget(args):
    check_depth(args.max_depth)
    if args.max_cells is not None and args.max_cells < 1:
        raise UsageError("--max-cells must be at least 1")
    if args.time_limit is not None and not args.time_limit > 0:
        raise UsageError("--time-limit must be a positive number of seconds")


def run_proof(model_path, args, default_out=None):
    """Load, prove, write outputs; shared by ``prove`` and ``demo``. Returns exit code."""
    from pathlib import Path

    from certify.executors import check_executor, flow_workers
    from certify.files import output_folder
    from certify.prove import prove, write_proof
    from certify.report import summary_table

    _check_budget(args)
    executor = getattr(args, "executor", "local")  # demo has no executor options
    scheduler, workers = getattr(args, "scheduler", None), getattr(args, "workers", None)
    check_executor(executor, scheduler, workers)
    model = _load(model_path, args)
    if args.param:
        model = model.with_parameters(dict(parse_param(p) for p in args.param))
    out = output_folder(args.out or default_out or Path("proofs_out") / Path(model_path).stem)
    slices = None
    if args.slice:
        from certify.plots import parse_slice
        if len(model.states) < 3:
            raise UsageError("--slice: only models of 3 or more states are drawn in slices")
        slices = parse_slice(model, args.slice)
    progress = None if args.quiet else progress_bar()
    if model.controls:
        return _run_policy(model, out, args, progress)
    if executor == "local" and workers is None and len(model.states) >= 3:
        workers = flow_workers()
    proof = prove(model, max_depth=args.max_depth, max_cells=args.max_cells,
                  time_limit=args.time_limit, progress=progress, executor=executor,
                  scheduler=scheduler, workers=workers)
    if progress is not None:
        progress.close()
    started = time.time()
    try:
        summary = write_proof(proof, out, figures=False)
        from certify.plots import save_figures
        save_figures(proof, out, slices)
    except KeyboardInterrupt:
        _report_partial(out, started)
        return 130
    if args.json:
        print(json.dumps(summary, indent=2))
    elif not args.quiet:
        print(summary_table(summary))
    if proof.interrupted:
        print("certify: interrupted; wrote the proof of the last finished round", file=sys.stderr)
        return 130
    return 0


def _load(model_path, args):
    """The model of a TOML file, or of an SBML file completed by --range and --limit."""
    from certify.commands.import_sbml import sbml_options
    from certify.sbml import load_model_file

    ranges, limits = sbml_options(args)
    return load_model_file(model_path, ranges=ranges, limits=limits)


def _run_policy(model, out, args, progress):
    """A model with ``[controls]``: prove a policy map and write it (certify.policy)."""
    from certify.policy import prove_policy
    from certify.policy_output import policy_table, write_policy

    controls = {c.name for c in model.controls}
    overridden = sorted(controls & {parse_param(p)[0] for p in args.param})
    if overridden:
        raise UsageError(f"--param {overridden[0]}: a control's settings come from the "
                         f"model's [controls]")
    pp = prove_policy(model, max_depth=args.max_depth, max_cells=args.max_cells,
                      time_limit=args.time_limit, progress=progress)
    if progress is not None:
        progress.close()
    summary = write_policy(pp, out)
    if args.json:
        print(json.dumps(summary, indent=2))
    elif not args.quiet:
        counts = ", ".join(f"{n} {k}" for k, n in summary["cells"].items())
        print(f"{model.name}: policy map in {out} ({counts}; {summary['stop_reason']})")
        print("\n".join(policy_table(summary)))
    return 0


#: The files ``certify prove`` writes, in the order it writes them.
OUTPUTS = ("certificate.json.gz", "summary.json", "map.png", "time_to_limit.png")


def _report_partial(out, started):
    """Say which outputs an interrupt during writing left complete in `out`."""
    written = [name for name in OUTPUTS
               if (out / name).is_file() and (out / name).stat().st_mtime >= started - 1]
    missing = [name for name in OUTPUTS if name not in written]
    print(f"certify: interrupted while writing into {out}; written: "
          f"{', '.join(written) or 'nothing'}; not written (older copies may remain): "
          f"{', '.join(missing)}", file=sys.stderr)


class progress_bar:
    """Progress on stderr: rounds, cells, decided fraction."""

    def __init__(self):
        from tqdm import tqdm

        self.bar = tqdm(total=100, unit="%", file=sys.stderr, leave=False,
                        bar_format="{desc} |{bar}| {n:.1f}% decided [{elapsed}]")

    def starting(self, rounds, n_leaves):
        """A round begins: a round of a 3D or 4D model may take minutes."""
        self.bar.set_description(f"round {rounds}, {n_leaves} cells: flowing")
        self.bar.refresh()

    def __call__(self, rounds, n_leaves, decided, seconds):
        self.bar.set_description(f"round {rounds}, {n_leaves} cells")
        # rounded down: 100.0 % only when nothing is left undecided
        self.bar.n = math.floor(1000 * decided) / 10
        self.bar.refresh()

    def close(self):
        self.bar.close()


def run(args):
    """Prove the model named by ``args.model``."""
    return run_proof(args.model, args)
