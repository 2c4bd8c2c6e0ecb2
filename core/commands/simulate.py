"""``longrun simulate FILE --replicates R --steps T ...``: simulate, and say whether to trust it.

Runs ``R`` independent replicates with the replicate engine
(:mod:`core.simulate`) for a burn-in of ``B`` steps followed by ``T`` steps
(``B + T`` in all, the run convention of ``check-plan``), then prints, per
state, the ensemble at step ``B + T`` beside the exact law ``pi0 P^(B+T)``,
the time average of the kept draws (the states at steps ``B, B + S, ...,
B + (m-1) S``, ``m = floor(T / S)``) beside the exact long-run law with its
Monte Carlo standard error, R-hat and ESS, the total variation distances, and
a one-line verdict.  ``--json`` prints the same
as one JSON document.  A progress bar goes to stderr when the run takes more
than about a second and stderr is a terminal (never with ``--json``).
"""
from __future__ import annotations

import sys
import time

from ..units import format_tv
from ._common import (add_file_argument, load_valid, nonnegative_int, positive_int, probability, seed_int,
                      state_index, stderr_is_tty, write_stdout)

HELP = "simulate many replicates of the chain and compare them with the exact long-run values"
DESCRIPTION = (
    "Simulate R independent replicates of the chain for a burn-in of B steps then T steps (fast, "
    "reproducible from --seed), the same run as check-plan's, and set the results beside the exact values: "
    "the ensemble at step B+T against pi0 P^(B+T) (total variation and a chi-square test), the time "
    "average of the states at steps B, B+S, ..., B+(m-1)S, m = floor(T/S), against the long-run law (Monte Carlo "
    "standard errors, z-scores), rank-normalised split R-hat and ESS of each state's indicator, and a "
    "one-line verdict on whether the simulation can be trusted. Results describe the model, not the "
    "world; decisions on money, maintenance or safety need qualified review."
)

#: Most states listed in the readable table (all of them are in --json).
TABLE_ROWS = 25
#: Seconds of work before a progress bar appears.
PROGRESS_AFTER = 1.0


def add_arguments(parser):
    add_file_argument(parser)
    parser.add_argument("--replicates", "-R", required=True, type=positive_int, metavar="R",
                        help="independent replicates, 1 to 1e6 (e.g. 1000 or 1e5)")
    parser.add_argument("--steps", "-T", required=True, type=positive_int, metavar="T",
                        help="steps per replicate after the burn-in (e.g. 10000 or 1e6); the run is B + T steps")
    parser.add_argument("--burn-in", type=nonnegative_int, default=0, metavar="B",
                        help="steps run first, whose states are not kept for the time average (default 0)")
    parser.add_argument("--stride", type=positive_int, default=1, metavar="S",
                        help="keep the states at steps B, B+S, B+2S, ... (floor(T/S) of them; at most T; "
                        "default 1)")
    parser.add_argument("--start", metavar="ID", default=None,
                        help="start state (default: the first state in the file); 'uniform' starts "
                        "from every state with equal probability")
    parser.add_argument("--seed", type=seed_int, default=None, metavar="N",
                        help="seed for a reproducible run (default: fresh; the seed used is printed)")
    parser.add_argument("--tracked", type=positive_int, default=None, metavar="K",
                        help="replicates whose own counts feed R-hat, ESS and the standard errors "
                        "(default 1000)")
    parser.add_argument("--memory-limit", metavar="SIZE", default=None,
                        help="largest memory the run may take, e.g. 4GiB (default 2GiB, or the "
                        "LONGRUN_SIMULATE_MEMORY environment variable)")
    parser.add_argument("--tolerance", type=probability, default=None, metavar="X",
                        help="largest total variation distance between the time average and the long-run "
                        "law that is close enough (default 0.05)")
    parser.add_argument("--json", action="store_true", help="print the result as JSON")


