"""The client report's content: what it says, with every number from core.

:func:`build_report` turns a chain (valid or not) and an optional simulation
:class:`~core.plan.Plan` into a :class:`Report`: a title, a footer (generation
time, Longrun version, the input's SHA-256) and numbered sections made of
plain blocks (:class:`Paragraph`, :class:`Facts`, :class:`Table`,
:class:`Callout`, :class:`BarChart`, :class:`LineChart`,
:class:`ChainPicture`).  It is a content model, not a layout: ``app.report``
renders it as self-contained HTML or as PDF, and a test can read it without Qt.

Every string in the model is plain text (never markup); user-written text
(state ids, labels, names, descriptions) is kept as written and a renderer
must escape it.  All numbers come from :mod:`core.analysis`,
:mod:`core.findings`, :mod:`core.plan` and :mod:`core.evolution`; this module
only chooses what to show and formats it (probabilities to four significant
digits, step counts in the chain's own time unit through :mod:`core.units`).

The report of an invalid chain lists its problems in place of the analysis
instead of failing.  Large chains are summarised: the matrix is printed up to
:data:`MAX_TABLE_STATES` states, charts show at most :data:`MAX_BARS` bars.

Example
-------
>>> from core.model import Chain
>>> from core.plan import Plan
>>> chain = Chain.from_matrix([[0.9, 0.1], [0.5, 0.5]], ["up", "down"], name="Toy")
>>> rep = build_report(chain, plan=Plan("up", 3))
>>> [s.title for s in rep.sections][:3]
['Summary', 'The model', 'Validation']
"""
from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass, replace
from datetime import datetime, timezone
from typing import Any, Sequence, Union

import numpy as np

__all__ = [
    "MAX_TABLE_STATES",
    "GRID_STATES",
    "MAX_BARS",
    "MAX_LISTED",
    "NOISE_SD",
    "Paragraph",
    "Facts",
    "Table",
    "Callout",
    "Series",
    "BarChart",
    "LineSeries",
    "Marker",
    "LineChart",
    "ChainPicture",
    "Subheading",
    "Section",
    "Footer",
    "Report",
    "build_report",
    "file_sha256",
    "fmt_prob",
    "fmt_pct",
    "fmt_num",
]

#: Largest chain whose matrix is printed and whose picture is drawn in full
#: (``longrun report --max-table-states`` changes it).
MAX_TABLE_STATES = 60
#: Up to this many states the matrix is printed as a grid; above, row by row.
GRID_STATES = 12
#: Most bars in one chart (the largest values are kept, the rest summarised).
MAX_BARS = 24
#: Most rows in a per-state table below the matrix (largest values first).
MAX_LISTED = 40
#: Error bars on the plan's estimate span this many standard deviations of the
#: Monte Carlo noise (about 95 % for a normal estimate; common practice).
NOISE_SD = 2
#: Points of the distance-versus-run-length curve.
CURVE_POINTS = 56
#: Budget (in multiply-adds, ~n^3 per matrix product) of the time-average
#: curve, which needs a fresh power ladder for every point.
_CURVE_BUDGET = 4e9


# --------------------------------------------------------------------------
# number formats
# --------------------------------------------------------------------------
_SUPERSCRIPT = str.maketrans("0123456789-+", "\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079\u207b\u207a")


def _sci(x: float, digits: int = 4) -> str:
    """``2.5 x 10^-11`` with a multiplication sign and superscript exponent."""
    m, e = f"{x:.{digits - 1}e}".split("e")
    if "." in m:
        m = m.rstrip("0").rstrip(".")
    return f"{m} \u00d7 10{str(int(e)).translate(_SUPERSCRIPT)}"


def fmt_prob(p: float) -> str:
    """A probability to four significant digits, readable at both ends.

    ``0.3530`` -> ``"0.353"``, ``2.5e-11`` -> ``"2.5 x 10^-11"`` (with a
    superscript exponent), ``1 - 1e-12`` -> ``"1 - 1 x 10^-12"`` (a value so
    close to 1 that four digits would round it to 1 keeps its remainder).

    >>> fmt_prob(0.35300412), fmt_prob(0.0), fmt_prob(1.0), fmt_prob(0.04)
    ('0.353', '0', '1', '0.04')
    """
    p = float(p)
    if not math.isfinite(p):
        return "undefined"
    if p == 0:
        return "0"
    if p == 1:
        return "1"
    if 0.9999 < p < 1:
        return f"1 \u2212 {_sci(1 - p)}"
    if abs(p) < 1e-4:
        return ("\u2212" if p < 0 else "") + _sci(abs(p))
    return f"{p:.4g}".replace("-", "\u2212")


def fmt_pct(p: float) -> str:
    """A probability as a percentage to three significant digits (``"14.1%"``)."""
    x = float(p) * 100
    if x == 0:
        return "0%"
    if abs(x) < 0.01:
        return f"{_sci(x, 2)}%"
    return f"{x:.3g}%"


def fmt_num(x: float, digits: int = 4) -> str:
    """A plain number to ``digits`` significant digits (scientific beyond 1e7 or below 1e-4)."""
    x = float(x)
    if math.isnan(x):
        return "undefined"
    if math.isinf(x):
        return "infinite"
    if x == 0:
        return "0"
    if 1e-4 <= abs(x) < 1e7:
        s = f"{x:.{digits}g}"
        if "e" in s:
            s = f"{x:,.0f}"
        return s
    return _sci(x, digits)


def _steps(t: float | None, step) -> str:
    """Steps and what they mean in the chain's unit, compactly: ``"1,462 steps (~122 years)"``.

    The step length itself is stated once in the report's facts, so it is not
    repeated here; a unit that is not a time (``"voyage leg"``) gives a count
    of that unit, as :func:`core.units.format_steps` does.
    """
    from .units import format_count, format_duration, format_steps, step_seconds

    if t is None or step is None or not math.isfinite(float(t)):
        return format_steps(t, step)
    secs = step_seconds(step)
    if secs is None:
        return format_steps(t, step)
    x = float(t)
    return f"{format_count(x)} {'step' if x == 1 else 'steps'} (~{format_duration(x * secs)})"


def _count(t: float) -> str:
    from .units import format_count

    return format_count(t)


def _plural(n: int, word: str, plural: str | None = None) -> str:
    return f"{n:,} {word if n == 1 else (plural or word + 's')}"


