"""Helpers shared by the subcommands: loading, start states, output."""
from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from ..errors import OptionError, ValidationError
from ..model import Chain


def add_file_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("file", metavar="FILE", help="chain file (.json) or matrix (.csv)")
    parser.add_argument(
        "--max-states",
        type=int,
        default=None,
        metavar="N",
        help="largest number of states analysed (default 5000; also LONGRUN_MAX_STATES)",
    )


def load_any(path: str, *, max_states: int | None = None) -> Chain:
    """Load a chain file or a matrix CSV (by extension), possibly invalid."""
    from dataclasses import replace

    from ..io import load_chain, read_matrix_csv

    chain = read_matrix_csv(path) if Path(path).suffix.lower() in (".csv", ".tsv", ".txt") else load_chain(path)
    if max_states is not None:
        if max_states < 1:
            raise OptionError(f"--max-states must be at least 1, not {max_states}")
        chain = replace(chain, state_limit=max_states)
    return chain


def load_valid(args: argparse.Namespace) -> Chain:
    """Load ``args.file`` and raise :class:`ValidationError` if it has problems."""
    chain = load_any(args.file, max_states=getattr(args, "max_states", None))
    if chain.problems:
        raise ValidationError(chain.problems, source=args.file)
    return chain


def state_index(chain: Chain, sid: str | None, *, option: str = "--start") -> int | None:
    """Row index of state ``sid`` (None stays None); a clear error if unknown."""
    if sid is None:
        return None
    if sid not in chain.index:
        shown = ", ".join(chain.ids[:12]) + (" ..." if chain.n > 12 else "")
        raise OptionError(f"{option} {sid!r}: no such state (states are: {shown})")
    return chain.index[sid]


def positive_int(text: str) -> int:
    """argparse type: a whole number >= 1 (accepts 1e6 and 1_000_000)."""
    v = nonnegative_int(text)
    if v < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1, not {text}")
    return v


def nonnegative_int(text: str) -> int:
    """argparse type: a whole number >= 0 (accepts 1e6 and 1_000_000)."""
    digits = text.strip().replace("_", "")
    if digits.isdigit() and len(digits) <= 18:
        return int(digits)  # exact (a float would round beyond 2**53)
    try:
        f = float(text.replace("_", ""))
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if not f.is_integer() or f < 0 or f > 1e18:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number >= 0")
    return int(f)


def seed_int(text: str) -> int:
    """argparse type: a seed, a whole number from 0 to 2**128 - 1, read exactly.

    Fresh seeds are 128-bit numbers (numpy's ``SeedSequence`` entropy); the one a
    run reports must be accepted back as it was printed.
    """
    digits = text.strip().replace("_", "")
    if digits.isdigit():
        v = int(digits)
        if v < 2**128:
            return v
        raise argparse.ArgumentTypeError(f"{text!r} is larger than the largest seed, 2**128 - 1")
    return nonnegative_int(text)


def probability(text: str) -> float:
    """argparse type: a number in (0, 1)."""
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not 0 < v < 1:
        raise argparse.ArgumentTypeError(f"must be between 0 and 1 (exclusive), not {text}")
    return v


def write_stdout(text: str) -> None:
    sys.stdout.write(text if text.endswith("\n") else text + "\n")
    sys.stdout.flush()


def stderr_is_tty() -> bool:
    try:
        return os.isatty(sys.stderr.fileno())
    except (OSError, ValueError, AttributeError):
        return False
