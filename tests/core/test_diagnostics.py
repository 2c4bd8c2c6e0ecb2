"""R-hat, ESS, MCSE and the chi-square fit (core.diagnostics).

Outside references: the E12 fixtures of the shared reference list (Vehtari,
Gelman, Simpson, Carpenter & Buerkner, Bayesian Analysis 16(2):667-718, 2021;
formulas seen in the authors' source, fixture values computed from them), the
AR(1) integrated autocorrelation time ``(1 + phi)/(1 - phi)`` (a closed form,
e.g. Geyer, Statistical Science 7(4), 1992 [memory]), and scipy.stats.
"""
import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import stats

from core import diagnostics as D

# REFERENCES E12, Example B (3 chains x 8 draws)
EXAMPLE_B = [list(range(1, 9)), [2 * i for i in range(1, 9)], [0.5, 1.5, 0.7, 1.1, 0.9, 1.3, 0.6, 1.2]]


# ---------------------------------------------------------------------------
# E12 fixtures


def test_rhat_example_a():
    # E12 Example A: B = 10, W = 5/2, var+ = 4, R-hat = sqrt(8/5) (exact fixture, computed from BDA3 formula)
    assert D.rhat([[1, 2, 3, 4, 5], [3, 4, 5, 6, 7]]) == pytest.approx(1.2649110640673517647, rel=1e-15)


def test_rhat_identical_chains_below_one():
    # E12: two identical chains [1,2,3,4] -> sqrt((n-1)/n) = 0.866... (R-hat < 1 is legitimate)
    assert D.rhat([[1, 2, 3, 4], [1, 2, 3, 4]]) == pytest.approx(0.86602540378443859659, rel=1e-15)


def test_split_rhat_example_b():
    # E12 Example B: split-R-hat (raw) = 2.85620194764481 (computed fixture)
    assert D.split_rhat(EXAMPLE_B) == pytest.approx(2.85620194764481, rel=1e-13)


def test_rank_rhat_example_b_blom():
    # E12 Example B with Blom's S + 1/4: bulk 2.228641473281955, folded 1.4897096003983057
    r = D.rank_rhat(EXAMPLE_B)
    assert r.bulk == pytest.approx(2.228641473281955, rel=1e-13)
    assert r.folded == pytest.approx(1.4897096003983057, rel=1e-13)
    assert r.rhat == pytest.approx(2.228641473281955, rel=1e-13)


def test_rank_rhat_example_b_literal_denominator():
    # E12 Example B with the literal "S - 1/4" of the published eq. (14): 2.1848630459633913, 1.524482427718182
    r = D.rank_rhat(EXAMPLE_B, offset=-0.25)
    assert r.bulk == pytest.approx(2.1848630459633913, rel=1e-13)
    assert r.folded == pytest.approx(1.524482427718182, rel=1e-13)


def test_split_chains_drops_middle_draw_when_odd():
    # Stan / ArviZ convention (common practice): first and last N//2 draws
    s = D.split_chains([[1, 2, 3, 4, 5]])
    assert s.tolist() == [[1, 2], [4, 5]]


def test_rhat_degenerate_cases():
    assert math.isnan(D.rhat([[1, 1, 1], [1, 1, 1]]))  # all equal: undefined
    assert math.isinf(D.rhat([[0, 0, 0], [1, 1, 1]]))  # constant chains that differ: W = 0 < B
    with pytest.raises(ValueError, match="at least 2 chains"):
        D.rhat([[1, 2, 3]])


# ---------------------------------------------------------------------------
# counts vs arrays (indicators)


def _same_rhat(got: float, want: float) -> bool:
    """Equal R-hats; the array formula meets W = 0 only up to rounding (a huge finite value)."""
    if math.isnan(want):
        return math.isnan(got)
    if math.isinf(got):
        return math.isinf(want) or want > 1e8
    return got == pytest.approx(want, rel=1e-10)


def _indicator_chains(draws: np.ndarray, n: int):
    """Per-chain counts of each state, for (C, h) integer draws."""
    return np.stack([np.bincount(row, minlength=n) for row in draws])


