"""Convergence diagnostics and Monte Carlo errors: R-hat, ESS, MCSE, chi-square fit.

Two families of functions:

* On stored draws, an ``(M, N)`` array (``M`` chains of ``N`` draws): the
  diagnostics of Vehtari et al. (2021) exactly as published and as implemented
  by the reference implementations (Stan, ArviZ): :func:`rhat` (the basic
  Gelman-Rubin/BDA3 formula), :func:`split_rhat`, :func:`rank_rhat` (split,
  rank-normalised, bulk and folded), :func:`ess_mean`, :func:`ess_bulk`,
  :func:`ess_tail` (Geyer's initial monotone sequence), :func:`mcse_mean`.
* On *counts*, for the indicator of each state, which is all a replicate
  simulation keeps (no ``R x T`` storage): :func:`indicator_rhat` and
  :func:`indicator_rank_rhat` from per-chain counts, and the Monte Carlo
  standard error and effective sample size of a pooled time average from
  independent replicates (:func:`replicate_mcse`) or batch means
  (:func:`batch_means_mcse`).

Indicators from counts
----------------------
For a 0/1 series of length ``h`` with ``c`` ones, the mean is ``c/h`` and the
ddof-1 variance is ``c (h - c) / (h (h - 1))``, so split-R-hat needs only the
count of each half-chain.  Rank normalisation needs only counts too: with
``Z`` zeros and ``O`` ones among the ``S`` pooled draws, the average ranks are
``(Z + 1)/2`` for every 0 and ``Z + (O + 1)/2`` for every 1, so the normal
scores take two values ``z0 < z1`` and each chain's mean and variance follow
from its count.  Because R-hat is invariant under ``x -> a + b x`` (``b != 0``),
the rank-normalised R-hat of an indicator that is not constant equals its
split-R-hat; the folded draws ``|x - median|`` are ``x``, ``1 - x`` or a
constant (median 1/2), so the folded R-hat equals it too or is undefined.  The
count formulas are checked against the array functions in the tests.

Undefined cases, stated rather than hidden: when an indicator is constant over
all pooled draws (a state never or always occupied), ``W = B = 0`` and R-hat
is undefined (``nan``, JSON ``null``); when every chain is constant but chains
differ (each replicate stuck in its own trap), ``W = 0 < B`` and R-hat is
``inf``.  :func:`rhat_note` words both.

References
----------
A. Vehtari, A. Gelman, D. Simpson, B. Carpenter & P.-C. Buerkner,
"Rank-normalization, folding, and localization: an improved R-hat for
assessing convergence of MCMC", *Bayesian Analysis* 16(2):667-718 (2021),
doi:10.1214/20-BA1221 (formulas seen in the authors' source).
A. Gelman & D.B. Rubin, "Inference from iterative simulation using multiple
sequences", *Statistical Science* 7(4):457-472 (1992).
C.J. Geyer, "Practical Markov chain Monte Carlo", *Statistical Science*
7(4):473-483 (1992) [memory for volume and pages].
J.M. Flegal & G.L. Jones, "Batch means and spectral variance estimators in
Markov chain Monte Carlo", *Annals of Statistics* 38(2):1034-1070 (2010)
[memory].
A.M. Law, *Simulation Modeling and Analysis*, 5th ed. (McGraw-Hill 2015),
ch. 9, the replication/deletion approach [memory].
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "BLOM_OFFSET",
    "split_chains",
    "rhat",
    "split_rhat",
    "rank_normalize",
    "RankRhat",
    "rank_rhat",
    "autocovariance",
    "ess_mean",
    "ess_bulk",
    "ess_tail",
    "mcse_mean",
    "indicator_rhat",
    "indicator_rank_rhat",
    "rhat_note",
    "MCSE",
    "replicate_mcse",
    "batch_means_mcse",
    "GOF",
    "chisquare_gof",
]

#: ``S + 1/4`` in the rank normalisation ``(r - 3/8) / (S + 1/4)`` (Blom 1958).
#: The published eq. (14) prints ``S - 1/4``; Blom's constant is ``+1/4``,
#: which is what the reference implementations use.
BLOM_OFFSET = 0.25


def _draws(x) -> np.ndarray:
    a = np.asarray(x, dtype=np.float64)
    if a.ndim == 1:
        a = a[None, :]
    if a.ndim != 2:
        raise ValueError(f"draws must be an (M, N) array of M chains, not shape {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ValueError("draws must be finite numbers")
    return a


def split_chains(x) -> np.ndarray:
    """Split each chain into its first and last ``N // 2`` draws: ``(2M, N // 2)``.

    With an odd ``N`` the middle draw is dropped (the Stan and ArviZ convention).
    """
    a = _draws(x)
    half = a.shape[1] // 2
    return np.concatenate([a[:, :half], a[:, a.shape[1] - half:]], axis=0)


def _rhat_from_moments(means: np.ndarray, variances: np.ndarray, N: int) -> np.ndarray:
    """R-hat from per-chain means and ddof-1 variances, ``(M, ...)`` arrays, N draws each."""
    M = means.shape[0]
    B = N * np.var(means, axis=0, ddof=1)
    W = variances.mean(axis=0)
    var_plus = (N - 1) / N * W + B / N
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.sqrt(var_plus / W)
    out = np.where((W == 0) & (B > 0), np.inf, out)
    out = np.where((W == 0) & (B == 0), np.nan, out)
    return out if M > 1 else np.full_like(out, np.nan)


def rhat(x) -> float:
    """The basic R-hat of ``M >= 2`` chains (Gelman et al., BDA3 form).

    ``B = N/(M-1) sum_m (mean_m - mean)^2``, ``W = mean_m s_m^2`` (ddof 1),
    ``var+ = (N-1)/N W + B/N``, ``R-hat = sqrt(var+ / W)``.

    Returns ``nan`` when all draws are equal and ``inf`` when every chain is
    constant but chains differ.

    Examples
    --------
    >>> round(rhat([[1, 2, 3, 4, 5], [3, 4, 5, 6, 7]]), 12)  # sqrt(8/5)
    1.264911064067
    """
    a = _draws(x)
    M, N = a.shape
    if M < 2 or N < 2:
        raise ValueError(f"R-hat needs at least 2 chains of at least 2 draws, not {M} x {N}")
    return float(_rhat_from_moments(a.mean(axis=1), a.var(axis=1, ddof=1), N))


def split_rhat(x) -> float:
    """R-hat of the chains split in halves (Vehtari et al. 2021, section 3.1)."""
    a = _draws(x)
    if a.shape[1] < 4:
        raise ValueError(f"split R-hat needs at least 4 draws per chain, not {a.shape[1]}")
    return rhat(split_chains(a))


def rank_normalize(x, *, offset: float = BLOM_OFFSET) -> np.ndarray:
    """Normal scores of the pooled average ranks: ``Phi^-1((r - 3/8) / (S + offset))``.

    Parameters
    ----------
    x : (M, N) array_like
    offset : float, optional
        ``1/4`` (Blom; default).  ``-1/4`` reproduces the literal print of the
        published eq. (14), for comparison only.
    """
    from scipy.special import ndtri
    from scipy.stats import rankdata

    a = _draws(x)
    S = a.size
    r = rankdata(a, method="average").reshape(a.shape)
    return ndtri((r - 0.375) / (S + offset))


@dataclass(frozen=True)
class RankRhat:
    """Rank-normalised split R-hat: ``bulk``, ``folded`` (tail) and ``rhat = max`` of both."""

    bulk: float
    folded: float
    rhat: float


def _nanmax2(a: float, b: float) -> float:
    if np.isnan(a):
        return b
    if np.isnan(b):
        return a
    return max(a, b)


def rank_rhat(x, *, offset: float = BLOM_OFFSET) -> RankRhat:
    """Rank-normalised split R-hat of Vehtari et al. (2021), eq. (14)-(15).

    ``bulk``: split R-hat of the rank-normalised draws; ``folded``: the same
    for ``|x - median(x)|`` (median of the pooled raw draws, before
    splitting); ``rhat`` is the larger (ignoring an undefined one).

    Examples
    --------
    >>> r = rank_rhat([[1, 2, 3, 4, 5, 6, 7, 8], [2, 4, 6, 8, 10, 12, 14, 16],
    ...                [0.5, 1.5, 0.7, 1.1, 0.9, 1.3, 0.6, 1.2]])
    >>> round(r.bulk, 12)
    2.228641473282
    """
    a = _draws(x)
    if a.shape[1] < 4:
        raise ValueError(f"rank R-hat needs at least 4 draws per chain, not {a.shape[1]}")
    bulk = _split_rank_rhat(a, offset)
    folded = _split_rank_rhat(np.abs(a - np.median(a)), offset)
    return RankRhat(bulk=bulk, folded=folded, rhat=_nanmax2(bulk, folded))


def _split_rank_rhat(a: np.ndarray, offset: float) -> float:
    s = split_chains(a)
    if np.all(s == s.flat[0]):
        return float("nan")
    return rhat(rank_normalize(s, offset=offset))


def autocovariance(x) -> np.ndarray:
    """Biased autocovariance of each chain at every lag (FFT), ``(M, N)``.

    ``acov[m, t] = (1/N) sum_{i < N - t} (x_i - mean)(x_{i+t} - mean)``.
    """
    a = _draws(x)
    M, N = a.shape
    c = a - a.mean(axis=1, keepdims=True)
    nfft = 1 << (2 * N - 1).bit_length()
    f = np.fft.rfft(c, n=nfft, axis=1)
    ac = np.fft.irfft(f * np.conj(f), n=nfft, axis=1)[:, :N]
    return ac / N


def _ess_raw(a: np.ndarray) -> float:
    """ESS of the (already split / transformed) chains ``a`` (Stan and ArviZ algorithm)."""
    M, N = a.shape
    if N < 4:
        return float("nan")
    if np.ptp(a) == 0:
        return float("nan")
    acov = autocovariance(a)
    mean_var = acov[:, 0].mean() * N / (N - 1.0)
    var_plus = mean_var * (N - 1.0) / N
    if M > 1:
        var_plus += np.var(a.mean(axis=1), ddof=1)
    rho = np.zeros(N)
    rho[0] = 1.0
    rho_even = 1.0
    rho_odd = 1.0 - (mean_var - acov[:, 1].mean()) / var_plus
    rho[1] = rho_odd
    # Geyer's initial positive sequence
    t = 1
    while t < N - 3 and rho_even + rho_odd > 0.0:
        rho_even = 1.0 - (mean_var - acov[:, t + 1].mean()) / var_plus
        rho_odd = 1.0 - (mean_var - acov[:, t + 2].mean()) / var_plus
        if rho_even + rho_odd >= 0:
            rho[t + 1] = rho_even
            rho[t + 2] = rho_odd
        t += 2
    max_t = t - 2
    if rho_even > 0:
        rho[max_t + 1] = rho_even
    # Geyer's initial monotone sequence
    t = 1
    while t <= max_t - 2:
        if rho[t + 1] + rho[t + 2] > rho[t - 1] + rho[t]:
            rho[t + 1] = (rho[t - 1] + rho[t]) / 2.0
            rho[t + 2] = rho[t + 1]
        t += 2
    S = M * N
    tau = -1.0 + 2.0 * rho[: max_t + 1].sum() + rho[max_t + 1: max_t + 2].sum()
    tau = max(tau, 1.0 / np.log10(S))
    return float(S / tau)


def ess_mean(x) -> float:
    """ESS of the mean: the autocorrelation ESS of the split chains (no rank normalisation).

    ``S / tau`` with ``tau = -1 + 2 sum_{t'} P_t'`` over Geyer's initial
    monotone sequence of ``P_t' = rho_2t' + rho_2t'+1`` and the multi-chain
    autocorrelation ``rho_t = 1 - (W - mean_m acov_m(t)) / var+`` (Vehtari et
    al. 2021, section 3.2; the biased per-chain autocovariance, as Stan and
    ArviZ compute it), with ``tau >= 1/log10(S)``.  ``nan`` for constant draws.
    """
    return _ess_raw(split_chains(x))


def ess_bulk(x) -> float:
    """Bulk ESS: :func:`ess_mean` of the rank-normalised split chains."""
    s = split_chains(x)
    if np.ptp(s) == 0:
        return float("nan")
    return _ess_raw(rank_normalize(s))


def ess_tail(x, *, prob: tuple[float, float] = (0.05, 0.95)) -> float:
    """Tail ESS: the smaller ESS of the indicators ``x <= q05`` and ``x <= q95`` (split chains)."""
    a = _draws(x)
    q = np.quantile(a, prob)
    vals = [_ess_raw(split_chains((a <= qi).astype(np.float64))) for qi in q]
    return float(np.nanmin(vals)) if not all(np.isnan(vals)) else float("nan")


def mcse_mean(x) -> float:
    """Monte Carlo standard error of the mean: ``sd / sqrt(ess_mean)``."""
    a = _draws(x)
    return float(np.std(a, ddof=1) / np.sqrt(ess_mean(a)))


# ---------------------------------------------------------------------------
# indicators from counts


def _counts(counts, length) -> tuple[np.ndarray, int]:
    c = np.asarray(counts)
    if c.ndim == 1:
        c = c[:, None]
    if c.ndim != 2:
        raise ValueError(f"counts must be a (chains, states) array, not shape {c.shape}")
    h = int(length)
    if h < 2:
        raise ValueError(f"each chain needs at least 2 draws, not {h}")
    if np.any(c < 0) or np.any(c > h):
        raise ValueError(f"counts must lie between 0 and the chain length {h}")
    return c.astype(np.float64), h


def indicator_rhat(counts, length: int) -> np.ndarray:
    """R-hat of each state's indicator from per-chain counts.

    Parameters
    ----------
    counts : (C, n) array_like
        ``counts[c, j]``: draws of chain ``c`` in state ``j``; every chain has
        ``length`` draws.  Pass split half-chains to get split-R-hat.
    length : int

    Returns
    -------
    (n,) ndarray
        ``nan`` where the indicator is constant over all draws, ``inf`` where
        every chain is constant but chains differ.
    """
    c, h = _counts(counts, length)
    if c.shape[0] < 2:
        raise ValueError("R-hat needs at least 2 chains")
    means = c / h
    variances = c * (h - c) / (h * (h - 1.0))
    return _rhat_from_moments(means, variances, h)


def _blom_pair(zeros: np.ndarray, ones: np.ndarray, offset: float) -> tuple[np.ndarray, np.ndarray]:
    from scipy.special import ndtri

    S = zeros + ones
    r0 = (zeros + 1.0) / 2.0
    r1 = zeros + (ones + 1.0) / 2.0
    return ndtri((r0 - 0.375) / (S + offset)), ndtri((r1 - 0.375) / (S + offset))


def _binary_rhat(c: np.ndarray, h: int, offset: float) -> np.ndarray:
    """Rank-normalised R-hat of 0/1 chains given per-chain counts of ones ``c`` (C, n)."""
    C = c.shape[0]
    ones = c.sum(axis=0)
    zeros = C * h - ones
    z0, z1 = _blom_pair(zeros, ones, offset)
    d = z1 - z0
    means = z0 + d * c / h
    variances = d * d * c * (h - c) / (h * (h - 1.0))
    out = _rhat_from_moments(means, variances, h)
    constant = (ones == 0) | (zeros == 0)
    return np.where(constant, np.nan, out)


def indicator_rank_rhat(counts, length: int, *, offset: float = BLOM_OFFSET) -> RankRhat:
    """Rank-normalised R-hat (bulk, folded, max) of each state's indicator from counts.

    Parameters
    ----------
    counts : (C, n) array_like
        Per-chain counts of each state, chains of ``length`` draws (pass split
        halves for the split version).
    length : int

    Returns
    -------
    RankRhat
        With ``(n,)`` arrays as fields.  ``folded`` is ``nan`` where the pooled
        median is exactly 1/2 (the folded draws are then constant).

    Notes
    -----
    See the module notes: pooled ranks of 0/1 values depend only on the
    counts, and the folded indicator is ``x`` (median 0), ``1 - x``
    (median 1) or constant (median 1/2).
    """
    c, h = _counts(counts, length)
    if c.shape[0] < 2:
        raise ValueError("R-hat needs at least 2 chains")
    S = c.shape[0] * h
    ones = c.sum(axis=0)
    bulk = _binary_rhat(c, h, offset)
    # pooled median of the 0/1 draws: 0, 1 or 1/2 (numpy's mean of the middle pair)
    med = np.where(2 * ones > S, 1.0, np.where(2 * ones < S, 0.0, 0.5))
    # folded values: |0 - med| for zeros, |1 - med| for ones; count the larger value
    larger_is_zero = med > 0.5
    fc = np.where(larger_is_zero[None, :], h - c, c)
    folded = _binary_rhat(fc, h, offset)
    folded = np.where(med == 0.5, np.nan, folded)
    best = np.where(np.isnan(bulk), folded, np.where(np.isnan(folded), bulk, np.fmax(bulk, folded)))
    return RankRhat(bulk=bulk, folded=folded, rhat=best)


def rhat_note(value: float, *, constant_value: float | None = None) -> str | None:
    """Plain words for an undefined or infinite R-hat (None when it is a number)."""
    if np.isnan(value):
        if constant_value is None:
            return "undefined: the indicator is constant in every chain"
        where = "never" if constant_value == 0 else "always"
        return f"undefined: the state was {where} occupied in any kept draw of any tracked replicate"
    if np.isinf(value):
        return ("infinite: each tracked replicate kept a constant value but replicates disagree "
                "(they settled in different places)")
    return None


@dataclass(frozen=True)
class MCSE:
    """Monte Carlo standard error and effective sample size of pooled time averages.

    Attributes
    ----------
    mean : (n,) ndarray
        The estimate (pooled time average of each state's indicator).
    se : (n,) ndarray
        Its Monte Carlo standard error.
    ess : (n,) ndarray
        ``mean (1 - mean) / se^2``: the number of independent draws that
        would give the same standard error (``nan`` where ``se == 0``).
    method : str
    groups : int
        Independent replicates or batches the error was estimated from.
    """

    mean: np.ndarray
    se: np.ndarray
    ess: np.ndarray
    method: str
    groups: int


def _ess_from_se(mean: np.ndarray, se: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        ess = mean * (1.0 - mean) / (se * se)
    return np.where(se > 0, ess, np.nan)


def replicate_mcse(counts, length: int, *, replicates: int | None = None, mean=None) -> MCSE:
    """MCSE of a pooled time average from independent replicates.

    Parameters
    ----------
    counts : (K, n) array_like
        Kept draws per state of ``K >= 2`` independent, identically started
        replicates, ``length`` draws each.
    length : int
    replicates : int, optional
        Number of replicates pooled in the estimate (default ``K``; larger when
        the counts come from the first ``K`` of them).
    mean : (n,) array_like, optional
        The pooled estimate (default: the mean of the given replicates).

    Notes
    -----
    The replicate means are i.i.d., so ``Var(pooled) = Var(mean_r) / R``
    exactly, estimated by the ddof-1 sample variance of the ``K`` means: no
    model of the autocorrelation is needed (Law 2015, replication/deletion).
    """
    c, h = _counts(counts, length)
    K = c.shape[0]
    if K < 2:
        raise ValueError("replicate MCSE needs at least 2 replicates")
    R = K if replicates is None else int(replicates)
    est = c.mean(axis=0) / h if mean is None else np.asarray(mean, dtype=np.float64)
    # the variance of the integer counts is exactly 0 when they are all equal (a deterministic
    # chain), where the variance of the rounded means c / h would be a few ulps
    se = np.sqrt(np.var(c, axis=0, ddof=1) / R) / h
    return MCSE(mean=est, se=se, ess=_ess_from_se(est, se), method="independent replicates", groups=K)


def batch_means_mcse(counts, length: int) -> MCSE:
    """MCSE of a time average by batch means.

    Parameters
    ----------
    counts : (K, n) array_like
        Counts of each state in ``K >= 2`` batches of ``length`` consecutive
        kept draws (batches of several replicates may be mixed).
    length : int

    Notes
    -----
    ``Var(mean) = s_b^2 / K`` with ``s_b^2`` the ddof-1 variance of the batch
    means: valid when a batch is much longer than the autocorrelation time
    (Flegal & Jones 2010).  The estimate is the mean of the batch means.
    """
    c, h = _counts(counts, length)
    K = c.shape[0]
    if K < 2:
        raise ValueError("batch means need at least 2 batches")
    est = c.mean(axis=0) / h
    se = np.sqrt(np.var(c, axis=0, ddof=1) / K) / h  # exact 0 for equal counts (see replicate_mcse)
    return MCSE(mean=est, se=se, ess=_ess_from_se(est, se), method=f"batch means ({K} batches of {h} draws)",
                groups=K)


# ---------------------------------------------------------------------------
# goodness of fit


@dataclass(frozen=True)
class GOF:
    """Pearson chi-square goodness of fit of counts to a law.

    Attributes
    ----------
    statistic : float
    dof : int
        Cells after pooling minus 1.
    pvalue : float
        ``nan`` when fewer than 2 cells remain; 0 when counts fall where the
        law has no mass (``impossible`` > 0).
    cells : int
        Cells after pooling.
    pooled : int
        Original cells merged into others because their expected count was
        below ``min_expected``.
    impossible : int
        Counts observed in cells of probability 0.
    """

    statistic: float
    dof: int
    pvalue: float
    cells: int
    pooled: int
    impossible: int


def chisquare_gof(counts, probs, *, min_expected: float = 5.0) -> GOF:
    """Chi-square test of multinomial counts against a law, pooling sparse cells.

    Parameters
    ----------
    counts : (n,) array_like of int
    probs : (n,) array_like
        The law (normalised here).
    min_expected : float, optional
        Cells with a smaller expected count are pooled (default 5, Cochran's
        rule of thumb, common practice): sorted by expected count, the
        smallest are merged into one cell until it reaches ``min_expected``;
        a remainder that stays below it is merged with the next smallest cell.

    Returns
    -------
    GOF
        Computed by ``scipy.stats.chisquare`` on the pooled cells.
    """
    from scipy.stats import chisquare

    obs = np.asarray(counts, dtype=np.float64)
    p = np.asarray(probs, dtype=np.float64)
    if obs.shape != p.shape or obs.ndim != 1:
        raise ValueError("counts and probs must be vectors of the same length")
    if np.any(p < 0) or not np.isfinite(p).all() or p.sum() <= 0:
        raise ValueError("probs must be a probability vector")
    p = p / p.sum()
    N = obs.sum()
    zero = p == 0
    impossible = int(obs[zero].sum())
    if impossible:
        return GOF(statistic=float("inf"), dof=max(int((~zero).sum()) - 1, 0), pvalue=0.0,
                   cells=int((~zero).sum()), pooled=0, impossible=impossible)
    o, e = obs[~zero], N * p[~zero]
    order = np.argsort(e, kind="stable")
    o, e = o[order], e[order]
    k = 0
    pooled = 0
    if e[0] < min_expected:
        cum = np.cumsum(e)
        k = int(np.searchsorted(cum, min_expected)) + 1  # smallest k with cum[k-1] >= min_expected
        k = min(k, e.size)
        pooled = k
    if k:
        o = np.concatenate([[o[:k].sum()], o[k:]])
        e = np.concatenate([[e[:k].sum()], e[k:]])
    if e.size < 2:
        return GOF(statistic=0.0, dof=0, pvalue=float("nan"), cells=int(e.size), pooled=pooled, impossible=0)
    res = chisquare(o, e * (o.sum() / e.sum()))
    return GOF(statistic=float(res.statistic), dof=int(e.size - 1), pvalue=float(res.pvalue), cells=int(e.size),
               pooled=pooled, impossible=0)