# --------------------------------------------------------------------------
# the blocks
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class Paragraph:
    """Running text; ``kind`` is ``"body"``, ``"lead"`` (a section's opening) or ``"note"`` (small print)."""

    text: str
    kind: str = "body"


@dataclass(frozen=True)
class Subheading:
    """A heading inside a section."""

    text: str


@dataclass(frozen=True)
class Facts:
    """Key-value pairs (a definition list)."""

    items: tuple[tuple[str, str], ...]


@dataclass(frozen=True)
class Table:
    """A table of formatted cells.

    Attributes
    ----------
    columns : tuple of str
        Column headings.
    rows : tuple of tuple of str
        The cells, already formatted (plain text).
    align : tuple of str
        ``"left"`` or ``"right"`` for each column (numbers right).
    caption : str
    note : str
        Small print under the table (what was left out, and how to get it).
    kind : str
        ``"data"``, ``"matrix"`` (a grid with row and column heads) or
        ``"listing"`` (a long text column).
    emphasis : tuple of tuple of str
        Per cell ``""``, ``"muted"`` (a zero), ``"strong"`` or ``"bad"``/``"good"``;
        empty when nothing is emphasised.
    """

    columns: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    align: tuple[str, ...] = ()
    caption: str = ""
    note: str = ""
    kind: str = "data"
    emphasis: tuple[tuple[str, ...], ...] = ()


@dataclass(frozen=True)
class Callout:
    """A boxed statement: a finding, a verdict or the caution.

    ``kind`` is a finding severity (``"error"``, ``"warning"``, ``"note"``), a
    verdict (``"sound"``, ``"misleading"``), ``"valid"`` or ``"caution"``.
    """

    kind: str
    title: str
    text: str
    detail: str = ""
    detail_label: str = ""


@dataclass(frozen=True)
class Series:
    """One series of a bar chart.

    ``role`` names its meaning for the renderer's palette: ``"truth"`` (the
    exact long run), ``"estimate"`` (what a planned simulation reports),
    ``"law"`` (a stationary law, coloured by class).  ``errors`` are half
    widths of error bars (or empty).
    """

    name: str
    values: tuple[float, ...]
    role: str = "law"
    errors: tuple[float, ...] = ()


@dataclass(frozen=True)
class BarChart:
    """Bars over categories (states); one series, or several side by side.

    Attributes
    ----------
    groups : tuple of int
        For a one-series chart, the colour group of each category (the
        closed class rank); empty for a single colour.
    group_names : tuple of str
        Legend names of the groups.
    """

    title: str
    categories: tuple[str, ...]
    series: tuple[Series, ...]
    y_label: str
    x_label: str = "state"
    caption: str = ""
    groups: tuple[int, ...] = ()
    group_names: tuple[str, ...] = ()
    note: str = ""


@dataclass(frozen=True)
class LineSeries:
    """A curve ``y(x)``; ``role`` ``"distance"`` for the plan's distance curve."""

    name: str
    x: tuple[float, ...]
    y: tuple[float, ...]
    role: str = "distance"


@dataclass(frozen=True)
class Marker:
    """A reference line: ``axis="x"`` vertical at ``value``, ``"y"`` horizontal.

    ``role`` is ``"plan"`` (the planned run), ``"sound"`` (the shortest sound
    run) or ``"tolerance"``; ``point`` marks ``(value, y)`` on the curve.
    """

    axis: str
    value: float
    label: str
    role: str
    point: float | None = None


@dataclass(frozen=True)
class LineChart:
    """Curves on a (log-log by default) grid with reference lines."""

    title: str
    series: tuple[LineSeries, ...]
    x_label: str
    y_label: str
    markers: tuple[Marker, ...] = ()
    log_x: bool = True
    log_y: bool = True
    y_floor: float | None = None
    caption: str = ""
    note: str = ""


@dataclass(frozen=True)
class ChainPicture:
    """The chain as drawn in the editor (the renderer draws it from ``Report.chain``)."""

    caption: str
    states: int


Block = Union[Paragraph, Subheading, Facts, Table, Callout, BarChart, LineChart, ChainPicture]


@dataclass(frozen=True)
class Section:
    """A numbered section: a stable ``key``, a title and its blocks."""

    key: str
    title: str
    blocks: tuple[Block, ...]


@dataclass(frozen=True)
class Footer:
    """What every page carries: when, with what, from which input."""

    generated: str
    version: str
    source: str
    sha256: str
    sha256_of: str

    @property
    def line(self) -> str:
        return (f"Generated {self.generated} \u00b7 Longrun {self.version} \u00b7 "
                f"{self.source} \u00b7 SHA-256 {self.sha256}")


@dataclass(frozen=True)
class Report:
    """The whole client report (see :func:`build_report`).

    Attributes
    ----------
    title, subtitle : str
    chain : core.model.Chain
        The model reported on (the renderer draws its picture).
    valid : bool
    verdict : str or None
        ``"sound"`` / ``"misleading"`` when a plan was checked.
    sections : tuple of Section
    caution : str
    footer : Footer
    """

    title: str
    subtitle: str
    chain: Any
    valid: bool
    verdict: str | None
    sections: tuple[Section, ...]
    caution: str
    footer: Footer

    def section(self, key: str) -> Section:
        for s in self.sections:
            if s.key == key:
                return s
        raise KeyError(key)

    def blocks(self, kind: type | None = None):
        """Every block, in order (optionally only those of one class)."""
        for s in self.sections:
            for b in s.blocks:
                if kind is None or isinstance(b, kind):
                    yield b

    def plain_text(self) -> str:
        """All text of the report, in reading order (for search, tests and plain viewers)."""
        out = [self.title, self.subtitle]
        for s in self.sections:
            out.append(s.title)
            for b in s.blocks:
                out.extend(_block_text(b))
        out += [self.caution, self.footer.line]
        return "\n".join(t for t in out if t)


def _block_text(b) -> list[str]:
    if isinstance(b, (Paragraph, Subheading)):
        return [b.text]
    if isinstance(b, Facts):
        return [f"{k}: {v}" for k, v in b.items]
    if isinstance(b, Table):
        return [b.caption, " | ".join(b.columns), *(" | ".join(r) for r in b.rows), b.note]
    if isinstance(b, Callout):
        return [b.title, b.text, b.detail]
    if isinstance(b, BarChart):
        return [b.title, " | ".join(b.categories), b.caption, b.note]
    if isinstance(b, LineChart):
        return [b.title, *(m.label for m in b.markers), b.caption, b.note]
    if isinstance(b, ChainPicture):
        return [b.caption]
    return []


