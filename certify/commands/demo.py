"""``certify demo``: prove the built-in fermenter model and check its certificate."""

from pathlib import Path

from certify.commands.prove import add_budget_arguments, run_proof

__all__ = ["HELP", "EXITS", "add_arguments", "run", "DEMO_MODEL"]

HELP = ("prove the built-in demo model (a substrate-inhibited fermenter), write its map, and "
        "re-verify its certificate with the independent checker")
EXITS = "0 proven and valid, 1 the check found the certificate invalid, 2 usage or input error, 130 interrupted"

#: The demo model ships with the repository (``make demo`` runs from an editable install).
DEMO_MODEL = Path(__file__).resolve().parents[2] / "models" / "fermenter.toml"


def add_arguments(parser):
    """Add the options of ``certify demo`` to ``parser``."""
    add_budget_arguments(parser)


def run(args):
    """Prove the demo model into ``proofs_out/fermenter/`` (or ``--out``)."""
    path = DEMO_MODEL
    try:
        path = path.relative_to(Path.cwd())
    except ValueError:
        pass
    out = Path(args.out or Path("proofs_out") / "fermenter")
    code = run_proof(str(path), args, default_out=out)
    if code != 0:
        return code
    from certify.check import check_certificate
    from certify.commands.check import _Progress

    cert = out / "certificate.json.gz"
    progress = None if args.quiet or args.json else _Progress()
    try:
        result = check_certificate(cert, progress=progress)
    finally:
        if progress is not None:
            progress.close()
    if not args.json:
        verdict = "VALID" if result.valid else "INVALID"
        print(f"independent check: {verdict}: {result.message} ({result.cells_checked} cells, "
              f"{result.seconds:.1f} s)")
    return result.status