@given(st.integers(0, 10**6), st.integers(2, 6), st.integers(4, 40), st.integers(2, 5), st.floats(0.0, 0.98))
def test_indicator_rhat_equals_array_formula(seed, chains, h, n, stick):
    # Counts formula vs the array formula on the same draws (both from the BDA3 definition).
    rng = np.random.default_rng(seed)
    x = rng.integers(0, n, size=(chains, h))
    # make some chains sticky so that constant and disagreeing chains occur
    for c in range(chains):
        if rng.random() < stick:
            x[c] = x[c, 0]
    counts = _indicator_chains(x, n)
    got = D.indicator_rhat(counts, h)
    for j in range(n):
        assert _same_rhat(got[j], D.rhat((x == j).astype(float)))


@given(st.integers(0, 10**6), st.integers(2, 6), st.integers(2, 30), st.integers(2, 4), st.floats(0.0, 0.9))
def test_indicator_rank_rhat_equals_array_formula(seed, chains, h, n, stick):
    # Rank normalisation computed from counts vs scipy ranks of the stored 0/1 draws.
    rng = np.random.default_rng(seed)
    x = rng.integers(0, n, size=(chains, h))
    for c in range(chains):
        if rng.random() < stick:
            x[c] = x[c, 0]
    counts = _indicator_chains(x, n)
    got = D.indicator_rank_rhat(counts, h)
    for j in range(n):
        ind = (x == j).astype(float)
        # the counts are of whole chains (already split); apply the array formula to them as chains
        if np.all(ind == ind.flat[0]):
            assert math.isnan(got.bulk[j]) and math.isnan(got.rhat[j])
            continue
        assert _same_rhat(got.bulk[j], D.rhat(D.rank_normalize(ind)))
        fold = np.abs(ind - np.median(ind))
        if np.all(fold == fold.flat[0]):
            assert math.isnan(got.folded[j])
            assert got.rhat[j] == got.bulk[j] or math.isinf(got.bulk[j])
        else:
            assert _same_rhat(got.folded[j], D.rhat(D.rank_normalize(fold)))


def test_indicator_rank_rhat_equals_split_rhat_for_binary():
    # Affine invariance (module notes): for a non-constant indicator, rank R-hat == split R-hat.
    rng = np.random.default_rng(7)
    counts = rng.integers(1, 19, size=(8, 3))
    assert np.allclose(D.indicator_rank_rhat(counts, 20).bulk, D.indicator_rhat(counts, 20), rtol=1e-12)


def test_indicator_rank_rhat_median_half_has_undefined_folded():
    counts = np.array([[2], [2]])  # 4 ones among 8 draws: pooled median exactly 1/2
    r = D.indicator_rank_rhat(counts, 4)
    assert math.isnan(r.folded[0]) and np.isfinite(r.bulk[0]) and r.rhat[0] == r.bulk[0]


def test_rhat_note_words_undefined_and_infinite():
    assert "never occupied" in D.rhat_note(float("nan"), constant_value=0.0)
    assert "always occupied" in D.rhat_note(float("nan"), constant_value=1.0)
    assert "disagree" in D.rhat_note(float("inf"))
    assert D.rhat_note(1.0) is None


# ---------------------------------------------------------------------------
# ESS


