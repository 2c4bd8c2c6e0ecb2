"""Estimating a chain from data, checked against published values and reference libraries.

Sources named beside each check:
- Anderson & Goodman, "Statistical inference about Markov chains", Ann. Math. Statist. 28 (1957):
  MLE n_ij / n_i and the chi-square / likelihood-ratio order test (formulas from memory, as listed
  in the team's REFERENCES.md, E13).
- REFERENCES.md E13 fixture (computed from the published formulas): counts, Wald and Wilson intervals.
- scipy.stats.binomtest(...).proportion_ci(method="wilson") and scipy.stats.chi2_contingency
  as reference implementations.
- Goodman, Technometrics 7 (1965): simultaneous multinomial intervals (formula from memory).
Statistical checks use fixed seeds and binomial tests at alpha = 1e-6 (or k standard errors),
as stated beside each.
"""
from __future__ import annotations

from fractions import Fraction

import numpy as np
import pytest
from scipy import stats

from core.errors import OptionError
from core.estimate import (
    count_transitions,
    fit_counts,
    fit_from_chain,
    fit_observations,
    fit_to_chain,
    goodman_intervals,
    order_test,
    sample_matrices,
    wald_interval,
    wilson_interval,
)

ALPHA = 1e-6  # level of every statistical check in this file


def simulate(P, T, reps, rng, start=0):
    """``reps`` independent paths of length ``T`` of the chain ``P`` (vectorised), shape (reps, T)."""
    P = np.asarray(P, dtype=float)
    cum = np.cumsum(P, axis=1)
    cum[:, -1] = 1.0
    out = np.empty((reps, T), dtype=np.int64)
    s = np.full(reps, start, dtype=np.int64)
    for t in range(T):
        out[:, t] = s
        u = rng.random(reps)
        s = (u[:, None] >= cum[s]).sum(axis=1)
    return out


# An invented chain used for the statistical checks (not a reference value).
TRUE_P = np.array([[0.6, 0.3, 0.1], [0.2, 0.5, 0.3], [0.25, 0.25, 0.5]])


# --------------------------------------------------------------------------
# E13 worked fixture
# --------------------------------------------------------------------------
E13_SEQ = "AABABBBAABAAABBBBABAAB"


def e13_fit():
    seq = [0 if c == "A" else 1 for c in E13_SEQ]
    return seq, fit_counts(count_transitions([seq], 2), states=["A", "B"])


def test_e13_counts_and_mle():
    # REFERENCES.md E13 (computed): counts [[5, 6], [5, 5]], P_hat = [[5/11, 6/11], [1/2, 1/2]]
    # (Anderson & Goodman 1957 MLE n_ij / n_i, formula from memory)
    seq, fit = e13_fit()
    assert fit.counts.tolist() == [[5, 6], [5, 5]]
    assert fit.departures.tolist() == [11, 10]
    np.testing.assert_allclose(fit.mle, [[5 / 11, 6 / 11], [0.5, 0.5]], rtol=0, atol=1e-15)
    assert fit.prior is None
    np.testing.assert_array_equal(fit.estimate, fit.mle)


def test_e13_wald_and_wilson_intervals():
    # REFERENCES.md E13 (computed to 15 significant digits with z = Phi^-1(0.975)):
    # p(A->B), n_A = 11: Wald (0.251202364373007, 0.839706726536084), Wilson (0.280091537409322, 0.787287283775402)
    # p(B->B), n_B = 10: Wald (0.190102483847719, 0.809897516152281), Wilson (0.236593090512564, 0.763406909487436)
    _, fit = e13_fit()
    lo, hi = wald_interval(6, 11)
    assert lo == pytest.approx(0.251202364373007, abs=1e-12)
    assert hi == pytest.approx(0.839706726536084, abs=1e-12)
    lo, hi = wald_interval(5, 10)
    assert lo == pytest.approx(0.190102483847719, abs=1e-12)
    assert hi == pytest.approx(0.809897516152281, abs=1e-12)
    assert fit.low[0, 1] == pytest.approx(0.280091537409322, abs=1e-12)
    assert fit.high[0, 1] == pytest.approx(0.787287283775402, abs=1e-12)
    assert fit.low[1, 1] == pytest.approx(0.236593090512564, abs=1e-12)
    assert fit.high[1, 1] == pytest.approx(0.763406909487436, abs=1e-12)


