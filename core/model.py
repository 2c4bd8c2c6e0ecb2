"""The chain: states, transitions as the user typed them, and validation.

A :class:`Chain` is immutable.  Every edit returns a new chain, which is what
the app's undo commands store.  Probabilities are kept exactly as typed (a
JSON number, or a string such as ``"0.3"``, ``"1/3"``, ``"2.5e-11"``,
``"2.5%"`` or ``"rest"``), parsed to exact fractions for validation, and turned
into floats only when the dense matrix is built.  ``rest`` is resolved in exact
rational arithmetic, so a remainder of 1e-15 next to a probability of
``1 - 1e-15`` keeps all its digits.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass, field, replace
from fractions import Fraction
from functools import cached_property
from typing import Any, Iterable, Mapping

import numpy as np

from .errors import ValidationError

__all__ = [
    "ROW_SUM_TOLERANCE",
    "DENSE_STATE_LIMIT",
    "REST",
    "Problem",
    "State",
    "Transition",
    "Step",
    "Chain",
    "parse_probability",
    "format_probability",
]

#: Largest allowed ``|row sum - 1|`` (exact rational arithmetic on what was typed).
ROW_SUM_TOLERANCE = 1e-9
#: Default largest number of states analysed with dense matrices.
DENSE_STATE_LIMIT = 5000
#: The keyword for "one minus the other probabilities of this state".
REST = "rest"

_NUMBER = r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?"
_NUMBER_RE = re.compile(rf"^{_NUMBER}$")
_FRACTION_RE = re.compile(rf"^({_NUMBER})\s*/\s*({_NUMBER})$")
_PERCENT_RE = re.compile(rf"^({_NUMBER})\s*%$")
_NONFINITE_RE = re.compile(r"^[+-]?(nan|inf|infinity)$", re.IGNORECASE)
# the same numbers as _NUMBER, in parts: sign, digits before and after the point, exponent
_DECIMAL_RE = re.compile(r"^([+-]?)(?:(\d+)\.?(\d*)|\.(\d+))(?:[eE]([+-]?\d+))?$")
#: Exponents beyond this take the general (Fraction) path.
_DECIMAL_EXPONENT = 400


def _as_decimal(raw: Any) -> tuple[int, int] | None:
    """``(m, k)`` with ``raw == m / 10**k`` exactly, for an int, a float or a plain decimal text; else None.

    The fast path of validation: integers instead of fractions for what nearly
    every chain holds (``parse_probability`` reads the same values, slower).
    """
    if isinstance(raw, bool):
        return None
    if isinstance(raw, int):
        return raw, 0
    if isinstance(raw, float):
        if not math.isfinite(raw):
            return None
        raw = repr(raw)
    elif not isinstance(raw, str):
        return None
    m = _DECIMAL_RE.match(raw.strip())
    if m is None:
        return None
    sign, whole, frac, only_frac, exp = m.groups()
    if only_frac is not None:
        whole, frac = "0", only_frac
    e = int(exp) if exp else 0
    if abs(e) > _DECIMAL_EXPONENT:
        return None
    k = len(frac) - e
    mant = int(whole + frac)
    if sign == "-":
        mant = -mant
    if k < 0:
        return mant * 10 ** (-k), 0
    return mant, k


class _Rest:
    """Sentinel returned by :func:`parse_probability` for ``"rest"``."""

    _instance = None

    def __new__(cls):
        if cls._instance is None:
            cls._instance = super().__new__(cls)
        return cls._instance

    def __repr__(self) -> str:  # pragma: no cover - debugging aid
        return "REST"


REST_VALUE = _Rest()


def parse_probability(raw: Any) -> Fraction | _Rest:
    """Parse a probability as typed into an exact fraction.

    Parameters
    ----------
    raw : int, float or str
        A JSON number, or a string holding a decimal or scientific number
        (``"0.25"``, ``"2.5e-11"``), a fraction (``"1/3"``, ``"0.5/3"``), a
        percentage (``"2.5%"``) or the word ``"rest"``.

    Returns
    -------
    fractions.Fraction or REST_VALUE
        The exact value (decimals are read as the decimal the user typed, not
        its nearest binary float), or the ``REST_VALUE`` sentinel.

    Raises
    ------
    ValueError
        When the text is not a number; the message says why.  NaN and
        infinities raise with a message containing ``"not a finite number"``.

    Examples
    --------
    >>> parse_probability("1/3")
    Fraction(1, 3)
    >>> parse_probability(0.1)
    Fraction(1, 10)
    """
    if isinstance(raw, bool):
        raise ValueError(f"{raw!r} is a true/false value, not a probability")
    if isinstance(raw, int):
        return Fraction(raw)
    if isinstance(raw, float):
        if not math.isfinite(raw):
            raise ValueError(f"{raw!r} is not a finite number")
        # repr gives the shortest decimal that reads back as this float,
        # which is what the user typed in a JSON file.
        return Fraction(repr(raw))
    if not isinstance(raw, str):
        raise ValueError(f"{raw!r} is not a number or text")
    text = raw.strip()
    if text.lower() == REST:
        return REST_VALUE
    if not text:
        raise ValueError("the probability is empty")
    if _NONFINITE_RE.match(text):
        raise ValueError(f"{raw!r} is not a finite number")
    if _NUMBER_RE.match(text):
        return Fraction(text)
    m = _FRACTION_RE.match(text)
    if m:
        den = Fraction(m.group(2))
        if den == 0:
            raise ValueError(f"{raw!r} divides by zero")
        return Fraction(m.group(1)) / den
    m = _PERCENT_RE.match(text)
    if m:
        return Fraction(m.group(1)) / 100
    raise ValueError(
        f"{raw!r} is not a probability (write a number such as 0.3 or 2.5e-11, "
        "a fraction such as 1/3, a percentage such as 5%, or 'rest')"
    )


def format_probability(value: float) -> str:
    """Shortest text that reads back as ``value`` (``repr`` of a float)."""
    return repr(float(value))


@dataclass(frozen=True)
class Problem:
    """One validation problem, with its place.

    Attributes
    ----------
    code : str
        Stable identifier (``"row-sum"``, ``"negative"``, ...).
    message : str
        Plain-language sentence naming the place, e.g.
        ``"state 'pump': probabilities sum to 1.2 (must be 1)"``.
    state : str or None
        The state (row) concerned, if any.
    transition : (str, str) or None
        The transition concerned, as ``(from, to)``.
    value : object
        The offending value (the text typed, or the sum).
    """

    code: str
    message: str
    state: str | None = None
    transition: tuple[str, str] | None = None
    value: Any = None


@dataclass(frozen=True)
class State:
    """A state: an id (unique), an optional label and canvas position."""

    id: str
    label: str | None = None
    x: float | None = None
    y: float | None = None
    extra: Mapping[str, Any] = field(default_factory=dict, compare=True)

    @property
    def display_name(self) -> str:
        return self.label if self.label else self.id


@dataclass(frozen=True)
class Transition:
    """A transition ``source -> target`` with probability ``p`` as typed."""

    source: str
    target: str
    p: Any
    extra: Mapping[str, Any] = field(default_factory=dict, compare=True)


@dataclass(frozen=True)
class Step:
    """The real time one step stands for (``value`` x ``unit``)."""

    value: float
    unit: str


@dataclass(frozen=True, eq=True)
class Chain:
    """A finite Markov chain as written by its user.

    Attributes
    ----------
    states : tuple of State
        In file order; this order is the row/column order of :meth:`matrix`.
    transitions : tuple of Transition
        In file order.  Absent pairs have probability 0.
    name, description : str
    step : Step or None
    extra : mapping
        Unknown top-level keys of the file, kept for the round trip.
    state_limit : int
        Largest number of states accepted (dense analysis).

    Notes
    -----
    Build one directly, with :func:`core.io.load_chain`, or with
    :meth:`from_matrix`.  Check :attr:`problems` (all validation problems, at
    once) or call :meth:`matrix`, which raises :class:`ValidationError`.
    """

    states: tuple[State, ...] = ()
    transitions: tuple[Transition, ...] = ()
    name: str = ""
    description: str = ""
    step: Step | None = None
    extra: Mapping[str, Any] = field(default_factory=dict)
    state_limit: int = field(default=DENSE_STATE_LIMIT, compare=False)

    # -- construction -------------------------------------------------------
    @classmethod
    def from_matrix(
        cls,
        P: Any,
        ids: Iterable[str] | None = None,
        *,
        name: str = "",
        description: str = "",
        step: Step | None = None,
        exact: bool = False,
    ) -> "Chain":
        """Build a chain from a dense matrix.

        Parameters
        ----------
        P : (n, n) array_like
            Row-stochastic matrix (floats, ints or ``Fraction`` entries).
        ids : sequence of str, optional
            State ids; default ``"s0", "s1", ...``.
        exact : bool
            Store ``Fraction`` entries as ``"a/b"`` strings (exact round trip).
        """
        rows = [list(r) for r in P]
        n = len(rows)
        ids = [f"s{i}" for i in range(n)] if ids is None else [str(i) for i in ids]
        if len(ids) != n:
            raise ValueError(f"{len(ids)} ids for a {n}x{n} matrix")
        states = tuple(State(i) for i in ids)
        trans = []
        for i, row in enumerate(rows):
            if len(row) != n:
                raise ValueError(f"row {i} has {len(row)} entries, expected {n}")
            for j, v in enumerate(row):
                if v == 0:
                    continue
                if isinstance(v, Fraction):
                    p: Any = str(v) if exact or v.denominator != 1 else int(v)
                elif isinstance(v, (int, np.integer)):
                    p = int(v)
                else:
                    p = float(v)
                trans.append(Transition(ids[i], ids[j], p))
        return cls(states, tuple(trans), name=name, description=description, step=step)

    # -- lookups ------------------------------------------------------------
    @cached_property
    def ids(self) -> tuple[str, ...]:
        return tuple(s.id for s in self.states)

    @cached_property
    def index(self) -> dict[str, int]:
        """Map state id -> row index (first occurrence for duplicate ids)."""
        out: dict[str, int] = {}
        for i, s in enumerate(self.states):
            out.setdefault(s.id, i)
        return out

    @property
    def n(self) -> int:
        return len(self.states)

    def state(self, sid: str) -> State:
        return self.states[self.index[sid]]

    def transition(self, source: str, target: str) -> Transition | None:
        for t in self.transitions:
            if t.source == source and t.target == target:
                return t
        return None

    def outgoing(self, sid: str) -> tuple[Transition, ...]:
        return tuple(t for t in self.transitions if t.source == sid)

    # -- validation ---------------------------------------------------------
    @cached_property
    def _analysis(self) -> tuple[tuple[Problem, ...], dict[tuple[str, str], Fraction], dict[str, Fraction]]:
        return _validate(self)

    @property
    def problems(self) -> tuple[Problem, ...]:
        """Every validation problem, in file order (empty when valid)."""
        return self._analysis[0]

    @property
    def is_valid(self) -> bool:
        return not self.problems

    def problems_for(self, sid: str) -> tuple[Problem, ...]:
        return tuple(p for p in self.problems if p.state == sid)

    @property
    def exact_probabilities(self) -> dict[tuple[str, str], Fraction]:
        """``{(from, to): Fraction}`` with ``rest`` resolved (valid entries only)."""
        return dict(self._analysis[1])

    def row_sum(self, sid: str) -> Fraction:
        """Exact sum of the state's parsed probabilities (``rest`` resolved; 0 for a broken row)."""
        return self._analysis[2].get(sid, Fraction(0))

    @property
    def row_sums(self) -> dict[str, Fraction]:
        """``{state: exact row sum}`` (``rest`` resolved) of the rows without a broken entry."""
        return dict(self._analysis[2])

    def check(self) -> "Chain":
        """Return ``self`` if valid, else raise :class:`ValidationError`."""
        if self.problems:
            raise ValidationError(self.problems, source=self.name or None)
        return self

    def matrix(self) -> np.ndarray:
        """The dense row-stochastic transition matrix, ``P[i, j] = P(i -> j)``.

        Returns
        -------
        P : (n, n) ndarray of float64
            A fresh, writeable array.  Entries are the exact typed values
            rounded once to float64.

        Raises
        ------
        ValidationError
            If the chain has any problem.
        """
        self.check()
        return self._matrix_unchecked()

    def _matrix_unchecked(self) -> np.ndarray:
        return self._float_matrix.copy()

    @cached_property
    def _float_matrix(self) -> np.ndarray:
        n = self.n
        P = np.zeros((n, n))
        vals = self._analysis[1]
        if vals:
            idx = self.index
            rows = np.fromiter((idx[a] for a, _ in vals), dtype=np.intp, count=len(vals))
            cols = np.fromiter((idx[b] for _, b in vals), dtype=np.intp, count=len(vals))
            # int / int is correctly rounded: the same double as float(Fraction), faster
            P[rows, cols] = np.fromiter((v.numerator / v.denominator for v in vals.values()), dtype=np.float64,
                                        count=len(vals))
        P.setflags(write=False)
        return P

    # -- edits (each returns a new chain) ----------------------------------
    def with_meta(self, **changes: Any) -> "Chain":
        """Replace ``name``, ``description``, ``step`` or ``extra``."""
        allowed = {"name", "description", "step", "extra"}
        bad = set(changes) - allowed
        if bad:
            raise TypeError(f"cannot change {sorted(bad)} with with_meta")
        return replace(self, **changes)

    def with_state(self, state: State, *, index: int | None = None) -> "Chain":
        """Add ``state`` (at ``index``, default the end) or replace the state with its id."""
        states = list(self.states)
        if state.id in self.index:
            states[self.index[state.id]] = state
        else:
            states.insert(len(states) if index is None else index, state)
        return replace(self, states=tuple(states))

    def without_state(self, sid: str) -> "Chain":
        """Remove a state and every transition into or out of it."""
        return replace(
            self,
            states=tuple(s for s in self.states if s.id != sid),
            transitions=tuple(t for t in self.transitions if sid not in (t.source, t.target)),
        )

    def with_state_renamed(self, old: str, new: str) -> "Chain":
        """Change a state's id, carrying its transitions along."""
        if new == old:
            return self
        if new in self.index:
            raise ValueError(f"a state called {new!r} already exists")
        states = tuple(replace(s, id=new) if s.id == old else s for s in self.states)
        trans = tuple(
            replace(
                t,
                source=new if t.source == old else t.source,
                target=new if t.target == old else t.target,
            )
            for t in self.transitions
        )
        return replace(self, states=states, transitions=trans)

    def with_state_moved(self, sid: str, x: float, y: float) -> "Chain":
        return self.with_state(replace(self.state(sid), x=float(x), y=float(y)))

    def with_positions(self, positions: Mapping[str, tuple[float, float]]) -> "Chain":
        """Move many states at once (``{id: (x, y)}``)."""
        states = tuple(
            replace(s, x=float(positions[s.id][0]), y=float(positions[s.id][1]))
            if s.id in positions
            else s
            for s in self.states
        )
        return replace(self, states=states)

    def with_transition(self, source: str, target: str, p: Any) -> "Chain":
        """Set ``P(source -> target)`` to ``p`` as typed; ``p=None`` removes it.

        An existing transition keeps its place in the file order.
        """
        trans = list(self.transitions)
        for k, t in enumerate(trans):
            if t.source == source and t.target == target:
                if p is None:
                    del trans[k]
                else:
                    trans[k] = replace(t, p=p)
                return replace(self, transitions=tuple(trans))
        if p is not None:
            trans.append(Transition(source, target, p))
        return replace(self, transitions=tuple(trans))

    def with_transitions(self, items: Iterable[tuple[str, str, Any]]) -> "Chain":
        """Apply several :meth:`with_transition` edits at once."""
        out = self
        for a, b, p in items:
            out = out.with_transition(a, b, p)
        return out


