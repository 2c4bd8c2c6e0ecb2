"""Findings: what in a chain (and in a simulation plan for it) can mislead.

:func:`find_all` inspects a chain, optionally with a start and a
:class:`~core.plan.Plan`, and returns frozen :class:`Finding` objects, each
with a stable code, a severity, a plain-language title, an explanation with
the numbers, the states and transitions involved, and a remedy.  It never
raises for an invalid chain: it returns the validation problems as findings.

Codes (stable; see :data:`CODES`):

``invalid-model``
    A validation problem (one finding per problem).
``plan-misleading``
    The exact plan check (:func:`core.plan.check_plan`) finds the plan's
    estimate farther from the long run than its tolerance.
``several-closed-classes``
    The long run depends on the start; each closed class and the probability
    of ending in it from the start.
``transient-start``
    The start lies in a transient class; its expected stay there (compared
    with the planned run).
``bottleneck``
    A set ``S`` inside a closed class with a small bottleneck ratio
    ``Phi(S) = Q(S, S^c) / pi(S)``, its expected escape times, and how many
    crossings a planned run would see.
``periodic``
    A closed class with period ``d > 1``, its cyclic subclasses, and the
    remedies with their trade-offs.
``tiny-probability``
    Probabilities below ``1e-9``: rare events that dominate the time to
    equilibrium.
``near-one-decimal``
    A probability typed as a decimal so close to 1 that a double cannot keep
    its remainder (use ``rest``).
``slow-mixing``
    ``t_mix(1/4)`` against the planned run, with the recommended burn-in
    ``t_mix(eps)``.
``short-burn-in``
    A time-average plan whose burn-in is shorter than ``t_mix(eps)``.
``unreachable-states``
    States the start can never reach.
``absorbing-states``
    States the chain never leaves.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Any, Mapping, Sequence

import numpy as np

__all__ = [
    "SEVERITIES",
    "CODES",
    "TINY_PROBABILITY",
    "Finding",
    "find_all",
    "bottleneck_ratio",
    "expected_exit_times",
    "sweep_cuts",
]

#: Severities, most serious first (the sort order of :func:`find_all`).
SEVERITIES = ("error", "warning", "note")
#: Every finding code, in the order findings of equal severity are listed.
CODES = (
    "invalid-model",
    "plan-misleading",
    "several-closed-classes",
    "transient-start",
    "bottleneck",
    "periodic",
    "tiny-probability",
    "near-one-decimal",
    "slow-mixing",
    "short-burn-in",
    "unreachable-states",
    "absorbing-states",
)
#: Probabilities below this are flagged as rare events.
TINY_PROBABILITY = 1e-9
#: Without a plan, a bottleneck is reported when Phi(S) is at most this.
BOTTLENECK_RATIO = 1e-3
#: With a plan, fewer expected crossings of a cut than this is a warning ...
FEW_CROSSINGS = 10
#: ... and fewer than this a note.
SOME_CROSSINGS = 100
#: Without a plan, an expected stay in a transient start class of at least this many steps is a warning.
LONG_STAY = 1000
#: Without a plan, t_mix(1/4) of at least this many steps is noted.
SLOW_MIXING = 1000
#: A plan shorter than this many mixing times is warned about (common practice).
MIXING_TIMES_PER_RUN = 10
#: Eigenvalues of the reversibilisation above 1 minus this are "close to 1" (their vectors are swept too).
NEAR_ONE = 1e-2
#: Most eigenvectors swept per closed class.
MAX_SWEEPS = 8
#: Most states or transitions named in one explanation.
MAX_NAMED = 8
#: Classes up to this size get a dense symmetric eigensolver; larger ones a Lanczos solver.
_DENSE_EIGEN = 1000
#: Classes up to this size sum every sweep cut directly; larger ones update the cut flow.
_DIRECT_SWEEP = 400


@dataclass(frozen=True)
class Finding:
    """One finding about a chain or a plan.

    Attributes
    ----------
    code : str
        Stable identifier (one of :data:`CODES`).
    severity : {"error", "warning", "note"}
    title : str
        A plain-language headline.
    explanation : str
        Two or three sentences with the numbers.
    remedy : str
        What to do about it.
    states : tuple of int
        Row indices of the states involved (states of the file that exist).
    state_ids : tuple of str
        Their ids (for an invalid model, also ids that do not exist).
    transitions : tuple of (int, int)
        The transitions involved, as row indices.
    transition_ids : tuple of (str, str)
        The same as ids.
    data : mapping
        The key numbers, machine-readable (names depend on the code).
    """

    code: str
    severity: str
    title: str
    explanation: str
    remedy: str
    states: tuple[int, ...] = ()
    state_ids: tuple[str, ...] = ()
    transitions: tuple[tuple[int, int], ...] = ()
    transition_ids: tuple[tuple[str, str], ...] = ()
    data: Mapping[str, Any] = field(default_factory=dict, hash=False, compare=False)

    def __post_init__(self):
        if self.severity not in SEVERITIES:
            raise ValueError(f"severity must be one of {SEVERITIES}, not {self.severity!r}")
        if self.code not in CODES:
            raise ValueError(f"unknown finding code {self.code!r}")

    def to_json(self, ids: Sequence[str] | None = None) -> dict:
        """``{"code", "severity", "title", "explanation", "remedy", "states", "transitions", "data"}``.

        States and transitions are given by id: ``ids`` (the chain's ids, row
        order) maps the indices when given, otherwise the stored ids are used.
        """
        if ids is not None:
            states = [ids[i] for i in self.states]
            trans = [[ids[a], ids[b]] for a, b in self.transitions]
        else:
            states = list(self.state_ids)
            trans = [list(t) for t in self.transition_ids]
        from .jsonout import to_jsonable

        return {
            "code": self.code,
            "severity": self.severity,
            "title": self.title,
            "explanation": self.explanation,
            "remedy": self.remedy,
            "states": states,
            "transitions": trans,
            "data": to_jsonable(dict(self.data)),
        }


# --------------------------------------------------------------------------
# numerical helpers (not in the analysis contract)
# --------------------------------------------------------------------------
def expected_exit_times(P: np.ndarray, S: Sequence[int]) -> np.ndarray:
    """Expected number of steps to leave the set ``S``, from each state of ``S``.

    Solves ``(I - P_SS) x = 1`` with :func:`core.stationary.solve_mmatrix`,
    the subtraction-free state reduction of GTH: the diagonal of ``I - P_SS``
    is the sum of the flows out of each state (the probabilities of leaving
    ``S`` plus those of moving within it), never ``1 - P_ii``, so exit times of
    order ``1e9`` (a set left with probability ``1e-9``) keep their relative
    accuracy.  States that may never leave ``S`` get ``inf``.

    Parameters
    ----------
    P : (n, n) ndarray
        Row-stochastic matrix.
    S : sequence of int
        The set; it must be possible to leave it from every state.

    Returns
    -------
    (len(S),) ndarray
        ``x[k] = E_{S[k]}[steps until the chain first leaves S]`` (``inf``
        where it cannot be left).

    References
    ----------
    W.K. Grassmann, M.I. Taksar and D.P. Heyman, "Regenerative analysis and
    steady state distributions for Markov chains", Operations Research 33
    (1985), 1107-1116 (the subtraction-free elimination).
    J.G. Kemeny and J.L. Snell, *Finite Markov Chains*, ch. 3 (``N = (I-Q)^-1``,
    expected steps ``N 1``).
    """
    S = np.asarray(S, dtype=int)
    out = np.full(S.size, math.inf)
    inside = np.zeros(P.shape[0], dtype=bool)
    inside[S] = True
    # A state has a finite exit time unless it can reach a part of S with no way out.
    sub = P[np.ix_(S, S)] > 0
    can_leave = (P[np.ix_(S, np.flatnonzero(~inside))] > 0).any(axis=1)
    stuck = ~_can_reach(sub, can_leave)
    bad = _can_reach(sub, stuck)
    keep = np.flatnonzero(~bad)
    if keep.size == 0:
        return out
    from .stationary import solve_mmatrix

    Sk = S[keep]
    outside = np.setdiff1d(np.arange(P.shape[0]), Sk)
    exits = P[np.ix_(Sk, outside)].sum(axis=1)
    x = solve_mmatrix(P[np.ix_(Sk, Sk)], exits, np.ones(Sk.size))
    out[keep] = x
    return out


def _can_reach(adj: np.ndarray, targets: np.ndarray) -> np.ndarray:
    """Mask of the nodes of the directed graph ``adj`` that can reach a node of ``targets``."""
    from scipy.sparse import csr_matrix, vstack, hstack
    from scipy.sparse.csgraph import breadth_first_order

    k = adj.shape[0]
    if not targets.any():
        return np.zeros(k, dtype=bool)
    # reversed graph plus a super-source k pointing at every target
    rev = csr_matrix(adj.T.astype(np.int8))
    top = hstack([rev, csr_matrix((k, 1), dtype=np.int8)])
    bottom = hstack([csr_matrix(targets.astype(np.int8)[None, :]), csr_matrix((1, 1), dtype=np.int8)])
    G = vstack([top, bottom]).tocsr()
    order = breadth_first_order(G, k, directed=True, return_predecessors=False)
    out = np.zeros(k + 1, dtype=bool)
    out[order] = True
    return out[:k]


def bottleneck_ratio(P: np.ndarray, pi: np.ndarray, S: Sequence[int], C: Sequence[int] | None = None) -> float:
    """``Phi(S) = Q(S, C \\ S) / pi(S)`` with ``Q(x, y) = pi(x) P(x, y)``.

    Parameters
    ----------
    P : (n, n) ndarray
    pi : (n,) ndarray
        A stationary law (of the closed class ``C``).
    S : sequence of int
        A proper subset of ``C``.
    C : sequence of int, optional
        The closed class (default: every state).

    Returns
    -------
    float
        Computed by summing the flows across the cut (never as ``1 - ...``),
        so it keeps relative accuracy however small it is.

    References
    ----------
    D.A. Levin and Y. Peres, *Markov Chains and Mixing Times*, 2nd ed., §7.2
    (bottleneck ratio ``Phi(S) = Q(S, S^c)/pi(S)``).
    """
    S = np.asarray(S, dtype=int)
    C = np.arange(P.shape[0]) if C is None else np.asarray(C, dtype=int)
    rest = np.setdiff1d(C, S)
    q = float((pi[S][:, None] * P[np.ix_(S, rest)]).sum())
    return q / float(pi[S].sum())


def sweep_cuts(P: np.ndarray, pi: np.ndarray, C: Sequence[int]) -> list[tuple[tuple[int, ...], float, float]]:
    """Candidate bottlenecks of a closed class by spectral sweeps.

    The additive reversibilisation ``R = (P + P*)/2`` (``P*`` the time
    reversal, ``P*(x, y) = pi(y) P(y, x)/pi(x)``) is reversible with the same
    ``pi`` and the same flows across every cut, ``Q_R(S, S^c) = Q(S, S^c)``.
    Its eigenvectors are those of the symmetric ``D^1/2 R D^-1/2``.  The states
    are sorted by the second eigenvector (and by every further one whose
    eigenvalue is within :data:`NEAR_ONE` of 1, up to :data:`MAX_SWEEPS`), and
    every prefix of each order is a candidate cut; the best cut of each order
    (smallest ``Q(S, S^c) / min(pi(S), pi(S^c))``) is kept.

    Parameters
    ----------
    P : (n, n) ndarray
    pi : (n,) ndarray
        Stationary law of the class (zero outside it).
    C : sequence of int
        The closed class, at least two states.

    Returns
    -------
    list of (S, Phi(S), eigenvalue)
        Distinct cuts, ``S`` the side with ``pi(S) <= 1/2`` (sorted indices),
        ``Phi(S)`` by :func:`bottleneck_ratio`, and the eigenvalue of ``R``
        whose vector gave the cut (NaN for an atom of the partition the
        cuts generate, also a candidate); sorted by ``Phi``.

    References
    ----------
    D.A. Levin and Y. Peres, *Markov Chains and Mixing Times*, 2nd ed., §13.3
    (Cheeger's inequality for reversible chains, ``gamma/2 <= Phi_* <=
    sqrt(2 gamma)``, whose proof is the sweep used here).
    J.A. Fill, "Eigenvalue bounds on convergence to stationarity for
    nonreversible Markov chains", Ann. Appl. Probab. 1 (1991) (the additive
    reversibilisation).
    """
    C = np.asarray(C, dtype=int)
    k = C.size
    if k < 2:
        return []
    p = pi[C].astype(float)
    p = p / p.sum()
    F = p[:, None] * P[np.ix_(C, C)]
    np.fill_diagonal(F, 0.0)
    sym = 0.5 * (F + F.T)
    rs = np.sqrt(p)
    Ssym = sym / np.outer(rs, rs)
    # diagonal of R: R_xx = P_xx; in the symmetric form it is unchanged
    Ssym[np.diag_indices(k)] = np.diag(P[np.ix_(C, C)])
    if k <= _DENSE_EIGEN:
        vals, vecs = np.linalg.eigh(Ssym)
        order_desc = np.argsort(vals)[::-1]
        vals, vecs = vals[order_desc], vecs[:, order_desc]
    else:
        from scipy.sparse.linalg import eigsh

        vals, vecs = eigsh(Ssym, k=min(MAX_SWEEPS + 1, k - 1), which="LA")
        order_desc = np.argsort(vals)[::-1]
        vals, vecs = vals[order_desc], vecs[:, order_desc]
    chosen = [1] + [i for i in range(2, min(MAX_SWEEPS + 1, len(vals))) if vals[i] > 1 - NEAR_ONE]
    seen: dict[tuple[int, ...], tuple[float, float]] = {}
    for i in chosen:
        f = vecs[:, i] / rs
        order = np.argsort(f, kind="stable")
        Fp = F[np.ix_(order, order)]
        pp = p[order]
        head = np.cumsum(pp)[:-1]
        tail = np.cumsum(pp[::-1])[::-1][1:]
        if k <= _DIRECT_SWEEP:
            q = np.array([Fp[:j, j:].sum() for j in range(1, k)])
        else:  # incremental; the chosen cut is re-summed directly below
            q = np.empty(k - 1)
            acc = 0.0
            for j in range(1, k):
                acc += Fp[j - 1, j:].sum() - Fp[: j - 1, j - 1].sum()
                q[j - 1] = max(acc, 0.0)
        phi = q / np.minimum(head, tail)
        j = int(np.argmin(phi)) + 1
        side = order[:j] if head[j - 1] <= tail[j - 1] else order[j:]
        S = tuple(sorted(int(C[x]) for x in side))
        if S not in seen:
            seen[S] = (bottleneck_ratio(P, pi, S, C), float(vals[i]))
    # With several eigenvalues near 1 (several weakly joined groups), each sweep cuts off
    # one group or a union of groups; the atoms of the partition the cuts generate are
    # the groups themselves, so they are candidates too.
    if len(seen) > 1:
        Cset = [int(x) for x in C]
        label = {x: () for x in Cset}
        for S in list(seen):
            Sset = set(S)
            for x in Cset:
                label[x] = label[x] + (x in Sset,)
        atoms: dict[tuple, list[int]] = {}
        for x in Cset:
            atoms.setdefault(label[x], []).append(x)
        piC = pi[C].sum()
        for atom in atoms.values():
            if len(atom) == len(Cset):
                continue
            side = atom if pi[atom].sum() <= 0.5 * piC else sorted(set(Cset) - set(atom))
            S = tuple(sorted(side))
            if S not in seen:
                seen[S] = (bottleneck_ratio(P, pi, S, C), float("nan"))
    out = [(S, phi_s, lam) for S, (phi_s, lam) in seen.items()]
    out.sort(key=lambda t: t[1])
    return out


# --------------------------------------------------------------------------
# wording helpers
# --------------------------------------------------------------------------
def _g(x: float, digits: int = 3) -> str:
    return f"{float(x):.{digits}g}"


def _ordinal(k: int) -> str:
    if 10 <= k % 100 <= 20:
        return f"{k}th"
    return f"{k}{ {1: 'st', 2: 'nd', 3: 'rd'}.get(k % 10, 'th')}"


def _count(x: float) -> str:
    from .units import format_count

    return format_count(x)


def _steps(t: float, step) -> str:
    from .units import format_steps

    return format_steps(t, step)


class _Names:
    def __init__(self, chain):
        self.chain = chain
        self.ids = chain.ids

    def one(self, i: int) -> str:
        return repr(self.ids[i])

    def many(self, idx: Sequence[int], limit: int = MAX_NAMED) -> str:
        idx = list(idx)
        shown = ", ".join(repr(self.ids[i]) for i in idx[:limit])
        if len(idx) > limit:
            shown += f" and {len(idx) - limit} more"
        return "{" + shown + "}"


def _finding(code, severity, title, explanation, remedy, *, names, states=(), transitions=(), data=None):
    states = tuple(int(i) for i in states)
    transitions = tuple((int(a), int(b)) for a, b in transitions)
    return Finding(
        code=code,
        severity=severity,
        title=title,
        explanation=explanation,
        remedy=remedy,
        states=states,
        state_ids=tuple(names.ids[i] for i in states),
        transitions=transitions,
        transition_ids=tuple((names.ids[a], names.ids[b]) for a, b in transitions),
        data=dict(data or {}),
    )


# --------------------------------------------------------------------------
# the engine
# --------------------------------------------------------------------------
def find_all(chain, *, plan=None, start=None, epsilon: float = 0.25) -> tuple[Finding, ...]:
    """Every finding about ``chain`` (and ``plan``), most serious first.

    Parameters
    ----------
    chain : core.model.Chain
        Possibly invalid: then only its validation problems are returned, as
        ``invalid-model`` findings.
    plan : core.plan.Plan, optional
        A simulation plan: expected stays, escape times and mixing times are
        compared with its run length, and the exact plan check is included.
    start : int, str or (n,) array_like, optional
        A start state (index or id) or start law; defaults to the plan's start.
    epsilon : float
        Distance to stationarity for the recommended burn-in ``t_mix(epsilon)``
        (default 1/4), in (0, 1).

    Returns
    -------
    tuple of Finding
        Sorted by severity (error, warning, note), then in the order of
        :data:`CODES`.  Empty for a clean ergodic, aperiodic, fast-mixing chain
        without a plan.

    Raises
    ------
    core.errors.OptionError
        When ``start`` or ``epsilon`` is out of range (a user error in the
        request, not in the chain).

    Examples
    --------
    >>> from core.model import Chain
    >>> flip = Chain.from_matrix([[0, 1], [1, 0]], ids=["on", "off"])
    >>> [f.code for f in find_all(flip)]
    ['periodic']
    >>> find_all(flip)[0].to_json()["states"]
    ['on', 'off']
    """
    from .errors import OptionError

    names = _Names(chain)
    if chain.problems:
        return tuple(_invalid_findings(chain, names))
    if not 0 < float(epsilon) < 1:
        raise OptionError(f"epsilon must be between 0 and 1 (exclusive), not {epsilon}")
    from .plan import _start_law
    from .structure import classify

    P = chain.matrix()
    n = chain.n
    if plan is not None:
        if start is None:
            start = plan.start
        else:
            from dataclasses import replace

            plan = replace(plan, start=start)
    pi0 = start_index = None
    if start is not None:
        pi0, start_index = _start_law(start, n, chain.ids)
    st = classify(P)
    ctx = _Context(chain, names, P, st, plan, pi0, start_index, float(epsilon))
    out: list[Finding] = []
    for detect in (
        _plan_finding,
        _closed_classes,
        _transient_start,
        _bottlenecks,
        _periodic,
        _tiny,
        _near_one,
        _mixing,
        _unreachable,
        _absorbing,
    ):
        out.extend(detect(ctx))
    rank = {c: i for i, c in enumerate(CODES)}
    out.sort(key=lambda f: (SEVERITIES.index(f.severity), rank[f.code]))
    return tuple(out)


class _Context:
    def __init__(self, chain, names, P, st, plan, pi0, start_index, epsilon):
        self.chain = chain
        self.names = names
        self.P = P
        self.st = st
        self.plan = plan
        self.pi0 = pi0
        self.start_index = start_index
        self.epsilon = epsilon
        self.step = chain.step
        self._laws = None
        self._absorption = None
        self._check = None

    @property
    def laws(self):
        if self._laws is None:
            from .stationary import stationary_laws

            self._laws = stationary_laws(self.P, self.st)
        return self._laws

    @property
    def absorption(self):
        if self._absorption is None:
            from .passage import absorption

            self._absorption = absorption(self.P, self.st)
        return self._absorption

    @property
    def check(self):
        if self._check is None and self.plan is not None:
            from .plan import check_plan

            self._check = check_plan(self.chain, self.plan)
        return self._check

    def start_text(self) -> str:
        if self.start_index is not None:
            return f"from {self.names.one(self.start_index)}"
        return "from the given start law"

    def run_length(self) -> int | None:
        return None if self.plan is None else self.plan.burn_in + self.plan.steps

    def reach(self) -> np.ndarray:
        """Probability of ending in each closed class from the start."""
        if len(self.st.closed) == 1:
            return np.array([1.0])
        return np.clip(self.pi0 @ self.absorption.probabilities, 0.0, 1.0)


def _invalid_findings(chain, names):
    idx = chain.index
    for p in chain.problems:
        states = (idx[p.state],) if p.state in idx else ()
        sids = (p.state,) if p.state else ()
        trans: tuple = ()
        tids: tuple = ()
        if p.transition is not None:
            a, b = p.transition
            tids = ((a, b),)
            if a in idx and b in idx:
                trans = ((idx[a], idx[b]),)
        yield Finding(
            code="invalid-model",
            severity="error",
            title="The model is not valid",
            explanation=p.message[0].upper() + p.message[1:] + ".",
            remedy="Correct this entry; nothing can be analysed or simulated until every problem is fixed.",
            states=states,
            state_ids=sids,
            transitions=trans,
            transition_ids=tids,
            data={"problem": p.code},
        )


# -- plan ----------------------------------------------------------------------
def _plan_finding(ctx):
    check = ctx.check
    if check is None or check.sound:
        return
    plan = check.plan
    data = {
        "tv": check.tv,
        "tolerance": plan.tolerance,
        "min_steps": check.min_steps,
        "min_burn_in": check.min_burn_in,
        "estimator": plan.estimator,
    }
    if check.min_steps is not None:
        remedy = (
            f"Run at least {_steps(check.min_steps, ctx.step)}"
            + (
                f", or lengthen the burn-in to {_count(check.min_burn_in)} steps"
                if check.min_burn_in is not None and check.min_burn_in > plan.burn_in
                else ""
            )
            + "; or use the exact long-run law from the analysis instead of a simulation."
        )
    else:
        remedy = (
            f"{check.min_steps_reason[0].upper()}{check.min_steps_reason[1:]}; "
            "or use the exact long-run law from the analysis."
        )
    j = np.argsort(-np.abs(check.bias))[: min(3, ctx.chain.n)]
    yield _finding(
        "plan-misleading",
        "warning",
        "The planned simulation would mislead",
        check.sentence,
        remedy,
        names=ctx.names,
        states=[int(x) for x in j if abs(check.bias[x]) > 0],
        data=data,
    )


# -- closed classes ----------------------------------------------------------------
def _closed_classes(ctx):
    st = ctx.st
    if len(st.closed) < 2:
        return
    names = ctx.names
    parts = []
    data_classes = []
    reach = ctx.reach() if ctx.pi0 is not None else None
    for k, ci in enumerate(st.closed):
        states = st.classes[ci].states
        item = names.many(states, 4)
        if reach is not None:
            item += f" (probability {_g(reach[k], 4)})"
        parts.append(item)
        data_classes.append(
            {"states": [names.ids[i] for i in states], "probability": None if reach is None else float(reach[k])}
        )
    listing = "; ".join(parts[:MAX_NAMED]) + (f"; and {len(parts) - MAX_NAMED} more" if len(parts) > MAX_NAMED else "")
    if reach is not None:
        where = f"Started {ctx.start_text()}, it ends in: {listing}."
    else:
        where = f"They are: {listing}; which one a run ends in depends on where it starts."
    explanation = (
        f"The chain has {len(st.closed)} closed classes, groups of states it never leaves once it "
        f"enters them, so there is no single long-run law. {where} A single simulated run shows "
        "the long run of only one of them."
    )
    remedy = (
        "Report the long run per class with the probability of reaching each, or simulate many "
        "replicates and report the split; if the classes should be connected, add the missing "
        "transitions."
    )
    yield _finding(
        "several-closed-classes",
        "warning",
        "The long run depends on the start",
        explanation,
        remedy,
        names=names,
        states=[i for ci in st.closed for i in st.classes[ci].states],
        data={"classes": data_classes},
    )


# -- transient start -----------------------------------------------------------------
def _transient_start(ctx):
    if ctx.pi0 is None:
        return
    st = ctx.st
    names = ctx.names
    T = ctx.run_length()
    for ci in st.transient:
        cls = st.classes[ci]
        idx = np.array(cls.states)
        mass = float(ctx.pi0[idx].sum())
        if mass <= 0:
            continue
        x = expected_exit_times(ctx.P, idx)
        w = ctx.pi0[idx] / mass
        stay = float(w @ x)
        leave_trans = [(a, b) for a in idx for b in np.flatnonzero(ctx.P[a] > 0) if st.class_of[b] != ci]
        if T is not None:
            severe = stay >= ctx.plan.tolerance * T
            compare = (
                f"The planned run is {_count(T)} steps, so "
                + (
                    "on average the run would spend a share of it there large enough to bias the estimate."
                    if stay < T
                    else "a typical run would never leave it at all."
                )
            )
        else:
            severe = stay >= LONG_STAY
            compare = "A run shorter than that sees mostly this class and little of the long run."
        explanation = (
            f"The start{'' if ctx.start_index is not None else ' law'} lies in the transient class "
            f"{names.many(cls.states)}, which the chain leaves for good after "
            f"{_steps(stay, ctx.step)} on average (exact, from the start). "
            f"{compare}"
        )
        remedy = (
            f"Discard a burn-in of several times {_count(stay)} steps, start in the long-run class, "
            "or read the long run from the exact analysis."
        )
        yield _finding(
            "transient-start",
            "warning" if severe else "note",
            "The simulation starts where the chain does not stay",
            explanation,
            remedy,
            names=names,
            states=cls.states,
            transitions=leave_trans[:MAX_NAMED * 4],
            data={"expected_stay": stay, "start_mass": mass, "run_steps": T},
        )


# -- bottlenecks ------------------------------------------------------------------
def _bottlenecks(ctx):
    st = ctx.st
    names = ctx.names
    P = ctx.P
    T = ctx.run_length()
    for k, ci in enumerate(st.closed):
        C = np.array(st.classes[ci].states)
        if C.size < 2:
            continue
        pi = ctx.laws[k]
        if ctx.pi0 is not None and ctx.reach()[k] <= 0:
            continue
        reported = 0
        for S, phi, lam in sweep_cuts(P, pi, C):
            if reported >= 3:
                break
            Sarr = np.array(S)
            Sc = np.setdiff1d(C, Sarr)
            q = phi * float(pi[Sarr].sum())  # Q(S, S^c) = Q(S^c, S) (stationarity)
            if T is None:
                if phi > BOTTLENECK_RATIO:
                    continue
                severity = "warning"
            else:
                crossings = T * q
                if crossings >= SOME_CROSSINGS and phi > BOTTLENECK_RATIO:
                    continue
                severity = "warning" if crossings < FEW_CROSSINGS else "note"
            reported += 1
            piS = float(pi[Sarr].sum())
            piSc = float(pi[Sc].sum())
            phi_c = bottleneck_ratio(P, pi, Sc, C)
            e_S = _stationary_exit(P, pi, Sarr)
            e_Sc = _stationary_exit(P, pi, Sc)
            cut = [(a, b) for a in Sarr for b in Sc if P[a, b] > 0] + [
                (a, b) for a in Sc for b in Sarr if P[a, b] > 0
            ]
            side_of_start = ""
            if ctx.start_index is not None and ctx.start_index in C:
                mine = Sarr if ctx.start_index in S else Sc
                e0 = expected_exit_times(P, mine)[int(np.searchsorted(mine, ctx.start_index))]
                side_of_start = (
                    f" Started from {names.one(ctx.start_index)}, the first crossing comes after "
                    f"{_count(e0)} steps on average."
                )
            if T is not None:
                compare = (
                    f"A run of {_count(T)} steps would cross it only about {_g(T * q, 2)} times"
                    + (", too few to weigh the two sides." if T * q < SOME_CROSSINGS else ".")
                )
            else:
                compare = (
                        f"A simulation needs many times {_steps(max(e_S, e_Sc), ctx.step)} "
                    "to weigh the two sides correctly."
                )
            explanation = (
                f"The states {names.many(S)} (long-run share {_g(piS)}) and the rest of their class "
                f"(share {_g(piSc)}) are joined only weakly: per step, a fraction Phi = {_g(phi)} of "
                f"the first group's long-run mass leaves it ({_g(phi_c)} for the rest). Starting from "
                f"the long-run law within each side, leaving takes {_count(e_S)} and {_count(e_Sc)} "
                f"steps on average (exact).{side_of_start} {compare}"
            )
            remedy = (
                "Trust the exact long-run law rather than a short run; if you simulate, check the "
                "plan (check-plan) and run for many escape times, or start replicates on both "
                f"sides in the proportion {_g(piS)} : {_g(piSc)}. Check the crossing "
                "probabilities: a small typo here changes the long run a lot."
            )
            yield _finding(
                "bottleneck",
                severity,
                "A bottleneck splits a class into two slowly mixing parts",
                explanation,
                remedy,
                names=names,
                states=S,
                transitions=cut[: MAX_NAMED * 4],
                data={
                    "phi": phi,
                    "phi_complement": phi_c,
                    "flow": q,
                    "pi_set": piS,
                    "escape_steps": e_S,
                    "escape_steps_complement": e_Sc,
                    "escape_start": "stationary law restricted to the side",
                    "eigenvalue": lam,
                    "run_steps": T,
                    "crossings": None if T is None else T * q,
                },
            )


def _stationary_exit(P, pi, S) -> float:
    w = pi[S] / pi[S].sum()
    return float(w @ expected_exit_times(P, S))


# -- periodicity ------------------------------------------------------------------
def _periodic(ctx):
    st = ctx.st
    names = ctx.names
    for k, ci in enumerate(st.closed):
        cls = st.classes[ci]
        d = cls.period or 1
        if d <= 1:
            continue
        if ctx.pi0 is not None and ctx.reach()[k] <= 0:
            continue
        subs = "; ".join(names.many(s, 4) for s in cls.cyclic_subclasses[:MAX_NAMED])
        severity = "warning"
        plan_note = ""
        if ctx.plan is not None:
            if ctx.plan.estimator == "average" and math.gcd(ctx.plan.stride, d) == 1:
                severity = "note"
                plan_note = (
                    f" The plan's time average with stride {ctx.plan.stride} visits every subclass in turn, "
                    "so it is not affected."
                )
            elif ctx.plan.estimator == "average":
                plan_note = (
                    f" The plan's stride {ctx.plan.stride} shares the factor "
                    f"{math.gcd(ctx.plan.stride, d)} with the period, so its samples skip subclasses."
                )
            else:
                plan_note = " The plan reads the replicates at one fixed step, which is exactly this case."
        explanation = (
            f"The class {names.many(cls.states)} has period {d}: its states fall into {d} cyclic "
            f"subclasses ({subs}) that the chain visits in strict rotation, so P^t never settles. "
            f"From a fixed start all replicates sit in the same subclass at any fixed time, and "
            f"sampling every {_ordinal(d)} step (or any multiple) sees only one subclass, although in the "
            f"long run each holds 1/{d} of the time.{plan_note}"
        )
        remedy = (
            "Estimate by time averages along each run (every subclass is visited in turn; the "
            "error shrinks like 1/T); or sample at random times, e.g. add a random offset of 0 to "
            f"{d - 1} steps to each sampling time (the model is unchanged, only the schedule); or "
            "study the lazy chain (I+P)/2, which has the same long-run law and no period but is a "
            "different model: it moves half as often, so every expected time doubles."
        )
        yield _finding(
            "periodic",
            severity,
            f"The chain cycles with period {d}",
            explanation,
            remedy,
            names=names,
            states=cls.states,
            data={"period": d, "subclasses": [[names.ids[i] for i in s] for s in cls.cyclic_subclasses]},
        )


# -- typed probabilities ---------------------------------------------------------------
def _tiny(ctx):
    chain = ctx.chain
    idx = chain.index
    limit = Fraction(repr(TINY_PROBABILITY))
    ln, ld = limit.numerator, limit.denominator
    items = sorted(
        (
            (v, a, b)
            for (a, b), v in chain.exact_probabilities.items()
            if v.numerator * ld < ln * v.denominator and v > 0  # v < limit, in integers (fast)
        ),
        key=lambda t: t[0],
    )
    if not items:
        return
    underflow = [(a, b) for v, a, b in items if float(v) == 0.0]
    usable = [it for it in items if float(it[0]) > 0]
    v0, a0, b0 = usable[0] if usable else items[0]
    p0 = float(v0)
    wait = 1.0 / p0 if p0 > 0 else math.inf

    def shown_value(v, a, b):
        typed = chain.transition(a, b).p
        if isinstance(typed, str) and typed.strip().lower() == "rest":
            return f"'rest' = {float(v):.3g}"
        return str(typed) if float(v) == 0.0 else f"{float(v):.3g}"

    shown = ", ".join(f"{a!r} -> {b!r} ({shown_value(v, a, b)})" for v, a, b in items[:MAX_NAMED])
    more = f" and {len(items) - MAX_NAMED} more" if len(items) > MAX_NAMED else ""
    T = ctx.run_length()
    compare = (
        f" The planned run of {_count(T)} steps would see it about {_g(T * p0, 2)} times from that state."
        if T is not None and usable
        else ""
    )
    wait_text = (
        f"from {a0!r} the smallest one takes {_steps(wait, ctx.step)} on average to happen, "
        "and a simulation sees it rarely or never."
        if usable
        else "a simulation never sees them."
    )
    explanation = (
        f"{len(items)} transition{'s have' if len(items) != 1 else ' has'} a probability below "
        f"{TINY_PROBABILITY:g}: {shown}{more}. Such rare events set the time to equilibrium: "
        f"{wait_text}{compare}"
    )
    if underflow:
        explanation += (
            f" {len(underflow)} of them {'is' if len(underflow) == 1 else 'are'} below the smallest "
            "double (about 5e-324), so the matrix, and every computation on it, treats "
            f"{'it' if len(underflow) == 1 else 'them'} as impossible."
        )
    remedy = (
        "Check the values (a slipped exponent?). If they are right, rely on the exact analysis "
        "for anything that depends on them, or check a simulation plan first (check-plan): it "
        "must be many times longer than the waiting times."
    )
    states = sorted({idx[a] for _, a, _ in items})
    yield _finding(
        "tiny-probability",
        "warning",
        "Very small probabilities: rare events dominate",
        explanation,
        remedy,
        names=ctx.names,
        states=states,
        transitions=[(idx[a], idx[b]) for _, a, b in items],
        data={"smallest": p0, "waiting_steps": wait, "count": len(items), "underflow": len(underflow)},
    )


_NINES = re.compile(r"^\s*\+?0?\.(9+)")


def _near_one(ctx):
    """Decimals so close to 1 that a double cannot keep the remainder.

    Flagged: a decimal (text or JSON number, fractions excepted) with at least 15
    nines after the point; one whose double keeps less than 3 correct digits of
    its remainder ``1 - p``; and a JSON number read as exactly 1 in a row that
    has other transitions (its typed digits beyond double precision, and the
    remainder with them, were dropped when the file was read).
    """
    chain = ctx.chain
    idx = chain.index
    exact = chain.exact_probabilities  # parsed at validation, 'rest' resolved, zeros dropped
    # Only values within 1e-13 of 1 can be flagged (15 nines, or a double whose remainder is off
    # by more than 0.1%: half an ulp of 1 is 5.6e-17); found in integers first, as there are rarely any
    near = {k: v for k, v in exact.items() if (v.denominator - v.numerator) * 10**13 <= v.denominator}
    if not near:
        return
    rows = {a for a, _ in near}
    live: dict[str, int] = {}  # transitions per row that carry probability (or are 'rest')
    for t in chain.transitions:
        if t.source in rows and ((t.source, t.target) in exact
                                 or (isinstance(t.p, str) and t.p.strip().lower() == "rest")):
            live[t.source] = live.get(t.source, 0) + 1
    hits = []
    for t in chain.transitions:
        v = near.get((t.source, t.target))
        if v is None:
            continue
        if isinstance(t.p, str) and ("/" in t.p or t.p.strip().lower() == "rest"):
            continue  # a fraction or 'rest' keeps its remainder exactly
        if isinstance(t.p, float) and v == 1:
            if live.get(t.source, 0) > 1:
                hits.append((t, None, None, None))
            continue
        comp = 1 - v
        if comp <= 0:
            continue
        text = (t.p if isinstance(t.p, str) else repr(t.p)).strip()
        m = _NINES.match(text)
        nines = len(m.group(1)) if m else 0
        stored = 1 - Fraction(float(v))  # the remainder the double holds (exact)
        rel = abs(stored - comp) / comp
        if nines >= 15 or rel > Fraction(1, 1000):
            hits.append((t, float(comp), float(stored), float(rel)))
    if not hits:
        return
    parts = []
    for t, comp, stored, rel in hits[:MAX_NAMED]:
        if comp is None:
            parts.append(
                f"{t.source!r} -> {t.target!r} reads as exactly 1 although the row has other "
                "transitions: the digits typed after the 16th were dropped when the file was read, "
                "and with them the remainder"
            )
        else:
            parts.append(
                f"{t.source!r} -> {t.target!r} = {t.p!s} leaves a remainder of {comp:.3g}, but as a "
                f"double its remainder is {stored:.3g} (off by {100 * rel:.2g}%)"
            )
    more = f"; and {len(hits) - MAX_NAMED} more" if len(hits) > MAX_NAMED else ""
    numbers = [t for t, *_ in hits if not isinstance(t.p, str)]
    if numbers:
        where = (
            " A JSON number is read as a double, so digits beyond the 16th never reach Longrun: "
            "the remainder used is the double's."
        )
    else:
        where = (
            " Longrun reads typed text exactly, so its own results keep the remainder, but the "
            "matrix as doubles (in exports and in other tools) does not."
        )
    explanation = (
        "Probabilities typed as decimals this close to 1 lose their remainder, because a double "
        "keeps only about 16 significant digits: " + "; ".join(parts) + more + "." + where + " The "
        "small remainder is often the event that matters (a failure, an escape), and its size "
        "sets the long-run behaviour."
    )
    remedy = (
        "Type the small probabilities explicitly (e.g. 2.5e-17) and write 'rest' for the one "
        "close to 1: Longrun computes 'rest' exactly."
    )
    yield _finding(
        "near-one-decimal",
        "warning" if numbers else "note",
        "A probability close to 1 loses its remainder",
        explanation,
        remedy,
        names=ctx.names,
        states=sorted({idx[t.source] for t, *_ in hits}),
        transitions=[(idx[t.source], idx[t.target]) for t, *_ in hits],
        data={"count": len(hits), "from_numbers": len(numbers)},
    )


# -- mixing ------------------------------------------------------------------------
def _mixing(ctx):
    from .evolution import MAX_BITS, mixing

    st = ctx.st
    plan = ctx.plan
    names = ctx.names
    if len(st.closed) != 1:
        return
    ci = st.closed[0]
    cls = st.classes[ci]
    if (cls.period or 1) > 1:
        return
    pi = ctx.laws[0]
    P = ctx.P
    m4 = mixing(P, 0.25, pi=pi, structure=st)
    if m4.reason == "too large":
        yield _finding(
            "slow-mixing",
            "warning",
            "The chain takes practically for ever to forget its start",
            f"The mixing time t_mix(1/4) exceeds 2**{MAX_BITS - 1} (about 4.6e18) steps: no "
            "simulation of any feasible length settles on the long-run law.",
            "Use the exact long-run law from the analysis; check the very small probabilities "
            "that cause this.",
            names=names,
            data={"t_mix": None, "epsilon": ctx.epsilon, "t_mix_epsilon": None, "run_steps": ctx.run_length()},
        )
        return
    t4 = m4.steps
    if t4 is None:
        return
    te = t4 if ctx.epsilon == 0.25 else mixing(P, ctx.epsilon, pi=pi, structure=st).steps
    if te is None:  # beyond 2**62 for a tiny epsilon: report t_mix(1/4) only
        te = t4
    T = ctx.run_length()
    data = {"t_mix": t4, "epsilon": ctx.epsilon, "t_mix_epsilon": te, "run_steps": T}
    if plan is None:
        if t4 < SLOW_MIXING:
            return
        severity = "note"
        compare = (
            f"A simulation should run many times longer than that and discard at least "
            f"t_mix({ctx.epsilon:g}) = {_count(te)} steps as burn-in."
        )
    else:
        if T >= MIXING_TIMES_PER_RUN * t4:
            return
        severity = "warning"
        compare = (
            f"The planned run of {_count(T)} steps is only {_g(T / t4, 2)} mixing times long; "
            f"a common rule of thumb asks for at least {MIXING_TIMES_PER_RUN}."
        )
    eps_part = (
        f", and t_mix({ctx.epsilon:g}) = {_count(te)} steps to be within {ctx.epsilon:g}"
        if ctx.epsilon != 0.25
        else ""
    )
    explanation = (
        f"From the worst start it takes t_mix(1/4) = {_steps(t4, ctx.step)} "
        f"before the chain's law is within 1/4 (total variation) of the "
        f"long-run law{eps_part}. {compare}"
    )
    remedy = (
        f"Use a burn-in of at least t_mix({ctx.epsilon:g}) = {_count(te)} steps and a run many "
        "mixing times long; check the plan exactly with check-plan."
    )
    yield _finding(
        "slow-mixing",
        severity,
        "The chain takes long to forget its start",
        explanation,
        remedy,
        names=names,
        data=data,
    )
    if plan is not None and plan.estimator == "average" and te is not None and plan.burn_in < te:
        yield _finding(
            "short-burn-in",
            "note",
            "The burn-in is shorter than the mixing time",
            (
                f"The plan discards {_count(plan.burn_in)} steps, less than t_mix({ctx.epsilon:g}) = "
                f"{_count(te)} steps, so the first part of each time average still remembers the "
                "start."
            ),
            f"Discard at least {_count(te)} steps before averaging.",
            names=names,
            data={"burn_in": plan.burn_in, "recommended": te, "epsilon": ctx.epsilon},
        )


# -- reachability and absorbing states ------------------------------------------------
def _unreachable(ctx):
    if ctx.pi0 is None:
        return
    from scipy.sparse import csr_matrix
    from scipy.sparse.csgraph import breadth_first_order

    P = ctx.P
    st = ctx.st
    G = csr_matrix(P > 0)
    seen = np.zeros(P.shape[0], dtype=bool)
    for s in np.flatnonzero(ctx.pi0 > 0):
        if not seen[s]:
            seen[breadth_first_order(G, int(s), directed=True, return_predecessors=False)] = True
    lost = np.flatnonzero(~seen)
    if lost.size == 0:
        return
    recurrent = [i for i in lost if st.classes[st.class_of[i]].closed]
    severity = "warning" if recurrent else "note"
    explanation = (
        f"{lost.size} of the {P.shape[0]} states can never be reached {ctx.start_text()}: "
        f"{ctx.names.many(lost)}. A simulation from this start never visits them"
        + (
            ", including a closed class whose long run it therefore never sees."
            if recurrent
            else "; they only matter for other starts."
        )
    )
    remedy = (
        "If these states should be reachable, add the missing transitions; otherwise analyse "
        "them from a start that reaches them, or remove them."
    )
    yield _finding(
        "unreachable-states",
        severity,
        "Some states are unreachable from the start",
        explanation,
        remedy,
        names=ctx.names,
        states=lost,
        data={"count": int(lost.size)},
    )


def _absorbing(ctx):
    st = ctx.st
    ab = list(st.absorbing_states)
    if not ab:
        return
    names = ctx.names
    extra = ""
    data: dict[str, Any] = {"states": [names.ids[i] for i in ab]}
    if ctx.pi0 is not None:
        probs = ctx.reach()
        by_state = {st.classes[ci].states[0]: probs[k] for k, ci in enumerate(st.closed) if len(st.classes[ci].states) == 1}
        p_abs = sum(float(by_state.get(i, 0.0)) for i in ab)
        steps = float(ctx.pi0 @ ctx.absorption.expected_steps)
        extra = (
            f" {ctx.start_text()[0].upper()}{ctx.start_text()[1:]} the chain is absorbed with probability "
            f"{_g(p_abs, 4)}"
            + (f", after {_steps(steps, ctx.step)} on average" if p_abs >= 1 - 1e-12 else "")
            + "."
        )
        data.update(absorbed=p_abs, expected_steps=steps if p_abs >= 1 - 1e-12 else None)
    explanation = (
        f"{'These states are' if len(ab) > 1 else 'This state is'} absorbing (never left once "
        f"entered): {names.many(ab)}.{extra} After absorption a run records nothing but that "
        "state, so a time average then measures how long the run was rather than the model."
    )
    remedy = (
        "Ask about absorption instead (probabilities and expected steps, in the exact analysis); "
        "if the state should be left (a repair, a restart), add that transition."
    )
    yield _finding(
        "absorbing-states",
        "note",
        "The chain can get stuck for good",
        explanation,
        remedy,
        names=names,
        states=ab,
        transitions=[(i, i) for i in ab],
        data=data,
    )