def test_e13_chain_file_holds_exact_fractions_and_the_counts():
    _, fit = e13_fit()
    chain = fit_to_chain(fit)
    assert chain.is_valid
    typed = {(t.source, t.target): t.p for t in chain.transitions}
    assert typed == {("A", "A"): "5/11", ("A", "B"): "6/11", ("B", "A"): "1/2", ("B", "B"): "1/2"}
    assert chain.exact_probabilities[("A", "B")] == Fraction(6, 11)
    assert chain.extra["transition_counts"] == {"states": ["A", "B"], "matrix": [[5, 6], [5, 5]]}
    assert chain.extra["estimation"]["prior_alpha"] is None


# --------------------------------------------------------------------------
# Wilson interval against scipy
# --------------------------------------------------------------------------
@pytest.mark.parametrize("level", [0.8, 0.9, 0.95, 0.99])
def test_wilson_matches_scipy(level):
    # reference: scipy.stats.binomtest(x, n).proportion_ci(confidence_level, method="wilson")
    for n in (1, 2, 3, 7, 20, 133, 1000):
        xs = np.arange(n + 1) if n < 1000 else np.array([0, 1, 2, 37, 500, 998, 999, 1000])
        lo, hi = wilson_interval(xs, n, level=level)
        for k, x in enumerate(xs):
            ref = stats.binomtest(int(x), n).proportion_ci(confidence_level=level, method="wilson")
            assert lo[k] == pytest.approx(ref.low, abs=1e-12)
            assert hi[k] == pytest.approx(ref.high, abs=1e-12)


def test_interval_edges_and_empty_rows():
    lo, hi = wilson_interval([0, 9], [9, 9])
    assert lo[0] == 0.0 and hi[1] == 1.0
    z = stats.norm.ppf(0.975)
    # closed form of the Wilson upper end at x = 0: z^2 / (n + z^2) (Wilson 1927, from memory)
    assert hi[0] == pytest.approx(z * z / (9 + z * z), abs=1e-14)
    assert wilson_interval(0, 0) == (0.0, 1.0)
    assert wald_interval(0, 0) == (0.0, 1.0)
    with pytest.raises(OptionError, match="between 0 and 1"):
        wilson_interval(1, 2, level=1.0)


def test_wilson_coverage_on_a_simulated_chain():
    """95% Wilson intervals cover the true entries in about 95% of repetitions.

    400 independent paths of 400 steps of TRUE_P; for each of the 9 entries the number of
    covering repetitions is tested against Binomial(400, 0.95) with a two-sided binomial test
    at alpha = 1e-6 (about 4.9 standard errors, i.e. coverage outside roughly [0.90, 0.99]
    would be caught).  The same test must reject 80% intervals presented as 95% ones, so it
    has the power to see a wrong interval.
    """
    rng = np.random.default_rng(20240601)
    R, T = 400, 400
    paths = simulate(TRUE_P, T, R, rng)
    covered = np.zeros((3, 3), dtype=int)
    covered80 = np.zeros((3, 3), dtype=int)
    for path in paths:
        C = count_transitions([path], 3)
        n = C.sum(axis=1, keepdims=True)
        lo, hi = wilson_interval(C, n)
        covered += (lo <= TRUE_P) & (TRUE_P <= hi)
        lo8, hi8 = wilson_interval(C, n, level=0.8)
        covered80 += (lo8 <= TRUE_P) & (TRUE_P <= hi8)
    for k in covered.ravel():
        assert stats.binomtest(int(k), R, 0.95).pvalue > ALPHA, covered / R
    # power check: 80% intervals are rejected as 95% ones for every entry
    for k in covered80.ravel():
        assert stats.binomtest(int(k), R, 0.95).pvalue < ALPHA, covered80 / R