def _direct_ess(chains: np.ndarray) -> float:
    """The E12 ESS recipe written out with direct (non-FFT) autocovariance sums.

    tau = -1 + 2 sum_{k <= K} P'_k, P_k = rho_2k + rho_2k+1 while positive (Geyer's initial positive
    sequence), P' its running minimum (initial monotone sequence), rho_t = 1 - (W - mean_m acov_m(t)) / var+;
    plus, as Stan and ArviZ do, the next even autocorrelation once when it is positive.
    """
    M, N = chains.shape
    acov = np.empty((M, N))
    for m in range(M):
        c = chains[m] - chains[m].mean()
        for t in range(N):
            acov[m, t] = np.dot(c[: N - t], c[t:]) / N
    W = np.mean(acov[:, 0] * N / (N - 1))
    var_plus = W * (N - 1) / N + np.var(chains.mean(axis=1), ddof=1)
    rho = [1.0] + [1.0 - (W - acov[:, t].mean()) / var_plus for t in range(1, N)]
    pairs = [rho[0] + rho[1]]
    k = 1
    while 2 * k < N - 2 and pairs[-1] > 0:
        p = rho[2 * k] + rho[2 * k + 1]
        if p <= 0:
            break
        pairs.append(p)
        k += 1
    assert 2 * k < N - 2, "the fixture must stop by sign, not by length"
    extra = rho[2 * k] if rho[2 * k] > 0 else 0.0
    for i in range(1, len(pairs)):
        pairs[i] = min(pairs[i], pairs[i - 1])
    tau = max(-1.0 + 2.0 * sum(pairs) + extra, 1 / math.log10(M * N))
    return M * N / tau


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_ess_matches_direct_transcription(seed):
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((3, 64))
    for t in range(1, 64):
        x[:, t] += 0.6 * x[:, t - 1]
    assert D.ess_mean(x) == pytest.approx(_direct_ess(D.split_chains(x)), rel=1e-10)


def _ar1(rng, phi, M, N):
    x = np.empty((M, N))
    x[:, 0] = rng.standard_normal(M) / math.sqrt(1 - phi**2)
    e = rng.standard_normal((M, N))
    for t in range(1, N):
        x[:, t] = phi * x[:, t - 1] + e[:, t]
    return x


@pytest.mark.parametrize("phi", [0.0, 0.5, 0.8])
def test_ess_of_ar1_matches_closed_form(phi):
    # ESS/S = (1 - phi)/(1 + phi) for a stationary Gaussian AR(1) (closed form of the integrated
    # autocorrelation time, tau = (1 + phi)/(1 - phi); common practice).  Tolerance: 5 standard errors of
    # tau-hat by Sokal's approximation var(tau-hat) ~ 2 (2W + 1) tau^2 / S with W the truncation lag,
    # bounded here by W <= 6 tau (A. Sokal, "Monte Carlo methods in statistical mechanics", 1997 [memory]).
    rng = np.random.default_rng(20210)
    M, N = 4, 20000
    x = _ar1(rng, phi, M, N)
    tau = (1 + phi) / (1 - phi)
    S = M * N
    W = 6 * tau
    rel_se = math.sqrt(2 * (2 * W + 1) / S)
    for est in (D.ess_mean(x), D.ess_bulk(x)):
        assert abs(S / est / tau - 1) < 5 * rel_se


def test_tail_ess_of_iid_draws_is_close_to_sample_size():
    # i.i.d. draws: tau = 1 for the quantile indicators; same Sokal bound with W <= 6
    rng = np.random.default_rng(5)
    x = rng.standard_normal((4, 20000))
    rel_se = math.sqrt(2 * 13 / x.size)
    assert abs(x.size / D.ess_tail(x) - 1) < 5 * rel_se


def test_ess_constant_draws_is_undefined():
    assert math.isnan(D.ess_mean(np.ones((2, 10))))
    assert math.isnan(D.ess_bulk(np.ones((2, 10))))


def test_mcse_mean_of_iid_draws():
    # MCSE = sd / sqrt(ESS); for i.i.d. draws close to sd / sqrt(S) (same tolerance as above)
    rng = np.random.default_rng(9)
    x = rng.standard_normal((4, 5000))
    want = x.std(ddof=1) / math.sqrt(x.size)
    assert D.mcse_mean(x) == pytest.approx(want, rel=5 * math.sqrt(2 * 13 / x.size) / 2)


# ---------------------------------------------------------------------------
# MCSE of indicators from counts


