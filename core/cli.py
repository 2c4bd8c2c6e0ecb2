"""The ``longrun`` command line: every computation, headless.

``longrun`` with no arguments opens the app on a sample model; ``longrun FILE``
opens FILE in the app.  Subcommands are listed in :data:`COMMANDS`; each lives
in its own module under :mod:`core.commands`.  User errors (bad files, bad
options, invalid models) print one clear message on stderr and exit 2.
"""
from __future__ import annotations

import argparse
import importlib
import sys

from .errors import LongrunError

#: (subcommand, module under core.commands)
COMMANDS = (
    ("validate", "validate"),
    ("analyze", "analyze"),
    ("export", "export"),
    ("simulate", "simulate"),
    ("check-plan", "check_plan"),
    ("fit", "fit"),
    ("report", "report"),
    ("gui", "gui"),
)


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse's own errors: exit 2 with usage
        self.print_usage(sys.stderr)
        self.exit(2, f"longrun: error: {message}\n")


def build_parser() -> argparse.ArgumentParser:
    from . import __version__

    parser = _Parser(
        prog="longrun",
        description="Exact long-run analysis of finite Markov chains, and checks of whether "
        "a simulation of them can be trusted. Run without arguments to open the app.",
    )
    parser.add_argument("--version", action="version", version=f"longrun {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, modname in COMMANDS:
        try:
            mod = importlib.import_module(f"core.commands.{modname}")
        except ModuleNotFoundError as exc:
            if exc.name == f"core.commands.{modname}":
                continue  # subcommand not built yet
            raise
        p = sub.add_parser(name, help=mod.HELP, description=getattr(mod, "DESCRIPTION", mod.HELP))
        mod.add_arguments(p)
        p.set_defaults(_run=mod.run)
    return parser


def _normalise(argv: list[str]) -> list[str]:
    names = {n for n, _ in COMMANDS}
    if not argv:
        return ["gui"]
    if argv[0] not in names and not argv[0].startswith("-"):
        return ["gui", *argv]
    return argv


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``longrun`` console script; returns the exit status."""
    argv = _normalise(list(sys.argv[1:] if argv is None else argv))
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help(sys.stderr)
        return 2
    try:
        return int(args._run(args) or 0)
    except LongrunError as exc:
        print(f"longrun: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("longrun: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