def _state_ref(sid: str) -> str:
    return f"state {sid!r}"


def _fmt_fraction(x: Fraction) -> str:
    f = float(x)
    return f"{f:.12g}"


_POW10 = [10**k for k in range(64)]


def _where(t: Transition) -> str:
    return f"transition {t.source!r} -> {t.target!r}"


def _pow10(k: int) -> int:
    return _POW10[k] if k < 64 else 10**k


def _validate(chain: Chain) -> tuple[tuple[Problem, ...], dict[tuple[str, str], Fraction], dict[str, Fraction]]:
    """Collect every problem of ``chain``; return them, the parsed entries and the exact row sums."""
    problems: list[Problem] = []
    values: dict[tuple[str, str], Fraction] = {}

    if not chain.states:
        problems.append(Problem("no-states", "the chain has no states (add at least one)"))
    if chain.n > chain.state_limit:
        problems.append(
            Problem(
                "too-many-states",
                f"the chain has {chain.n} states, more than the limit of "
                f"{chain.state_limit} for dense analysis (raise it with the "
                "--max-states option or the LONGRUN_MAX_STATES environment variable)",
                value=chain.n,
            )
        )

    seen: set[str] = set()
    for k, s in enumerate(chain.states):
        if not isinstance(s.id, str) or not s.id.strip():
            problems.append(
                Problem("bad-state-id", f"state number {k + 1} has an empty id", value=s.id)
            )
        elif s.id in seen:
            problems.append(
                Problem(
                    "duplicate-state",
                    f"{_state_ref(s.id)} is defined more than once (state number {k + 1})",
                    state=s.id,
                    value=s.id,
                )
            )
        seen.add(s.id)

    rest_of: dict[str, tuple[str, str]] = {}
    seen_t: set[tuple[str, str]] = set()
    sums: dict[str, Fraction] = {}
    dec_sums: dict[str, list[int]] = {}  # [m, k]: the row's decimal entries sum to m / 10**k
    bad_rows: set[str] = set()
    for k, t in enumerate(chain.transitions):
        key = (t.source, t.target)
        if t.source not in seen or t.target not in seen:
            unknown = [x for x in key if x not in seen]
            for x in dict.fromkeys(unknown):
                problems.append(
                    Problem(
                        "unknown-state",
                        f"{_where(t)} (number {k + 1}) refers to a state {x!r} that does not exist",
                        state=t.source if t.source in seen else None,
                        transition=key,
                        value=x,
                    )
                )
            continue
        if key in seen_t:
            problems.append(
                Problem(
                    "duplicate-transition",
                    f"{_where(t)} is given more than once (number {k + 1})",
                    state=t.source,
                    transition=key,
                    value=t.p,
                )
            )
            bad_rows.add(t.source)
            continue
        seen_t.add(key)
        dec = _as_decimal(t.p)
        if dec is not None and 0 <= dec[0] <= _pow10(dec[1]):
            # a decimal probability: kept and summed in integers (out-of-range ones go on below)
            m, d = dec  # the value is m / 10**d
            if m:
                values[key] = Fraction(m, _pow10(d))
            acc = dec_sums.get(t.source)
            if acc is None:
                dec_sums[t.source] = [m, d]
            elif d > acc[1]:
                acc[0] = acc[0] * _pow10(d - acc[1]) + m
                acc[1] = d
            else:
                acc[0] += m * _pow10(acc[1] - d)
            continue
        try:
            v = parse_probability(t.p)
        except ValueError as exc:
            code = "not-finite" if "not a finite number" in str(exc) else "unparseable"
            problems.append(
                Problem(code, f"{_where(t)}: {exc}", state=t.source, transition=key, value=t.p)
            )
            bad_rows.add(t.source)
            continue
        if v is REST_VALUE:
            if t.source in rest_of:
                problems.append(
                    Problem(
                        "two-rest",
                        f"{_state_ref(t.source)} uses 'rest' twice ({rest_of[t.source][1]!r} "
                        f"and {t.target!r}); at most one transition per state may be 'rest'",
                        state=t.source,
                        transition=key,
                        value=t.p,
                    )
                )
                bad_rows.add(t.source)
            else:
                rest_of[t.source] = key
            continue
        if v < 0:
            problems.append(
                Problem(
                    "negative",
                    f"{_where(t)}: probability {t.p!r} is negative",
                    state=t.source,
                    transition=key,
                    value=t.p,
                )
            )
            bad_rows.add(t.source)
            continue
        if v > 1:
            problems.append(
                Problem(
                    "above-one",
                    f"{_where(t)}: probability {t.p!r} is greater than 1",
                    state=t.source,
                    transition=key,
                    value=t.p,
                )
            )
            bad_rows.add(t.source)
            continue
        if v != 0:
            values[key] = v
        sums[t.source] = sums.get(t.source, Fraction(0)) + v

    for src, (m, d) in dec_sums.items():
        sums[src] = sums.get(src, Fraction(0)) + Fraction(m, _pow10(d))

    for src, key in rest_of.items():
        if src in bad_rows:
            continue
        r = 1 - sums.get(src, Fraction(0))
        if r < -Fraction(ROW_SUM_TOLERANCE):
            problems.append(
                Problem(
                    "negative-rest",
                    f"{_state_ref(src)}: 'rest' towards {key[1]!r} would be {_fmt_fraction(r)}, "
                    f"because the other probabilities already sum to "
                    f"{_fmt_fraction(sums[src])} (more than 1)",
                    state=src,
                    transition=key,
                    value=float(r),
                )
            )
            bad_rows.add(src)
            continue
        if r > 0:
            values[key] = r
        sums[src] = sums.get(src, Fraction(0)) + max(r, Fraction(0))

    with_out = {a for (a, _) in values}  # values holds the positive entries only
    for s in dict.fromkeys(x for x in chain.ids if x):
        if s in bad_rows:
            continue
        total = sums.get(s)
        if total is None or s not in with_out:
            problems.append(
                Problem(
                    "no-outgoing",
                    f"{_state_ref(s)} has no outgoing probability (every state needs "
                    "transitions summing to 1; add a self-loop with 'rest' to make it absorbing)",
                    state=s,
                    value=0.0,
                )
            )
            continue
        if abs(total - 1) > Fraction(ROW_SUM_TOLERANCE):
            problems.append(
                Problem(
                    "row-sum",
                    f"{_state_ref(s)}: probabilities sum to {_fmt_fraction(total)} (must be 1)",
                    state=s,
                    value=float(total),
                )
            )
    # Drop values of rows that are broken so no partial row leaks into matrices.
    if bad_rows:
        values = {k: v for k, v in values.items() if k[0] not in bad_rows}
    totals = {src: v for src, v in sums.items() if src not in bad_rows}
    return tuple(problems), values, totals