def _start(chain, text):
    if text is None:
        return 0, f"{chain.ids[0]!r} (the first state; choose with --start)"
    if text == "uniform" and "uniform" not in chain.index:
        return "uniform", f"uniform over the {chain.n} states"
    i = state_index(chain, text, option="--start")
    return i, repr(chain.ids[i])


def run(args) -> int:
    from ..jsonout import dumps
    from ..simulate import (DEFAULT_TOLERANCE, DEFAULT_TRACKED, ReplicateSimulation, compare,
                            memory_limit_from_env, parse_bytes)

    chain = load_valid(args)
    start, start_text = _start(chain, args.start)
    limit = parse_bytes(args.memory_limit) if args.memory_limit is not None else memory_limit_from_env()
    P = chain.matrix()
    sim = ReplicateSimulation(
        P, replicates=args.replicates, steps=args.steps, start=start, burn_in=args.burn_in,
        stride=args.stride, seed=args.seed, tracked=args.tracked or DEFAULT_TRACKED, memory_limit=limit,
    )
    bar = _Progress(enabled=not args.json and stderr_is_tty())
    try:
        for snap in sim.snapshots(every=max(1, sim.total_steps // 400)):
            bar.update(snap)
    finally:
        bar.close()
    tol = DEFAULT_TOLERANCE if args.tolerance is None else args.tolerance
    report = compare(sim.result(), P, ids=chain.ids, tolerance=tol)
    if args.json:
        doc = {"file": args.file, "name": chain.name or None, **report.to_json()}
        write_stdout(dumps(doc))
    else:
        write_stdout(render(report, chain, args.file, start_text))
    return 0


class _Progress:
    """A one-line progress bar on stderr, shown once the run has taken PROGRESS_AFTER seconds."""

    def __init__(self, *, enabled: bool, width: int = 30):
        self.enabled = enabled
        self.width = width
        self.t0 = time.monotonic()
        self.last = 0.0
        self.shown = False

    def update(self, snap) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if now - self.t0 < PROGRESS_AFTER or (now - self.last < 0.1 and not snap.done):
            return
        self.last = now
        frac = snap.progress
        fill = int(round(frac * self.width))
        rate = snap.step * snap.replicates / snap.elapsed if snap.elapsed else 0.0
        eta = (snap.total_steps - snap.step) * snap.replicates / rate if rate else 0.0
        line = (f"\r[{'#' * fill}{'.' * (self.width - fill)}] {100 * frac:5.1f}%  step {snap.step:,}/"
                f"{snap.total_steps:,}  {rate:.3g} replicate-steps/s  {eta:.0f} s left ")
        sys.stderr.write(line)
        sys.stderr.flush()
        self.shown = True

    def close(self) -> None:
        if self.shown:
            sys.stderr.write("\r" + " " * (self.width + 90) + "\r")
            sys.stderr.flush()


def _kept_steps(r) -> str:
    """The kept steps B, B + S, ..., B + (k-1) S written out briefly."""
    B, s, k = r.burn_in, r.stride, r.kept
    if k == 0:
        return "none yet"
    steps = [B + j * s for j in range(min(k, 3))]
    if k <= 3:
        return ", ".join(f"{t:,}" for t in steps)
    return f"{steps[0]:,}, {steps[1]:,}, ..., {B + (k - 1) * s:,}"


def _cell(x, fmt: str = ".6g", width: int = 10) -> str:
    import math

    if x is None:
        return f"{'-':>{width}}"
    x = float(x)
    if math.isnan(x):
        return f"{'n/a':>{width}}"
    if math.isinf(x):
        return f"{('inf' if x > 0 else '-inf'):>{width}}"
    return f"{x:>{width}{fmt}}"


def render(report, chain, path: str, start_text: str) -> str:
    """The readable report of a simulation: settings, the per-state table, distances, verdict."""
    import textwrap

    import numpy as np

    from ..units import format_steps

    r = report.result
    ids = chain.ids
    lines = [
        f"Simulation: {chain.name or path}",
        f"  start        {start_text}",
        f"  replicates   {r.replicates:,}",
        f"  burn-in      {format_steps(r.burn_in, chain.step) if r.burn_in else 'none'}",
        f"  steps        {format_steps(r.steps, chain.step)} after the burn-in ({r.total_steps:,} in all; "
        f"the ensemble is at step {r.step:,})",
        f"  kept draws   {r.kept:,} per replicate (the states at steps {_kept_steps(r)})",
        f"  seed         {r.seed}",
        f"  speed        {r.step * r.replicates / r.elapsed:.3g} replicate-steps/s" if r.elapsed else "",
        "",
    ]
    lines = [ln for ln in lines if ln != "" or ln is lines[-1]]
    w = max(8, *(len(s) for s in ids[: 10**4]))
    head = (f"  {'state':<{w}}  {'ensemble':>10}  {'exact':>10}  {'time avg':>10}  {'long run':>10}  "
            f"{'MCSE':>9}  {'z':>7}  {'R-hat':>7}  {'ESS':>9}")
    sub = (f"  {'':<{w}}  {'at B+T':>10}  {'P^(B+T)':>10}  {'(kept)':>10}  {'(exact)':>10}  "
           f"{'':>9}  {'':>7}  {'':>7}  {'':>9}")
    lines += [head, sub, "  " + "-" * (len(head) - 2)]
    n = r.n
    order = np.arange(n)
    if n > TABLE_ROWS:
        score = np.abs(report.z) if report.z is not None else np.abs(report.ensemble_share - report.exact_at_step)
        score = np.nan_to_num(score, nan=0.0, posinf=1e300)
        order = np.sort(np.argsort(-score, kind="stable")[:TABLE_ROWS])
    mc = report.mcse
    for j in order:
        lines.append(
            f"  {ids[j]:<{w}}  {_cell(report.ensemble_share[j])}  {_cell(report.exact_at_step[j])}  "
            f"{_cell(None if report.time_average is None else report.time_average[j])}  "
            f"{_cell(report.long_run[j])}  {_cell(None if mc is None else mc.se[j], '.2g', 9)}  "
            f"{_cell(None if report.z is None else report.z[j], '.2f', 7)}  "
            f"{_cell(None if report.rhat is None else report.rhat[j], '.4f', 7)}  "
            f"{_cell(None if mc is None else mc.ess[j], '.3g', 9)}"
            + ("  <-" if j in report.disagree else "")
        )
    if n > TABLE_ROWS:
        lines.append(f"  ({n - TABLE_ROWS} more states; --json lists all)")
    lines.append("")
    g = report.gof
    if g.dof == 0 and not g.impossible:
        test = "no chi-square test (the exact law puts all its mass on one state)"
    else:
        test = (f"chi-square {g.statistic:.4g} on {g.dof} df, p = {g.pvalue:.3g}"
                + (f" ({g.pooled} sparse cells pooled)" if g.pooled else ""))
    lines.append(f"  ensemble vs pi0 P^(B+T)  TV {report.tv_ensemble:.3g} (sampling noise alone gives about "
                 f"{report.tv_ensemble_noise:.2g}); {test}")
    if report.tv_time_average is not None:
        lines.append(f"  time average vs long run TV {report.tv_time_average:.3g}"
                     + (f"; |z| > {report.z_crit:.2f} flags a state (family-wise 1e-3)"
                        if report.z is not None else ""))
    lines.append(f"  d_start(B+T)             {format_tv(report.curve_tv[-1])} (exact distance of pi0 P^(B+T) from the long "
                 "run)")
    lines.append("")
    for f in report.findings:
        lines.append(textwrap.fill(f, width=96, initial_indent="  - ", subsequent_indent="    "))
    lines.append("")
    lines.append(report.verdict)
    lines.append("Results describe the model, not the world; decisions on money, maintenance or safety "
                 "need qualified review.")
    return "\n".join(lines)
