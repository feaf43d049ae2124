"""``certify diff OLD NEW``: how the proven map changed between two certificates.

Exit codes: 0 done (or the ``--fail-on`` condition does not hold), 1 the condition
holds or (with ``--check``) a certificate is not valid, 2 usage or input error.
"""

import json
import sys

from certify.errors import UsageError

__all__ = ["HELP", "EXITS", "add_arguments", "run"]

HELP = ("compare two certificates of the same states and window: volume moving between "
        "labels, a plot of the changes, and the model differences")
EXITS = ("0 done (or the --fail-on condition does not hold), 1 the --fail-on condition holds "
         "or (--check) a certificate is not valid, 2 usage or input error, 130 interrupted")


def add_arguments(parser):
    """Add the options of ``certify diff`` to ``parser``."""
    from certify.diff import FAIL_ON

    parser.add_argument("old", metavar="OLD", help="certificate (or its folder) of the old model")
    parser.add_argument("new", metavar="NEW", help="certificate (or its folder) of the new model")
    parser.add_argument("--fail-on", choices=FAIL_ON,
                        help="exit 1 when a proven-safe region is proven doomed or outside in "
                             "NEW (safe-loss), or when any volume changed label (any-change)")
    parser.add_argument("--out", metavar="DIR",
                        help="folder for diff.png and diff.json (default: proofs_out/diff/)")
    parser.add_argument("--check", action="store_true",
                        help="re-verify both certificates with the independent checker first "
                             "and exit 1, comparing nothing, when either is not valid")
    parser.add_argument("--workers", type=int, metavar="N", dest="jobs",
                        help="worker processes of --check (default: all cores)")
    parser.add_argument("--json", action="store_true", help="print the comparison as JSON")


def run(args):
    """Compare the certificates; return 1 when the ``--fail-on`` condition holds."""
    from pathlib import Path

    from certify.diff import diff_certificates, write_diff
    from certify.files import output_folder

    if args.jobs is not None and args.jobs < 1:
        raise UsageError("--workers must be at least 1")
    checks = _checks(args) if args.check else None
    if checks is not None and not all(c["valid"] for c in checks.values()):
        _print_invalid(checks, args.json)
        return 1
    out = output_folder(args.out or Path("proofs_out") / "diff")
    result = diff_certificates(args.old, args.new)
    write_diff(result, out)
    failed = bool(args.fail_on) and result.fails(args.fail_on)
    if args.fail_on == "safe-loss" and sum(result.table[0]) == 0:
        print("certify: warning: OLD proves no start safe, so --fail-on safe-loss has nothing "
              "to lose; prove OLD deeper (--max-depth) for a meaningful gate", file=sys.stderr)
    if args.json:
        data = result.to_json()
        data.update({"plot": str(out / "diff.png"), "fail_on": args.fail_on, "failed": failed})
        if checks is not None:
            data["checked"] = checks
        print(json.dumps(data, indent=2))
    else:
        if checks is not None:
            for role, c in checks.items():
                print(f"VALID {role}: {c['certificate']} ({c['cells_checked']} cells checked)")
        print(_text(result, out, args.fail_on, failed))
    return 1 if failed else 0


def _checks(args):
    """Run the independent checker on OLD and NEW: per role, its verdict and reasons."""
    from certify.check import check_certificate

    checks = {}
    for role, path in (("OLD", args.old), ("NEW", args.new)):
        result = check_certificate(path, jobs=args.jobs)
        checks[role] = {"certificate": str(path), "valid": result.valid,
                        "message": result.message, "cells_checked": result.cells_checked,
                        "failures": result.failures}
    return checks


def _print_invalid(checks, as_json):
    if as_json:
        print(json.dumps({"checked": checks, "compared": False}, indent=2))
        return
    for role, c in checks.items():
        verdict = "VALID" if c["valid"] else "INVALID"
        print(f"{verdict} {role}: {c['certificate']}: {c['message']}")
    print("the certificates were not compared: a map that does not check proves nothing")


def _text(result, out, fail_on, failed):
    from certify.diff import LABELS

    W = result.window_volume
    lines = [f"OLD {result.old}", f"NEW {result.new}"]
    if result.model_changes:
        lines.append("model differences (OLD -> NEW):")
        for c in result.model_changes:
            lines.append(f"  {c['kind']} {c['name']}: {c['old'] or '(absent)'} -> "
                         f"{c['new'] or '(absent)'}")
    else:
        lines.append("the models have the same parameters, equations and limits")
    note = "" if result.exact else " (straddling cells split by estimate)"
    lines.append(f"share of the window moving between labels, rows OLD, columns NEW{note}:")
    lines.append(" " * 10 + "".join(f"{k:>11}" for k in LABELS))
    for i, k in enumerate(LABELS):
        lines.append(f"{k:<10}" + "".join(f"{100 * v / W:>10.3f}%" for v in result.table[i]))
    lines.append(f"changed label: {100 * result.changed_volume / W:.3f} % of the window")
    lines.append(f"proven loss (safe -> doomed or outside): "
                 f"{100 * result.proven_loss / W:.3f} %")
    lines.append(f"unproven loss (safe -> undecided): {100 * result.unproven_loss / W:.3f} %")
    lines.append(f"plot {out / 'diff.png'}")
    if fail_on:
        lines.append(f"{'FAILED' if failed else 'PASSED'} --fail-on {fail_on}")
    return "\n".join(lines)
