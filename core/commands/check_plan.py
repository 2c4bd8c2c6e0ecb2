"""``longrun check-plan FILE --steps T ...``: will a planned simulation mislead?

Computes exactly, without simulating, the law the planned simulation's
estimate converges to, compares it with the long-run law from the same start,
and prints the verdict, the shortest sound run and burn-in, the Monte Carlo
noise at the planned number of replicates, and one plain sentence for a client.
"""
from __future__ import annotations

from ._common import add_file_argument, load_valid, nonnegative_int, positive_int, probability, state_index, write_stdout

HELP = "check exactly, before simulating, whether a simulation plan's estimate can be trusted"
DESCRIPTION = (
    "Check a simulation plan exactly, without simulating: the law its estimate converges to "
    "as replicates grow, next to the long-run law from the same start; their total variation "
    "distance (the bias); a verdict against the tolerance; the shortest run and burn-in that "
    "make the plan sound; and the Monte Carlo noise at the planned replicates."
)

#: Most states listed in the readable table (all of them are in --json).
TABLE_ROWS = 25


def add_arguments(parser):
    add_file_argument(parser)
    parser.add_argument("--steps", "-T", required=True, type=positive_int, metavar="T",
                        help="steps simulated after the burn-in (e.g. 10000 or 1e6)")
    parser.add_argument("--start", metavar="ID", default=None,
                        help="start state (default: the first state in the file)")
    parser.add_argument("--burn-in", type=nonnegative_int, default=0, metavar="B",
                        help="steps discarded before the run (default 0)")
    parser.add_argument("--stride", type=positive_int, default=1, metavar="S",
                        help="the time average samples every S steps (default 1)")
    parser.add_argument("--replicates", "-R", type=positive_int, default=None, metavar="R",
                        help="independent replicates (default 100)")
    parser.add_argument("--estimator", choices=("final", "average"), default="final",
                        help="'final': where the replicates are at the last step (default); "
                        "'average': the time average along each replicate")
    parser.add_argument("--tolerance", type=probability, default=None, metavar="X",
                        help="largest acceptable total variation distance (default 0.05)")
    parser.add_argument("--json", action="store_true", help="print the result as JSON")


def run(args) -> int:
    from ..jsonout import dumps
    from ..plan import DEFAULT_REPLICATES, DEFAULT_TOLERANCE, Plan, check_plan

    chain = load_valid(args)
    start = state_index(chain, args.start) if args.start is not None else 0
    plan = Plan(
        start,
        args.steps,
        burn_in=args.burn_in,
        stride=args.stride,
        replicates=args.replicates if args.replicates is not None else DEFAULT_REPLICATES,
        estimator=args.estimator,
        tolerance=args.tolerance if args.tolerance is not None else DEFAULT_TOLERANCE,
    )
    check = check_plan(chain, plan)
    if args.json:
        doc = check.to_json()
        doc = {"file": args.file, "name": chain.name or None, **doc}
        write_stdout(dumps(doc))
    else:
        write_stdout(render(check, chain, args.file, start_given=args.start is not None))
    return 0


def render(check, chain, path: str, *, start_given: bool = True) -> str:
    """The readable report of a plan check."""
    import numpy as np

    from ..units import format_steps, format_tv

    plan = check.plan
    ids = chain.ids
    est_name = (
        "final step (where the replicates are at the last step)"
        if plan.estimator == "final"
        else f"time average along each replicate, every {plan.stride} step{'s' if plan.stride > 1 else ''} "
        f"({plan.samples:,} samples per replicate)"
    )
    lines = [
        f"Plan check: {chain.name or path}",
        f"  start         {ids[check.start_index]!r}" + ("" if start_given else " (the first state; choose with --start)"),
        f"  run           {format_steps(plan.steps, chain.step)}",
        f"  burn-in       {format_steps(plan.burn_in, chain.step) if plan.burn_in else 'none'}",
        f"  replicates    {plan.replicates:,}",
        f"  estimator     {est_name}",
        f"  verdict       {check.verdict.upper()}: the estimate converges to a law "
        f"{format_tv(check.tv, zero='less than 1e-12', digits=4)} away "
        f"(total variation) from the long run; tolerance {plan.tolerance:g}",
        "",
    ]
    w = max(10, *(len(s) for s in ids[: 10**4]))
    header = f"  {'state':<{w}}  {'plan estimates':>14}  {'long run':>12}  {'bias':>11}  {'noise sd':>10}"
    lines += [header, "  " + "-" * (len(header) - 2)]
    order = np.arange(chain.n)
    if chain.n > TABLE_ROWS:
        order = np.sort(np.argsort(-np.abs(check.bias), kind="stable")[:TABLE_ROWS])
    for i in order:
        lines.append(
            f"  {ids[i]:<{w}}  {check.expected_estimate[i]:>14.6g}  {check.long_run[i]:>12.6g}  "
            f"{_signed(check.bias[i]):>11}  {check.noise_sd[i]:>10.3g}"
        )
    if chain.n > TABLE_ROWS:
        lines.append(f"  ({chain.n - TABLE_ROWS} more states with smaller bias; --json lists all)")
    lines.append("")
    if check.min_steps is not None:
        lines.append(
            f"  shortest sound run      {format_steps(check.min_steps, chain.step)} at this burn-in"
        )
    else:
        lines.append(f"  shortest sound run      none: {check.min_steps_reason}")
    if check.min_burn_in == 0:
        lines.append("  shortest sound burn-in  none needed at this run length")
    elif check.min_burn_in is not None:
        lines.append(f"  shortest sound burn-in  {format_steps(check.min_burn_in, chain.step)} at this run length")
    else:
        lines.append(f"  shortest sound burn-in  none: {check.min_burn_in_reason}")
    lines.append(f"  noise                   {check.noise_method}")
    lines += ["", _wrap(check.sentence)]
    return "\n".join(lines)


def _signed(x: float) -> str:
    """A difference of exact laws: ``0`` below the rounding level (see :func:`core.units.format_tv`)."""
    from ..units import TV_ROUNDING

    return "0" if abs(x) < TV_ROUNDING else f"{x:+.3g}"


def _wrap(text: str, width: int = 92) -> str:
    import textwrap

    return "\n".join(textwrap.wrap(text, width=width))
