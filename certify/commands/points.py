"""``certify points MODEL``: proven equilibria, stability, and how the flow meets each limit."""

import json

from certify.commands.prove import check_depth, parse_param

__all__ = ["HELP", "EXITS", "add_arguments", "run", "points_table"]

HELP = "prove the equilibria (with stability) and where the flow leaves, returns to or touches each limit"
EXITS = "0 done, 2 usage or input error, 130 interrupted"


def add_arguments(parser):
    """Add the options of ``certify points`` to ``parser``."""
    parser.add_argument("model", metavar="MODEL", help="model file (TOML)")
    parser.add_argument("--param", action="append", default=[], metavar="NAME=VALUE|NAME=LO:HI",
                        help="override a parameter by a number or an interval (repeatable)")
    parser.add_argument("--max-depth", type=int, default=12, metavar="D",
                        help="deepest halving of the window in the searches (default 12)")
    parser.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def run(args):
    """Analyse the model named by ``args.model``; print the result; return 0."""
    from certify.model import load_model
    from certify.points import analyse_points

    check_depth(args.max_depth)
    model = load_model(args.model)
    if args.param:
        model = model.with_parameters(dict(parse_param(p) for p in args.param))
    result = analyse_points(model, max_depth=args.max_depth)
    summary = result.summary()
    if args.json:
        print(json.dumps(summary, indent=2))
    else:
        print(points_table(model, result))
    return 0


def _fmt_box(box, names):
    return ", ".join(f"{name} = {_fmt_interval(lo, hi)}" for name, (lo, hi) in zip(names, box))


def _fmt_interval(lo, hi):
    if hi - lo < 1e-9 * max(1.0, abs(lo)):
        return "0" if lo <= 0 <= hi else f"{0.5 * (lo + hi):.10g}"
    return f"[{lo:.6g}, {hi:.6g}]"


def points_table(model, result):
    """The human-readable report of ``certify points``.

    Parameters
    ----------
    model : certify.model.Model
    result : certify.points.PointsResult

    Returns
    -------
    str
    """
    states = [s.name for s in model.states]
    names = ", ".join(states)
    eq = result.equilibria
    lines = [f"model      {model.name}", "", f"equilibria in the window ({names}):"]
    if not eq.equilibria:
        lines.append("  none" if eq.complete else "  none isolated")
    for k, e in enumerate(eq.equilibria, start=1):
        lines.append(f"  {k:>2}  {e.stability:<12} {e.limits:<10} {_fmt_box(e.box, states)}")
    if eq.complete:
        lines.append("  the rest of the window is proven free of equilibria")
    else:
        lines.append(f"  NOT complete: {len(eq.unresolved)} box(es) could not be cleared (they "
                     f"may hold equilibria; a line or surface of rest states, such as the "
                     f"states without infected people of an epidemic, is never cleared):")
        lines += [f"      {_fmt_box(b, states)}" for b in eq.unresolved[:10]]
        if len(eq.unresolved) > 10:
            lines.append(f"      ... and {len(eq.unresolved) - 10} more (see --json)")
    for r, c in zip(result.limits, model.constraints):
        lines += ["", f"limit {r.name}: {c.text}",
                  f"  flow leaves in {len(r.leaves)} box(es), returns in {len(r.returns)} box(es)"]
        for t in r.tangencies:
            proof = "one tangency point" if t.unique else "covers possible tangencies"
            lines.append(f"  tangency  {t.kind:<12} {_fmt_box(t.box, states)}  ({proof})")
        if not r.tangencies:
            lines.append("  no tangency in the window")
    lines += ["", "Boxes are proven for every parameter value; stability is from the "
              "Routh-Hurwitz conditions on the interval Jacobian. Results speak about the "
              "model, not the system it describes."]
    return "\n".join(lines)