# --------------------------------------------------------------------------
# Goodman simultaneous intervals
# --------------------------------------------------------------------------
def test_goodman_formula():
    # Goodman (1965), Technometrics 7:247-254 (formula from memory):
    # A = chi2_1 quantile at 1 - alpha/k; (A + 2x -+ sqrt(A (A + 4 x (N - x) / N))) / (2 (N + A))
    counts = np.array([[12, 30, 0, 58], [1, 1, 1, 1]])
    lo, hi = goodman_intervals(counts, level=0.9)
    k = 4
    A = stats.chi2.ppf(1 - 0.1 / k, 1)
    for r, row in enumerate(counts):
        N = row.sum()
        for j, x in enumerate(row):
            root = np.sqrt(A * (A + 4 * x * (N - x) / N))
            assert lo[r, j] == pytest.approx(max(0.0, (A + 2 * x - root) / (2 * (N + A))), abs=1e-12)
            assert hi[r, j] == pytest.approx((A + 2 * x + root) / (2 * (N + A)), abs=1e-12)
    # it is the Wilson interval at the Bonferroni level 1 - alpha/k (z^2 = A); reference: scipy
    ref = stats.binomtest(30, 100).proportion_ci(confidence_level=1 - 0.1 / k, method="wilson")
    assert (lo[0, 1], hi[0, 1]) == pytest.approx((ref.low, ref.high), abs=1e-12)


def test_goodman_simultaneous_coverage():
    """All entries of a row are covered together in at least 95% of repetitions.

    One-sided binomial test (alternative "less") at alpha = 1e-6 against 0.95, over 400
    repetitions of 300-step paths of TRUE_P, for each row.
    """
    rng = np.random.default_rng(99)
    R = 400
    paths = simulate(TRUE_P, 300, R, rng)
    all_covered = np.zeros(3, dtype=int)
    for path in paths:
        fit = fit_counts(count_transitions([path], 3), simultaneous=True)
        lo, hi = fit.simultaneous
        all_covered += np.all((lo <= TRUE_P) & (TRUE_P <= hi), axis=1)
    for k in all_covered:
        assert stats.binomtest(int(k), R, 0.95, alternative="less").pvalue > ALPHA


# --------------------------------------------------------------------------
# sparse data, zeros, the prior
# --------------------------------------------------------------------------
def test_sparse_findings():
    C = np.array([[30, 10, 0], [3, 4, 0], [0, 0, 0]])
    fit = fit_counts(C, states=["a", "b", "c"])
    codes = [(f.code, f.states[0]) for f in fit.findings]
    assert ("few-departures", "b") in codes  # 7 departures < 20
    assert ("never-left", "c") in codes
    assert ("few-departures", "a") not in codes  # 40 departures
    unobs = [f for f in fit.findings if f.code == "unobserved" and f.states[0] == "a"][0]
    z = stats.norm.ppf(0.975)
    # the quoted bound is the Wilson upper end at x = 0, z^2 / (n + z^2) with n = 40
    assert f"{z * z / (40 + z * z):.3g}" in unobs.message
    assert "not" in unobs.message and "impossible" in unobs.message
    assert not fit.complete and np.all(np.isnan(fit.estimate[2]))
    chain = fit_to_chain(fit)
    assert not chain.is_valid
    assert [p.code for p in chain.problems] == ["no-outgoing"]
    # threshold is configurable
    fit5 = fit_counts(C, min_departures=5)
    assert not any(f.code == "few-departures" for f in fit5.findings)


