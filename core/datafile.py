"""Reading observed state sequences from CSV files.

A data file is a table with a header row.  Three layouts are understood:

* **one sequence** -- a column of state labels in time order
  (``state`` below), every other column ignored;
* **several sequences** -- an id column plus a state column; each id is its own
  sequence and no transition is ever counted from one id to another;
* either of the above with a **time column** to sort each sequence by (ISO 8601
  dates or date-times, or plain numbers).  Rows with equal times keep their
  order in the file (the sort is stable); how many such ties there were is
  reported in :attr:`Observations.time_ties`.

The state column may also be a **numeric series** (daily returns, a wear
gauge) cut into bands, by cut points the user gives or at ``K`` empirical
quantiles.  Bands are closed on the left: with cut points ``c1 < c2 < ...`` a
value ``v`` belongs to ``[c_k, c_{k+1})``, so a value equal to a cut point goes
to the band *above* it.  Band ids are ``band1``, ``band2``, ... (lowest first)
and labels are made from the cut points: ``"below -1%"``, ``"-1% to 1%"``,
``"1% and above"``.  Cells may carry a ``%`` sign (``-1.3%`` is ``-0.013``);
cut points written with ``%`` give labels in percent.

Other rules, applied the same way everywhere:

* Lines whose first cell starts with ``#`` are comments; blank lines are
  skipped.  The delimiter is the most frequent of comma, semicolon and tab on
  the header line.
* An empty cell in the state column of a row that is not blank (its other
  cells hold something, such as a date) is a **gap**: the sequence is split
  there, so no transition is counted across it.  Nothing else splits a sequence (a
  missing date is not detected: rows are taken as consecutive steps).
* Every unreadable row raises :class:`~core.errors.ChainFileError` naming the
  line: a non-number in a numeric column, a time that is neither a number nor an
  ISO date, a label outside a fixed state list, a row with more values than the
  header.
* Sequences with a single observation contribute nothing and are counted in
  :attr:`Observations.short_sequences`; if no transition at all can be counted
  the file is refused.
* Files are bounded by :data:`core.io.MAX_FILE_BYTES` and :data:`MAX_ROWS` data
  rows, and at most :data:`MAX_STATES` distinct states are accepted.
"""
from __future__ import annotations

import csv
import hashlib
import io
import math
import os
import re
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any, Iterable, Sequence

import numpy as np

from .errors import ChainFileError, LimitError, OptionError
from .limits import env_whole

__all__ = [
    "MAX_ROWS",
    "MAX_STATES",
    "Table",
    "Binning",
    "Observations",
    "read_table",
    "parse_table",
    "parse_cuts",
    "parse_number",
    "band_labels",
    "observations_from_table",
    "read_observations",
]


#: Largest number of data rows read, unless ``LONGRUN_MAX_ROWS`` sets another.
MAX_ROWS = 1_000_000
#: Largest number of distinct states a data file may produce.
MAX_STATES = 1000

_NUM_RE = re.compile(r"^[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?$")


# --------------------------------------------------------------------------
# the raw table
# --------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Table:
    """A CSV file split into cells, before any interpretation.

    Attributes
    ----------
    columns : tuple of str
        Header names (``"1"``, ``"2"``, ... for a file read without header).
    rows : tuple of tuple of str
        Data rows, cells stripped of surrounding spaces, comments and blank
        lines removed.
    lines : tuple of int
        The file line (1-based) where each data row starts.
    delimiter : str
    source : str or None
        File name used in messages.
    sha256 : str or None
        SHA-256 of the file's bytes (recorded as the data source).
    """

    columns: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    lines: tuple[int, ...]
    delimiter: str = ","
    source: str | None = None
    sha256: str | None = None
    header_line: int | None = None

    def column_index(self, name: str | None, *, option: str = "--column") -> int:
        """Index of column ``name``: its header name (exact, then ignoring case) or 1-based number."""
        if name is None:
            raise OptionError(f"{option}: no column given")
        key = str(name).strip()
        if key in self.columns:
            return self.columns.index(key)
        folded = [c for c in self.columns if c.casefold() == key.casefold()]
        if len(folded) == 1:
            return self.columns.index(folded[0])
        if key.isdigit() and 1 <= int(key) <= len(self.columns):
            return int(key) - 1
        shown = ", ".join(repr(c) for c in self.columns[:20]) + (" ..." if len(self.columns) > 20 else "")
        raise OptionError(f"{option} {name!r}: the file has no such column (its columns are {shown})")

    def column(self, index: int) -> list[str]:
        """The cells of one column (missing trailing cells read as empty)."""
        return [r[index] if index < len(r) else "" for r in self.rows]


