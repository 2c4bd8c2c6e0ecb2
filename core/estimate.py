"""Chains fitted from observed data: counts, estimates, intervals, checks.

From observed state sequences (:mod:`core.datafile`) this module computes

* the transition counts ``N[i, j]`` (pairs of consecutive observations inside a
  sequence; never across two sequences) and the maximum-likelihood matrix
  ``P_hat[i, j] = N[i, j] / N[i, .]`` (Anderson & Goodman 1957);
* a confidence interval for every entry: the Wilson score interval, and on
  request Goodman's (1965) simultaneous intervals for each row;
* findings about thin data: states left fewer than ``min_departures`` times
  (default 20), states never left, and transitions never observed -- a zero
  count is not proof that a transition is impossible, and the upper end of its
  interval says how large it could be;
* optionally a stated pseudo-count: a symmetric Dirichlet prior ``alpha`` on
  each row, whose posterior mean ``(N[i, j] + alpha) / (N[i, .] + n alpha)``
  then replaces the maximum-likelihood estimate.  It is never applied unless
  asked for;
* the uncertainty of derived answers (stationary law, mixing time, expected
  steps to absorption and absorption probabilities): matrices are drawn from
  the row-wise Dirichlet posterior or by a parametric bootstrap, the answer is
  computed for each draw with the exact analysis functions, and percentile
  intervals are reported with the number of draws and the seed;
* the Anderson & Goodman test of a first-order chain against a second-order
  one, with degrees of freedom counted on the observed support.

Everything here is plain numpy/scipy; the long-run answers come from
:mod:`core.structure`, :mod:`core.stationary`, :mod:`core.passage` and
:mod:`core.evolution`.

References
----------
T. W. Anderson and L. A. Goodman, "Statistical inference about Markov chains",
Ann. Math. Statist. 28(1):89-110, 1957.
E. B. Wilson, "Probable inference, the law of succession, and statistical
inference", J. Amer. Statist. Assoc. 22:209-212, 1927.
L. A. Goodman, "On simultaneous confidence intervals for multinomial
proportions", Technometrics 7:247-254, 1965.
B. Efron and R. Tibshirani, An Introduction to the Bootstrap, 1993 (percentile
intervals, parametric bootstrap).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from fractions import Fraction
from typing import Any, Generator, Iterable, Sequence

import numpy as np

from .errors import OptionError

__all__ = [
    "DEFAULT_MIN_DEPARTURES",
    "DEFAULT_DRAWS",
    "count_transitions",
    "wilson_interval",
    "wald_interval",
    "goodman_intervals",
    "FitFinding",
    "OrderTest",
    "order_test",
    "Fit",
    "fit_counts",
    "fit_observations",
    "fit_to_chain",
    "fit_from_chain",
    "sample_matrices",
    "Progress",
    "DerivedInterval",
    "DerivedUncertainty",
    "iter_derived_uncertainty",
    "derived_uncertainty",
]

#: States left fewer times than this are reported as poorly estimated.
DEFAULT_MIN_DEPARTURES = 20
#: Default number of matrices drawn for the uncertainty of derived answers.
DEFAULT_DRAWS = 1000
#: Keys of the chain file's top level where a fit is recorded.
COUNTS_KEY = "transition_counts"
SOURCE_KEY = "fitted_from"
ESTIMATION_KEY = "estimation"


# --------------------------------------------------------------------------
# counting
# --------------------------------------------------------------------------
def _as_runs(sequences: Iterable[Sequence[int]]) -> list[np.ndarray]:
    return [np.asarray(s, dtype=np.int64).ravel() for s in sequences]


def count_transitions(sequences: Iterable[Sequence[int]], n: int) -> np.ndarray:
    """Count consecutive pairs ``i -> j`` inside each sequence.

    Parameters
    ----------
    sequences : iterable of (m,) int array_like
        State indices in time order, one array per sequence.  No pair is formed
        across two sequences.
    n : int
        Number of states; indices must lie in ``0..n-1``.

    Returns
    -------
    N : (n, n) ndarray of int64
        ``N[i, j]`` = number of steps from ``i`` to ``j``.

    Examples
    --------
    >>> count_transitions([[0, 0, 1], [1, 0]], 2).tolist()
    [[1, 1], [1, 0]]
    """
    runs = [r for r in _as_runs(sequences) if r.size >= 2]
    if not runs:
        return np.zeros((n, n), dtype=np.int64)
    a = np.concatenate([r[:-1] for r in runs])
    b = np.concatenate([r[1:] for r in runs])
    if a.size and (min(a.min(), b.min()) < 0 or max(a.max(), b.max()) >= n):
        raise ValueError(f"state indices must lie in 0..{n - 1}")
    return np.bincount(a * n + b, minlength=n * n).reshape(n, n).astype(np.int64)


# --------------------------------------------------------------------------
# intervals
# --------------------------------------------------------------------------
def _z(level: float) -> float:
    from scipy.stats import norm

    if not 0 < level < 1:
        raise OptionError(f"the confidence level must be between 0 and 1, not {level}")
    return float(norm.ppf(0.5 + level / 2))


def wilson_interval(x: Any, n: Any, *, level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval for a binomial proportion ``x / n`` (vectorised).

    Parameters
    ----------
    x, n : array_like of int
        Successes and trials (broadcast together); ``0 <= x <= n``.
    level : float
        Confidence level (two-sided), default 0.95.

    Returns
    -------
    low, high : ndarray
        ``(p + z^2/2n -+ z sqrt(p(1-p)/n + z^2/4n^2)) / (1 + z^2/n)`` with
        ``z = Phi^-1(1/2 + level/2)``; exactly 0 when ``x = 0`` and 1 when
        ``x = n``; ``(0, 1)`` when ``n = 0`` (nothing observed).

    References
    ----------
    E. B. Wilson (1927), J. Amer. Statist. Assoc. 22:209-212.
    """
    z = _z(level)
    x = np.asarray(x, dtype=float)
    n = np.asarray(n, dtype=float)
    x, n = np.broadcast_arrays(x, n)
    z2 = z * z
    with np.errstate(divide="ignore", invalid="ignore"):
        p = x / n
        denom = 1.0 + z2 / n
        center = (p + z2 / (2 * n)) / denom
        half = z / denom * np.sqrt(p * (1 - p) / n + z2 / (4 * n * n))
        low = np.clip(center - half, 0.0, 1.0)
        high = np.clip(center + half, 0.0, 1.0)
    low = np.where(x == 0, 0.0, low)
    high = np.where(x == n, 1.0, high)
    empty = n == 0
    return np.where(empty, 0.0, low)[()], np.where(empty, 1.0, high)[()]