def test_prior_is_stated_and_never_silent():
    C = np.array([[8, 2, 0], [0, 5, 5], [0, 0, 0]])
    plain = fit_counts(C)
    assert plain.prior is None and plain.estimate[0, 2] == 0.0
    assert not any(f.code == "prior" for f in plain.findings)
    fit = fit_counts(C, prior=0.5)
    # posterior mean of a symmetric Dirichlet(alpha) row: (n_ij + alpha) / (n_i + n alpha)
    np.testing.assert_allclose(fit.estimate, (C + 0.5) / (C.sum(1, keepdims=True) + 1.5), rtol=0, atol=1e-15)
    assert fit.complete
    assert any(f.code == "prior" and "0.5" in f.message for f in fit.findings)
    chain = fit_to_chain(fit)
    assert chain.is_valid
    assert chain.exact_probabilities[("s0", "s2")] == Fraction(1, 23)  # 0.5 / 11.5
    assert chain.exact_probabilities[("s2", "s1")] == Fraction(1, 3)
    # Beta marginal of the Dirichlet posterior (scipy.stats.beta as reference)
    lo, hi = fit.posterior
    a, b = 2 + 0.5, 8 + 1.0
    assert lo[0, 1] == pytest.approx(stats.beta.ppf(0.025, a, b), abs=1e-12)
    assert hi[0, 1] == pytest.approx(stats.beta.ppf(0.975, a, b), abs=1e-12)
    with pytest.raises(OptionError, match="positive"):
        fit_counts(C, prior=0)


def test_awkward_prior_writes_floats_with_rest():
    C = np.array([[3, 1], [2, 2]])
    fit = fit_counts(C, prior=1 / 3)
    chain = fit_to_chain(fit)
    assert chain.is_valid
    assert any(t.p == "rest" for t in chain.transitions)
    np.testing.assert_allclose(chain.matrix(), fit.estimate, rtol=0, atol=1e-15)


# --------------------------------------------------------------------------
# drawing matrices
# --------------------------------------------------------------------------
@pytest.mark.parametrize("alpha", [0.0, 0.01, 1.0])
def test_posterior_draws_have_dirichlet_moments(alpha):
    """Mean and variance of Dirichlet(counts + alpha) draws (textbook Dirichlet moments:
    E = a_j / a_0, Var = a_j (a_0 - a_j) / (a_0^2 (a_0 + 1)), common practice), within 5 SE."""
    C = np.array([[7, 3, 0], [1, 0, 0], [2, 2, 2]])
    D = 20000
    X = sample_matrices(C, D, method="posterior", prior=alpha, rng=np.random.default_rng(5))
    assert X.shape == (D, 3, 3)
    assert np.all(np.isfinite(X))
    np.testing.assert_allclose(X.sum(axis=2), 1.0, rtol=0, atol=1e-12)
    a = C + alpha
    a0 = a.sum(axis=1, keepdims=True)
    mean = a / a0
    var = a * (a0 - a) / (a0**2 * (a0 + 1))
    se = np.sqrt(var / D)
    assert np.all(np.abs(X.mean(axis=0) - mean) <= 5 * se + 1e-15)
    if alpha == 0:
        assert np.all(X[:, C == 0] == 0.0)  # observed support only
    # each entry's whole law: the Dirichlet marginal is Beta(a_j, a_0 - a_j) (common practice).
    # At thresholds inside (0, 1) the share of draws below must match scipy.stats.beta's cdf
    # (binomial test at alpha = 1e-6).  Thresholds, not a KS test, because with alpha = 0.01 much
    # of the mass lies within 1e-16 of 0 or 1 and is rounded onto the endpoints.
    for i in range(3):
        for j in range(3):
            if a[i, j] > 0 and a0[i, 0] - a[i, j] > 0:
                ref = stats.beta(a[i, j], a0[i, 0] - a[i, j])
                for t in (1e-6, 0.01, 0.1, 0.5, 0.9, 0.99, 1 - 1e-6):
                    k = int(np.count_nonzero(X[:, i, j] < t))
                    assert stats.binomtest(k, D, float(ref.cdf(t))).pvalue > ALPHA, (i, j, t)