def _detect_delimiter(line: str) -> str:
    counts = {d: line.count(d) for d in ",;\t"}
    best = max(counts, key=counts.get)
    return best if counts[best] > 0 else ","


def parse_table(text: str, *, source: str | None = None, header: bool = True, sha256: str | None = None) -> Table:
    """Split CSV text into a :class:`Table` (see the module notes for the rules).

    Parameters
    ----------
    text : str
        The file content.
    source : str, optional
        File name for messages.
    header : bool
        The first data line holds column names (default).  Without a header
        the columns are named ``"1"``, ``"2"``, ...

    Raises
    ------
    ChainFileError
        Empty file, a broken quote, duplicate header names, a row with more
        values than the header (each with its line).
    LimitError
        More than :data:`MAX_ROWS` data rows.
    """
    if text.startswith("\ufeff"):
        text = text[1:]
    first = ""
    for ln in text.splitlines():
        s = ln.strip()
        if s and not s.startswith("#"):
            first = ln
            break
    if not first:
        raise ChainFileError("the data file is empty (no header and no rows)", path=source)
    delim = _detect_delimiter(first)
    reader = csv.reader(io.StringIO(text), delimiter=delim)
    rows: list[tuple[str, ...]] = []
    lines: list[int] = []
    columns: tuple[str, ...] | None = None
    header_line = None
    max_rows = env_whole("LONGRUN_MAX_ROWS", MAX_ROWS, unit="data rows")
    prev = 0
    try:
        for raw in reader:
            start = prev + 1
            prev = reader.line_num
            cells = [c.strip() for c in raw]
            if not any(cells):
                continue
            if cells[0].startswith("#"):
                continue
            while cells and not cells[-1]:
                cells.pop()
            if columns is None and header:
                names = []
                for k, c in enumerate(cells):
                    names.append(c if c else f"column {k + 1}")
                dup = [c for c in names if names.count(c) > 1]
                if dup:
                    raise ChainFileError(
                        f"the header names column {dup[0]!r} twice; give every column its own name",
                        path=source,
                        where=f"line {start}",
                    )
                columns = tuple(names)
                header_line = start
                continue
            if len(rows) >= max_rows:
                raise LimitError(
                    f"{source or 'the data'}: more than {max_rows:,} data rows (raise the limit with the "
                    "LONGRUN_MAX_ROWS environment variable)"
                )
            rows.append(tuple(cells))
            lines.append(start)
    except csv.Error as exc:
        raise ChainFileError(f"cannot read the CSV ({exc})", path=source, where=f"line {reader.line_num}") from None
    if columns is None:
        width = max((len(r) for r in rows), default=1)
        columns = tuple(str(k + 1) for k in range(width))
    else:
        for r, ln in zip(rows, lines):
            if len(r) > len(columns):
                raise ChainFileError(
                    f"the row has {len(r)} values but the header has {len(columns)} columns "
                    "(an unquoted delimiter inside a value?)",
                    path=source,
                    where=f"line {ln}",
                )
    if not rows:
        raise ChainFileError("the data file has a header but no data rows", path=source)
    return Table(columns, tuple(rows), tuple(lines), delim, source, sha256, header_line)


