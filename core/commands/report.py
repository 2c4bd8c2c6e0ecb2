"""``longrun report FILE [plan options] -o OUT.html|OUT.pdf``: the client report.

One self-contained document: the model (its picture as drawn and its matrix),
the validation result, classes and periods, the long-run law, the mixing time,
the findings and, with ``--steps``, the plan check told as a story; it ends
with a caution and carries the generation time, the Longrun version and the
input file's SHA-256.  An invalid chain gets a report listing its problems.

The rendering uses Qt (imported only here, inside :func:`run`); without a
display it runs offscreen.
"""
from __future__ import annotations

import os
import sys

from ..errors import OptionError
from ._common import add_file_argument, load_any, nonnegative_int, positive_int, probability, write_stdout

HELP = "write the client report (self-contained HTML or PDF), with an optional simulation plan check"
DESCRIPTION = (
    "Write one self-contained client report of a chain: its picture and matrix, the validation, "
    "classes and periods, the long-run law, the mixing time and the findings; with --steps, the "
    "exact check of a simulation plan (what it would report against the truth, how far off, how "
    "long it must run instead). The output's suffix (.html or .pdf) chooses the format."
)

#: Plan options that make sense only with --steps.
_PLAN_ONLY = ("burn_in", "stride", "replicates", "estimator", "tolerance")


def add_arguments(parser):
    add_file_argument(parser)
    parser.add_argument("-o", "--output", required=True, metavar="OUT",
                        help="report file: .html (self-contained) or .pdf")
    g = parser.add_argument_group("simulation plan (as in check-plan; --steps turns the plan check on)")
    g.add_argument("--steps", "-T", type=positive_int, default=None, metavar="T",
                   help="steps simulated after the burn-in (e.g. 10000 or 1e6)")
    g.add_argument("--start", metavar="ID", default=None,
                   help="start state (default: the first state in the file)")
    g.add_argument("--burn-in", type=nonnegative_int, default=None, metavar="B",
                   help="steps discarded before the run (default 0)")
    g.add_argument("--stride", type=positive_int, default=None, metavar="S",
                   help="the time average samples every S steps (default 1)")
    g.add_argument("--replicates", "-R", type=positive_int, default=None, metavar="R",
                   help="independent replicates (default 100)")
    g.add_argument("--estimator", choices=("final", "average"), default=None,
                   help="'final': where the replicates are at the last step (default); "
                   "'average': the time average along each replicate")
    g.add_argument("--tolerance", type=probability, default=None, metavar="X",
                   help="largest acceptable total variation distance (default 0.05)")
    parser.add_argument("--epsilon", type=probability, default=0.25, metavar="E",
                        help="distance to the long run that defines the mixing time (default 0.25)")
    parser.add_argument("--max-table-states", type=positive_int, default=None, metavar="N",
                        help="largest chain whose matrix and picture are printed in full (default 60); "
                        "larger chains are summarised")
    parser.add_argument("--max-size-mb", type=float, default=None, metavar="MB",
                        help="refuse to write a report larger than this (default 25; also "
                        "LONGRUN_MAX_REPORT_MB)")


def _headless() -> None:
    """Render offscreen when there is no display to talk to."""
    if sys.platform.startswith("linux") or "bsd" in sys.platform:
        if not os.environ.get("DISPLAY") and not os.environ.get("WAYLAND_DISPLAY"):
            os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")


def _plan(args, chain):
    from ..plan import DEFAULT_REPLICATES, DEFAULT_TOLERANCE, Plan

    if args.steps is None:
        given = [f"--{n.replace('_', '-')}" for n in _PLAN_ONLY if getattr(args, n) is not None]
        if given:
            raise OptionError(f"{', '.join(given)} describe{'s' if len(given) == 1 else ''} a simulation "
                              "plan and need --steps (the planned run length)")
        return None
    estimator = args.estimator or "final"
    if args.stride is not None and estimator != "average":
        raise OptionError("--stride applies to the time average only; add --estimator average")
    return Plan(
        args.start if args.start is not None else (chain.ids[0] if chain.n else 0),
        args.steps,
        burn_in=args.burn_in or 0,
        stride=args.stride or 1,
        replicates=args.replicates if args.replicates is not None else DEFAULT_REPLICATES,
        estimator=estimator,
        tolerance=args.tolerance if args.tolerance is not None else DEFAULT_TOLERANCE,
    )


def run(args) -> int:
    from pathlib import Path

    from ..report import file_sha256
    from ._common import state_index

    out = Path(args.output)
    if out.suffix.lower() not in (".html", ".htm", ".pdf"):
        raise OptionError(f"-o {args.output!r}: the report file name must end in .html or .pdf")
    if str(out.parent) and not out.parent.is_dir():
        raise OptionError(f"-o {args.output!r}: the folder {out.parent} does not exist")
    if args.max_size_mb is not None and not args.max_size_mb > 0:
        raise OptionError(f"--max-size-mb must be positive, not {args.max_size_mb:g}")
    chain = load_any(args.file, max_states=args.max_states)
    if not chain.problems and args.start is not None:
        state_index(chain, args.start)  # a clear message for an unknown start
    plan = _plan(args, chain)
    if chain.problems and args.steps is not None:
        print(f"{args.file}: the chain is not valid, so the plan is not checked; "
              "the report lists the problems", file=sys.stderr)
    _headless()
    from app.report import export_report

    done = export_report(
        chain,
        out,
        plan=plan,
        start=args.start if plan is None and not chain.problems else None,
        epsilon=args.epsilon,
        source=Path(args.file).name,
        sha256=file_sha256(args.file),
        max_table_states=args.max_table_states,
        max_mb=args.max_size_mb,
    )
    size = done["bytes"]
    shown = f"{size / 1024:.0f} KiB" if size < 2**20 else f"{size / 2**20:.1f} MiB"
    extra = f", {done['pages']} pages" if done.get("pages") else ""
    what = ("model not valid: problems listed" if not done["valid"] else
            f"plan {done['verdict']}" if done["verdict"] else "no plan checked")
    write_stdout(f"wrote {out} ({shown}{extra}; {what})")
    return 0