def test_bootstrap_draws():
    C = np.array([[60, 40], [10, 0]])
    X = sample_matrices(C, 5000, method="bootstrap", rng=np.random.default_rng(3))
    # row 0: Binomial(100, 0.4) / 100 has mean 0.4 and variance 0.0024 (binomial moments)
    assert X[:, 0, 1].mean() == pytest.approx(0.4, abs=5 * np.sqrt(0.0024 / 5000))
    assert X[:, 0, 1].var() == pytest.approx(0.0024, rel=0.1)
    assert np.all(X[:, 1] == [1.0, 0.0])
    with pytest.raises(OptionError, match="unknown sampling method"):
        sample_matrices(C, 3, method="jackknife")
    with pytest.raises(OptionError, match="never left"):
        sample_matrices(np.array([[1, 0], [0, 0]]), 3, method="posterior")


# --------------------------------------------------------------------------
# the order test
# --------------------------------------------------------------------------
def scipy_order_statistics(seq, n):
    """Sum over middle states of scipy's independence tests (reference implementation)."""
    seq = np.asarray(seq)
    T = np.zeros((n, n, n))
    np.add.at(T, (seq[:-2], seq[1:-1], seq[2:]), 1)
    g2 = x2 = 0.0
    df = 0
    for j in range(n):
        tab = T[:, j, :]
        tab = tab[tab.sum(axis=1) > 0][:, tab.sum(axis=0) > 0]
        if tab.size == 0 or min(tab.shape) < 2:
            continue
        s1, _, d, _ = stats.chi2_contingency(tab, correction=False)
        s2, _, _, _ = stats.chi2_contingency(tab, correction=False, lambda_="log-likelihood")
        x2 += s1
        g2 += s2
        df += d
    return g2, x2, df


def second_order_path(T, rng):
    """Two states; the next state repeats the previous-but-one with probability 0.8."""
    s = [0, 1]
    for _ in range(T - 2):
        s.append(s[-2] if rng.random() < 0.8 else 1 - s[-2])
    return np.array(s)


def test_order_test_matches_scipy_contingency_tests():
    rng = np.random.default_rng(11)
    P = np.array([[0.5, 0.5, 0.0], [0.1, 0.6, 0.3], [0.0, 0.4, 0.6]])  # two structural zeros
    seq = simulate(P, 3000, 1, rng)[0]
    t = order_test([seq], 3)
    g2, x2, df = scipy_order_statistics(seq, 3)
    assert t.g2 == pytest.approx(g2, rel=1e-9)
    assert t.pearson == pytest.approx(x2, rel=1e-9)
    assert t.df == df
    assert t.p_value == pytest.approx(stats.chi2.sf(g2, df), rel=1e-9)


def test_order_test_degrees_of_freedom_with_structural_zeros():
    # Support of P below: predecessors of 0 are {0, 1}, of 1 {0, 1, 2}, of 2 {1, 2};
    # successors of 0 are {0, 1}, of 1 {0, 1, 2}, of 2 {1, 2}.  df = sum (r_j - 1)(c_j - 1)
    # = 1*1 + 2*2 + 1*1 = 6 (hand count), against n (n - 1)^2 = 12 with no zeros
    # (Anderson & Goodman 1957, from memory).
    P = np.array([[0.5, 0.5, 0.0], [0.1, 0.6, 0.3], [0.0, 0.4, 0.6]])
    rng = np.random.default_rng(2)
    seq = simulate(P, 5000, 1, rng)[0]
    assert order_test([seq], 3).df == 6
    full = simulate(TRUE_P, 5000, 1, rng)[0]
    assert order_test([full], 3).df == 12


def test_order_test_statistic_is_chi_square_with_that_df():
    """Under a first-order chain with structural zeros, G2 has mean df = 6 (not 12).

    300 paths of 2000 steps; the mean of G2 must be within 5 standard errors of 6
    (a chi-square with 6 df has variance 12); a wrongly counted df of 12 is 25 SE away.
    """
    P = np.array([[0.5, 0.5, 0.0], [0.1, 0.6, 0.3], [0.0, 0.4, 0.6]])
    rng = np.random.default_rng(8)
    paths = simulate(P, 2000, 300, rng)
    g = np.array([order_test([p], 3).g2 for p in paths])
    assert abs(g.mean() - 6) < 5 * np.sqrt(12 / 300)


