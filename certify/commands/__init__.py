"""Subcommands of the ``certify`` command line, one module each.

A command module ``certify/commands/<name>.py`` defines ``HELP`` (one line),
``EXITS`` (its exit codes, one line, printed by ``--help``), ``add_arguments(parser)`` and ``run(args) -> int``; :mod:`certify.cli` registers
the modules that exist.
"""

__all__ = []