# --------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------
def file_sha256(path) -> str:
    """Hex SHA-256 of a file's bytes (read in chunks)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _display(chain, i: int) -> str:
    s = chain.states[i]
    return s.id if not s.label or s.label == s.id else f"{s.id} ({s.label})"


def _names(chain, idx: Sequence[int], limit: int = 12, *, quote: bool = False) -> str:
    idx = list(idx)
    q = _quote if quote else str
    shown = ", ".join(q(chain.ids[i]) for i in idx[:limit])
    if len(idx) > limit:
        shown += f" and {len(idx) - limit} more"
    return shown


def _quote(s: str) -> str:
    return f"\u2018{s}\u2019"


def _typed(p) -> str:
    if isinstance(p, float):
        return repr(p)
    return str(p).strip()


class _Tags:
    """Class tags matching the editor's picture: C1, C2 ... closed, T1 ... transient."""

    def __init__(self, structure):
        self.s = structure
        self.tag: dict[int, str] = {}
        for rank, k in enumerate(structure.closed):
            self.tag[k] = f"C{rank + 1}"
        for rank, k in enumerate(structure.transient):
            self.tag[k] = f"T{rank + 1}"

    def of_state(self, i: int) -> str:
        return self.tag[int(self.s.class_of[i])]


# --------------------------------------------------------------------------
# the builder
# --------------------------------------------------------------------------
def build_report(
    chain,
    *,
    plan=None,
    start=None,
    epsilon: float = 0.25,
    source: str | None = None,
    sha256: str | None = None,
    generated: datetime | None = None,
    max_table_states: int = MAX_TABLE_STATES,
) -> Report:
    """Build the client report of ``chain`` (and of a simulation ``plan``).

    Parameters
    ----------
    chain : core.model.Chain
        The model, valid or not (an invalid one gets a report listing its
        problems in place of the analysis).
    plan : core.plan.Plan, optional
        A simulation plan; its check is told as a story (what it would report
        against the truth, how far off that is, how long it must run instead).
    start : int or str, optional
        A start state (row index or id) for the start-specific facts; it
        replaces the plan's start when both are given.
    epsilon : float
        Distance to the long run that defines the mixing time, in (0, 1).
    source : str, optional
        The input's name as shown in the footer (a file name).
    sha256 : str, optional
        Hex SHA-256 of the input file; when omitted, the SHA-256 of the
        chain's file text (:func:`core.io.dumps_chain`) is given instead and
        the footer says so.
    generated : datetime, optional
        Generation time (default now, local time zone).
    max_table_states : int
        Largest chain printed in full (matrix and picture); larger ones are
        summarised.

    Returns
    -------
    Report

    Raises
    ------
    core.errors.OptionError
        For a start state that does not exist or is a start law, or
        ``epsilon`` out of range.
    """
    from . import __version__
    from .analysis import CAUTION
    from .errors import OptionError

    eps = float(epsilon)
    if not 0.0 < eps < 1.0:
        raise OptionError(f"epsilon must be between 0 and 1 (exclusive), not {epsilon}")
    if max_table_states < 1:
        raise OptionError(f"the largest printed table must have at least 1 state, not {max_table_states}")
    if start is None and plan is not None:
        start = plan.start

    when = (generated or datetime.now(timezone.utc).astimezone())
    if sha256 is None:
        from .io import dumps_chain

        digest = hashlib.sha256(dumps_chain(chain).encode("utf-8")).hexdigest()
        sha_of = "the model's file text (not taken from a saved file)"
    else:
        digest, sha_of = sha256, "the input file"
    name = source or "unsaved model"
    footer = Footer(
        generated=when.strftime("%Y-%m-%d %H:%M %Z").strip(),
        version=__version__,
        source=name,
        sha256=digest,
        sha256_of=sha_of,
    )
    title = chain.name.strip() or (source or "Untitled chain")
    subtitle = "Long-run analysis" + (" and simulation plan check" if plan is not None else "")

    ctx = _Ctx(chain, plan, start, eps, max_table_states)
    sections = [ctx.model_section(), ctx.validation_section()]
    if ctx.valid:
        sections += [
            ctx.classes_section(),
            ctx.long_run_section(),
            ctx.mixing_section(),
            ctx.findings_section(),
        ]
        if plan is not None:
            sections.append(ctx.plan_section())
    else:
        sections.append(ctx.not_analysed_section())
    sections.insert(0, ctx.summary_section())
    sections.append(Section("caution", "Caution", (
        Callout("caution", "Results describe the model, not the system", CAUTION),
        Paragraph(
            f"Prepared with Longrun {__version__} on {footer.generated} from {name}. "
            f"SHA-256 of {sha_of}: {digest}."
            + (" Every figure in this report is computed exactly from the transition matrix (no "
               "simulation was run); figures are rounded for reading." if ctx.valid else ""),
            "note",
        ),
    )))
    return Report(
        title=title,
        subtitle=subtitle,
        chain=chain,
        valid=ctx.valid,
        verdict=None if ctx.check is None else ctx.check.verdict,
        sections=tuple(sections),
        caution=CAUTION,
        footer=footer,
    )