def test_order_test_rejects_second_order_and_keeps_first_order():
    rng = np.random.default_rng(4)
    second = second_order_path(3000, rng)
    t2 = order_test([second], 2, alpha=ALPHA)
    assert t2.rejected and t2.p_value < ALPHA
    first = simulate(TRUE_P, 3000, 1, rng)[0]
    t1 = order_test([first], 3, alpha=ALPHA)
    assert not t1.rejected and t1.p_value > ALPHA


def test_order_test_never_spans_sequences():
    # each piece alone has no triple; joined they would
    t = order_test([[0, 1], [1, 0], [0, 0]], 2)
    assert t.triples == 0 and t.df == 0 and t.p_value is None and not t.rejected


def test_second_order_is_a_finding(tmp_path):
    from core.datafile import read_observations

    rng = np.random.default_rng(4)
    seq = second_order_path(2000, rng)
    p = tmp_path / "alt.csv"
    p.write_text("state\n" + "\n".join("LH"[s] for s in seq) + "\n")
    fit = fit_observations(read_observations(p))
    assert any(f.code == "second-order" and f.level == "warning" for f in fit.findings)
    assert fit.source["file"] == "alt.csv"
    first = simulate(TRUE_P, 2000, 1, rng)[0]
    p.write_text("state\n" + "\n".join("xyz"[s] for s in first) + "\n")
    fit = fit_observations(read_observations(p), order_alpha=ALPHA)
    assert not any(f.code == "second-order" for f in fit.findings)


# --------------------------------------------------------------------------
# counting and reading back
# --------------------------------------------------------------------------
def test_counting_matches_a_plain_loop():
    rng = np.random.default_rng(0)
    seqs = [rng.integers(0, 4, size=int(m)) for m in rng.integers(0, 30, size=12)]
    ref = np.zeros((4, 4), dtype=int)
    for s in seqs:
        for a, b in zip(s[:-1], s[1:]):
            ref[a, b] += 1
    np.testing.assert_array_equal(count_transitions(seqs, 4), ref)
    with pytest.raises(ValueError, match="0..3"):
        count_transitions([[0, 4]], 4)


def test_fit_from_chain_round_trip(tmp_path):
    from core.io import load_chain, save_chain

    C = np.array([[30, 10], [5, 25]])
    fit = fit_counts(C, states=["up", "down"], labels=["Up", "Down"], prior=1.0)
    path = tmp_path / "fitted.json"
    save_chain(fit_to_chain(fit, name="test"), path)
    back = fit_from_chain(load_chain(path))
    assert back is not None
    np.testing.assert_array_equal(back.counts, C)
    assert back.prior == 1.0 and back.labels == ("Up", "Down")
    np.testing.assert_allclose(back.estimate, fit.estimate, rtol=0, atol=1e-15)
    # an edited chain no longer matches its counts
    edited = load_chain(path).with_transitions([("up", "up", "0.7"), ("up", "down", "0.3")])
    assert fit_from_chain(edited) is None


# --------------------------------------------------------------------------
# uncertainty of derived answers
# --------------------------------------------------------------------------
from core.estimate import derived_uncertainty, iter_derived_uncertainty  # noqa: E402


def exact_stationary(P):
    """Stationary law by an mpmath solve at 30 digits (reference library, independent of core)."""
    import mpmath

    mpmath.mp.dps = 30
    n = len(P)
    A = mpmath.matrix(n, n)
    for i in range(n):
        for j in range(n):
            A[i, j] = mpmath.mpf(P[j][i]) - (1 if i == j else 0)
    for j in range(n):
        A[n - 1, j] = 1
    b = mpmath.matrix([0] * (n - 1) + [1])
    return np.array([float(v) for v in mpmath.lu_solve(A, b)])


