"""Subcommands of the ``longrun`` command line, one module each.

Each module defines ``HELP`` (one line), ``add_arguments(parser)`` and
``run(args) -> int``.  :mod:`core.cli` lists them in :data:`core.cli.COMMANDS`
and imports a module only when its subcommand runs.
"""