def read_table(path: str | os.PathLike, *, header: bool = True) -> Table:
    """Read a CSV data file (bounded size, UTF-8) into a :class:`Table`."""
    from .io import _decode, _read_bytes

    data = _read_bytes(path)
    text = _decode(data, str(path))
    return parse_table(text, source=str(path), header=header, sha256=hashlib.sha256(data).hexdigest())


# --------------------------------------------------------------------------
# numbers, cut points, bands
# --------------------------------------------------------------------------
def parse_number(text: str) -> tuple[float, bool]:
    """Parse ``"0.013"``, ``"-1.3%"``, ``"2e-3"``; return ``(value, had_percent)``.

    Raises
    ------
    ValueError
        Not a finite number.
    """
    s = text.strip()
    pct = s.endswith("%")
    if pct:
        s = s[:-1].strip()
    if not _NUM_RE.match(s):
        raise ValueError(f"{text!r} is not a number")
    v = float(s)
    if not math.isfinite(v):
        raise ValueError(f"{text!r} is not a finite number")
    return (v / 100.0 if pct else v), pct


def parse_cuts(spec: str | Iterable[Any]) -> tuple[tuple[float, ...], bool]:
    """Parse cut points: ``"-1%,1%"`` or ``"-0.01, 0.01"`` or a list of numbers.

    Returns
    -------
    cuts : tuple of float
        Strictly increasing.
    percent : bool
        True when any cut point was written with ``%`` (labels then show percent).

    Raises
    ------
    OptionError
        Not numbers, not strictly increasing, or none at all.
    """
    if isinstance(spec, str):
        parts = [p for p in re.split(r"[,;\s]+", spec.strip()) if p]
    else:
        parts = list(spec)
    if not parts:
        raise OptionError("--cuts: give at least one cut point, e.g. --cuts=-1%,1%")
    vals: list[float] = []
    pct = False
    for p in parts:
        if isinstance(p, (int, float)) and not isinstance(p, bool):
            v, had = float(p), False
            if not math.isfinite(v):
                raise OptionError(f"--cuts: {p!r} is not a finite number")
        else:
            try:
                v, had = parse_number(str(p))
            except ValueError as exc:
                raise OptionError(f"--cuts: {exc}") from None
        pct = pct or had
        vals.append(v)
    for a, b in zip(vals, vals[1:]):
        if not b > a:
            raise OptionError(
                f"--cuts: cut points must increase strictly from left to right ({_fmt_cut(a, pct)} "
                f"is followed by {_fmt_cut(b, pct)})"
            )
    return tuple(vals), pct


def _fmt_cut(v: float, percent: bool) -> str:
    if percent:
        return f"{v * 100:.6g}%"
    return f"{v:.6g}"


def band_labels(cuts: Sequence[float], *, percent: bool = False) -> tuple[str, ...]:
    """Labels of the ``len(cuts) + 1`` bands: ``below a``, ``a to b``, ..., ``z and above``.

    ``"a to b"`` means ``a <= value < b`` (bands closed on the left).
    """
    f = [_fmt_cut(c, percent) for c in cuts]
    out = [f"below {f[0]}"]
    out += [f"{a} to {b}" for a, b in zip(f, f[1:])]
    out.append(f"{f[-1]} and above")
    return tuple(out)