def test_e8_two_state_chain_intervals_collapse_on_the_closed_form():
    # LPW 2nd ed. Example 1.1 / 4.1 and REFERENCES.md E8 (computed): P = [[0.7, 0.3], [0.1, 0.9]],
    # pi = (q/(p+q), p/(p+q)) = (1/4, 3/4), t_mix(1/4) = 3.  Counts proportional to P with 10^7
    # departures per row make the posterior very tight around these values.
    C = np.array([[7_000_000, 3_000_000], [1_000_000, 9_000_000]])
    fit = fit_counts(C, states=["a", "b"])
    d = derived_uncertainty(fit, draws=200, seed=1)
    pi = {v.state: v for v in d.of("stationary")}
    assert pi["a"].point == pytest.approx(0.25, abs=1e-12)
    assert pi["a"].low < 0.25 < pi["a"].high and pi["a"].high - pi["a"].low < 1e-3
    assert pi["b"].low < 0.75 < pi["b"].high
    (mt,) = d.of("mixing_time")
    assert mt.point == 3 and mt.low == 3 and mt.high == 3 and mt.draws == 200
    assert d.used == 200 and d.draws == 200 and d.seed == 1
    assert "200 matrices" in d.describe() and "seed 1" in d.describe()


def test_e2_drunkards_walk_absorption_intervals():
    # Grinstead & Snell, Introduction to Probability, §11.2, Examples 11.13-11.16 (REFERENCES E2:
    # P and N seen, t and B from memory): t = N1 = (3, 4, 3), B = [[3/4,1/4],[1/2,1/2],[1/4,3/4]].
    P = np.array([[1, 0, 0, 0, 0], [.5, 0, .5, 0, 0], [0, .5, 0, .5, 0], [0, 0, .5, 0, .5], [0, 0, 0, 0, 1]])
    C = (P * 2_000_000).astype(np.int64)
    fit = fit_counts(C, states=["home", "c1", "c2", "c3", "bar"])
    d = derived_uncertainty(fit, draws=200, seed=3)
    steps = {v.state: v for v in d.of("expected_steps")}
    for s, t in (("c1", 3), ("c2", 4), ("c3", 3)):
        assert steps[s].point == pytest.approx(t, rel=1e-12)
        assert steps[s].low < t < steps[s].high and steps[s].high - steps[s].low < 0.02
    ab = {(v.state, v.target): v for v in d.of("absorption")}
    for (s, target), b in {("c1", "home"): 0.75, ("c2", "bar"): 0.5, ("c3", "bar"): 0.75}.items():
        assert ab[(s, target)].point == pytest.approx(b, rel=1e-12)
        assert ab[(s, target)].low < b < ab[(s, target)].high
    assert not d.of("mixing_time")
    assert any("no mixing time" in note for note in d.notes)
    with pytest.raises(OptionError, match="unknown derived quantity"):
        derived_uncertainty(fit, draws=10, quantities=["entropy"])


def test_posterior_intervals_shrink_with_more_data():
    """Interval widths fall like 1/sqrt(T) (asymptotic normality, common practice):
    16 times the data must at least halve every width (the expected factor is 4)."""
    truth = exact_stationary(TRUE_P.tolist())
    widths = []
    for T, seed in ((500, 21), (8000, 22)):
        path = simulate(TRUE_P, T, 1, np.random.default_rng(seed))[0]
        d = derived_uncertainty(fit_counts(count_transitions([path], 3)), draws=400, seed=seed)
        widths.append(np.array([v.high - v.low for v in d.of("stationary")]))
        if T == 8000:
            for v, t in zip(d.of("stationary"), truth):
                assert v.low <= t <= v.high
    assert np.all(widths[1] < 0.5 * widths[0]), widths