def wald_interval(x: Any, n: Any, *, level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Wald (normal-approximation) interval ``p -+ z sqrt(p(1-p)/n)``, clipped to [0, 1].

    Given for comparison only: it collapses to a point at ``x = 0`` and
    ``x = n`` and undercovers for small ``n`` (common practice; the Wilson
    interval is the one Longrun reports).  ``(0, 1)`` when ``n = 0``.
    """
    z = _z(level)
    x = np.asarray(x, dtype=float)
    n = np.asarray(n, dtype=float)
    x, n = np.broadcast_arrays(x, n)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = x / n
        half = z * np.sqrt(p * (1 - p) / n)
        low = np.clip(p - half, 0.0, 1.0)
        high = np.clip(p + half, 0.0, 1.0)
    empty = n == 0
    return np.where(empty, 0.0, low)[()], np.where(empty, 1.0, high)[()]


def goodman_intervals(counts: Any, *, level: float = 0.95, categories: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Goodman's simultaneous confidence intervals for multinomial rows.

    For a row with total ``N`` and ``k`` categories, with
    ``A = chi2_{1}^{-1}(1 - (1 - level)/k)`` (Bonferroni over the ``k``
    cells), each count ``x`` gets
    ``(A + 2x -+ sqrt(A (A + 4 x (N - x) / N))) / (2 (N + A))``; all ``k``
    intervals of a row hold together with probability at least ``level``
    (asymptotically).

    Parameters
    ----------
    counts : (m, k) array_like of int
        One multinomial sample per row.
    level : float
        Simultaneous level for each row.
    categories : int, optional
        ``k`` in the Bonferroni factor; default the number of columns.

    Returns
    -------
    low, high : (m, k) ndarray
        ``(0, 1)`` for rows with ``N = 0``.

    References
    ----------
    L. A. Goodman (1965), Technometrics 7:247-254.
    """
    from scipy.stats import chi2

    if not 0 < level < 1:
        raise OptionError(f"the confidence level must be between 0 and 1, not {level}")
    C = np.atleast_2d(np.asarray(counts, dtype=float))
    k = C.shape[1] if categories is None else int(categories)
    A = float(chi2.ppf(1 - (1 - level) / k, 1))
    N = C.sum(axis=1, keepdims=True)
    N_b = np.broadcast_to(N, C.shape)
    with np.errstate(divide="ignore", invalid="ignore"):
        root = np.sqrt(A * (A + 4 * C * (N_b - C) / N_b))
        low = np.clip((A + 2 * C - root) / (2 * (N_b + A)), 0.0, 1.0)
        high = np.clip((A + 2 * C + root) / (2 * (N_b + A)), 0.0, 1.0)
    low = np.where(C == 0, 0.0, low)
    high = np.where(C == N_b, 1.0, high)
    empty = N_b == 0
    return np.where(empty, 0.0, low), np.where(empty, 1.0, high)


# --------------------------------------------------------------------------
# findings and the order test
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class FitFinding:
    """Something the modeller should know about a fit.

    Attributes
    ----------
    code : str
        ``"never-left"``, ``"few-departures"``, ``"unobserved"``,
        ``"prior"``, ``"second-order"``, ``"order-test-small-counts"``,
        ``"order-test-not-possible"``, ``"data"``.
    level : str
        ``"warning"`` (may change conclusions) or ``"note"``.
    message : str
        A plain sentence naming the states concerned.
    states : tuple of str
        State ids concerned (may be empty).
    """

    code: str
    level: str
    message: str
    states: tuple[str, ...] = ()


@dataclass(frozen=True)
class OrderTest:
    """Anderson & Goodman test of "first order" against "second order".

    Under the first-order hypothesis the next state depends on the current
    state only: ``p(k | i, j) = p(k | j)``.  For each middle state ``j`` the
    triples ``i -> j -> k`` form a table of previous state by next state; the
    test is the test of independence in these tables, summed over ``j``.

    Attributes
    ----------
    g2 : float
        Likelihood-ratio statistic ``2 sum n_ijk log(n_ijk n_.j. / (n_ij. n_.jk))``.
    pearson : float
        Pearson statistic ``sum (n_ijk - E_ijk)^2 / E_ijk``, ``E_ijk = n_ij. n_.jk / n_.j.``.
    df : int
        ``sum_j (r_j - 1)(c_j - 1)`` with ``r_j`` the previous states and
        ``c_j`` the next states actually seen around ``j``: transitions never
        observed are treated as structural zeros, not as free parameters
        (``n (n - 1)^2`` when every transition occurs).
    p_value, p_value_pearson : float or None
        Upper chi-square tail; None when ``df = 0``.
    alpha : float
        Level at which :attr:`rejected` is decided (on ``p_value``).
    rejected : bool
    triples : int
        Number of consecutive triples counted.
    small_expected : float or None
        Share of table cells with expected count below 5 (Cochran's rule of
        thumb: above 20% the chi-square approximation is doubtful); None when
        the tables are too large to list.
    """

    g2: float
    pearson: float
    df: int
    p_value: float | None
    p_value_pearson: float | None
    alpha: float
    rejected: bool
    triples: int
    small_expected: float | None = None


def order_test(sequences: Iterable[Sequence[int]], n: int, *, alpha: float = 0.05) -> OrderTest:
    """Test a first-order chain against a second-order one (Anderson & Goodman 1957).

    Parameters
    ----------
    sequences : iterable of (m,) int array_like
        State indices in time order; triples never span two sequences.
    n : int
        Number of states.
    alpha : float
        Level of the test (default 0.05).

    Returns
    -------
    OrderTest

    Notes
    -----
    Anderson & Goodman (1957), section 3.4: the likelihood-ratio and
    chi-square tests of the order of a chain.  Counting degrees of freedom on
    the observed support is common practice for tables with structural zeros;
    zeros inside a table whose margins are positive are taken as sampling zeros.
    """
    from scipy.stats import chi2

    if not 0 < alpha < 1:
        raise OptionError(f"the test level must be between 0 and 1, not {alpha}")
    runs = [r for r in _as_runs(sequences) if r.size >= 3]
    if not runs:
        return OrderTest(0.0, 0.0, 0, None, None, alpha, False, 0, None)
    a = np.concatenate([r[:-2] for r in runs])
    b = np.concatenate([r[1:-1] for r in runs])
    c = np.concatenate([r[2:] for r in runs])
    codes, cnt = np.unique((a * n + b) * n + c, return_counts=True)
    cnt = cnt.astype(float)
    i = codes // (n * n)
    j = (codes // n) % n
    k = codes % n
    n_ij = np.bincount(i * n + j, weights=cnt, minlength=n * n)
    n_jk = np.bincount(j * n + k, weights=cnt, minlength=n * n)
    n_j = np.bincount(j, weights=cnt, minlength=n)
    E = n_ij[i * n + j] * n_jk[j * n + k] / n_j[j]
    g2 = float(2.0 * np.sum(cnt * np.log(cnt / E)))
    g2 = max(g2, 0.0)
    pearson = max(float(np.sum(cnt * cnt / E) - cnt.sum()), 0.0)
    N2 = n_ij.reshape(n, n)  # [i, j]
    M2 = n_jk.reshape(n, n)  # [j, k]
    r = np.count_nonzero(N2 > 0, axis=0)
    cc = np.count_nonzero(M2 > 0, axis=1)
    seen = n_j > 0
    df = int(np.sum((r[seen] - 1) * (cc[seen] - 1)))
    small = None
    cells = int(np.sum(r[seen] * cc[seen]))
    if 0 < cells <= 10_000_000:
        below = 0
        for jj in np.flatnonzero(seen):
            rr = N2[:, jj][N2[:, jj] > 0]
            ck = M2[jj][M2[jj] > 0]
            below += int(np.count_nonzero(np.multiply.outer(rr, ck) / n_j[jj] < 5))
        small = below / cells
    if df == 0:
        return OrderTest(g2, pearson, 0, None, None, alpha, False, int(cnt.sum()), small)
    p = float(chi2.sf(g2, df))
    pp = float(chi2.sf(pearson, df))
    return OrderTest(g2, pearson, df, p, pp, alpha, p < alpha, int(cnt.sum()), small)


# --------------------------------------------------------------------------
# the fit
# --------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Fit:
    """A transition matrix estimated from counts, with its uncertainty.

    Attributes
    ----------
    states, labels : tuple of str
        State ids (matrix order) and display labels.
    counts : (n, n) ndarray of int64
        Transition counts.
    estimate : (n, n) ndarray
        The matrix written to the chain file: the maximum-likelihood estimate,
        or the posterior mean when a prior is given.  Rows of states never left
        are NaN unless a prior fills them.
    mle : (n, n) ndarray
        ``counts / departures`` (NaN rows for states never left).
    prior : float or None
        The symmetric Dirichlet pseudo-count ``alpha``, if one was asked for.
    level : float
        Confidence level of the intervals.
    low, high : (n, n) ndarray
        Wilson score interval of each entry (from the counts alone).
    simultaneous : tuple of two (n, n) ndarrays, or None
        Goodman's simultaneous intervals (each row at ``level``), if asked for.
    posterior : tuple of two (n, n) ndarrays, or None
        Equal-tailed credible interval of each entry under the prior
        (``Beta(N_ij + alpha, N_i - N_ij + (n - 1) alpha)`` marginals), when a prior is given.
    findings : tuple of FitFinding
    order_test : OrderTest or None
        None when fitted from counts alone.
    source : dict or None
        The data-source record (:meth:`core.datafile.Observations.to_json`).
    min_departures : int
    notes : tuple of str
        How the data were read.
    """

    states: tuple[str, ...]
    labels: tuple[str, ...]
    counts: np.ndarray
    estimate: np.ndarray
    mle: np.ndarray
    prior: float | None
    level: float
    low: np.ndarray
    high: np.ndarray
    simultaneous: tuple[np.ndarray, np.ndarray] | None = None
    posterior: tuple[np.ndarray, np.ndarray] | None = None
    findings: tuple[FitFinding, ...] = ()
    order_test: OrderTest | None = None
    source: dict | None = None
    min_departures: int = DEFAULT_MIN_DEPARTURES
    notes: tuple[str, ...] = ()

    @property
    def n(self) -> int:
        return len(self.states)

    @property
    def departures(self) -> np.ndarray:
        """``(n,)`` number of observed steps out of each state."""
        return self.counts.sum(axis=1)

    @property
    def n_transitions(self) -> int:
        return int(self.counts.sum())

    @property
    def complete(self) -> bool:
        """Every row has an estimate (no state left unestimated)."""
        return bool(np.all(np.isfinite(self.estimate)))

    @property
    def method(self) -> str:
        if self.prior is None:
            return "maximum likelihood (Anderson & Goodman 1957)"
        return f"posterior mean under a symmetric Dirichlet prior, alpha = {self.prior:g} per entry"

    def to_chain(self, *, name: str = "", description: str = ""):
        """The fitted :class:`~core.model.Chain` (see :func:`fit_to_chain`)."""
        return fit_to_chain(self, name=name, description=description)

    def to_json(self) -> dict:
        return {
            "states": list(self.states),
            "labels": list(self.labels),
            "method": self.method,
            "prior_alpha": self.prior,
            "level": self.level,
            "transitions": self.n_transitions,
            "departures": self.departures,
            "counts": self.counts,
            "estimate": self.estimate,
            "mle": self.mle,
            "intervals": {"method": "Wilson score", "low": self.low, "high": self.high},
            "simultaneous": None
            if self.simultaneous is None
            else {"method": "Goodman (1965), per row", "low": self.simultaneous[0], "high": self.simultaneous[1]},
            "posterior": None
            if self.posterior is None
            else {"method": "Dirichlet posterior, equal-tailed", "low": self.posterior[0], "high": self.posterior[1]},
            "min_departures": self.min_departures,
            "findings": list(self.findings),
            "order_test": self.order_test,
            "source": self.source,
            "notes": list(self.notes),
        }


def _check_prior(prior: float | None) -> float | None:
    if prior is None:
        return None
    p = float(prior)
    if not math.isfinite(p) or p <= 0:
        raise OptionError(f"--prior: the pseudo-count alpha must be a positive number, not {prior}")
    return p


def fit_counts(
    counts: Any,
    *,
    states: Sequence[str] | None = None,
    labels: Sequence[str] | None = None,
    prior: float | None = None,
    level: float = 0.95,
    simultaneous: bool = False,
    min_departures: int = DEFAULT_MIN_DEPARTURES,
) -> Fit:
    """Estimate a transition matrix from counts.

    Parameters
    ----------
    counts : (n, n) array_like of int
        ``counts[i, j]`` = observed steps ``i -> j``.
    states, labels : sequence of str, optional
        Ids (default ``s0, s1, ...``) and display labels (default the ids).
    prior : float, optional
        Symmetric Dirichlet pseudo-count added to every entry; the estimate is
        then the posterior mean.  None (default): maximum likelihood.
    level : float
        Confidence level of the intervals (default 0.95).
    simultaneous : bool
        Also compute Goodman's simultaneous row intervals.
    min_departures : int
        States left fewer times are reported (default 20).

    Returns
    -------
    Fit

    Examples
    --------
    >>> f = fit_counts([[5, 6], [5, 5]], states=["A", "B"])
    >>> f.estimate[0].tolist()
    [0.45454545454545453, 0.5454545454545454]
    """
    C = np.asarray(counts)
    if C.ndim != 2 or C.shape[0] != C.shape[1] or C.shape[0] == 0:
        raise ValueError(f"counts must be a square (n, n) array, got shape {C.shape}")
    if not np.all(np.isfinite(C)) or np.any(C < 0) or np.any(C != np.round(C)):
        raise ValueError("counts must be non-negative whole numbers")
    C = C.astype(np.int64)
    n = C.shape[0]
    ids = tuple(f"s{i}" for i in range(n)) if states is None else tuple(str(s) for s in states)
    if len(ids) != n:
        raise ValueError(f"{len(ids)} state ids for {n} states")
    labs = ids if labels is None else tuple(str(s) for s in labels)
    alpha = _check_prior(prior)
    if int(min_departures) < 1:
        raise OptionError(f"--min-departures must be at least 1, not {min_departures}")
    dep = C.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        mle = C / dep[:, None]
    mle[dep == 0] = np.nan
    if alpha is None:
        est = mle.copy()
    else:
        est = (C + alpha) / (dep[:, None] + n * alpha)
    low, high = wilson_interval(C, dep[:, None], level=level)
    sim = goodman_intervals(C, level=level) if simultaneous else None
    post = None
    if alpha is not None:
        from scipy.stats import beta

        a = C + alpha
        b = dep[:, None] - C + (n - 1) * alpha
        tail = (1 - level) / 2
        post = (beta.ppf(tail, a, b), beta.ppf(1 - tail, a, b))
    findings = _sparse_findings(ids, C, low, high, est, alpha, int(min_departures), level)
    return Fit(
        states=ids,
        labels=labs,
        counts=C,
        estimate=est,
        mle=mle,
        prior=alpha,
        level=float(level),
        low=low,
        high=high,
        simultaneous=sim,
        posterior=post,
        findings=tuple(findings),
        min_departures=int(min_departures),
    )


def _names(ids: Sequence[str], idx: Iterable[int], limit: int = 8) -> str:
    idx = list(idx)
    shown = ", ".join(repr(ids[i]) for i in idx[:limit])
    return shown + (f" and {len(idx) - limit} more" if len(idx) > limit else "")


def _sparse_findings(ids, C, low, high, est, alpha, min_dep, level) -> list[FitFinding]:
    out: list[FitFinding] = []
    n = len(ids)
    dep = C.sum(axis=1)
    pct = f"{level * 100:g}%"
    if alpha is not None:
        out.append(
            FitFinding(
                "prior",
                "note",
                f"a pseudo-count alpha = {alpha:g} (symmetric Dirichlet prior) was added to each of the {n} "
                "entries of every row: the matrix holds posterior means, not maximum-likelihood estimates, "
                "and no transition is exactly impossible",
            )
        )
    for i in range(n):
        sid = ids[i]
        if dep[i] == 0:
            tail = (
                f"its row is the prior alone (1/{n} for every state)"
                if alpha is not None
                else "its row cannot be estimated: give a pseudo-count (--prior) or write the row by hand"
            )
            out.append(
                FitFinding(
                    "never-left",
                    "warning",
                    f"state {sid!r} is never seen leaving (0 departures): {tail}",
                    (sid,),
                )
            )
            continue
        if dep[i] < min_dep:
            widest = int(np.argmax(high[i] - low[i]))
            out.append(
                FitFinding(
                    "few-departures",
                    "warning",
                    f"state {sid!r} is left only {int(dep[i])} time{'s' if dep[i] != 1 else ''} (fewer than "
                    f"{min_dep}): its probabilities are poorly determined (the {pct} interval of "
                    f"{sid!r} -> {ids[widest]!r} runs from {low[i, widest]:.3g} to {high[i, widest]:.3g})",
                    (sid,),
                )
            )
        zeros = np.flatnonzero(C[i] == 0)
        if zeros.size:
            up = float(high[i, zeros[0]])  # same for every zero count in the row
            after = (
                f"; with the prior each gets {float(est[i, zeros[0]]):.3g}"
                if alpha is not None
                else "; the fitted chain gives them probability 0 unless a pseudo-count is used (--prior)"
            )
            many = zeros.size != 1
            out.append(
                FitFinding(
                    "unobserved",
                    "note",
                    f"state {sid!r}: {zeros.size} transition{'s' if many else ''} never observed in "
                    f"{int(dep[i])} departure{'s' if dep[i] != 1 else ''} (to {_names(ids, zeros)}); "
                    "not seeing a transition does not "
                    f"prove it impossible: {'each' if many else 'it'} could have a probability up to "
                    f"{up:.3g} (upper end of the {pct} Wilson interval){after}",
                    (sid, *(ids[z] for z in zeros)),
                )
            )
    return out


def _order_findings(test: OrderTest) -> list[FitFinding]:
    out = []
    if test.df == 0:
        out.append(
            FitFinding(
                "order-test-not-possible",
                "note",
                "the first-order assumption could not be tested: the data hold no state with two different "
                "predecessors and two different successors (too few triples of consecutive observations)",
            )
        )
        return out
    if test.rejected:
        out.append(
            FitFinding(
                "second-order",
                "warning",
                f"the data do not look first order: the next state depends on the previous state as well as the "
                f"current one (Anderson-Goodman likelihood-ratio test, G2 = {test.g2:.4g}, df = {test.df}, "
                f"p = {test.p_value:.3g} < {test.alpha:g}); a chain on these states may misstate how long "
                "runs last; consider states that remember the previous step",
            )
        )
    if test.small_expected is not None and test.small_expected > 0.2:
        out.append(
            FitFinding(
                "order-test-small-counts",
                "note",
                f"{test.small_expected * 100:.0f}% of the order test's expected counts are below 5: its "
                "chi-square p-value is only a rough guide (more data would make it reliable)",
            )
        )
    return out


def fit_observations(
    obs,
    *,
    prior: float | None = None,
    level: float = 0.95,
    simultaneous: bool = False,
    min_departures: int = DEFAULT_MIN_DEPARTURES,
    order_alpha: float = 0.05,
) -> Fit:
    """Count the transitions of :class:`~core.datafile.Observations` and fit them.

    Same options as :func:`fit_counts`, plus ``order_alpha``, the level of the
    first- against second-order test (its rejection is a warning finding).
    The data source and the notes on how the data were read are attached.
    """
    from dataclasses import replace

    C = count_transitions(obs.sequences, obs.n)
    f = fit_counts(
        C,
        states=obs.states,
        labels=obs.labels,
        prior=prior,
        level=level,
        simultaneous=simultaneous,
        min_departures=min_departures,
    )
    test = order_test(obs.sequences, obs.n, alpha=order_alpha)
    notes = obs.notes()
    data_findings = [FitFinding("data", "note", s[0].lower() + s[1:].rstrip(".")) for s in notes]
    return replace(
        f,
        order_test=test,
        findings=f.findings + tuple(_order_findings(test)) + tuple(data_findings),
        source=obs.to_json(),
        notes=notes,
    )


# --------------------------------------------------------------------------
# chain files
# --------------------------------------------------------------------------
def _entry_text(value: Fraction) -> Any:
    if value.denominator == 1:
        return int(value)
    return f"{value.numerator}/{value.denominator}"


def fit_to_chain(fit: Fit, *, name: str = "", description: str = ""):
    """Build the chain file content of a fit.

    Entries are written exactly: ``"5/11"`` for a maximum-likelihood entry,
    the exact posterior mean when the prior is a short decimal, otherwise
    full-precision floats with the largest entry of the row as ``"rest"``.
    Transitions of probability 0 are left out.  States never left (without a
    prior) get no transitions, so the chain is saved but flagged invalid until
    their rows are written.  The counts, the data source and the method are
    recorded in the top-level keys ``transition_counts``, ``fitted_from`` and
    ``estimation``.
    """
    from . import __version__
    from .model import Chain, State, Transition

    n = fit.n
    C = fit.counts
    dep = fit.departures
    alpha = None if fit.prior is None else Fraction(repr(fit.prior))
    trans: list[Transition] = []
    for i in range(n):
        if dep[i] == 0 and alpha is None:
            continue
        if alpha is None:
            exact = [Fraction(int(C[i, j]), int(dep[i])) for j in range(n)]
        else:
            den = int(dep[i]) + n * alpha
            exact = [(int(C[i, j]) + alpha) / den for j in range(n)]
        if all(v.denominator <= 10**12 for v in exact):
            vals: list[Any] = [_entry_text(v) for v in exact]
        else:
            big = max(range(n), key=lambda j: exact[j])
            vals = [float(v) for v in exact]
            vals[big] = "rest"
        for j in range(n):
            if exact[j] != 0:
                trans.append(Transition(fit.states[i], fit.states[j], vals[j]))
    states = tuple(State(s, label=(lab if lab != s else None)) for s, lab in zip(fit.states, fit.labels))
    src = fit.source or {}
    if not name:
        name = f"Fitted from {src['file']}" if src.get("file") else "Fitted chain"
    if not description:
        where = f" in {src['file']}" if src.get("file") else ""
        description = (
            f"Estimated from {fit.n_transitions} observed transitions{where} by {fit.method}. "
            "The counts are kept under 'transition_counts'; the estimates describe the data, "
            "not necessarily the system that produced them."
        )
    extra = {
        COUNTS_KEY: {"states": list(fit.states), "matrix": C.tolist()},
        SOURCE_KEY: fit.source,
        ESTIMATION_KEY: {
            "method": fit.method,
            "prior_alpha": fit.prior,
            "level": fit.level,
            "min_departures": fit.min_departures,
            "longrun_version": __version__,
        },
    }
    return Chain(states=states, transitions=tuple(trans), name=name, description=description, extra=extra)


def fit_from_chain(chain, *, level: float = 0.95, simultaneous: bool = False) -> Fit | None:
    """Rebuild the :class:`Fit` recorded in a fitted chain file.

    Returns None when the chain holds no counts, when they do not match its
    states, or when its matrix no longer equals the estimate from its counts
    (the chain was edited after fitting, so the intervals would not describe it).
    """
    rec = chain.extra.get(COUNTS_KEY)
    if not isinstance(rec, dict):
        return None
    ids = rec.get("states")
    mat = rec.get("matrix")
    if list(ids or []) != list(chain.ids):
        return None
    try:
        C = np.asarray(mat, dtype=float)
    except (TypeError, ValueError):
        return None
    n = chain.n
    if C.shape != (n, n) or not np.all(np.isfinite(C)) or np.any(C < 0) or np.any(C != np.round(C)):
        return None
    est_rec = chain.extra.get(ESTIMATION_KEY) or {}
    prior = est_rec.get("prior_alpha") if isinstance(est_rec, dict) else None
    try:
        fit = fit_counts(
            C.astype(np.int64),
            states=chain.ids,
            labels=[s.display_name for s in chain.states],
            prior=prior,
            level=level,
            simultaneous=simultaneous,
            min_departures=int(est_rec.get("min_departures", DEFAULT_MIN_DEPARTURES)) if isinstance(est_rec, dict) else DEFAULT_MIN_DEPARTURES,
        )
    except (OptionError, ValueError, TypeError):
        return None
    if not chain.is_valid or not fit.complete:
        return None
    if not np.allclose(chain.matrix(), fit.estimate, rtol=0, atol=1e-12):
        return None
    src = chain.extra.get(SOURCE_KEY)
    from dataclasses import replace

    return replace(fit, source=src if isinstance(src, dict) else None)


# --------------------------------------------------------------------------
# uncertainty of derived answers
# --------------------------------------------------------------------------
def sample_matrices(
    counts: Any,
    draws: int,
    *,
    method: str = "posterior",
    prior: float = 0.0,
    estimate: Any = None,
    rng: np.random.Generator | int | None = None,
) -> np.ndarray:
    """Draw transition matrices that the counts make plausible (vectorised).

    Parameters
    ----------
    counts : (n, n) array_like of int
    draws : int
    method : {"posterior", "bootstrap"}
        ``"posterior"``: each row independently from
        ``Dirichlet(counts[i] + prior)``; with ``prior = 0`` only observed
        transitions get weight (the posterior mean is then the maximum-likelihood
        estimate).  ``"bootstrap"``: parametric bootstrap, each row's counts
        redrawn from ``Multinomial(N_i, estimate[i])`` and divided by ``N_i``;
        rows never left keep ``estimate[i]``.
    prior : float
        Symmetric Dirichlet pseudo-count (``"posterior"`` only).
    estimate : (n, n) array_like, optional
        The matrix resampled by the bootstrap (default ``counts / N_i``).
    rng : numpy Generator or seed

    Returns
    -------
    (draws, n, n) ndarray
        Row-stochastic matrices.

    Notes
    -----
    Gamma variates are drawn in log space (``log X + log(U) / a`` with
    ``X ~ Gamma(a + 1)``, an exact identity) so that tiny shapes such as
    ``alpha = 0.01`` on an unobserved entry do not underflow to a zero row.
    """
    rng = np.random.default_rng(rng)
    C = np.asarray(counts, dtype=float)
    n = C.shape[0]
    draws = int(draws)
    dep = C.sum(axis=1)
    if method == "posterior":
        a = C + float(prior)
        if np.any(a.sum(axis=1) <= 0):
            raise OptionError(
                "the posterior of a state never left is undefined without a prior; give a pseudo-count (--prior)"
            )
        shape = (draws, n, n)
        A = np.broadcast_to(a, shape)
        pos = A > 0
        x = rng.gamma(A + 1.0, size=shape)
        u = 1.0 - rng.random(shape)
        with np.errstate(divide="ignore"):
            logg = np.where(pos, np.log(x) + np.log(u) / np.where(pos, A, 1.0), -np.inf)
        logg -= logg.max(axis=2, keepdims=True)
        w = np.exp(logg)
        return w / w.sum(axis=2, keepdims=True)
    if method == "bootstrap":
        if estimate is None:
            with np.errstate(divide="ignore", invalid="ignore"):
                estimate = C / dep[:, None]
        E = np.asarray(estimate, dtype=float)
        if not np.all(np.isfinite(E)):
            raise OptionError("the bootstrap needs an estimate for every row (a state is never left)")
        E = E / E.sum(axis=1, keepdims=True)
        Ni = dep.astype(np.int64)
        X = rng.multinomial(Ni, E, size=(draws, n)).astype(float)
        with np.errstate(divide="ignore", invalid="ignore"):
            out = X / Ni[None, :, None]
        empty = Ni == 0
        if empty.any():
            out[:, empty, :] = E[empty]
        return out
    raise OptionError(f"unknown sampling method {method!r} (use 'posterior' or 'bootstrap')")


@dataclass(frozen=True)
class Progress:
    """A progress snapshot of a long computation."""

    done: int
    total: int
    message: str = ""


@dataclass(frozen=True)
class DerivedInterval:
    """One derived answer with its interval over the drawn matrices.

    Attributes
    ----------
    quantity : str
        ``"stationary"`` (long-run share of ``state`` in its closed class),
        ``"expected_steps"`` (from transient ``state`` until a closed class is
        entered), ``"absorption"`` (probability that transient ``state`` ends in
        closed class ``target``), ``"mixing_time"`` (whole chain, steps).
    state : str or None
    target : str or None
        The closed class, named by its state ids joined with ``+``.
    point : float or None
        Value for the fitted matrix itself.
    low, high : float or None
        Equal-tailed percentile interval over the draws where it is defined.
    draws : int
        Draws in which the value was defined.
    """

    quantity: str
    state: str | None
    target: str | None
    point: float | None
    low: float | None
    high: float | None
    draws: int


@dataclass(frozen=True)
class DerivedUncertainty:
    """Intervals for derived answers, with how they were obtained.

    Attributes
    ----------
    method : str
        ``"posterior"`` or ``"bootstrap"``.
    prior : float
        Dirichlet pseudo-count used by the posterior (0: observed transitions only).
    draws : int
        Matrices drawn.
    seed : int or None
    level : float
    epsilon : float
        Total-variation threshold of the mixing time.
    used : int
        Draws whose class structure (closed classes) equals the fitted
        chain's; only those enter the intervals.
    values : tuple of DerivedInterval
    notes : tuple of str
    """

    method: str
    prior: float
    draws: int
    seed: int | None
    level: float
    epsilon: float
    used: int
    values: tuple[DerivedInterval, ...]
    notes: tuple[str, ...] = ()

    def describe(self) -> str:
        if self.method == "posterior":
            how = (
                f"the row-wise Dirichlet posterior (prior alpha = {self.prior:g}"
                + ("; transitions never observed stay impossible in every draw)" if self.prior == 0 else ")")
            )
        else:
            how = "a parametric bootstrap (each row's counts redrawn from the fitted probabilities)"
        return (
            f"{self.draws} matrices drawn from {how}, seed {self.seed}; {self.level * 100:g}% percentile "
            f"intervals over the {self.used} draws with the fitted chain's class structure"
        )

    def of(self, quantity: str) -> tuple[DerivedInterval, ...]:
        return tuple(v for v in self.values if v.quantity == quantity)

    def to_json(self) -> dict:
        return {
            "method": self.method,
            "prior_alpha": self.prior,
            "draws": self.draws,
            "seed": self.seed,
            "level": self.level,
            "epsilon": self.epsilon,
            "used": self.used,
            "description": self.describe(),
            "values": list(self.values),
            "notes": list(self.notes),
        }


def _closed_signature(structure) -> tuple[tuple[int, ...], ...]:
    return tuple(structure.classes[c].states for c in structure.closed)


def _has_mixing_time(structure) -> bool:
    """One closed class, aperiodic: ``d(t)`` tends to 0 (transient states allowed)."""
    return bool(len(structure.closed) == 1 and structure.classes[structure.closed[0]].period == 1)


def iter_derived_uncertainty(
    fit: Fit,
    *,
    draws: int = DEFAULT_DRAWS,
    seed: int | None = 0,
    method: str | None = None,
    prior: float | None = None,
    level: float | None = None,
    epsilon: float = 0.25,
    quantities: Iterable[str] | None = None,
    chunk: int = 100,
) -> Generator[Progress, None, DerivedUncertainty]:
    """Intervals for the stationary law, mixing time and absorption of a fitted chain.

    A generator: it yields :class:`Progress` after every ``chunk`` draws (so a
    caller can cancel) and returns the :class:`DerivedUncertainty`.

    Parameters
    ----------
    fit : Fit
        Must have an estimate for every row.
    draws : int
        Matrices drawn (at least 2).
    seed : int or None
        Seed of ``numpy.random.default_rng``; the default 0 makes runs repeatable.
    method : {"posterior", "bootstrap"}, optional
        Default ``"posterior"`` with the fit's prior (0 when it has none).
    prior : float, optional
        Override the pseudo-count of the posterior draws.
    level : float, optional
        Interval level (default the fit's).
    epsilon : float
        Mixing-time threshold on the worst-start total-variation distance.
    quantities : iterable of str, optional
        Any of ``"stationary"``, ``"absorption"`` (expected steps and
        probabilities) and ``"mixing_time"``; default all three.
    chunk : int
        Draws per progress snapshot.

    Notes
    -----
    Each drawn matrix is analysed exactly (:func:`core.structure.classify`,
    :func:`core.stationary.stationary_laws`, :func:`core.passage.absorption`,
    :func:`core.evolution.mixing`, the function behind ``mixing_time``); the
    class structure is computed once per support pattern.  A draw whose closed
    classes differ from the fitted chain's (possible with the bootstrap, which
    can lose a rare transition) is left out and counted; the mixing time is given only when the
    fitted chain has a single closed class and it is aperiodic, and left out for
    draws where it is not defined.
    """
    from .errors import LimitError
    from .evolution import mixing
    from .passage import absorption
    from .stationary import stationary_laws
    from .structure import classify

    structures: dict[bytes, Any] = {}

    def structure_of(P: np.ndarray):
        # the class structure depends only on which entries are positive: classify each
        # support pattern once (posterior draws all share one pattern)
        key = np.packbits(P > 0).tobytes()
        S = structures.get(key)
        if S is None:
            S = structures[key] = classify(P)
        return S

    def mix(P: np.ndarray, S, pi: np.ndarray) -> float | None:
        try:
            m = mixing(P, epsilon, pi=pi, structure=S)
        except LimitError:
            return None
        return None if m.steps is None else float(m.steps)

    if not fit.complete:
        bad = [fit.states[i] for i in np.flatnonzero(~np.all(np.isfinite(fit.estimate), axis=1))]
        raise OptionError(
            f"no uncertainty for derived answers: {_names(bad, range(len(bad)))} "
            f"{'is' if len(bad) == 1 else 'are'} never left in the data; give a pseudo-count (--prior)"
        )
    draws = int(draws)
    if draws < 2:
        raise OptionError(f"--draws must be at least 2 to give an interval, not {draws}")
    method = method or "posterior"
    if method not in ("posterior", "bootstrap"):
        raise OptionError(f"unknown sampling method {method!r} (use 'posterior' or 'bootstrap')")
    alpha = float(fit.prior or 0.0) if prior is None else float(prior)
    if alpha < 0 or not math.isfinite(alpha):
        raise OptionError(f"the pseudo-count must be 0 or more, not {prior}")
    wanted = {"stationary", "absorption", "mixing_time"} if quantities is None else set(quantities)
    unknown = wanted - {"stationary", "absorption", "mixing_time"}
    if unknown:
        raise OptionError(
            f"unknown derived quantity {sorted(unknown)[0]!r} (use 'stationary', 'absorption', 'mixing_time')"
        )
    level = fit.level if level is None else float(level)
    if not 0 < level < 1:
        raise OptionError(f"the confidence level must be between 0 and 1, not {level}")
    rng = np.random.default_rng(seed)
    n = fit.n
    P0 = fit.estimate
    S0 = structure_of(P0)
    sig0 = _closed_signature(S0)
    laws0 = stationary_laws(P0, S0)
    pi0 = np.sum(laws0, axis=0)
    transient = [s for c in S0.transient for s in S0.classes[c].states] if "absorption" in wanted else []
    closed_names = ["+".join(fit.states[s] for s in S0.classes[c].states) for c in S0.closed]
    A0 = absorption(P0, S0) if transient else None
    has_mix = "mixing_time" in wanted and _has_mixing_time(S0)
    m0 = mix(P0, S0, pi0) if has_mix else None

    pis = []
    steps = []
    probs = []
    mixes = []
    used = 0
    per = max(1, min(int(chunk), max(1, 2_000_000 // max(n * n, 1))))
    done = 0
    while done < draws:
        m = min(per, draws - done)
        Ps = sample_matrices(
            fit.counts, m, method=method, prior=alpha, estimate=P0, rng=rng
        )
        for P in Ps:
            S = structure_of(P)
            if _closed_signature(S) != sig0:
                continue
            used += 1
            pis.append(np.sum(stationary_laws(P, S), axis=0))
            if transient:
                A = absorption(P, S)
                steps.append(A.expected_steps[transient])
                probs.append(A.probabilities[transient])
            if has_mix:
                t = mix(P, S, pis[-1]) if _has_mixing_time(S) else None
                mixes.append(np.nan if t is None else t)
        done += m
        yield Progress(done, draws, f"{done} of {draws} matrices analysed")

    tail = (1 - level) / 2
    values: list[DerivedInterval] = []

    def interval(samples: np.ndarray, discrete: bool = False):
        ok = samples[np.isfinite(samples)]
        if ok.size == 0:
            return None, None, 0
        how = "inverted_cdf" if discrete else "linear"
        lo, hi = np.quantile(ok, [tail, 1 - tail], method=how)
        return float(lo), float(hi), int(ok.size)

    if used:
        Pi = np.array(pis)
        for c in S0.closed if "stationary" in wanted else ():
            for s in S0.classes[c].states:
                lo, hi, k = interval(Pi[:, s])
                values.append(DerivedInterval("stationary", fit.states[s], None, float(pi0[s]), lo, hi, k))
        if transient:
            St = np.array(steps)
            Pr = np.array(probs)
            for t_i, s in enumerate(transient):
                lo, hi, k = interval(St[:, t_i])
                values.append(
                    DerivedInterval("expected_steps", fit.states[s], None, float(A0.expected_steps[s]), lo, hi, k)
                )
            if len(sig0) > 1:
                for t_i, s in enumerate(transient):
                    for c_i, name in enumerate(closed_names):
                        lo, hi, k = interval(Pr[:, t_i, c_i])
                        values.append(
                            DerivedInterval(
                                "absorption", fit.states[s], name, float(A0.probabilities[s, c_i]), lo, hi, k
                            )
                        )
        if has_mix:
            lo, hi, k = interval(np.array(mixes), discrete=True)
            values.append(
                DerivedInterval("mixing_time", None, None, None if m0 is None else float(m0), lo, hi, k)
            )
    notes = []
    if used < draws:
        notes.append(
            f"{draws - used} of {draws} drawn matrices had other closed classes than the fitted chain "
            "(a rare transition lost or gained) and were left out"
        )
    if "mixing_time" in wanted and not has_mix:
        notes.append(
            "no mixing time: the fitted chain has several closed classes or a periodic one, so the distance "
            "to a single stationary law need not shrink"
        )
    mt = [v for v in values if v.quantity == "mixing_time"]
    if mt and mt[0].draws < used:
        notes.append(
            f"the mixing time was not defined in {used - mt[0].draws} of the {used} draws used "
            "(periodic or beyond the computable range) and is left out there"
        )
    return DerivedUncertainty(
        method=method,
        prior=alpha,
        draws=draws,
        seed=seed,
        level=level,
        epsilon=float(epsilon),
        used=used,
        values=tuple(values),
        notes=tuple(notes),
    )


def derived_uncertainty(fit: Fit, **options: Any) -> DerivedUncertainty:
    """Run :func:`iter_derived_uncertainty` to the end and return its result."""
    gen = iter_derived_uncertainty(fit, **options)
    while True:
        try:
            next(gen)
        except StopIteration as stop:
            return stop.value