@dataclass(frozen=True)
class Binning:
    """How a numeric column was cut into states.

    Attributes
    ----------
    method : str
        ``"cuts"`` (given by the user) or ``"quantiles"``.
    cuts : tuple of float
        The cut points actually used, strictly increasing.
    labels : tuple of str
        One per band, lowest first.
    percent : bool
        Labels are written in percent.
    quantiles : int or None
        The number of bands asked for (``"quantiles"`` only); fewer are made
        when quantiles coincide because of repeated values.
    closed : str
        ``"left"``: a band is ``[a, b)``, a value equal to a cut point goes to
        the band above it.
    """

    method: str
    cuts: tuple[float, ...]
    labels: tuple[str, ...]
    percent: bool = False
    quantiles: int | None = None
    closed: str = "left"

    def assign(self, values: np.ndarray) -> np.ndarray:
        """Band index (0 = lowest) of each value: the number of cut points ``<= value``."""
        return np.searchsorted(np.asarray(self.cuts, dtype=float), np.asarray(values, dtype=float), side="right")

    def describe(self) -> str:
        how = "at the given cut points" if self.method == "cuts" else f"at {self.quantiles}-quantiles"
        return (
            f"numeric values cut into {len(self.labels)} bands {how}; bands are closed on the left "
            "([a, b)): a value equal to a cut point belongs to the band above it"
        )

    def to_json(self) -> dict:
        return {
            "method": self.method,
            "cuts": list(self.cuts),
            "labels": list(self.labels),
            "percent": self.percent,
            "quantiles": self.quantiles,
            "closed": self.closed,
            "rule": "a band [a, b) holds values v with a <= v < b",
        }


# --------------------------------------------------------------------------
# observations
# --------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Observations:
    """Observed state sequences, coded as row indices, ready to count.

    Attributes
    ----------
    states : tuple of str
        State ids in matrix order.
    labels : tuple of str
        Display labels (equal to the ids for a label column).
    sequences : tuple of (m,) int ndarray
        Each a run of consecutive observations; ``sequences[k][t]`` is the
        index of the state seen at step ``t``.  Ids and gaps split runs.
    sequence_ids : tuple of str
        The id of each run (``""`` without an id column; ``"id (part 2)"``
        after a gap).
    rows : int
        Data rows read.
    n_ids : int
        Distinct sequence ids (1 without an id column), before gaps split them.
    gaps : int
        Empty state cells (each splits a sequence).
    time_ties : int
        Rows that share their time with an earlier row of the same id (kept in
        file order).
    short_sequences : int
        Runs with a single observation (nothing to count in them).
    binning : Binning or None
        How a numeric column was cut, if it was.
    column, id_column, time_column : str or None
        Header names of the columns used.
    source : str or None
        The file name; ``sha256`` its digest.
    values : (rows,) ndarray or None
        The parsed numbers of a numeric state column, in file row order (NaN
        for gaps); None for a label column.
    """

    states: tuple[str, ...]
    labels: tuple[str, ...]
    sequences: tuple[np.ndarray, ...]
    sequence_ids: tuple[str, ...]
    rows: int
    n_ids: int = 1
    gaps: int = 0
    time_ties: int = 0
    short_sequences: int = 0
    binning: Binning | None = None
    column: str | None = None
    id_column: str | None = None
    time_column: str | None = None
    source: str | None = None
    sha256: str | None = None
    values: np.ndarray | None = field(default=None, repr=False)

    @property
    def n(self) -> int:
        return len(self.states)

    @property
    def n_transitions(self) -> int:
        """Transitions that can be counted (consecutive pairs within runs)."""
        return int(sum(max(len(s) - 1, 0) for s in self.sequences))


    def notes(self) -> tuple[str, ...]:
        """Plain sentences about how the data were read (ties, gaps, short runs, bands)."""
        out = []
        if self.binning is not None:
            out.append(self.binning.describe() + ".")
            if self.binning.method == "quantiles" and self.binning.quantiles and len(self.binning.labels) < self.binning.quantiles:
                out.append(
                    f"{self.binning.quantiles} quantile bands were asked for but only {len(self.binning.labels)} "
                    "could be made: repeated values make some quantiles coincide."
                )
        if self.gaps:
            out.append(
                f"{self.gaps} empty state cell{'s' if self.gaps != 1 else ''} split the data into separate "
                "runs; no transition is counted across a gap."
            )
        if self.time_ties:
            out.append(
                f"{self.time_ties} row{'s' if self.time_ties != 1 else ''} share{'s' if self.time_ties == 1 else ''} "
                "a time with an earlier row of the same sequence; tied rows are kept in file order."
            )
        if self.short_sequences:
            out.append(
                f"{self.short_sequences} run{'s' if self.short_sequences != 1 else ''} with a single observation "
                "contribute no transition."
            )
        return tuple(out)

    def to_json(self) -> dict:
        """The data-source record saved in fitted chain files."""
        return {
            "file": None if self.source is None else Path(self.source).name,
            "sha256": self.sha256,
            "column": self.column,
            "id_column": self.id_column,
            "time_column": self.time_column,
            "rows": self.rows,
            "sequences": self.n_ids,
            "runs": len(self.sequences),
            "transitions": self.n_transitions,
            "gaps": self.gaps,
            "time_ties": self.time_ties,
            "short_runs": self.short_sequences,
            "binning": None if self.binning is None else self.binning.to_json(),
        }