class _Ctx:
    """The computations a report needs, each done once."""

    def __init__(self, chain, plan, start, epsilon, max_states):
        from .errors import OptionError

        self.chain = chain
        self.plan = plan
        self.epsilon = epsilon
        self.max_states = max_states
        self.step = chain.step
        self.valid = not chain.problems
        self.start_index = None
        if start is not None and self.valid:
            if isinstance(start, str):
                if start not in chain.index:
                    shown = ", ".join(chain.ids[:12]) + (" ..." if chain.n > 12 else "")
                    raise OptionError(f"start {start!r}: no such state (states are: {shown})")
                self.start_index = chain.index[start]
            elif isinstance(start, (int, np.integer)) and not isinstance(start, bool):
                if not 0 <= int(start) < chain.n:
                    raise OptionError(f"start state index {start} is out of range (the chain has {chain.n} states)")
                self.start_index = int(start)
            else:
                raise OptionError("the report needs a start state (an id or a row index), not a start law")
        self.analysis = self.findings = self.check = None
        self.plan_remedy = ""
        if self.valid:
            from .analysis import analyze
            from .findings import find_all

            self.P = chain.matrix()
            self.analysis = analyze(chain, epsilon=epsilon, start=self.start_index)
            self.tags = _Tags(self.analysis.structure)
            if plan is not None:
                from .plan import check_plan

                plan = replace(plan, start=self.start_index)
                self.plan = plan
                self.check = check_plan(chain, plan)
            self.findings = find_all(chain, plan=plan, start=self.start_index, epsilon=epsilon)

    # -- summary ------------------------------------------------------------
    def summary_section(self) -> Section:
        c = self.chain
        blocks: list = []
        if not self.valid:
            n = len(c.problems)
            what = f"The model {_quote(c.name)}" if c.name else "The model"
            blocks.append(Paragraph(
                f"{what} cannot be analysed yet: it has {_plural(n, 'problem')} (listed under "
                "Validation). The report describes the model as written; the long-run analysis and "
                "any plan check follow once the problems are fixed.",
                "lead",
            ))
            if self.plan is not None:
                blocks.append(Callout("error", "The simulation plan was not checked",
                                      "A plan can only be checked against a valid model."))
            return Section("summary", "Summary", tuple(blocks))
        facts = [("States", f"{c.n:,}"), ("Transitions", f"{len(c.exact_probabilities):,} with positive probability")]
        facts.append(("One step", f"{self.step.value:g} {self.step.unit}" if self.step is not None
                      else "no time unit given (steps only)"))
        facts.append(("Structure", self._structure_phrase()))
        facts.append(("Long run", self._long_run_phrase()))
        facts.append(("Mixing time", self._mixing_phrase(short=True)))
        counts = {sev: sum(1 for f in self.findings if f.severity == sev) for sev in ("error", "warning", "note")}
        facts.append(("Findings", ", ".join(_plural(v, k) for k, v in counts.items() if v) or "none"))
        blocks.append(Paragraph(self._lead(), "lead"))
        blocks.append(Facts(tuple(facts)))
        if self.check is not None:
            ch = self.check
            blocks.append(Callout(
                ch.verdict,
                "The planned simulation can be trusted" if ch.sound else "The planned simulation would mislead",
                ch.sentence,
            ))
        return Section("summary", "Summary", tuple(blocks))

    def _lead(self) -> str:
        c = self.chain
        what = _quote(c.name) if c.name else "This model"
        text = (f"{what} is a finite Markov chain of {_plural(c.n, 'state')}"
                + (f", one step standing for {self.step.value:g} {self.step.unit}" if self.step else "")
                + ". This report gives its exact long-run behaviour")
        if self.plan is not None:
            text += (" and checks, before any simulation is run, whether the planned simulation "
                     "would report that behaviour faithfully")
        return text + "."

    def _structure_phrase(self) -> str:
        s = self.analysis.structure
        closed = s.closed_classes
        if s.irreducible:
            per = closed[0].period
            return ("irreducible and aperiodic" if per == 1 else f"irreducible, period {per}")
        parts = [_plural(len(closed), "closed class", "closed classes")]
        if s.transient:
            parts.append(_plural(len(s.transient_states), "transient state"))
        if s.absorbing_states:
            parts.append(_plural(len(s.absorbing_states), "absorbing state"))
        periodic = [k for k in closed if k.period and k.period > 1]
        if periodic:
            parts.append("periodic (" + ", ".join(f"period {k.period}" for k in periodic) + ")")
        return ", ".join(parts)

    def _long_run_phrase(self) -> str:
        a = self.analysis
        s = a.structure
        c = self.chain
        if len(s.closed) > 1:
            if a.start is not None:
                law = a.start.limit
                top = np.argsort(-law, kind="stable")[:3]
                return (f"depends on the start; from {_quote(c.ids[a.start.state])}: "
                        + ", ".join(f"{c.ids[i]} {fmt_pct(law[i])}" for i in top if law[i] > 0))
            return "depends on the start (several closed classes)"
        law = a.stationary[0]
        top = np.argsort(-law, kind="stable")[:3]
        return "share of time " + ", ".join(f"{c.ids[i]} {fmt_pct(law[i])}" for i in top if law[i] > 0)

    def _mixing_phrase(self, short: bool = False) -> str:
        a = self.analysis
        mx = a.mixing
        if mx.steps is not None:
            return f"{_steps(mx.steps, self.step)} to within {self.epsilon:g} of the long run, from any start"
        if mx.reason == "periodic":
            d = a.structure.closed_classes[0].period
            return (f"not defined: period {d}, the law at a fixed step keeps cycling" if short else
                    f"not defined: the closed class has period {d}, so the law at a given step keeps "
                    "cycling and never settles; only time averages converge")
        if mx.reason == "several closed classes":
            return ("not defined: the long run depends on the start" if short else
                    "not defined for the chain as a whole: with several closed classes the long run "
                    "depends on where the chain starts")
        return "more than about 4.6 \u00d7 10\u00b9\u2078 steps (beyond what can be computed)"

    # -- the model ----------------------------------------------------------
    def model_section(self) -> Section:
        c = self.chain
        blocks: list = []
        if c.description.strip():
            blocks.append(Paragraph(c.description.strip(), "lead"))
        if not self.valid:  # a valid chain's key figures are in the summary already
            facts = [("Name", c.name or "(no name)"), ("States", f"{c.n:,}"),
                     ("Transitions", f"{len(c.transitions):,} as written")]
            facts.append(("One step", f"{c.step.value:g} {c.step.unit}" if c.step else "no time unit given (steps only)"))
            blocks.append(Facts(tuple(facts)))
        if 0 < c.n <= self.max_states:
            blocks.append(ChainPicture(
                "As laid out in the editor: circles are states, arrows are transitions labelled with "
                "their probabilities as written.", c.n))
        elif c.n:
            blocks.append(Paragraph(
                f"The picture of the chain is left out: {c.n:,} states are more than the "
                f"{self.max_states} that can be drawn readably (raise the limit with --max-table-states).",
                "note"))
        blocks += self._matrix_blocks()
        return Section("model", "The model", tuple(blocks))

    def _matrix_blocks(self) -> list:
        c = self.chain
        n = c.n
        if n == 0:
            return [Paragraph("The chain has no states.", "note")]
        if n > self.max_states:
            nz = len(c.exact_probabilities)
            return [
                Subheading("Transition matrix"),
                Paragraph(
                    f"The transition matrix has {n:,} \u00d7 {n:,} entries, {nz:,} of them positive "
                    f"({nz / n:.3g} per row on average). It is too large to print readably: the limit "
                    f"is {self.max_states} states (raise it with --max-table-states). The validated "
                    "matrix can be handed over in full with: longrun export FILE --to matrix.csv "
                    "(or .json, with its SHA-256).",
                ),
            ]
        if self.valid and n <= GRID_STATES:
            P = self.P
            ids = c.ids
            rows, emph = [], []
            for i in range(n):
                cells = [ids[i]] + [fmt_prob(P[i, j]) if P[i, j] > 0 else "\u00b7" for j in range(n)]
                rows.append(tuple(cells))
                emph.append(tuple(["strong"] + ["" if P[i, j] > 0 else "muted" for j in range(n)]))
            return [
                Subheading("Transition matrix"),
                Table(("from \\ to",) + tuple(ids), tuple(rows), ("left",) + ("right",) * n,
                      caption="Row: the state now; column: the state one step later. Each row sums to 1.",
                      note="Probabilities rounded to 4 significant digits; \u00b7 marks an impossible move.",
                      kind="matrix", emphasis=tuple(emph)),
            ]
        # row by row, as written (also for invalid chains: what the user typed)
        exact = c.exact_probabilities
        out_rows = []
        by_source: dict[str, list] = {}
        for t in c.transitions:
            by_source.setdefault(t.source, []).append(t)
        for s in c.states:
            parts = []
            for t in by_source.get(s.id, []):
                typed = _typed(t.p)
                v = exact.get((t.source, t.target))
                shown = typed
                if typed.lower() == "rest" and v is not None:
                    shown = f"rest = {fmt_prob(float(v))}"
                parts.append(f"{t.target} {shown}")
            out_rows.append((s.id, ";  ".join(parts) if parts else "(no transitions)"))
        known = set(c.ids)
        orphans = [t for t in c.transitions if t.source not in known]
        for t in orphans:
            out_rows.append((t.source + " (not a state)", f"{t.target} {_typed(t.p)}"))
        caption = ("Each state's transitions as written: target and probability." if not self.valid else
                   "Each state's transitions: target and probability as written ('rest' resolved).")
        return [
            Subheading("Transitions" if not self.valid else "Transition matrix, row by row"),
            Table(("from", "to and probability"), tuple(out_rows), ("left", "left"),
                  caption=caption, kind="listing"),
        ]

    # -- validation --------------------------------------------------------
    def validation_section(self) -> Section:
        from .model import ROW_SUM_TOLERANCE

        c = self.chain
        if self.valid:
            return Section("validation", "Validation", (Callout(
                "valid", "The model is valid",
                f"All {_plural(c.n, 'state')} have transitions that sum to 1, checked in exact rational "
                f"arithmetic on the probabilities as written (tolerance {ROW_SUM_TOLERANCE:g}); every "
                "probability lies between 0 and 1 and every transition joins two existing states."),))
        rows = []
        for k, p in enumerate(c.problems, 1):
            where = p.state or (f"{p.transition[0]} \u2192 {p.transition[1]}" if p.transition else "the model")
            if p.transition and p.state:
                where = f"{p.transition[0]} \u2192 {p.transition[1]}"
            rows.append((str(k), where, p.message))
        n = len(rows)
        return Section("validation", "Validation", (
            Callout("error", f"The model is not valid: {_plural(n, 'problem')}",
                    "Each problem is listed with its place. Fix them in the editor or the file; nothing "
                    "else in the model needs to change."),
            Table(("#", "where", "problem"), tuple(rows), ("right", "left", "left"), kind="listing"),
        ))

    def not_analysed_section(self) -> Section:
        blocks = [Paragraph(
            "Classes, periods, the long-run law, the mixing time and the findings are computed from "
            "a valid transition matrix only. They are left out of this report until the problems "
            "above are fixed.")]
        if self.plan is not None:
            blocks.append(Paragraph("The simulation plan given was not checked for the same reason."))
        return Section("analysis", "Analysis", tuple(blocks))

    # -- classes -------------------------------------------------------------
    def classes_section(self) -> Section:
        a = self.analysis
        s = a.structure
        c = self.chain
        tags = self.tags
        blocks: list = []
        if s.irreducible:
            cls = s.classes[0]
            lead = "The chain is irreducible: every state can reach every other, so there is one long run."
            if cls.period and cls.period > 1:
                lead += (f" It is periodic with period {cls.period}: the chain moves through "
                         f"{cls.period} groups of states in a fixed cycle.")
            else:
                lead += " It is aperiodic, so the law at a given step settles down to the long run."
        elif len(s.closed) == 1:
            lead = ("The chain has one closed class, which it enters sooner or later from any start; "
                    "the other states are transient (visited only for a while).")
        else:
            lead = (f"The chain has {len(s.closed)} closed classes. Once it enters one it never leaves, "
                    "so where it ends up, and hence its long run, depends on where it starts.")
        blocks.append(Paragraph(lead, "lead"))
        rows = []
        for k, cls in enumerate(s.classes):
            if cls.closed:
                kind = "absorbing" if cls.size == 1 else "closed"
            else:
                kind = "transient"
            per = ("no cycle" if cls.period is None else "aperiodic" if cls.period == 1 else str(cls.period))
            rows.append((tags.tag[k], kind, per, f"{cls.size:,}", _names(c, cls.states)))
        ordered = sorted(range(len(rows)), key=lambda k: (not s.classes[k].closed, k))
        rows = [rows[k] for k in ordered]
        note = ""
        if len(rows) > MAX_LISTED:
            note = f"{len(rows) - MAX_LISTED:,} more classes are not listed."
            rows = rows[:MAX_LISTED]
        blocks.append(Table(("class", "kind", "period", "states", "members"), tuple(rows),
                            ("left", "left", "left", "right", "left"),
                            caption="Communicating classes. The tags match the picture: C for closed, T for transient.",
                            note=note))
        for k in s.closed:
            cls = s.classes[k]
            if cls.period and cls.period > 1:
                sub = tuple((f"{r}", _names(c, g)) for r, g in enumerate(cls.cyclic_subclasses))
                blocks.append(Table(("group", "states"), sub, ("right", "left"),
                                    caption=f"Class {tags.tag[k]} cycles through {cls.period} groups in turn "
                                    "(every transition goes from one group to the next).", kind="listing"))
        T = s.transient_states
        if T:
            ab = a.absorption
            closed_tags = tuple(tags.tag[k] for k in s.closed)
            rows = []
            for i in T[:MAX_LISTED]:
                probs = [fmt_prob(ab.probabilities[i, m]) for m in range(len(s.closed))]
                rows.append((c.ids[i], *probs, _steps(ab.expected_steps[i], self.step)))
            note = f"{len(T) - MAX_LISTED:,} more transient states are not listed." if len(T) > MAX_LISTED else ""
            blocks.append(Subheading("Leaving the transient states"))
            blocks.append(Table(
                ("from",) + tuple(f"ends in {t}" for t in closed_tags) + ("expected time before",),
                tuple(rows), ("left",) + ("right",) * len(closed_tags) + ("right",),
                caption="Probability of ending in each closed class, and the expected number of steps "
                "spent among the transient states first.", note=note))
        return Section("classes", "Classes and periods", tuple(blocks))

    # -- long run ------------------------------------------------------------
    def long_run_section(self) -> Section:
        a = self.analysis
        s = a.structure
        c = self.chain
        tags = self.tags
        blocks: list = []
        closed = s.closed
        if len(closed) == 1:
            cls = s.classes[closed[0]]
            lead = ("The long-run law is the share of time the chain spends in each state over a long "
                    "run, whatever the start")
            lead += (" (the stationary distribution)." if cls.period == 1 else
                     f". Because the chain has period {cls.period}, the law at a given step keeps cycling "
                     "around it; only shares of time converge.")
        else:
            lead = ("Each closed class has its own long-run law (its stationary distribution, summing to 1 "
                    "within the class). Which one applies depends on where the chain ends up.")
        blocks.append(Paragraph(lead, "lead"))
        # one bar per recurrent state, coloured by class
        cats, vals, groups = [], [], []
        for rank, (k, pi) in enumerate(zip(closed, a.stationary)):
            for i in s.classes[k].states:
                cats.append(i)
                vals.append(float(pi[i]))
                groups.append(rank)
        note = ""
        if len(cats) > MAX_BARS:
            keep = sorted(np.argsort(-np.asarray(vals), kind="stable")[:MAX_BARS])
            rest = 1.0 * (len(cats) - MAX_BARS)
            note = f"The {MAX_BARS} largest shares of {len(cats):,} recurrent states are shown ({rest:.0f} smaller ones left out)."
            cats = [cats[j] for j in keep]
            vals = [vals[j] for j in keep]
            groups = [groups[j] for j in keep]
        blocks.append(BarChart(
            title="Long-run share of time in each state",
            categories=tuple(c.ids[i] for i in cats),
            series=(Series("long-run share", tuple(vals), "law"),),
            y_label="probability",
            groups=tuple(groups) if len(closed) > 1 else (),
            group_names=tuple(tags.tag[k] for k in closed) if len(closed) > 1 else (),
            caption="Exact stationary probabilities (GTH state reduction)."
            + (" Colours mark the closed classes; each class's bars sum to 1." if len(closed) > 1 else ""),
            note=note,
        ))
        rows = []
        rec = [i for k in closed for i in s.classes[k].states]
        if len(rec) > MAX_LISTED:
            share = {i: float(pi[i]) for pi, k in zip(a.stationary, closed) for i in s.classes[k].states}
            rec = sorted(rec, key=lambda i: -share[i])[:MAX_LISTED]
        for i in rec:
            m = closed.index(int(s.class_of[i]))
            rows.append((_display(c, i), tags.of_state(i), fmt_prob(a.stationary[m][i]), fmt_pct(a.stationary[m][i]),
                         _steps(a.return_times[i], self.step)))
        nrec = int(np.sum(s.recurrent_mask))
        blocks.append(Table(
            ("state", "class", "probability", "share", "mean time between visits"), tuple(rows),
            ("left", "left", "right", "right", "left"),
            caption="Mean time between visits is 1 / probability (Kac's formula).",
            note=(f"The {MAX_LISTED} largest of {nrec:,} recurrent states are listed." if nrec > MAX_LISTED else
                  ("Transient states have long-run probability 0 and are not listed." if s.transient else "")),
        ))
        if a.start is not None and len(closed) > 1:
            st = a.start
            law = st.limit
            idx = [i for i in np.argsort(-law, kind="stable") if law[i] > 0][:MAX_LISTED]
            blocks.append(Subheading(f"Long run from {c.ids[st.state]}"))
            blocks.append(Table(("state", "class", "probability", "share"),
                                tuple((_display(c, i), tags.of_state(i), fmt_prob(law[i]), fmt_pct(law[i])) for i in idx),
                                ("left", "left", "right", "right"),
                                caption=f"Share of time in the long run when the chain starts in {c.ids[st.state]} "
                                "(each class's law weighted by the probability of ending in it)."))
        return Section("long-run", "Long-run law", tuple(blocks))

    # -- mixing ----------------------------------------------------------------
    def mixing_section(self) -> Section:
        a = self.analysis
        c = self.chain
        sp = a.spectrum
        mx = a.mixing
        blocks: list = []
        if mx.steps is not None:
            lead = (f"After {_steps(mx.steps, self.step)}, the chain's law is within {self.epsilon:g} "
                    "(total variation distance) of the long-run law, whatever state it started in. "
                    "That is the mixing time; a simulation should discard at least this much as burn-in "
                    "and run many mixing times long (common practice).")
        else:
            lead = "The mixing time is " + self._mixing_phrase() + "."
        blocks.append(Paragraph(lead, "lead"))
        facts = [(f"Mixing time t_mix({self.epsilon:g})", self._mixing_phrase(short=True)
                  if mx.steps is None else _steps(mx.steps, self.step))]
        if a.start is not None:
            st = a.start
            facts.append((f"From {c.ids[st.state]}",
                          _steps(st.mixing_steps, self.step) + f" to within {self.epsilon:g} of its long run"
                          if st.mixing_steps is not None else "its law does not settle (a periodic class is reached)"))
        facts.append(("Second-largest eigenvalue modulus", fmt_num(sp.slem, 6)))
        facts.append(("Spectral gap", fmt_num(sp.gap, 4)))
        facts.append(("Relaxation time (1 / gap)", _steps(sp.relaxation_time, self.step)
                      if sp.relaxation_time is not None else "not defined (gap 0: a periodic closed class)"))
        if a.structure.irreducible:
            facts.append(("Reversible (detailed balance)", "yes" if sp.reversible else "no"))
        if sp.bounds is not None:
            b = sp.bounds
            facts.append((f"Spectral bounds on t_mix({b.epsilon:g})",
                          f"{fmt_num(b.lower)} to {fmt_num(b.upper)} steps"))
        blocks.append(Facts(tuple(facts)))
        blocks.append(Paragraph(
            "Mixing time by doubling and binary lifting over exact powers of the matrix (Levin, Peres & "
            "Wilmer, Markov Chains and Mixing Times, 2nd ed., 2017, ch. 4); spectral bounds for "
            "reversible chains from the same book, Theorems 12.4 and 12.5.", "note"))
        return Section("mixing", "Mixing time", tuple(blocks))

    # -- findings ----------------------------------------------------------------
    def findings_section(self) -> Section:
        fs = self.findings
        told = ""
        if self.check is not None:
            plan_f = [f for f in fs if f.code == "plan-misleading"]
            if plan_f:
                self.plan_remedy = plan_f[0].remedy
                fs = tuple(f for f in fs if f.code != "plan-misleading")
                told = " The plan's own verdict is told in the next section, The simulation plan."
        if not fs:
            if told:
                return Section("findings", "Findings", (Paragraph(
                    "Apart from the plan's verdict, nothing in the chain is known to mislead a "
                    "simulation." + told, "lead"),))
            return Section("findings", "Findings", (Paragraph(
                "No findings: the chain has one aperiodic closed class, no rare transitions and mixes "
                "quickly; nothing in it is known to mislead a simulation.", "lead"),))
        blocks: list = [Paragraph(
            f"{_plural(len(fs), 'finding')} about what in this model"
            + (" and plan" if self.plan is not None else "")
            + " can mislead, most serious first." + told, "lead")]
        for f in fs:
            blocks.append(Callout(f.severity, f.title, f.explanation, detail=f.remedy, detail_label="What to do"))
        return Section("findings", "Findings", tuple(blocks))

    # -- the plan ----------------------------------------------------------------
    def plan_section(self) -> Section:
        ch = self.check
        plan = ch.plan
        c = self.chain
        step = self.step
        start = c.ids[ch.start_index]
        blocks: list = []
        est_words = ("where the replicates are at the last step" if plan.estimator == "final" else
                     "the time average along each replicate" +
                     (f", sampled every {plan.stride} steps" if plan.stride > 1 else ""))
        blocks.append(Paragraph(
            f"The plan: run {_plural(plan.replicates, 'independent replicate')} of the chain from "
            f"{_quote(start)}"
            + (f", discard the first {_steps(plan.burn_in, step)}" if plan.burn_in else "")
            + f", then simulate {_steps(plan.steps, step)} and estimate the long run from {est_words}. "
            "Its outcome can be computed exactly before running it: as the replicates grow, its estimate "
            "converges to a law that follows from the matrix alone.", "lead"))
        facts = [("Start", start), ("Run", _steps(plan.steps, step)),
                 ("Burn-in", _steps(plan.burn_in, step) if plan.burn_in else "none"),
                 ("Replicates", f"{plan.replicates:,}"),
                 ("Estimator", "final step" if plan.estimator == "final" else
                  f"time average ({_plural(plan.samples, 'sample')} per replicate)"),
                 ("Tolerance", f"{plan.tolerance:g} (total variation distance)")]
        blocks.append(Facts(tuple(facts)))

        # 1. what it would report vs the truth
        blocks.append(Subheading("What the simulation would report, and the truth"))
        n = c.n
        order = list(range(n))
        note = ""
        if n > MAX_BARS:
            order = sorted(np.argsort(-np.abs(ch.bias), kind="stable")[:MAX_BARS])
            note = f"The {MAX_BARS} states with the largest errors are shown (of {n:,})."
        err = tuple(float(NOISE_SD * ch.noise_sd[i]) for i in order)
        blocks.append(BarChart(
            title="Planned simulation vs the exact long run",
            categories=tuple(c.ids[i] for i in order),
            series=(Series("planned simulation would report", tuple(float(ch.expected_estimate[i]) for i in order),
                           "estimate", err),
                    Series("exact long run (the truth)", tuple(float(ch.long_run[i]) for i in order), "truth")),
            y_label="probability",
            caption=(f"Whiskers: \u00b1{NOISE_SD} standard deviations of Monte Carlo noise with "
                     f"{plan.replicates:,} replicates. Bars of the plan: the law its estimate converges to."),
            note=note,
        ))
        rows, emph = [], []
        lst = order if n <= MAX_LISTED else sorted(np.argsort(-np.abs(ch.bias), kind="stable")[:MAX_LISTED])
        for i in lst:
            b = ch.bias[i]
            rows.append((_display(c, i), fmt_prob(ch.expected_estimate[i]), fmt_prob(ch.long_run[i]),
                         ("+" if b > 0 else "") + fmt_prob(b), fmt_prob(ch.noise_sd[i])))
            big = abs(b) > NOISE_SD * ch.noise_sd[i] and abs(b) > plan.tolerance / max(2, n)
            emph.append(("", "", "", "bad" if big and not ch.sound else "", ""))
        blocks.append(Table(("state", "simulation reports", "truth (long run)", "error", "noise (1 sd)"),
                            tuple(rows), ("left", "right", "right", "right", "right"),
                            caption="Error = what the simulation would report minus the truth.",
                            note=(f"The {MAX_LISTED} largest errors of {n:,} states are listed." if n > MAX_LISTED else ""),
                            emphasis=tuple(emph)))

        # 2. how far off
        blocks.append(Subheading("How far off it is"))
        blocks.append(Paragraph(self._how_far(ch)))

        # 3. how long it must run instead
        blocks.append(Subheading("How long it must run instead"))
        blocks.append(Paragraph(self._how_long(ch)))
        blocks.append(self._tv_chart(ch))
        blocks.append(Callout(ch.verdict, "Verdict: sound" if ch.sound else "Verdict: misleading", ch.sentence,
                              detail=self.plan_remedy, detail_label="What to do" if self.plan_remedy else ""))
        blocks.append(Paragraph(
            "Exact plan check: the estimate's limiting law pi0 P^(B+T) (final step) or the average of "
            "pi0 P^(B+js) (time average) computed by doubling, compared in total variation with the "
            "Cesaro long-run law; noise from the binomial spread or the asymptotic variance of the time "
            "average (Kemeny & Snell, Finite Markov Chains, 1960, ch. 4).", "note"))
        return Section("plan", "The simulation plan", tuple(blocks))

    def _how_far(self, ch) -> str:
        c = self.chain
        plan = ch.plan
        over = np.flatnonzero(ch.bias > 0)
        under = np.flatnonzero(ch.bias < 0)
        tv = float(ch.tv)
        noise = float(np.max(ch.noise_sd)) if ch.noise_sd.size else 0.0
        text = (f"The distance between what the simulation would report and the truth is {fmt_num(tv, 3)} "
                f"(total variation): for some group of states the reported share of time is off by "
                f"{fmt_pct(tv)} of all time, and no other question about shares can be off by more.")
        if tv > 0 and over.size and under.size:
            text += (f" Here the simulation gives too much weight, {fmt_pct(tv)} in total, to "
                     f"{_names(c, over, 6, quote=True)}, and the same too little to {_names(c, under, 6, quote=True)}.")
        text += f" The tolerance is {fmt_num(plan.tolerance, 3)}, so the plan is {ch.verdict}."
        if not ch.sound:
            if noise == 0:
                text += (" Every replicate would give exactly the same answer (there is no Monte Carlo noise "
                         "here), so more replicates cannot help: the error is a bias of the plan itself.")
            elif tv > NOISE_SD * noise:
                text += (f" Monte Carlo noise with {plan.replicates:,} replicates is only about "
                         f"\u00b1{fmt_num(noise, 2)} per state: the error is a bias of the plan itself, so more "
                         "replicates would report the wrong answer more precisely, not fix it.")
            else:
                text += (f" Monte Carlo noise with {plan.replicates:,} replicates (about \u00b1{fmt_num(noise, 2)} "
                         "per state) is as large as the bias, so a single simulation could land either side.")
        else:
            text += (f" What remains is Monte Carlo noise of about \u00b1{fmt_num(noise, 2)} per state "
                     f"with {plan.replicates:,} replicates.")
        return text

    def _how_long(self, ch) -> str:
        plan = ch.plan
        step = self.step
        if ch.sound:
            text = f"The planned run of {_steps(plan.steps, step)} is long enough."
            if ch.min_steps is not None and ch.min_steps < plan.steps:
                text += f" The shortest sound run at this burn-in is {_steps(ch.min_steps, step)}."
            return text
        if ch.min_steps is not None:
            text = (f"At the planned burn-in the simulation must run at least {_steps(ch.min_steps, step)} "
                    f"instead of {_steps(plan.steps, step)}, {fmt_num(ch.min_steps / plan.steps, 3)} times longer.")
            if ch.min_burn_in is not None and ch.min_burn_in > plan.burn_in:
                text += (f" Alternatively, keeping the run length, a burn-in of {_steps(ch.min_burn_in, step)} "
                         "makes it sound.")
            return text + " The chart shows the distance to the truth for every run length."
        text = f"No run length makes this plan sound: {ch.min_steps_reason}."
        if ch.min_burn_in is not None and ch.min_burn_in > plan.burn_in:
            text += f" A burn-in of {_steps(ch.min_burn_in, step)} would, at the planned run length."
        return text

    def _tv_chart(self, ch) -> LineChart:
        from .evolution import tv_curve, tv_distance
        from .plan import MAX_STEPS, estimate_law

        plan = ch.plan
        step = self.step
        lo = plan.stride if plan.estimator == "average" else 1
        hi = max(plan.steps, ch.min_steps or 0, 10)
        hi = hi * 6 if ch.min_steps is not None else max(hi * 100, 1000)
        hi = int(min(hi, MAX_STEPS // 2))
        n = self.chain.n
        points = CURVE_POINTS
        if plan.estimator == "average":
            per_point = float(n) ** 3 * (2 + math.log2(max(2, plan.burn_in + hi)))
            points = int(max(8, min(CURVE_POINTS, _CURVE_BUDGET / per_point)))
        grid = np.unique(np.round(np.geomspace(lo, hi, points)).astype(np.int64))
        extra = [plan.steps] + ([ch.min_steps] if ch.min_steps is not None else [])
        grid = np.unique(np.concatenate([grid, np.asarray(extra, dtype=np.int64)]))
        grid = grid[grid >= lo]
        if plan.estimator == "final":
            ys = tv_curve(self.P, ch.start_law, [int(plan.burn_in + t) for t in grid], target=ch.long_run)
        else:
            ys = np.array([tv_distance(estimate_law(self.P, replace(plan, steps=int(t))), ch.long_run)
                           for t in grid])
        markers = [
            Marker("y", plan.tolerance, f"tolerance {plan.tolerance:g}", "tolerance"),
            Marker("x", plan.steps, f"planned {_steps(plan.steps, step)}", "plan", point=float(ch.tv)),
        ]
        if ch.min_steps is not None:
            i = int(np.searchsorted(grid, ch.min_steps))
            markers.append(Marker("x", ch.min_steps, f"sound from {_steps(ch.min_steps, step)}", "sound",
                                  point=float(ys[i])))
        # the grid reaches down to a fiftieth of the tolerance (closer is "sound" anyway)
        positive = ys[ys > 0]
        floor = max(float(positive.min()) if positive.size else 0.0, plan.tolerance / 50)
        unit = f" (1 step = {step.value:g} {step.unit})" if step is not None else ""
        return LineChart(
            title="Distance of the simulation's answer from the truth, by run length",
            series=(LineSeries("distance to the long run", tuple(float(t) for t in grid), tuple(float(y) for y in ys)),),
            x_label=f"steps simulated after the burn-in{unit}",
            y_label="total variation distance",
            markers=tuple(markers),
            y_floor=min(floor, plan.tolerance / 10),
            caption=("Exact distance, for each run length at the planned burn-in, between the law the "
                     "plan's estimate converges to and the long-run law; below the tolerance line "
                     "the plan is sound."),
        )
