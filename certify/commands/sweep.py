"""``certify sweep MODEL --vary NAME=LO:HI:N``: a proven map of fates per parameter box."""

import json
import sys

from certify.commands.prove import add_depth_argument, parse_param
from certify.errors import UsageError

__all__ = ["HELP", "EXITS", "add_arguments", "run", "parse_vary", "sweep_table"]

HELP = "prove the map of fates for every box of a range of one or two parameters"
EXITS = "0 done, 2 usage or input error, 130 interrupted (rerun the command to resume)"


def add_arguments(parser):
    """Add the options of ``certify sweep`` to ``parser``."""
    parser.add_argument("model", metavar="MODEL", help="model file (TOML)")
    parser.add_argument("--vary", action="append", default=[], metavar="NAME=LO:HI:N",
                        help="cut [LO, HI] of parameter NAME into N equal boxes "
                             "(once or twice)")
    parser.add_argument("--param", action="append", default=[], metavar="NAME=VALUE|NAME=LO:HI",
                        help="fix another parameter to a number or an interval for the whole "
                             "sweep (repeatable)")
    add_depth_argument(parser, "deepest bisection level of a cell in each box's proof",
                       "max_depth")
    parser.add_argument("--time-limit-each", type=float, metavar="S",
                        help="stop refining each box's proof after S seconds "
                             "(default: none; results then depend on the machine)")
    parser.add_argument("--executor", choices=["local", "dask"], default="local",
                        help="local process pool (default) or a Dask cluster")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help="address of a running Dask scheduler, e.g. tcp://HOST:8786 "
                             "(default with --executor dask: a LocalCluster on 127.0.0.1)")
    parser.add_argument("--workers", type=int, metavar="N",
                        help="processes of the local pool or LocalCluster (default: all cores)")
    parser.add_argument("--out", metavar="DIR",
                        help="sweep folder (default: proofs_out/<model file stem>-sweep/); "
                             "rerunning with the same folder resumes")
    parser.add_argument("--keep-certificates", action="store_true",
                        help="also write each box's certificate under DIR/boxes/<key>/")
    parser.add_argument("--json", action="store_true", help="print sweep.json on stdout")
    parser.add_argument("--quiet", action="store_true", help="no progress bar, no table")


def parse_vary(text):
    """Parse ``NAME=LO:HI:N`` into ``(name, (lo, hi, n))`` with exact Fractions.

    Parameters
    ----------
    text : str

    Returns
    -------
    tuple
        ``(name, (Fraction, Fraction, int))``; the range itself is checked by
        :func:`certify.sweep.sweep`.

    Raises
    ------
    UsageError
        When the text does not have that shape, a bound is not a number or N is not a
        whole number of at least 1.
    """
    from fractions import Fraction

    name, sep, value = text.partition("=")
    name = name.strip()
    parts = value.split(":")
    if not sep or not name or len(parts) != 3:
        raise UsageError(f"--vary {text!r}: write NAME=LO:HI:N, e.g. H=0.05:0.35:6")
    try:
        lo, hi = Fraction(parts[0].strip()), Fraction(parts[1].strip())
    except (ValueError, ZeroDivisionError):
        raise UsageError(f"--vary {text!r}: LO and HI must be numbers") from None
    n_text = parts[2].strip()
    if not (n_text.isascii() and n_text.isdigit()) or int(n_text) < 1:
        raise UsageError(f"--vary {text!r}: N must be a whole number of boxes, at least 1")
    return name, (lo, hi, int(n_text))


def _vary(texts):
    if not texts:
        raise UsageError("give the parameter to sweep with --vary NAME=LO:HI:N")
    if len(texts) > 2:
        raise UsageError(f"--vary: at most 2 parameters can be swept, got {len(texts)}")
    vary = {}
    for text in texts:
        name, spec = parse_vary(text)
        if name in vary:
            raise UsageError(f"--vary: parameter {name!r} is given twice")
        vary[name] = spec
    return vary


class _ProgressBar:
    """A tqdm bar over parameter boxes, on stderr."""

    def __init__(self):
        self.bar = None

    def __call__(self, n_done, n_boxes):
        if self.bar is None:
            from tqdm import tqdm

            self.bar = tqdm(total=n_boxes, initial=n_done, unit="box", file=sys.stderr,
                            leave=False, desc="parameter boxes")
        else:
            self.bar.update(n_done - self.bar.n)

    def close(self):
        if self.bar is not None:
            self.bar.close()


def sweep_table(result):
    """A short human-readable table of a sweep.

    Parameters
    ----------
    result : certify.sweep.SweepResult

    Returns
    -------
    str
    """
    rows = [("box", "safe % proven", "safe % at most", "undecided %", "equilibria", "verdict")]
    for e in result.entries:
        box = " ".join(f"{name}=[{lo:.4g}, {hi:.4g}]" for name, (lo, hi) in e["params"].items())
        lo, hi = e["safe_bounds"]
        eq = e["equilibria"]
        counts = ", ".join(f"{n} {word}" for word, n in eq["by_stability"].items() if n) or "none"
        if not eq["complete"]:
            counts += " (+unresolved)"
        verdict = ("no safe state" if e["no_safe_state"]
                   else "safe states exist" if e["safe_state_exists"] else "open")
        rows.append((box, f"{100 * lo:.2f}", f"{100 * hi:.2f}",
                     f"{100 * e['fractions']['undecided']:.2f}", counts, verdict))
    widths = [max(len(r[k]) for r in rows) for k in range(len(rows[0]))]
    right = (False, True, True, True, False, False)  # numbers right-aligned
    lines = ["  ".join(cell.rjust(w) if r else cell.ljust(w)
                       for cell, w, r in zip(row, widths, right)).rstrip() for row in rows]
    lines.append(f"{result.n_boxes} boxes ({result.n_resumed} resumed), {result.seconds:.1f} s; "
                 f"written to {result.out}")
    return "\n".join(lines)


def run(args):
    """Sweep the model named by ``args.model``; return 0, or 130 when interrupted."""
    from certify.files import output_folder
    from certify.model import load_model
    from certify.sweep import default_sweep_dir, sweep

    vary = _vary(args.vary)
    model = load_model(args.model)
    if args.param:
        fixed = dict(parse_param(p) for p in args.param)
        both = sorted(set(fixed) & set(vary))
        if both:
            raise UsageError(f"--param {both[0]}: the parameter is also given to --vary")
        model = model.with_parameters(fixed)
    out = output_folder(args.out or default_sweep_dir(model))
    progress = None if args.quiet else _ProgressBar()
    try:
        result = sweep(model, vary, max_depth=args.max_depth,
                       time_limit_each=args.time_limit_each, executor=args.executor,
                       scheduler=args.scheduler, workers=args.workers, out=out,
                       keep_certificates=args.keep_certificates, progress=progress)
    finally:
        if progress is not None:
            progress.close()
    if not result.success:
        print(f"certify: interrupted after {len(result.entries)} of {result.n_boxes} boxes; "
              f"rerun the same command to resume in {result.out}", file=sys.stderr)
        return 130
    if args.json:
        print((result.out / "sweep.json").read_text(encoding="utf-8"), end="")
    elif not args.quiet:
        print(sweep_table(result))
    return 0
