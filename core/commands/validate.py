"""``longrun validate FILE``: every problem, one per line, with its place."""
from __future__ import annotations

from ._common import add_file_argument, load_any, write_stdout

HELP = "check a chain file and list every problem (exit 0 if valid, 2 if not)"


def add_arguments(parser):
    add_file_argument(parser)


def run(args) -> int:
    import sys

    chain = load_any(args.file, max_states=args.max_states)
    if not chain.problems:
        write_stdout(f"{args.file}: valid ({chain.n} states, {len(chain.transitions)} transitions)")
        return 0
    n = len(chain.problems)
    print(f"{args.file}: {n} problem{'s' if n != 1 else ''}:", file=sys.stderr)
    for p in chain.problems:
        print(f"{args.file}: {p.message}", file=sys.stderr)
    return 2