def _natural_key(s: str):
    return [(0, int(t), "") if t.isdigit() else (1, 0, t.casefold()) for t in re.split(r"(\d+)", s) if t]


def _time_keys(cells: list[str], lines: Sequence[int], name: str, source: str | None) -> np.ndarray:
    """Sortable float keys for a time column (all numbers, or all ISO dates/times)."""
    first = next((c for c in cells if c), None)
    if first is None:
        raise ChainFileError(f"the time column {name!r} is empty", path=source)
    numeric = _NUM_RE.match(first) is not None
    out = np.empty(len(cells))
    aware: bool | None = None
    epoch = datetime(1970, 1, 1)
    for k, c in enumerate(cells):
        where = f"line {lines[k]}"
        if not c:
            raise ChainFileError(f"the time cell (column {name!r}) is empty", path=source, where=where)
        if numeric:
            if not _NUM_RE.match(c):
                raise ChainFileError(
                    f"time {c!r} (column {name!r}) is not a number, but the column starts with numbers",
                    path=source,
                    where=where,
                )
            out[k] = float(c)
            continue
        try:
            dt = datetime.fromisoformat(c)
        except ValueError:
            raise ChainFileError(
                f"time {c!r} (column {name!r}) is neither a number nor an ISO 8601 date or date-time "
                "(such as 2024-03-01 or 2024-03-01T14:30:00)",
                path=source,
                where=where,
            ) from None
        is_aware = dt.tzinfo is not None and dt.utcoffset() is not None
        if aware is None:
            aware = is_aware
        elif aware != is_aware:
            state = "has a time zone but earlier times do not" if is_aware else "has no time zone but earlier times do"
            raise ChainFileError(
                f"time {c!r} (column {name!r}) {state}; use one convention for the whole column",
                path=source,
                where=where,
            )
        out[k] = dt.timestamp() if is_aware else (dt - epoch).total_seconds()
    return out


