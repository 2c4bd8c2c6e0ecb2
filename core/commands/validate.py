"""``longrun validate FILE``: every problem, one per line, with its place."""
from __future__ import annotations

from ._common import add_file_argument, load_any, write_stdout

HELP = "check a chain file (or a received validated-matrix export) and list every problem; exit 0 if valid, 2 if not"


def add_arguments(parser):
    add_file_argument(parser)


def _check_export(path: str) -> int | None:
    """Verify a validated-matrix export (the receiver's check); None if not one."""
    import json
    import sys
    from pathlib import Path

    from ..io import VALIDATED_FORMAT, _decode, _read_bytes, check_validated_matrix

    if Path(path).suffix.lower() != ".json":
        return None
    try:
        doc = json.loads(_decode(_read_bytes(path), path))
    except (ValueError, RecursionError):
        return None  # not JSON: the chain reader gives the precise message
    if not isinstance(doc, dict) or doc.get("format") != VALIDATED_FORMAT:
        return None
    problems = check_validated_matrix(doc)
    if problems:
        print(f"{path}: validated-matrix export with {len(problems)} problem(s):", file=sys.stderr)
        for msg in problems:
            print(f"{path}: {msg}", file=sys.stderr)
        return 2
    write_stdout(
        f"{path}: validated-matrix export, SHA-256 matches, {len(doc['states'])} states, "
        f"every row sums to 1 within {doc.get('tolerance')}"
    )
    return 0


def run(args) -> int:
    import sys

    verdict = _check_export(args.file)
    if verdict is not None:
        return verdict
    chain = load_any(args.file, max_states=args.max_states)
    if not chain.problems:
        write_stdout(f"{args.file}: valid ({chain.n} states, {len(chain.transitions)} transitions)")
        return 0
    n = len(chain.problems)
    print(f"{args.file}: {n} problem{'s' if n != 1 else ''}:", file=sys.stderr)
    for p in chain.problems:
        print(f"{args.file}: {p.message}", file=sys.stderr)
    return 2
