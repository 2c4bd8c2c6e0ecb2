"""``longrun analyze FILE [--json] [--epsilon E] [--start ID]``: the exact long-run analysis."""
from __future__ import annotations

from ._common import add_file_argument, load_valid, probability, state_index, write_stdout

HELP = "exact long-run analysis: classes, period, stationary laws, absorption, mixing, spectrum"
DESCRIPTION = (
    "Exact long-run analysis of a chain: communicating classes (closed or transient, period, "
    "cyclic subclasses), stationary law of each closed class, absorption probabilities and "
    "expected steps before absorption, the long-run law from every start, mean return times, "
    "Kemeny's constant, the mixing time and the spectrum. Prints a readable report, or with "
    "--json the machine-readable document."
)


def add_arguments(parser):
    add_file_argument(parser)
    parser.add_argument("--json", action="store_true", help="print the analysis as JSON (full-precision floats)")
    parser.add_argument(
        "--epsilon",
        type=probability,
        default=0.25,
        metavar="E",
        help="total variation threshold of the mixing time, between 0 and 1 (default 0.25)",
    )
    parser.add_argument("--start", metavar="ID", default=None, help="also report what happens from this start state")


def findings_text(findings) -> str:
    """The findings as an indented, wrapped text section (empty string if none)."""
    import textwrap

    if not findings:
        return "Findings\n  none: the chain is valid, and nothing in it calls for care in simulation.\n"
    lines = ["Findings"]
    wrap = textwrap.TextWrapper(width=96, initial_indent="    ", subsequent_indent="    ")
    for f in findings:
        lines.append(f"  [{f.severity}] {f.title}")
        lines.extend(wrap.wrap(f.explanation))
        if f.remedy:
            lines.extend(wrap.wrap("What to do: " + f.remedy))
    return "\n".join(lines) + "\n"


def run(args) -> int:
    from ..analysis import analyze
    from ..findings import find_all
    from ..jsonout import dumps

    chain = load_valid(args)
    start = state_index(chain, args.start, option="--start")
    report = analyze(chain, epsilon=args.epsilon, start=start)
    findings = find_all(chain, start=start, epsilon=args.epsilon)
    if args.json:
        doc = report.to_json()
        doc["findings"] = [f.to_json(chain.ids) for f in findings]
        write_stdout(dumps(doc))
        return 0
    text = report.to_text()
    head, sep, tail = text.rpartition("\nCaution:")
    if sep:
        text = f"{head.rstrip()}\n\n{findings_text(findings)}{sep}{tail}"
    else:
        text = f"{text.rstrip()}\n\n{findings_text(findings)}"
    write_stdout(text)
    return 0