def test_posterior_intervals_cover_the_true_stationary_law():
    """Repeated data sets from TRUE_P: the 95% posterior interval of each stationary entry holds
    the true value (mpmath solve) in about 95% of 100 repetitions; binomial test at alpha = 1e-6
    against 0.95 (it would catch a coverage below about 0.80).  Credible intervals have
    approximately nominal frequentist coverage for large samples (Bernstein-von Mises, common
    practice); 2000 steps per data set, 100 draws per interval."""
    truth = exact_stationary(TRUE_P.tolist())
    R = 100
    paths = simulate(TRUE_P, 2000, R, np.random.default_rng(77))
    hits = np.zeros(3, dtype=int)
    for r, path in enumerate(paths):
        fit = fit_counts(count_transitions([path], 3))
        d = derived_uncertainty(fit, draws=100, seed=r, quantities=["stationary"])
        assert not d.of("mixing_time")
        for k, v in enumerate(d.of("stationary")):
            hits[k] += v.low <= truth[k] <= v.high
    for k in hits:
        assert stats.binomtest(int(k), R, 0.95).pvalue > ALPHA, hits


def test_expected_steps_cover_the_truth():
    """Absorbing chain of our own: transient a, b; absorbing x.  Truth t = (I - Q)^-1 1
    (G&S §11.2, Theorem 11.5; numpy.linalg.solve as the reference).  80 data sets of 40 runs of
    60 steps (absorbed long before: P(still transient) = 0.8^60 < 2e-6); coverage of the 95%
    posterior interval (100 draws) tested against 0.95 at alpha = 1e-6."""
    P = np.array([[0.5, 0.3, 0.2], [0.4, 0.4, 0.2], [0.0, 0.0, 1.0]])
    Q = P[:2, :2]
    truth = np.linalg.solve(np.eye(2) - Q, np.ones(2))
    rng = np.random.default_rng(5)
    R = 80
    hits = np.zeros(2, dtype=int)
    for r in range(R):
        runs = np.vstack([simulate(P, 60, 20, rng, start=0), simulate(P, 60, 20, rng, start=1)])
        fit = fit_counts(count_transitions(runs, 3))
        d = derived_uncertainty(fit, draws=100, seed=r, quantities=["absorption"])
        for k, v in enumerate(d.of("expected_steps")):
            hits[k] += v.low <= truth[k] <= v.high
    for k in hits:
        assert stats.binomtest(int(k), R, 0.95).pvalue > ALPHA, hits


def test_bootstrap_leaves_out_draws_with_another_structure():
    # state 0 leaves for the absorbing state 1 once in 51 departures; a bootstrap row loses that
    # transition with probability (50/51)^51 (binomial zero count), turning 0 into a closed class.
    C = np.array([[50, 1], [0, 10]])
    fit = fit_counts(C)
    D = 1000
    d = derived_uncertainty(fit, draws=D, method="bootstrap", seed=9, quantities=["stationary"])
    p_keep = 1 - (50 / 51) ** 51
    assert stats.binomtest(d.used, D, p_keep).pvalue > ALPHA
    assert any("left out" in note for note in d.notes)
    # the posterior with prior 0 keeps the observed support: every draw is used
    assert derived_uncertainty(fit, draws=200, seed=9).used == 200


def test_derived_is_a_seeded_generator():
    C = np.array([[30, 10], [5, 25]])
    fit = fit_counts(C)
    gen = iter_derived_uncertainty(fit, draws=250, seed=4, chunk=100)
    snaps = []
    while True:
        try:
            snaps.append(next(gen))
        except StopIteration as stop:
            result = stop.value
            break
    assert [s.done for s in snaps] == [100, 200, 250] and snaps[-1].total == 250
    again = derived_uncertainty(fit, draws=250, seed=4)
    assert again.values == result.values
    other = derived_uncertainty(fit, draws=250, seed=5)
    assert other.values != result.values


def test_derived_refuses_rows_without_estimate():
    fit = fit_counts(np.array([[3, 1], [0, 0]]), states=["a", "b"])
    with pytest.raises(OptionError, match="'b' is never left"):
        derived_uncertainty(fit, draws=10)
    with pytest.raises(OptionError, match="at least 2"):
        derived_uncertainty(fit_counts(np.array([[3, 1], [1, 1]])), draws=1)
    # with a prior the empty row is the prior alone and the draws work
    d = derived_uncertainty(fit_counts(np.array([[3, 1], [0, 0]]), prior=1.0), draws=50)
    assert d.prior == 1.0 and d.used == 50
