"""``longrun fit DATA.csv -o chain.json``: estimate a chain from observed states."""
from __future__ import annotations

import argparse
import math
from pathlib import Path

from ..errors import OptionError
from ._common import nonnegative_int, positive_int, probability, stderr_is_tty, write_stdout

HELP = "estimate a chain from observed state sequences in a CSV file, with intervals"
DESCRIPTION = (
    "Count the transitions in a CSV of observed states (one column of labels in time order, "
    "or an id column plus a state column, optionally sorted by a time column; or a numeric "
    "column cut into bands), estimate the matrix with a confidence interval for every entry, "
    "report thin data and a test of the first-order assumption, and give intervals for the "
    "long-run answers. Writes a normal chain file that records the counts and the data source. "
    "Estimates describe the data, not necessarily the system; decisions on money, maintenance "
    "or safety deserve qualified review."
)


def _alpha(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not math.isfinite(v) or v <= 0:
        raise argparse.ArgumentTypeError(f"the pseudo-count must be a positive number, not {text}")
    return v


def add_arguments(parser):
    parser.add_argument("data", metavar="DATA", help="CSV file of observations (with a header row)")
    g = parser.add_argument_group("reading the data")
    g.add_argument("--column", metavar="NAME", help="the state column (header name or 1-based number)")
    g.add_argument("--id-column", metavar="NAME", help="column naming the sequence of each row; "
                   "no transition is counted across two ids")
    g.add_argument("--time-column", metavar="NAME", help="column to sort each sequence by (ISO dates/times "
                   "or numbers; equal times keep file order)")
    cut = g.add_mutually_exclusive_group()
    cut.add_argument("--cuts", metavar="LIST", help="cut a numeric column into bands at these points, "
                     "e.g. --cuts=-1%%,1%% (write '=' when the first is negative); bands are [a, b): a "
                     "value on a cut point goes to the band above")
    cut.add_argument("--quantiles", type=positive_int, metavar="K", help="cut a numeric column into K bands "
                     "at empirical quantiles")
    g.add_argument("--states", metavar="A,B,C", help="fixed list of state labels (matrix order); any "
                   "other label is an error, unseen ones get a row")
    g.add_argument("--no-header", action="store_true", help="the file has no header row (columns are 1, 2, ...)")
    e = parser.add_argument_group("estimation")
    e.add_argument("--prior", type=_alpha, metavar="ALPHA", help="add a symmetric Dirichlet pseudo-count ALPHA "
                   "to every entry (estimates become posterior means); off unless given")
    e.add_argument("--level", type=probability, default=0.95, help="confidence level of intervals (default 0.95)")
    e.add_argument("--simultaneous", action="store_true", help="also give Goodman's simultaneous intervals "
                   "for each row")
    e.add_argument("--min-departures", type=positive_int, default=20, metavar="N",
                   help="report states left fewer than N times (default 20)")
    e.add_argument("--order-alpha", type=probability, default=0.05, metavar="A",
                   help="level of the first- vs second-order test (default 0.05)")
    d = parser.add_argument_group("uncertainty of long-run answers")
    d.add_argument("--draws", type=nonnegative_int, default=1000, metavar="N",
                   help="matrices drawn for intervals of the stationary law, mixing time and absorption "
                   "(default 1000; 0 skips)")
    d.add_argument("--seed", type=nonnegative_int, default=0, metavar="N", help="random seed (default 0)")
    d.add_argument("--method", choices=("posterior", "bootstrap"), default="posterior",
                   help="row-wise Dirichlet posterior (default; prior ALPHA, or observed transitions only) "
                   "or parametric bootstrap")
    d.add_argument("--epsilon", type=probability, default=0.25, help="mixing-time threshold (default 0.25)")
    o = parser.add_argument_group("output")
    o.add_argument("-o", "--output", required=True, metavar="CHAIN.json", help="chain file to write")
    o.add_argument("--force", action="store_true", help="replace the output file if it exists")
    o.add_argument("--name", help="name of the fitted chain (default 'Fitted from DATA')")
    o.add_argument("--json", action="store_true", help="print the results as JSON")


def run(args) -> int:
    import sys

    from ..datafile import observations_from_table, read_table
    from ..estimate import fit_observations
    from ..io import save_chain
    from ..jsonout import dumps

    out = Path(args.output)
    if out.suffix.lower() != ".json":
        raise OptionError(f"-o {args.output!r}: the chain file name must end in .json")
    try:
        same = out.exists() and out.resolve() == Path(args.data).resolve()
    except OSError:
        same = False
    if same:
        raise OptionError("-o names the data file itself; choose another name so the data are not overwritten")
    if out.exists() and not args.force:
        raise OptionError(f"-o {args.output!r}: the file exists; add --force to replace it")
    states = None
    if args.states is not None:
        states = [s.strip() for s in args.states.split(",")]
    table = read_table(args.data, header=not args.no_header)
    obs = observations_from_table(
        table,
        column=args.column,
        id_column=args.id_column,
        time_column=args.time_column,
        cuts=args.cuts,
        quantiles=args.quantiles,
        states=states,
    )
    fit = fit_observations(
        obs,
        prior=args.prior,
        level=args.level,
        simultaneous=args.simultaneous,
        min_departures=args.min_departures,
        order_alpha=args.order_alpha,
    )
    chain = fit.to_chain(name=args.name or "")
    save_chain(chain, out)

    derived = None
    if args.draws and fit.complete:
        from ..estimate import iter_derived_uncertainty

        gen = iter_derived_uncertainty(
            fit, draws=args.draws, seed=args.seed, method=args.method, epsilon=args.epsilon
        )
        tty = stderr_is_tty() and not args.json
        while True:
            try:
                snap = next(gen)
            except StopIteration as stop:
                derived = stop.value
                break
            if tty:
                print(f"\r{snap.message}", end="", file=sys.stderr, flush=True)
        if tty:
            print("\r" + " " * 60 + "\r", end="", file=sys.stderr, flush=True)

    if args.json:
        write_stdout(
            dumps(
                {
                    "output": str(out),
                    "valid": chain.is_valid,
                    "fit": fit,
                    "uncertainty": derived,
                }
            )
        )
    else:
        write_stdout(format_report(fit, derived, obs, out, chain, args))
    if not chain.is_valid:
        bad = [f.states[0] for f in fit.findings if f.code == "never-left"]
        print(
            f"longrun: error: {out} was written but is not a valid chain yet: "
            f"{', '.join(map(repr, bad))} {'is' if len(bad) == 1 else 'are'} never seen leaving, so "
            f"{'its row' if len(bad) == 1 else 'their rows'} cannot be estimated; refit with --prior ALPHA "
            "or write the row(s) in the editor",
            file=sys.stderr,
        )
        return 2
    return 0


# --------------------------------------------------------------------------
# text report
# --------------------------------------------------------------------------
def _p(v: float) -> str:
    if v != v:  # NaN
        return "-"
    return f"{v:.4f}"


def format_report(fit, derived, obs, out, chain, args=None) -> str:
    """The plain-text report of ``longrun fit``."""
    src = fit.source or {}
    lines = []
    parts = [f"{src.get('rows', '?')} rows"]
    parts.append(f"{obs.n_ids} sequence{'s' if obs.n_ids != 1 else ''}")
    parts.append(f"{fit.n_transitions} transitions")
    cols = [f"states from column {obs.column!r}"]
    if obs.id_column:
        cols.append(f"sequences by {obs.id_column!r}")
    if obs.time_column:
        cols.append(f"sorted by {obs.time_column!r}")
    lines.append(f"Fitted from {src.get('file') or 'the data'}: {', '.join(parts)} ({'; '.join(cols)})")
    if any(lab != sid for sid, lab in zip(fit.states, fit.labels)):
        lines.append("States: " + ", ".join(f"{s} = {lab}" for s, lab in zip(fit.states, fit.labels)))
    lines.append(f"Method: {fit.method}; {fit.level * 100:g}% Wilson score intervals per entry"
                 + ("; Goodman simultaneous intervals per row" if fit.simultaneous is not None else "")
                 + ("; Dirichlet posterior credible intervals" if fit.posterior is not None else ""))
    lines.append("")
    w = max(6, *(len(s) for s in fit.states))
    head = f"{'from':<{w}}  {'to':<{w}}  {'count':>7}  {'of':>7}  {'estimate':>8}  {'interval':>17}"
    if fit.simultaneous is not None:
        head += f"  {'simultaneous':>17}"
    if fit.posterior is not None:
        head += f"  {'posterior':>17}"
    lines.append(head)
    n = fit.n
    dep = fit.departures
    show_all = n <= 12
    for i in range(n):
        zeros = []
        for j in range(n):
            c = int(fit.counts[i, j])
            if c == 0 and not show_all:
                zeros.append(j)
                continue
            row = (
                f"{fit.states[i]:<{w}}  {fit.states[j]:<{w}}  {c:>7}  {int(dep[i]):>7}  "
                f"{_p(fit.estimate[i, j]):>8}  {_p(fit.low[i, j]) + ' - ' + _p(fit.high[i, j]):>17}"
            )
            if fit.simultaneous is not None:
                lo, hi = fit.simultaneous
                row += f"  {_p(lo[i, j]) + ' - ' + _p(hi[i, j]):>17}"
            if fit.posterior is not None:
                lo, hi = fit.posterior
                row += f"  {_p(lo[i, j]) + ' - ' + _p(hi[i, j]):>17}"
            lines.append(row)
        if zeros:
            lines.append(
                f"{fit.states[i]:<{w}}  ({len(zeros)} other states never reached from here; each interval "
                f"0 - {_p(fit.high[i, zeros[0]])})"
            )
    if fit.findings:
        lines.append("")
        lines.append("Findings:")
        for f in fit.findings:
            lines.append(f"  {f.level}: {f.message}")
    t = fit.order_test
    if t is not None:
        lines.append("")
        if t.df == 0:
            lines.append("First- vs second-order test: not possible with these data (df = 0)")
        else:
            verdict = "first order rejected" if t.rejected else "first order not rejected"
            lines.append(
                f"First- vs second-order test (Anderson & Goodman 1957): G2 = {t.g2:.4g}, df = {t.df}, "
                f"p = {t.p_value:.3g} (Pearson X2 = {t.pearson:.4g}, p = {t.p_value_pearson:.3g}); "
                f"{verdict} at {t.alpha:g}"
            )
    lines.append("")
    if derived is not None:
        lines.append(f"Long-run answers: {derived.describe()}")
        for v in derived.values:
            rng = "-" if v.low is None else f"{v.low:.4g} - {v.high:.4g}"
            point = "-" if v.point is None else f"{v.point:.4g}"
            if v.quantity == "stationary":
                what = f"long-run share of {v.state}"
            elif v.quantity == "expected_steps":
                what = f"expected steps from {v.state} to a closed class"
            elif v.quantity == "absorption":
                what = f"probability {v.state} ends in {v.target}"
            else:
                what = f"mixing time (epsilon {derived.epsilon:g}), steps"
            lines.append(f"  {what:<52} {point:>10}   {rng}")
        for note in derived.notes:
            lines.append(f"  note: {note}")
    elif args is not None and args.draws == 0:
        lines.append("Long-run answers: not sampled (--draws 0)")
    elif not fit.complete:
        lines.append("Long-run answers: not computed, some rows have no estimate (see the findings)")
    lines.append("")
    lines.append(f"Wrote {out} ({chain.n} states, {len(chain.transitions)} transitions"
                 + ("" if chain.is_valid else "; not valid yet") + ")")
    return "\n".join(lines)
