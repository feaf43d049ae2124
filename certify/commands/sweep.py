"""``certify sweep MODEL --vary NAME=LO:HI:N``: a proven map of fates per parameter box."""

import json
import sys

from certify.commands.prove import add_depth_argument, parse_param
from certify.errors import UsageError

__all__ = ["HELP", "EXITS", "add_arguments", "run", "parse_vary", "parse_range",
           "sweep_table", "atlas_table"]

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
    atlas = parser.add_argument_group(
        "adaptive atlas (--adaptive): where a safe state exists, where none does")
    atlas.add_argument("--adaptive", action="store_true",
                       help="prove a verdict per box and halve only undetermined boxes; "
                            "give --vary NAME=LO:HI; writes atlas.json and atlas.png")
    atlas.add_argument("--resolution", type=int, default=64, metavar="N",
                       help="finest box: 1/N of each range, N a power of two (default 64)")
    atlas.add_argument("--start", type=int, default=4, metavar="N",
                       help="boxes per parameter of the starting grid, a power of two "
                            "(default 4)")
    atlas.add_argument("--time-budget", type=float, metavar="S",
                       help="split no box after S seconds (default: none)")
    atlas.add_argument("--fractions", action="store_true",
                       help="also prove each box's map for its safe-fraction bounds")
    atlas.add_argument("--no-structure", action="store_true",
                       help="do not prove the equilibrium structure of each box (faster; "
                            "the picture then shows the verdicts only)")
    atlas.add_argument("--no-map", action="store_true",
                       help="only the cheap tests (equilibria, trapping regions, limit rates); "
                            "no map of fates where they do not decide")
    parser.add_argument("--json", action="store_true",
                        help="print sweep.json (atlas.json with --adaptive) on stdout")
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


def parse_range(text):
    """Parse ``NAME=LO:HI`` (the ``--vary`` of an adaptive atlas) into ``(name, (lo, hi))``.

    Raises
    ------
    UsageError
        When the text does not have that shape or a bound is not a number.
    """
    _, sep, value = text.partition("=")
    if not sep or len(value.split(":")) != 2:
        raise UsageError(f"--vary {text!r}: with --adaptive write NAME=LO:HI, e.g. "
                         "D=0.05:0.35 (the boxes come from --start and --resolution)")
    name, (lo, hi, _) = parse_vary(f"{text}:1")
    return name, (lo, hi)


def _vary(texts, adaptive=False):
    form = "NAME=LO:HI" if adaptive else "NAME=LO:HI:N"
    if not texts:
        raise UsageError(f"give the parameter to sweep with --vary {form}")
    if len(texts) > 2:
        raise UsageError(f"--vary: at most 2 parameters can be swept, got {len(texts)}")
    vary = {}
    for text in texts:
        name, spec = parse_range(text) if adaptive else parse_vary(text)
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
        elif self.bar.total != n_boxes:  # the next level of an atlas
            self.bar.reset(total=n_boxes)
            self.bar.update(n_done)
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

    vary = _vary(args.vary, args.adaptive)
    model = load_model(args.model)
    if args.param:
        fixed = dict(parse_param(p) for p in args.param)
        both = sorted(set(fixed) & set(vary))
        if both:
            raise UsageError(f"--param {both[0]}: the parameter is also given to --vary")
        model = model.with_parameters(fixed)
    if args.adaptive:
        return _run_atlas(args, model, vary)
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


def atlas_table(result):
    """A short human-readable summary of an atlas.

    Parameters
    ----------
    result : certify.atlas.AtlasResult

    Returns
    -------
    str
    """
    from certify.palette import VERDICT_LABELS

    by = {}
    for e in result.boxes:
        by.setdefault((e["verdict"], e["by"]), []).append(e["area"])
    rows = [("verdict", "proven by", "boxes", "area %")]
    for (verdict, how), areas in sorted(by.items(), key=lambda kv: (kv[0][0], str(kv[0][1]))):
        rows.append((VERDICT_LABELS[verdict], how or "-", str(len(areas)), f"{100 * sum(areas):.2f}"))
    widths = [max(len(r[k]) for r in rows) for k in range(4)]
    lines = ["  ".join(cell.rjust(w) if k >= 2 else cell.ljust(w)
                       for k, (cell, w) in enumerate(zip(row, widths))).rstrip() for row in rows]
    lines.append(f"{result.message} {len(result.boxes)} boxes, {result.n_analysed} analysed now, "
                 f"{result.seconds:.1f} s; written to {result.out}")
    return "\n".join(lines)


def _run_atlas(args, model, vary):
    from certify.atlas import atlas, default_atlas_dir
    from certify.files import output_folder

    out = output_folder(args.out or default_atlas_dir(model))
    progress = None if args.quiet else _ProgressBar()
    try:
        result = atlas(model, vary, resolution=args.resolution, start=args.start,
                       time_budget=args.time_budget, use_map=not args.no_map,
                       structure=not args.no_structure,
                       max_depth=args.max_depth, time_limit_each=args.time_limit_each,
                       fractions=args.fractions, executor=args.executor,
                       scheduler=args.scheduler, workers=args.workers, out=out,
                       progress=progress)
    finally:
        if progress is not None:
            progress.close()
    if result.status == 2:
        print(f"certify: interrupted; rerun the same command to resume in {result.out}",
              file=sys.stderr)
        return 130
    if args.json:
        print((result.out / "atlas.json").read_text(encoding="utf-8"), end="")
    elif not args.quiet:
        print(atlas_table(result))
    return 0