def test_replicate_mcse_of_bernoulli_replicates():
    # Independent replicates of i.i.d. Bernoulli(p) draws: se = sqrt(p (1-p) / (h R)).  The estimate's
    # relative error is that of a sample sd from K groups, ~ 1/sqrt(2(K-1)); 5 of those.
    rng = np.random.default_rng(11)
    K, h, p = 400, 250, 0.3
    ones = rng.binomial(h, p, size=K)
    counts = np.stack([ones, h - ones], axis=1)
    mc = D.replicate_mcse(counts, h)
    want = math.sqrt(p * (1 - p) / (h * K))
    assert abs(mc.se[0] / want - 1) < 5 / math.sqrt(2 * (K - 1))
    assert mc.mean[0] == pytest.approx(ones.mean() / h)
    # ESS = p(1-p)/se^2 is about the number of draws
    assert abs(mc.ess[0] / (h * K) - 1) < 10 / math.sqrt(2 * (K - 1))


def test_replicate_mcse_scales_to_all_replicates():
    counts = np.array([[3, 7], [5, 5], [6, 4]])
    a = D.replicate_mcse(counts, 10)
    b = D.replicate_mcse(counts, 10, replicates=300)
    assert b.se == pytest.approx(a.se / 10)


def test_equal_counts_have_zero_mcse_and_no_ess():
    # Replicates (or batches) with the same counts, e.g. of a deterministic cycle, have sample
    # variance exactly 0 (common practice: a constant sample has no spread); the ESS p(1-p)/se^2
    # is then undefined, not a huge number from round-off (100/300 is not exact in binary).
    counts = np.tile([100, 100, 100], (50, 1))
    for mc in (D.replicate_mcse(counts, 300, replicates=1000), D.batch_means_mcse(counts, 300)):
        assert mc.se.tolist() == [0.0, 0.0, 0.0]
        assert np.isnan(mc.ess).all()


def test_batch_means_of_iid_batches():
    rng = np.random.default_rng(12)
    K, h, p = 300, 100, 0.2
    ones = rng.binomial(h, p, size=K)
    mc = D.batch_means_mcse(np.stack([ones, h - ones], axis=1), h)
    want = math.sqrt(p * (1 - p) / (h * K))
    assert abs(mc.se[0] / want - 1) < 5 / math.sqrt(2 * (K - 1))
    assert "batch means" in mc.method


def test_mcse_constant_indicator_has_no_ess():
    mc = D.replicate_mcse(np.array([[10, 0], [10, 0]]), 10)
    assert mc.se.tolist() == [0.0, 0.0]
    assert np.isnan(mc.ess).all()


# ---------------------------------------------------------------------------
# chi-square


def test_chisquare_matches_scipy_without_pooling():
    obs = np.array([18, 22, 31, 29])
    p = np.array([0.2, 0.2, 0.3, 0.3])
    g = D.chisquare_gof(obs, p)
    ref = stats.chisquare(obs, 100 * p)
    assert g.statistic == pytest.approx(ref.statistic) and g.pvalue == pytest.approx(ref.pvalue)
    assert g.dof == 3 and g.pooled == 0


def test_chisquare_pools_sparse_cells():
    p = np.array([0.5, 0.45, 0.02, 0.02, 0.01])
    obs = np.array([52, 44, 2, 1, 1])  # expected 50, 45, 2, 2, 1: the three small cells are pooled (5)
    g = D.chisquare_gof(obs, p)
    assert g.pooled == 3 and g.cells == 3 and g.dof == 2
    ref = stats.chisquare([4, 44, 52], [5, 45, 50])
    assert g.statistic == pytest.approx(ref.statistic) and g.pvalue == pytest.approx(ref.pvalue)


def test_chisquare_counts_in_impossible_cells():
    g = D.chisquare_gof([5, 5, 1], [0.5, 0.5, 0.0])
    assert g.pvalue == 0.0 and g.impossible == 1


def test_chisquare_of_true_multinomial_sample_is_not_rejected():
    # A sample from the law itself: p-value above alpha = 1e-6 (fixed seed)
    rng = np.random.default_rng(13)
    p = np.array([0.6, 0.3, 0.09, 0.009, 0.001])
    obs = rng.multinomial(10000, p)
    assert D.chisquare_gof(obs, p).pvalue > 1e-6
