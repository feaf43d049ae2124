"""The ``certify`` command line: ``main(argv=None) -> int``.

Subcommands live in ``certify/commands/<name>.py``; each module defines ``HELP``
(one line), ``EXITS`` (its exit codes, one line), ``add_arguments(parser)`` and
``run(args) -> int``. Only the modules
that exist are registered, so commands can be added one at a time.

Exit codes: 0 done (or verified), 1 not verified, 2 usage or input error,
3 inconclusive (``claim``), 130 interrupted; each module's ``EXITS`` text says which of
them its command uses, and ``--help`` prints it.
"""

import argparse
import importlib
import importlib.metadata
import importlib.util
import os
import sys

from certify.errors import CertifyError

__all__ = ["COMMANDS", "build_parser", "main", "module_name"]

#: Subcommands in the order ``certify --help`` lists them.
COMMANDS = ["import", "show", "prove", "check", "points", "sweep", "claim", "diff", "demo"]
#: Command modules named otherwise than their command (``import`` is a Python keyword).
_MODULE_NAMES = {"import": "import_sbml"}


def module_name(command):
    """The module of a subcommand, e.g. ``"certify.commands.show"``."""
    return f"certify.commands.{_MODULE_NAMES.get(command, command)}"


def _available_commands():
    """The command modules that exist, in :data:`COMMANDS` order."""
    modules = {}
    for name in COMMANDS:
        if importlib.util.find_spec(module_name(name)) is not None:
            modules[name] = importlib.import_module(module_name(name))
    return modules


def _version():
    try:
        return importlib.metadata.version("certify")
    except importlib.metadata.PackageNotFoundError:
        return "unknown (not installed)"


def build_parser():
    """Build the argument parser with every available subcommand.

    Returns
    -------
    argparse.ArgumentParser
        Parsed arguments carry ``run``, the chosen command's ``run`` function.
    """
    modules = _available_commands()
    missing = [name for name in COMMANDS if name not in modules]
    epilog = ("Run 'certify COMMAND --help' for the options of a command. Exit codes: 0 done, "
              "1 not verified (check, diff --fail-on, claim refuted), 2 usage or input error, "
              "3 claim inconclusive, 130 interrupted.")
    if missing:
        epilog += " Not built yet: " + ", ".join(missing) + "."
    parser = argparse.ArgumentParser(
        prog="certify",
        description=(
            "Prove which starting states of an ODE model stay within its limits forever, "
            "which must cross a limit, and write a certificate that an independent checker "
            "re-verifies. A certificate speaks about the model, not the system it describes."
        ),
        epilog=epilog,
    )
    parser.add_argument("--version", action="version", version=f"certify {_version()}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND", title="commands")
    for name, module in modules.items():
        sub = subparsers.add_parser(name, help=module.HELP, description=module.HELP,
                                    epilog=f"Exit codes: {module.EXITS}.")
        module.add_arguments(sub)
        sub.set_defaults(run=module.run, command_parser=sub)
    return parser


def main(argv=None):
    """Run the command line.

    Parameters
    ----------
    argv : list of str, optional
        Arguments without the program name; ``sys.argv[1:]`` when None.

    Returns
    -------
    int
        The exit code: 0 done, 1 not verified, 2 usage or input error, 130 interrupted.
        Errors are printed as one line ``certify: error: <message>`` on stderr.
    """
    parser = build_parser()
    try:
        args, extras = parser.parse_known_args(argv)
        if extras:
            # the command's own usage line, not the top level's, says what it takes
            getattr(args, "command_parser", parser).error(
                f"unrecognized arguments: {' '.join(extras)}")
    except SystemExit as exc:  # --help, --version and argparse's own usage errors
        return exc.code if isinstance(exc.code, int) else 0 if exc.code is None else 2
    if args.command is None:
        parser.print_usage(sys.stderr)
        print("certify: error: a command is required (see 'certify --help')", file=sys.stderr)
        return 2
    try:
        return args.run(args)
    except CertifyError as exc:
        message = " ".join(str(exc).split("\n"))
        print(f"certify: error: {message}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("certify: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into a reader that stopped (e.g. `| head`)
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0


if __name__ == "__main__":
    sys.exit(main())
