"""``longrun export FILE --to OUT.json|OUT.csv``: hand over a validated matrix."""
from __future__ import annotations

from pathlib import Path

from ..errors import OptionError
from ._common import add_file_argument, load_valid, write_stdout

HELP = "export the validated transition matrix as JSON (with SHA-256) or CSV"


def add_arguments(parser):
    add_file_argument(parser)
    parser.add_argument("--to", required=True, metavar="OUT", help="output file: .json or .csv")


def run(args) -> int:
    from ..io import atomic_write_text, matrix_csv_text, write_validated_matrix

    out = Path(args.to)
    suffix = out.suffix.lower()
    if suffix not in (".json", ".csv"):
        raise OptionError(f"--to {args.to!r}: the file name must end in .json or .csv")
    chain = load_valid(args)
    if suffix == ".json":
        doc = write_validated_matrix(chain, out)
        write_stdout(f"wrote {out} ({chain.n} states, sha256 {doc['sha256']})")
    else:
        atomic_write_text(out, matrix_csv_text(chain))
        write_stdout(f"wrote {out} ({chain.n} states)")
    return 0
