"""``certify check CERT``: re-verify a certificate independently of the code that made it."""

import json
import sys

from certify.errors import UsageError

__all__ = ["HELP", "EXITS", "add_arguments", "run", "SHOWN_FAILURES"]

HELP = "re-verify a certificate with independent arithmetic (exit 0 valid, 1 invalid)"
EXITS = "0 valid, 1 invalid, 2 usage or input error, 130 interrupted"

#: Failures listed on the terminal (``--json`` lists all).
SHOWN_FAILURES = 20


def add_arguments(parser):
    """Add the options of ``certify check`` to ``parser``."""
    parser.add_argument("certificate", metavar="CERT",
                        help="certificate file (certificate.json.gz) or the folder holding it")
    parser.add_argument("--model", metavar="MODEL.toml",
                        help="check the claims against this revised model (same states) "
                             "and report which still hold")
    parser.add_argument("--workers", "--jobs", type=int, metavar="N", dest="jobs",
                        help="worker processes (default: all cores; --jobs is the old name)")
    parser.add_argument("--json", action="store_true",
                        help="print {valid, cells_checked, failures, seconds, "
                             "parameters_narrowed} (and claim) as JSON")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")


class _Progress:
    """A tqdm bar on stderr counting recomputed cells (shown once checking starts)."""

    def __init__(self):
        self.bar = None

    def total(self, n):
        from tqdm import tqdm

        tqdm.monitor_interval = 0
        self.bar = tqdm(total=n, unit="cell", file=sys.stderr, leave=False, desc="checking")

    def __call__(self, n):
        if self.bar is not None:
            self.bar.update(n)

    def close(self):
        if self.bar is not None:
            self.bar.close()


def _describe(failure):
    if failure["cell"] is None:
        return f"  certificate: {failure['reason']}"
    depth, index = failure["address"]
    return (f"  cell {failure['cell']} (depth {depth}, index {index}, {failure['label']}): "
            f"{failure['reason']}")


def _print_regression(claims, model):
    """Per label, the claims that hold for the revised model and those whose stored
    steps do not re-verify (they may still be true: only a new proof can tell)."""
    for key, words in (("held", "claims that still hold"),
                       ("failed", "claims not re-verified with the stored steps")):
        counts = ", ".join(f"{n} {label}" for label, n in claims[key].items() if n)
        print(f"{words}: {counts or 'none'}")
    held, failed = sum(claims["held"].values()), sum(claims["failed"].values())
    if failed > held:
        print(f"most claims could not be re-verified for the revised model; prove it anew "
              f"(certify prove {model}) for a map of its own")


def run(args):
    """Check the certificate named by ``args.certificate``; returns 0 or 1."""
    from certify.check import check_certificate
    from certify.container import narrowed_text

    if args.jobs is not None and args.jobs < 1:
        raise UsageError("--workers must be at least 1")
    from certify.check._policy import check_policy, is_policy
    if is_policy(args.certificate):
        if args.model is not None:
            raise UsageError("--model: a policy certificate is checked against its own model")
        result = check_policy(args.certificate, jobs=args.jobs)
        print(json.dumps({"valid": result.valid, "cells_checked": result.cells_checked,
                          "failures": result.failures, "seconds": round(result.seconds, 3)},
                         indent=2) if args.json else
              f"{'VALID' if result.valid else 'INVALID'}: {args.certificate}: "
              f"{result.message} ({result.cells_checked} cells, {result.seconds:.1f} s)")
        return result.status
    progress = None if args.quiet or args.json else _Progress()
    try:
        result = check_certificate(args.certificate, model=args.model, jobs=args.jobs,
                                   progress=progress)
    finally:
        if progress is not None:
            progress.close()
    if args.json:
        out = {"valid": result.valid, "cells_checked": result.cells_checked,
               "failures": result.failures, "seconds": round(result.seconds, 3),
               "parameters_narrowed": result.parameters_narrowed}
        if result.claims is not None:
            out["claims"] = result.claims
        if result.claim is not None:
            out["claim"] = result.claim.to_json()
        print(json.dumps(out, indent=2))
        return result.status
    verdict = "VALID" if result.valid else "INVALID"
    print(f"{verdict}: {args.certificate}: {result.message} "
          f"({result.cells_checked} cells, {result.seconds:.1f} s)")
    if result.claims is not None:
        _print_regression(result.claims, args.model)
    if result.parameters_narrowed:
        text = narrowed_text(result.parameters_narrowed)
        print(f"parameters: the certificate was proven for {text}; its claims were checked "
              f"against the file's boxes" if result.model is not None else
              f"parameters: proven only for {text}")
    if result.claim is not None:
        print(f"claim: {result.claim.summary()}")
    for failure in result.failures[:SHOWN_FAILURES]:
        print(_describe(failure))
    hidden = len(result.failures) - SHOWN_FAILURES
    if hidden > 0:
        print(f"  ... and {hidden} more (--json lists all)")
    return result.status
