"""The whole exact long-run analysis of a chain, as one frozen report.

:func:`analyze` runs every computation of :mod:`core.structure`,
:mod:`core.stationary`, :mod:`core.passage`, :mod:`core.evolution` and
:mod:`core.spectral` once and returns a :class:`LongRunReport`;
:meth:`LongRunReport.to_json` is the ``longrun analyze --json`` contract and
:meth:`LongRunReport.to_text` the readable report.  :func:`iter_analyze` is
the same work as a generator of progress snapshots (for the app's worker
thread: cancel between yields).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Generator

import numpy as np

__all__ = [
    "Progress",
    "StartFacts",
    "LongRunReport",
    "analyze",
    "iter_analyze",
    "analyze_matrix",
    "iter_analyze_matrix",
    "CAUTION",
    "PASSAGE_LIMIT",
]

#: Closed classes up to this size get the full mean first passage matrix
#: (about m^3 flops); Kemeny's constant of larger ones comes from the spectrum.
PASSAGE_LIMIT = 2000

CAUTION = (
    "These results describe the model, not the world. Where they guide decisions on money, "
    "maintenance or safety, have the model and its use reviewed by a qualified person and "
    "follow local codes and licensed practice."
)


@dataclass(frozen=True)
class Progress:
    """One progress snapshot of :func:`iter_analyze`."""

    stage: str
    done: int
    total: int


@dataclass(frozen=True)
class StartFacts:
    """What happens from one chosen start state.

    Attributes
    ----------
    state : int
    limit : (n,) ndarray
        Long-run (Cesaro) law from this state.
    absorption : (c,) ndarray
        Probability of ending in each closed class (order of ``structure.closed``).
    expected_steps : float
        Expected steps before entering a closed class (0 if already recurrent).
    mixing_steps : int or None
        First ``t`` with ``||P^t(state, .) - limit||_TV <= epsilon``; None when a
        periodic closed class is reached (the law keeps cycling) or beyond
        ``2**62`` steps.
    """

    state: int
    limit: np.ndarray
    absorption: np.ndarray
    expected_steps: float
    mixing_steps: int | None


@dataclass(frozen=True)
class LongRunReport:
    """Everything :func:`analyze` found; see the field docs of each part.

    Attributes
    ----------
    name : str
    ids, labels : tuple of str
        State ids (as in the file) and display names, in row order.
    step : core.model.Step or None
    epsilon : float
    structure : core.structure.Structure
    stationary : tuple of (n,) ndarray
        Stationary law of each closed class (order of ``structure.closed``).
    absorption : core.passage.Absorption
    limit : (n, n) ndarray
        Row ``i``: the long-run (Cesaro) law from start state ``i``.
    mixing : core.evolution.Mixing
    spectrum : core.spectral.Spectrum
    return_times : (n,) ndarray
        Mean return time ``1/pi_i`` (Kac) for recurrent states, ``inf`` for
        transient ones (they may never return).
    kemeny : tuple of float
        Kemeny's constant of each closed class.
    passage : tuple of (m, m) ndarray or None
        Mean first passage times inside each closed class (class-local order
        ``structure.classes[k].states``, return times on the diagonal); None
        for classes above :data:`PASSAGE_LIMIT` states.
    start : StartFacts or None
    """

    name: str
    ids: tuple[str, ...]
    labels: tuple[str, ...]
    step: Any
    epsilon: float
    structure: Any
    stationary: tuple[np.ndarray, ...]
    absorption: Any
    limit: np.ndarray
    mixing: Any
    spectrum: Any
    return_times: np.ndarray
    kemeny: tuple[float, ...]
    passage: tuple[Any, ...]
    start: StartFacts | None

    @property
    def n(self) -> int:
        return len(self.ids)

    # -- JSON -------------------------------------------------------------
    def to_json(self) -> dict:
        """The ``longrun analyze --json`` document (see DEVELOPERS.md / issue contract).

        Keys: ``states``, ``classes``, ``stationary``, ``absorption``,
        ``expected_steps_to_absorption``, ``limit``, ``mixing_time``,
        ``spectral``, plus ``name``, ``step``, ``irreducible``,
        ``absorbing_states``, ``return_times``, ``kemeny``,
        ``steps_variance``, ``start`` (when a start state was given) and
        ``caution``.  Class numbers ``k`` index ``classes``.  In ``limit`` each
        law lists the states with positive long-run probability (absent ids
        have probability 0); ``absorption`` lists every closed class.
        Floats are kept in full precision by :func:`core.jsonout.dumps`.
        """
        ids = self.ids
        s = self.structure
        classes = []
        for cls in s.classes:
            classes.append({
                "states": [ids[i] for i in cls.states],
                "closed": cls.closed,
                "period": cls.period,
                "cyclic_subclasses": [[ids[i] for i in sub] for sub in cls.cyclic_subclasses],
                "absorbing": cls.closed and cls.size == 1,
            })
        stationary = []
        for k, pi in zip(s.closed, self.stationary):
            stationary.append({"class": k, "law": {ids[i]: float(pi[i]) for i in s.classes[k].states}})
        T = s.transient_states
        B = self.absorption.probabilities
        absorption = {ids[i]: {str(k): float(B[i, m]) for m, k in enumerate(s.closed)} for i in T}
        expected = {ids[i]: float(self.absorption.expected_steps[i]) for i in T}
        variance = {ids[i]: float(self.absorption.steps_variance[i]) for i in T}
        limit = {}
        for i in range(self.n):
            row = self.limit[i]
            limit[ids[i]] = {ids[j]: float(row[j]) for j in np.flatnonzero(row > 0)}
        rec = np.flatnonzero(np.isfinite(self.return_times))
        doc = {
            "name": self.name,
            "step": None if self.step is None else {"value": self.step.value, "unit": self.step.unit},
            "states": list(ids),
            "irreducible": s.irreducible,
            "classes": classes,
            "absorbing_states": [ids[i] for i in s.absorbing_states],
            "stationary": stationary,
            "absorption": absorption,
            "expected_steps_to_absorption": expected,
            "steps_variance": variance,
            "limit": limit,
            "mixing_time": {
                "epsilon": self.epsilon,
                "steps": self.mixing.steps,
                "reason": self.mixing.reason,
            },
            "spectral": self.spectrum.to_json(),
            "return_times": {ids[i]: float(self.return_times[i]) for i in rec},
            "kemeny": [{"class": k, "constant": K} for k, K in zip(s.closed, self.kemeny)],
            "caution": CAUTION,
        }
        if self.start is not None:
            st = self.start
            doc["start"] = {
                "state": ids[st.state],
                "limit": {ids[j]: float(st.limit[j]) for j in np.flatnonzero(st.limit > 0)},
                "absorption": {str(k): float(st.absorption[m]) for m, k in enumerate(s.closed)},
                "expected_steps_to_absorption": st.expected_steps,
                "mixing_time": {"epsilon": self.epsilon, "steps": st.mixing_steps},
            }
        return doc

    # -- text -------------------------------------------------------------
    def to_text(self, *, max_rows: int = 40) -> str:
        """The readable report of ``longrun analyze``."""
        return _format_text(self, max_rows=max_rows)


def iter_analyze(chain, *, epsilon: float = 0.25, start: int | None = None
                 ) -> Generator[Progress, None, LongRunReport]:
    """:func:`analyze` as a generator of :class:`Progress` snapshots.

    Returns the :class:`LongRunReport` as the generator's return value
    (``StopIteration.value``; ``yield from`` gives it directly).
    """
    P = chain.matrix()
    return (yield from iter_analyze_matrix(
        P, ids=chain.ids, labels=tuple(st.display_name for st in chain.states), name=chain.name,
        step=chain.step, epsilon=epsilon, start=start))


def iter_analyze_matrix(P, *, ids=None, labels=None, name: str = "", step=None, epsilon: float = 0.25,
                        start: int | None = None) -> Generator[Progress, None, LongRunReport]:
    """The analysis of a row-stochastic matrix (no chain object), as a generator.

    Parameters
    ----------
    P : (n, n) array_like
        Row-stochastic matrix (assumed valid: the chain's validation is the
        place that checks it).
    ids, labels : sequence of str, optional
        State ids and display names (default ``"s0", "s1", ...``).
    name : str
    step : core.model.Step, optional
    epsilon, start
        As for :func:`analyze`.
    """
    from .evolution import PowerLadder, mixing, mixing_time_from
    from .passage import absorption, limit_matrix, mean_first_passage
    from .spectral import spectrum
    from .stationary import stationary_laws
    from .structure import classify

    eps = float(epsilon)
    if not 0.0 < eps < 1.0:
        from .errors import OptionError

        raise OptionError(f"epsilon must be between 0 and 1 (exclusive), not {epsilon!r}")
    P = np.asarray(P, dtype=np.float64)
    n = P.shape[0]
    ids = tuple(f"s{i}" for i in range(n)) if ids is None else tuple(ids)
    labels = ids if labels is None else tuple(labels)
    if start is not None and not 0 <= int(start) < n:
        from .errors import OptionError

        raise OptionError(f"start state index {start} is out of range (0..{n - 1})")
    total = 6
    yield Progress("classes", 0, total)
    s = classify(P)
    yield Progress("stationary laws", 1, total)
    laws = stationary_laws(P, s)
    yield Progress("absorption", 2, total)
    ab = absorption(P, s)
    limit = limit_matrix(P, s, laws=laws, absorb=ab)
    limit.setflags(write=False)
    yield Progress("spectrum", 3, total)
    spec = spectrum(P, s, epsilon=eps, laws=laws)
    yield Progress("first passage", 4, total)
    ret = np.full(n, np.inf)
    kemeny, passage = [], []
    for k, pi in zip(s.closed, laws):
        st = np.asarray(s.classes[k].states)
        ret[st] = 1.0 / pi[st]
        if st.size == 1:
            kemeny.append(0.0)
            passage.append(np.ones((1, 1)))
        elif st.size <= PASSAGE_LIMIT:
            M = mean_first_passage(P[np.ix_(st, st)])
            M.setflags(write=False)
            M0 = M.copy()
            np.fill_diagonal(M0, 0.0)
            p = pi[st]
            kemeny.append(float(p @ M0 @ p))
            passage.append(M)
        else:
            mine = (spec.block == k) & (spec.one_minus != 0)
            kemeny.append(float(np.sum((1.0 / spec.one_minus[mine]).real)))
            passage.append(None)
    ret.setflags(write=False)
    yield Progress("mixing time", 5, total)
    ladder = PowerLadder(P)
    mix = mixing(ladder, eps, pi=laws[0] if len(laws) == 1 else None, structure=s)
    facts = None
    if start is not None:
        i = int(start)
        e = np.zeros(n)
        e[i] = 1.0
        facts = StartFacts(
            state=i,
            limit=limit[i],
            absorption=ab.probabilities[i],
            expected_steps=float(ab.expected_steps[i]),
            mixing_steps=mixing_time_from(ladder, e, eps, target=limit[i]),
        )
    yield Progress("done", total, total)
    return LongRunReport(
        name=name,
        ids=ids,
        labels=labels,
        step=step,
        epsilon=eps,
        structure=s,
        stationary=laws,
        absorption=ab,
        limit=limit,
        mixing=mix,
        spectrum=spec,
        return_times=ret,
        kemeny=tuple(kemeny),
        passage=tuple(passage),
        start=facts,
    )


def _drive(gen):
    while True:
        try:
            next(gen)
        except StopIteration as stop:
            return stop.value


def analyze_matrix(P, **options) -> LongRunReport:
    """:func:`analyze` for a bare matrix; options as for :func:`iter_analyze_matrix`."""
    return _drive(iter_analyze_matrix(P, **options))


def analyze(chain, *, epsilon: float = 0.25, start: int | None = None) -> LongRunReport:
    """Exact long-run analysis of a valid chain.

    Parameters
    ----------
    chain : core.model.Chain
        Must be valid (:meth:`core.model.Chain.matrix` raises
        :class:`core.errors.ValidationError` otherwise).
    epsilon : float
        Total variation threshold of the mixing time, in (0, 1).
    start : int, optional
        Row index of a start state for the start-specific facts.

    Returns
    -------
    LongRunReport

    Examples
    --------
    >>> from core.model import Chain
    >>> r = analyze(Chain.from_matrix([[0.5, 0.5], [0.25, 0.75]], ["up", "down"]))
    >>> r.to_json()["stationary"][0]["law"]
    {'up': 0.3333333333333333, 'down': 0.6666666666666666}
    """
    return _drive(iter_analyze(chain, epsilon=epsilon, start=start))


# -- readable report ---------------------------------------------------------

def _fmt_p(p: float) -> str:
    if p == 0:
        return "0"
    if p >= 1e-4:
        return f"{p:.6f}".rstrip("0").rstrip(".") if p < 1 else "1"
    m, e = f"{p:.4e}".split("e")
    return f"{m}e{int(e)}"


def _fmt_num(x: float) -> str:
    if x == 0:
        return "0"
    if 1e-4 <= abs(x) < 1e7:
        return f"{x:.6g}"
    m, e = f"{x:.4e}".split("e")
    return f"{m}e{int(e)}"


def _name(r: LongRunReport, i: int) -> str:
    sid, lab = r.ids[i], r.labels[i]
    return sid if lab == sid else f"{sid} ({lab})"


def _names(r: LongRunReport, states, limit: int = 12) -> str:
    states = list(states)
    shown = ", ".join(r.ids[i] for i in states[:limit])
    if len(states) > limit:
        shown += f", ... ({len(states) - limit} more)"
    return shown


def _class_label(r: LongRunReport, k: int) -> str:
    return f"[{k}] {_names(r, r.structure.classes[k].states, limit=3)}"


def _ends_in(r: LongRunReport, probs: np.ndarray) -> str:
    s = r.structure
    hits = [(k, probs[m]) for m, k in enumerate(s.closed) if probs[m] > 0]
    if len(hits) == 1:
        return f"{_class_label(r, hits[0][0])} for sure"
    return " or ".join(f"{_class_label(r, k)} (probability {_fmt_p(p)})" for k, p in hits)


def _law_lines(r: LongRunReport, law: np.ndarray, states, max_rows: int, extra=None) -> list[str]:
    states = [i for i in states if law[i] > 0]
    order = sorted(states, key=lambda i: -law[i]) if len(states) > max_rows else states
    width = max((len(_name(r, i)) for i in order[:max_rows]), default=0)
    out = []
    for i in order[:max_rows]:
        line = f"    {_name(r, i):<{width}}  {_fmt_p(law[i]):>12}"
        if extra is not None:
            line += extra(i)
        out.append(line)
    if len(order) > max_rows:
        out.append(f"    ... {len(order) - max_rows} more states with smaller shares (use --json for all)")
    return out


def _format_text(r: LongRunReport, *, max_rows: int) -> str:
    from .units import format_steps

    s = r.structure
    step = r.step
    L: list[str] = []
    title = r.name or "Chain"
    L.append(f"{title}: long-run analysis")
    unit = ""
    if step is not None:
        unit = f", one step = {step.value:g} {step.unit}"
    L.append(f"{r.n} state{'s' if r.n != 1 else ''}{unit}")
    L.append("")

    # classes
    L.append("Classes")
    for k, cls in enumerate(s.classes):
        if k == max_rows:
            L.append(f"  ... {len(s.classes) - max_rows} more classes (use --json for all)")
            break
        kind = "closed" if cls.closed else "transient"
        if cls.closed and cls.size == 1:
            kind = "absorbing"
        if cls.period is None:
            per = "no cycle"
        elif cls.period == 1:
            per = "aperiodic"
        else:
            per = f"period {cls.period}"
        L.append(f"  [{k}] {kind}, {per}, {cls.size} state{'s' if cls.size != 1 else ''}: {_names(r, cls.states)}")
        if cls.period is not None and cls.period > 1:
            for j, sub in enumerate(cls.cyclic_subclasses):
                L.append(f"      cyclic subclass {j}: {_names(r, sub)}")
    if s.irreducible:
        L.append("  The chain is irreducible: every state leads to every other.")
    elif len(s.closed) == 1:
        L.append("  One closed class: from any start the chain ends up there.")
    else:
        L.append(f"  {len(s.closed)} closed classes: where the chain ends up depends on the start.")
    L.append("")

    # stationary laws
    for m, (k, pi) in enumerate(zip(s.closed, r.stationary)):
        if m == max_rows:
            L.append(f"... {len(s.closed) - max_rows} more closed classes (use --json for all)")
            L.append("")
            break
        cls = s.classes[k]
        if cls.size == 1:
            L.append(f"Absorbing state {_name(r, cls.states[0])} (class [{k}]): once entered, never left")
            L.append("")
            continue
        L.append(f"Stationary law of class [{k}] (long-run share of time; mean return time = 1/share)")

        def ret(i):
            return f"   return every {format_steps(r.return_times[i], step)}"

        L += _law_lines(r, pi, cls.states, max_rows, extra=ret)
        K = r.kemeny[m]
        if cls.size > 1:
            L.append(f"  Kemeny's constant: {_fmt_num(K)} steps (expected steps to a target drawn from this law)")
        L.append("")

    # absorption
    T = s.transient_states
    if T:
        L.append("Leaving the transient states")
        rows = T if len(T) <= max_rows else T[:max_rows]
        width = max(len(_name(r, i)) for i in rows)
        for i in rows:
            L.append(f"  {_name(r, i):<{width}}  ends in {_ends_in(r, r.absorption.probabilities[i])}")
            L.append(f"  {'':<{width}}  after {format_steps(r.absorption.expected_steps[i], step)} on average"
                     f" (standard deviation {_fmt_num(float(np.sqrt(r.absorption.steps_variance[i])))} steps)")
        if len(T) > max_rows:
            L.append(f"  ... {len(T) - max_rows} more transient states (use --json for all)")
        L.append("")

    # mixing
    L.append(f"Mixing time (total variation within {r.epsilon:g} of the long-run law, worst start)")
    mx = r.mixing
    if mx.steps is not None:
        L.append(f"  {format_steps(mx.steps, step)}")
    elif mx.reason == "periodic":
        d = s.classes[s.closed[0]].period
        L.append(f"  not defined: the closed class has period {d}, so the law at step t keeps cycling;"
                 " the share of time still converges to the stationary law")
    elif mx.reason == "several closed classes":
        L.append("  not defined: there are several closed classes, so the long-run law depends on the start")
    else:
        L.append("  more than 4.6e18 steps (beyond what can be computed)")
    if r.start is not None:
        st = r.start
        L.append("")
        L.append(f"From start state {_name(r, st.state)}")
        if not s.recurrent_mask[st.state]:
            L.append(f"  ends in {_ends_in(r, st.absorption)}")
            L.append(f"  after {format_steps(st.expected_steps, step)} on average")
        L.append("  long-run law:")
        L += _law_lines(r, st.limit, range(r.n), max_rows)
        if st.mixing_steps is not None:
            L.append(f"  within {r.epsilon:g} of it (total variation) after {format_steps(st.mixing_steps, step)}")
        else:
            L.append("  the law at step t does not settle (a periodic class is reached), only its time average")
    L.append("")

    # spectral
    sp = r.spectrum
    L.append("Spectrum")
    L.append(f"  second-largest eigenvalue modulus {_fmt_num(sp.slem)}, spectral gap {_fmt_num(sp.gap)}")
    if sp.relaxation_time is not None:
        L.append(f"  relaxation time 1/gap: {format_steps(sp.relaxation_time, step)}")
    else:
        L.append("  relaxation time: not defined (gap 0: a periodic closed class)")
    if s.irreducible:
        if sp.reversible:
            L.append("  reversible (detailed balance holds)")
        else:
            v = sp.balance_violation
            why = "some transition has no reverse" if v == float("inf") else f"off by up to {_fmt_num(v)} (relative)"
            L.append(f"  not reversible: detailed balance fails, {why}")
    if sp.bounds is not None:
        b = sp.bounds
        L.append(f"  bounds for reversible chains (Levin-Peres-Wilmer Thms 12.4, 12.5): "
                 f"{_fmt_num(b.lower)} <= t_mix({b.epsilon:g}) <= {_fmt_num(b.upper)} steps")
    L.append("")
    L.append("Caution: " + CAUTION)
    return "\n".join(L)
