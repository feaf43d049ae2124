"""``certify claim MODEL --region ... --expect ...``: prove or refute a claim about a region.

Exit codes: 0 proven, 1 refuted, 2 usage or input error, 3 inconclusive.
"""

import json
import sys
from pathlib import Path

from certify.commands.prove import add_depth_argument, check_depth, parse_param, progress_bar
from certify.errors import UsageError

__all__ = ["HELP", "EXITS", "EXIT_CODES", "add_arguments", "run"]

HELP = ("prove or refute a claim that every start in a region is safe, doomed, or stays "
        "within the limits up to a time")

EXIT_CODES = {"proven": 0, "refuted": 1, "inconclusive": 3}
EXITS = "0 proven, 1 refuted, 2 usage or input error, 3 inconclusive, 130 interrupted"


def add_arguments(parser):
    """Add the options of ``certify claim`` to ``parser``."""
    parser.add_argument("model", metavar="MODEL", help="model file (TOML)")
    parser.add_argument("--region", required=True, metavar='"NAME=LO:HI, ..."',
                        help="the starting states the claim is about; states not named span "
                             "the window")
    parser.add_argument("--expect", required=True, metavar="safe|doomed|stays",
                        help="safe: stays within the limits forever; doomed: crosses a limit "
                             "(by --until T if given); stays: within the limits on [0, T]")
    parser.add_argument("--until", metavar="T",
                        help="horizon of a doomed or stays claim (required for stays)")
    add_depth_argument(parser, "deepest bisection level of a cell", "max_depth")
    parser.add_argument("--time-limit", type=float, metavar="S",
                        help="stop refining after S seconds (default: the model's [settings] "
                             "time_limit, else 300)")
    parser.add_argument("--param", action="append", default=[], metavar="NAME=VALUE|NAME=LO:HI",
                        help="override a parameter by a number or an interval (repeatable)")
    parser.add_argument("--out", metavar="DIR",
                        help="folder for the certificate and claim.json "
                             "(default: proofs_out/<model file stem>-claim/)")
    parser.add_argument("--json", action="store_true", help="print the verdict as JSON")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")


def run(args):
    """Judge the claim; return 0 proven, 1 refuted, 3 inconclusive."""
    from certify.claim import check_claim, parse_region, write_claim
    from certify.files import output_folder
    from certify.model import load_model

    check_depth(args.max_depth)
    if args.time_limit is not None and not args.time_limit > 0:
        raise UsageError("--time-limit must be a positive number of seconds")
    region = parse_region(args.region)
    model = load_model(args.model)
    if args.param:
        model = model.with_parameters(dict(parse_param(p) for p in args.param))
    out = output_folder(args.out or Path("proofs_out") / f"{Path(args.model).stem}-claim")
    progress = None if args.quiet or args.json else progress_bar()
    judge = _policy_claim if model.controls else check_claim
    try:
        result = judge(model, region, args.expect, args.until, max_depth=args.max_depth,
                       time_limit=args.time_limit, progress=progress)
    finally:
        if progress is not None:
            progress.close()
    if model.controls:
        return _report_policy_claim(result, out, args)
    result = write_claim(result, out)
    if args.json:
        print(json.dumps(result.to_json(), indent=2))
    else:
        print(_text(result))
    if result.proof.interrupted:
        print("certify: interrupted; the verdict rests on the last finished round",
              file=sys.stderr)
    return EXIT_CODES[result.verdict]


def _policy_claim(*args, **kwargs):
    """A model with [controls]: is there a policy for the region (certify.policy_claim)?"""
    from certify.policy_claim import claim_policy
    return claim_policy(*args, **kwargs)


def _report_policy_claim(result, out, args):
    from certify.policy_claim import write_policy_claim

    result = write_policy_claim(result, out)
    if args.json:
        print(json.dumps(result.to_json(), indent=2))
    else:
        region = ", ".join(f"{k}={float(lo):g}:{float(hi):g}"
                           for k, (lo, hi) in result.region.items())
        print(f"{result.verdict.upper()}  claim: a policy keeps every start in {region} "
              f"within the limits for all time\n{result.message}\n"
              f"certificate {result.certificate}")
    return EXIT_CODES[result.verdict]


def _text(result):
    region = ", ".join(f"{k}={float(lo):g}:{float(hi):g}" for k, (lo, hi) in result.region.items())
    unit = f" {result.proof.model.time_unit}" if result.proof.model.time_unit else ""
    until = None if result.until is None else f"t = {float(result.until):g}{unit}"
    claim = {"safe": "stays within the limits for all time",
             "stays": f"stays within the limits up to {until}",
             "doomed": "crosses a limit" + (f" by {until}" if until else "")}[result.expect]
    lines = [f"{result.verdict.upper()}  claim: every start in {region} {claim}",
             result.message]
    c = result.counterexample
    if c is not None:
        lo, hi = c["crossing_time"]
        lines.append("counterexample: " + ", ".join(
            f"{name}={x!r}" for name, x in zip(result.region, c["point"])))
        lines.append(f"  limit: {c['limit'] or 'not named'};  {_times(lo, hi, unit)}")
    if result.undecided_boxes:
        lines.append(f"undecided parts of the region: {len(result.undecided_boxes)}, total "
                     f"volume {result.undecided_volume:.6g}")
        for box in result.undecided_boxes[:20]:
            lines.append("  " + ", ".join(f"{k}=[{lo:.6g}, {hi:.6g}]"
                                          for k, (lo, hi) in zip(result.region, box)))
        if len(result.undecided_boxes) > 20:
            lines.append(f"  ... ({len(result.undecided_boxes) - 20} more in claim.json)")
    lines.append(f"certificate {result.certificate}")
    return "\n".join(lines)


def _times(lo, hi, unit):
    if lo is None:
        return "proven to stay within the limits for all time"
    if hi is None:
        return f"proven within the limits up to t = {lo:.6g}{unit}"
    return f"first crossing time in [{lo:.6g}, {hi:.6g}]{unit}"