def observations_from_table(
    table: Table,
    *,
    column: str | None = None,
    id_column: str | None = None,
    time_column: str | None = None,
    cuts: str | Sequence[Any] | None = None,
    quantiles: int | None = None,
    states: Sequence[str] | None = None,
) -> Observations:
    """Interpret a :class:`Table` as observed state sequences.

    Parameters
    ----------
    table : Table
    column : str, optional
        The state column (name or 1-based number).  Optional when exactly one
        column is left after the id and time columns.
    id_column : str, optional
        Column naming the sequence each row belongs to.
    time_column : str, optional
        Column to sort each sequence by (numbers or ISO 8601; stable sort).
    cuts : str or sequence of float, optional
        Cut points for a numeric state column (``"-1%,1%"``); bands ``[a, b)``.
    quantiles : int, optional
        Cut a numeric state column into this many bands at empirical
        quantiles of all its values (numpy's default linear interpolation).
    states : sequence of str, optional
        A fixed list of state labels, in matrix order: any other label is an
        error, and states never seen still get a row.

    Returns
    -------
    Observations

    Raises
    ------
    OptionError
        Conflicting or unknown columns and options.
    ChainFileError
        An unreadable row (with its line), or nothing to count.
    LimitError
        More than :data:`MAX_STATES` distinct states.
    """
    src = table.source
    if cuts is not None and quantiles is not None:
        raise OptionError("give either --cuts or --quantiles, not both")
    numeric = cuts is not None or quantiles is not None
    if numeric and states is not None:
        raise OptionError(
            "--states fixes the labels of a label column; with --cuts or --quantiles the states are the bands"
        )
    id_k = table.column_index(id_column, option="--id-column") if id_column is not None else None
    time_k = table.column_index(time_column, option="--time-column") if time_column is not None else None
    if column is not None:
        col_k = table.column_index(column, option="--column")
    else:
        rest = [k for k in range(len(table.columns)) if k not in (id_k, time_k)]
        if len(rest) != 1:
            shown = ", ".join(repr(table.columns[k]) for k in rest[:20])
            raise OptionError(
                f"the file has {len(rest)} candidate state columns ({shown}); choose one with --column"
                if rest
                else "no column is left for the states once the id and time columns are taken"
            )
        col_k = rest[0]
    used = [k for k in (col_k, id_k, time_k) if k is not None]
    if len(set(used)) != len(used):
        raise OptionError("the state, id and time columns must be three different columns")
    col_name = table.columns[col_k]
    lines = table.lines
    cells = table.column(col_k)
    n_rows = len(cells)

    # -- group rows into sequences (file order of first appearance) --------
    if id_k is not None:
        ids = table.column(id_k)
        for k, v in enumerate(ids):
            if not v:
                raise ChainFileError(
                    f"the id cell (column {table.columns[id_k]!r}) is empty; every row needs its sequence id",
                    path=src,
                    where=f"line {lines[k]}",
                )
        groups: dict[str, list[int]] = {}
        for k, v in enumerate(ids):
            groups.setdefault(v, []).append(k)
    else:
        groups = {"": list(range(n_rows))}
    ties = 0
    if time_k is not None:
        keys = _time_keys(table.column(time_k), lines, table.columns[time_k], src)
        for g, members in groups.items():
            idx = np.asarray(members)
            order = np.argsort(keys[idx], kind="stable")
            sorted_keys = keys[idx][order]
            ties += int(np.count_nonzero(sorted_keys[1:] == sorted_keys[:-1]))
            groups[g] = idx[order].tolist()

    # -- code the states ----------------------------------------------------
    gaps = sum(1 for c in cells if not c)
    codes = np.full(n_rows, -1, dtype=np.int64)
    binning: Binning | None = None
    values = None
    if numeric:
        values = np.full(n_rows, np.nan)
        any_pct = False
        for k, c in enumerate(cells):
            if not c:
                continue
            try:
                v, had = parse_number(c)
            except ValueError:
                raise ChainFileError(
                    f"{c!r} in column {col_name!r} is not a number (with --cuts or --quantiles the state "
                    "column must hold numbers; leave the cell empty to mark a gap)",
                    path=src,
                    where=f"line {lines[k]}",
                ) from None
            any_pct = any_pct or had
            values[k] = v
        present = ~np.isnan(values)
        if not present.any():
            raise ChainFileError(f"column {col_name!r} holds no values", path=src)
        if cuts is not None:
            cut_vals, pct = parse_cuts(cuts)
            binning = Binning("cuts", cut_vals, band_labels(cut_vals, percent=pct), pct)
        else:
            K = int(quantiles)  # type: ignore[arg-type]
            if K < 2:
                raise OptionError(f"--quantiles must be at least 2, not {quantiles}")
            if K > MAX_STATES:
                raise LimitError(f"--quantiles {K}: at most {MAX_STATES} bands")
            q = np.quantile(values[present], np.arange(1, K) / K)
            cut_vals = tuple(float(c) for c in np.unique(q))
            # a cut equal to the smallest value would leave its lower band empty
            lo = float(np.min(values[present]))
            cut_vals = tuple(c for c in cut_vals if c > lo)
            if not cut_vals:
                raise ChainFileError(
                    f"column {col_name!r} has a single repeated value; quantiles cannot cut it into bands",
                    path=src,
                )
            binning = Binning("quantiles", cut_vals, band_labels(cut_vals, percent=any_pct), any_pct, K)
        codes[present] = binning.assign(values[present])
        state_ids = tuple(f"band{k + 1}" for k in range(len(binning.labels)))
        labels = binning.labels
    else:
        if states is not None:
            state_ids = tuple(str(s).strip() for s in states)
            if not state_ids or any(not s for s in state_ids):
                raise OptionError("--states: give a comma-separated list of non-empty state labels")
            dup = [s for s in state_ids if state_ids.count(s) > 1]
            if dup:
                raise OptionError(f"--states names {dup[0]!r} twice")
            lookup = {s: i for i, s in enumerate(state_ids)}
            for k, c in enumerate(cells):
                if not c:
                    continue
                i = lookup.get(c)
                if i is None:
                    shown = ", ".join(state_ids[:20]) + (" ..." if len(state_ids) > 20 else "")
                    raise ChainFileError(
                        f"state {c!r} (column {col_name!r}) is not in the given state list ({shown})",
                        path=src,
                        where=f"line {lines[k]}",
                    )
                codes[k] = i
        else:
            distinct = {c for c in cells if c}
            if not distinct:
                raise ChainFileError(f"column {col_name!r} holds no state labels", path=src)
            if len(distinct) > MAX_STATES:
                raise LimitError(
                    f"{src or 'the data'}: column {col_name!r} has {len(distinct):,} different labels, more than "
                    f"the {MAX_STATES} states a fitted chain may have; if it holds numbers, cut them into "
                    "states with --cuts or --quantiles"
                )
            state_ids = tuple(sorted(distinct, key=_natural_key))
            lookup = {s: i for i, s in enumerate(state_ids)}
            for k, c in enumerate(cells):
                if c:
                    codes[k] = lookup[c]
        labels = state_ids

    # -- split into runs at gaps -------------------------------------------
    runs: list[np.ndarray] = []
    run_ids: list[str] = []
    short = 0
    for g, members in groups.items():
        seq = codes[np.asarray(members, dtype=np.int64)]
        cut_at = np.flatnonzero(seq < 0)
        pieces = np.split(seq, cut_at)
        part = 0
        for piece in pieces:
            piece = piece[piece >= 0]
            if piece.size == 0:
                continue
            part += 1
            runs.append(piece)
            run_ids.append(g if part == 1 else f"{g} (part {part})")
            if piece.size == 1:
                short += 1
    n_trans = sum(max(len(r) - 1, 0) for r in runs)
    if n_trans == 0:
        detail = (
            f"all {len(runs)} runs have a single observation"
            if runs
            else "no observations were found"
        )
        hint = " (is the --id-column right? each id is its own sequence)" if id_k is not None else ""
        raise ChainFileError(
            f"the sequences are too short to count any transition: {detail}{hint}; "
            "a transition needs two consecutive observations of the same sequence",
            path=src,
        )
    return Observations(
        states=state_ids,
        labels=tuple(labels),
        sequences=tuple(runs),
        sequence_ids=tuple(run_ids),
        rows=n_rows,
        n_ids=len(groups),
        gaps=gaps,
        time_ties=ties,
        short_sequences=short,
        binning=binning,
        column=col_name,
        id_column=None if id_k is None else table.columns[id_k],
        time_column=None if time_k is None else table.columns[time_k],
        source=src,
        sha256=table.sha256,
        values=values,
    )


def read_observations(path: str | os.PathLike, *, header: bool = True, **options: Any) -> Observations:
    """Read a data file and interpret it (see :func:`observations_from_table` for ``options``).

    Examples
    --------
    >>> obs = read_observations("sample_models/data/daily_moves.csv", column="daily_return",
    ...                         id_column="fund", time_column="date", cuts="-1%,1%")  # doctest: +SKIP
    >>> obs.labels  # doctest: +SKIP
    ('below -1%', '-1% to 1%', '1% and above')
    """
    return observations_from_table(read_table(path, header=header), **options)
