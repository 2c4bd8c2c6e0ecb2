"""The exact plan check: estimate laws, verdicts, shortest sound plans, noise.

Invented scenarios (fixtures below), closed forms and direct summation are the
references; each check names its source.
"""
from __future__ import annotations

import math
from fractions import Fraction as F

import mpmath
import numpy as np
import pytest
from hypothesis import given, strategies as st

from core.errors import OptionError, ValidationError
from core.evolution import distribution_at
from core.model import Chain, Step
from core.plan import (
    Plan,
    average_of_powers,
    bias_curve,
    check_plan,
    estimate_law,
    indicator_asymptotic_variance,
)
from core.stationary import gth


# --------------------------------------------------------------------------
# purpose-built chains (invented scenarios)
# --------------------------------------------------------------------------
ESCAPE = 1e-9


def quarantine_chain() -> Chain:
    """A parcel robot held in a quarantine bay, released with probability 1e-9 per step.

    Once out it shuttles between an aisle and a dock for ever (a fast two-state
    class with P = [[0.7, 0.3], [0.1, 0.9]], stationary law (1/4, 3/4)).  The
    release splits 1 : 3 between aisle and dock, the stationary proportions,
    so the law at step t is exactly ((1-e)^t, (1-(1-e)^t) * (1/4, 3/4)).
    """
    return Chain.from_matrix(
        [
            [F(1) - F(1, 10**9), F(1, 4 * 10**9), F(3, 4 * 10**9)],
            [0, F(7, 10), F(3, 10)],
            [0, F(1, 10), F(9, 10)],
        ],
        ids=["quarantine", "aisle", "dock"],
        name="Quarantined parcel robot (invented)",
        step=Step(1, "second"),
        exact=True,
    )


def shuttle_chain() -> Chain:
    """A shuttle bus loop of period 3: depot -> north | south -> market | station | harbour -> depot."""
    P = np.zeros((6, 6))
    P[0, 1], P[0, 2] = 0.5, 0.5
    P[1, 3], P[1, 4] = 0.2, 0.8
    P[2, 4], P[2, 5] = 0.5, 0.5
    P[3:, 0] = 1.0
    return Chain.from_matrix(
        P, ids=["depot", "north", "south", "market", "station", "harbour"], step=Step(10, "minute")
    )


def two_state(a: float, b: float) -> np.ndarray:
    return np.array([[1 - a, a], [b, 1 - b]])


def random_chain(rng, n, *, density=0.6, transient=False):
    P = rng.random((n, n)) * (rng.random((n, n)) < density)
    P[np.arange(n), (np.arange(n) + 1) % n] += 0.3  # a cycle keeps it irreducible
    if transient:  # state 0 is only left, never entered; the cycle closes through state 1
        P[1:, 0] = 0.0
        P[n - 1, 1 % n] += 0.3
    P /= P.sum(axis=1, keepdims=True)
    return P


def direct_laws(P, pi0, t_max):
    """pi0 P^t for t = 0..t_max by plain repeated multiplication."""
    out = [np.asarray(pi0, dtype=float)]
    for _ in range(t_max):
        out.append(out[-1] @ P)
    return out


# --------------------------------------------------------------------------
# the estimate law against direct summation
# --------------------------------------------------------------------------
@pytest.mark.parametrize("n", [2, 5, 9])
@pytest.mark.parametrize("stride", [1, 2, 5])
def test_average_of_powers_matches_direct_sum(n, stride):
    # Reference: the definition (1/m) sum_{j<m} P^(js), summed term by term.
    rng = np.random.default_rng(1234 + n)
    P = random_chain(rng, n)
    for m in (1, 2, 3, 10, 37):
        direct = np.zeros((n, n))
        Q = np.eye(n)
        A = np.linalg.matrix_power(P, stride)
        for _ in range(m):
            direct += Q
            Q = Q @ A
        got = average_of_powers(P, m, stride=stride)
        assert np.max(np.abs(got - direct / m)) < 1e-12


@pytest.mark.parametrize("estimator", ["final", "average"])
def test_estimate_law_matches_direct_summation(estimator):
    # Reference: pi0 P^(B+T), and (1/m) sum_{j<m} pi0 P^(B+js), summed directly.
    rng = np.random.default_rng(99)
    for trial in range(6):
        n = int(rng.integers(2, 8))
        P = random_chain(rng, n, density=0.4, transient=bool(trial % 2))
        pi0 = rng.random(n)
        pi0 /= pi0.sum()
        for B, T, s in [(0, 1, 1), (0, 7, 1), (3, 20, 3), (5, 41, 4), (11, 64, 1), (2, 50, 7)]:
            laws = direct_laws(P, pi0, B + T)
            plan = Plan(pi0, T, burn_in=B, stride=s, estimator=estimator)
            if estimator == "final":
                want = laws[B + T]
            else:
                m = T // s
                want = sum(laws[B + j * s] for j in range(m)) / m
            got = estimate_law(P, plan)
            assert np.max(np.abs(got - want)) < 1e-12
            check = check_plan(P, plan)
            assert np.max(np.abs(check.expected_estimate - want)) < 1e-12


def test_final_law_agrees_with_distribution_at_for_huge_t():
    # Two implementations of pi0 P^t (the plan's doubling and core.evolution) agree.
    rng = np.random.default_rng(7)
    P = random_chain(rng, 6, density=0.3)
    P[0] = 0
    P[0, 0], P[0, 1] = 1 - 1e-11, 1e-11  # a slow state
    pi0 = np.eye(6)[0]
    for t in (10**6, 10**10, 10**11, 10**12):
        got = estimate_law(P, Plan(0, t))
        want = distribution_at(P, pi0, t)
        assert np.max(np.abs(got - want) / np.maximum(want, 1e-300)) < 1e-10


def test_two_state_closed_form_at_a_trillion_steps():
    # Levin & Peres, Markov Chains and Mixing Times, 2nd ed., Example 1.1, (1.8) (seen):
    # pi0 P^t = pi + (1-a-b)^t (pi0 - pi) for P = [[1-a, a], [b, 1-b]]; hence the time
    # average over m steps is pi + (pi0 - pi)(1 - l^m)/(m(1 - l)), l = 1 - a - b.
    a, b = 2e-12, 3e-12
    P = two_state(a, b)
    mpmath.mp.dps = 40
    A, Bm = mpmath.mpf(a), mpmath.mpf(b)
    pi = [Bm / (A + Bm), A / (A + Bm)]
    lam = 1 - A - Bm
    pi0 = [1, 0]
    T = 10**12
    final = [pi[i] + lam**T * (pi0[i] - pi[i]) for i in range(2)]
    avg = [pi[i] + (pi0[i] - pi[i]) * (1 - lam**T) / (T * (1 - lam)) for i in range(2)]
    got_f = estimate_law(P, Plan(0, T))
    got_a = estimate_law(P, Plan(0, T, estimator="average"))
    # tolerance: ~40 squarings and ~40^2 vector steps, each a few ulps relative
    for got, want in ((got_f, final), (got_a, avg)):
        for i in range(2):
            assert abs(got[i] - float(want[i])) <= 1e-12 * float(want[i])


# --------------------------------------------------------------------------
# the trap left with probability 1e-9
# --------------------------------------------------------------------------
def _t_star(tol=0.05, eps=ESCAPE):
    # smallest t with (1-eps)^t <= tol, in 40-digit arithmetic
    mpmath.mp.dps = 40
    return int(mpmath.ceil(mpmath.log(tol) / mpmath.log(1 - mpmath.mpf(eps))))


def test_trap_short_plan_from_inside_is_misleading():
    chain = quarantine_chain()
    check = check_plan(chain, Plan("quarantine", 10**4))
    assert check.verdict == "misleading"
    # exact law ((1-e)^T, ...): the distance to the long run (0, 1/4, 3/4) is (1-e)^T
    assert check.tv == pytest.approx((1 - ESCAPE) ** 10**4, rel=1e-12)
    # min_steps of order 1e9, and exactly the smallest t with (1-e)^t <= 0.05
    # (one step of slack: rounding moves the crossing by ~1e-5 steps)
    t_star = _t_star()
    assert 10**9 <= check.min_steps < 10**10
    assert abs(check.min_steps - t_star) <= 1
    assert abs(check.min_burn_in - (t_star - 10**4)) <= 1
    assert "quarantine" in check.sentence and "year" in check.sentence


def test_trap_started_outside_or_run_long_is_sound():
    chain = quarantine_chain()
    outside = check_plan(chain, Plan("aisle", 10**4))
    assert outside.verdict == "sound"
    assert outside.tv < 1e-12
    long_run = check_plan(chain, Plan("quarantine", 10**11))
    assert long_run.verdict == "sound"
    assert long_run.tv < 1e-15
    # the trap's own share keeps its relative accuracy: (1 - 1e-9)^(1e11), about e^-100
    mpmath.mp.dps = 40
    want = float((1 - mpmath.mpf(ESCAPE)) ** 10**11)
    assert long_run.expected_estimate[0] == pytest.approx(want, rel=1e-9)


def test_trap_time_average_closed_form():
    # Time average of the trap's share: (1/m) sum_{j<m} (1-e)^j = (1 - (1-e)^m) / (m e).
    chain = quarantine_chain()
    check = check_plan(chain, Plan("quarantine", 10**4, estimator="average"))
    mpmath.mp.dps = 40
    e = mpmath.mpf(ESCAPE)

    def share(m):
        return (1 - (1 - e) ** m) / (m * e)

    assert check.expected_estimate[0] == pytest.approx(float(share(10**4)), rel=1e-10)
    assert check.verdict == "misleading"
    # the smallest m with share(m) <= 0.05 (share is decreasing), by bisection at 40 digits
    lo, hi = 1, 10**12
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if share(mid) <= 0.05:
            hi = mid
        else:
            lo = mid
    assert abs(check.min_steps - hi) <= 1
    assert 10**10 <= check.min_steps < 10**11


# --------------------------------------------------------------------------
# the period-3 shuttle
# --------------------------------------------------------------------------
def test_period_three_final_step_is_misleading_and_never_fixed():
    check = check_plan(shuttle_chain(), Plan("depot", 300))
    # P^300 from the depot is back at the depot (300 = 3 * 100): the estimate is the depot
    # alone, while each cyclic subclass holds 1/3 of the long run (a period-d chain spends
    # 1/d of its time in each subclass; common practice), so TV = 2/3.
    assert check.verdict == "misleading"
    assert check.expected_estimate[0] == pytest.approx(1.0, abs=1e-15)
    assert check.tv == pytest.approx(2 / 3, abs=1e-12)
    assert check.period == 3
    assert check.min_steps is None and "period 3" in check.min_steps_reason
    assert check.min_burn_in is None
    assert "no run length" in check.sentence


def test_period_three_time_average_is_sound():
    check = check_plan(shuttle_chain(), Plan("depot", 300, estimator="average"))
    assert check.verdict == "sound"
    # 300 samples cover 100 whole rotations: each subclass is seen exactly 1/3 of the time
    P = shuttle_chain().matrix()
    pi = gth(P)
    assert np.max(np.abs(check.long_run - pi)) < 1e-15
    assert check.tv < 0.05
    assert check.min_steps is not None and check.min_steps <= 300


def test_period_three_stride_sharing_the_period_never_converges():
    chain = shuttle_chain()
    bad = check_plan(chain, Plan("depot", 300, estimator="average", stride=3))
    assert bad.verdict == "misleading"
    assert bad.min_steps is None and "stride" in bad.min_steps_reason
    # samples every 3rd step from the depot see only the depot
    assert bad.limit_estimate[0] == pytest.approx(1.0, abs=1e-12)
    good = check_plan(chain, Plan("depot", 300, estimator="average", stride=2))
    assert good.verdict == "sound"


def test_flip_flop_start_split_evenly_is_sound_at_fixed_times():
    # The two-cycle [[0,1],[1,0]] from (1/2, 1/2) is stationary: the final step is exact.
    P = np.array([[0.0, 1.0], [1.0, 0.0]])
    check = check_plan(P, Plan([0.5, 0.5], 101))
    assert check.verdict == "sound" and check.tv == 0.0
    assert check.min_steps == 1 and check.min_burn_in == 0


# --------------------------------------------------------------------------
# shortest sound plans are tight
# --------------------------------------------------------------------------
@given(st.integers(0, 10**6), st.integers(2, 6), st.booleans(), st.sampled_from([0.02, 0.05, 0.2]))
def test_min_steps_and_burn_in_are_tight(seed, n, transient, tol):
    rng = np.random.default_rng(seed)
    P = random_chain(rng, n, density=0.3, transient=transient)
    P = 0.05 * np.eye(n) + 0.95 * P  # aperiodic
    for est, B, T in (("final", 3, 5), ("average", 2, 40)):
        plan = Plan(0, T, burn_in=B, estimator=est, tolerance=tol)
        check = check_plan(P, plan)
        assert check.min_steps is not None and check.min_burn_in is not None
        at = check_plan(P, Plan(0, check.min_steps, burn_in=B, estimator=est, tolerance=tol))
        assert at.verdict == "sound"
        if check.min_steps > 1:
            below = check_plan(P, Plan(0, check.min_steps - 1, burn_in=B, estimator=est, tolerance=tol))
            assert below.verdict == "misleading"
        at_b = check_plan(P, Plan(0, T, burn_in=check.min_burn_in, estimator=est, tolerance=tol))
        assert at_b.verdict == "sound"
        if check.min_burn_in > 0:
            below_b = check_plan(P, Plan(0, T, burn_in=check.min_burn_in - 1, estimator=est, tolerance=tol))
            assert below_b.verdict == "misleading"


# --------------------------------------------------------------------------
# asymptotic variance and noise
# --------------------------------------------------------------------------
@pytest.mark.parametrize("a,b", [(0.3, 0.1), (0.9, 0.8), (1e-3, 2e-3), (0.5, 0.5)])
def test_two_state_asymptotic_variance_closed_form(a, b):
    # Closed form for P = [[1-a, a], [b, 1-b]] (from memory, the standard two-state
    # result): sigma^2 of the indicator of state 1 is ab(2-a-b)/(a+b)^3.  Cross-check:
    # sigma^2 = gamma_0 + 2 sum_k gamma_k with gamma_k = pi_0 pi_1 (1-a-b)^k (LPW (1.8)).
    s2 = indicator_asymptotic_variance(two_state(a, b))
    closed = a * b * (2 - a - b) / (a + b) ** 3
    assert s2[1] == pytest.approx(closed, rel=1e-10)
    assert s2[0] == pytest.approx(closed, rel=1e-10)  # 1{X=0} = 1 - 1{X=1}
    p0, p1, lam = b / (a + b), a / (a + b), 1 - a - b
    K = int(60 / max(1e-12, -math.log(abs(lam)))) if lam != 0 else 1
    series = p0 * p1 * (1 + 2 * sum(lam**k for k in range(1, min(K, 10**6) + 1)))
    assert s2[1] == pytest.approx(series, rel=1e-8)


def test_asymptotic_variance_land_of_oz_from_fundamental_matrix():
    # Grinstead & Snell, Introduction to Probability, Example 11.1 (P, seen) and §11.5
    # (Z = (1/75)[[86,3,-14],[6,63,6],[-14,3,86]], value from memory, verified exactly in
    # the shared reference list E1); sigma_j^2 = pi_j (2 Z_jj - 1 - pi_j) (Kemeny & Snell,
    # Finite Markov Chains, ch. 4, from memory).
    P = np.array([[0.5, 0.25, 0.25], [0.5, 0.0, 0.5], [0.25, 0.25, 0.5]])
    Z = [F(86, 75), F(63, 75), F(86, 75)]
    pi = [F(2, 5), F(1, 5), F(2, 5)]
    want = [p * (2 * z - 1 - p) for p, z in zip(pi, Z)]
    got = indicator_asymptotic_variance(P)
    for g, w in zip(got, want):
        assert g == pytest.approx(float(w), rel=1e-13)


def test_asymptotic_variance_matches_autocovariance_series():
    # sigma_j^2 = gamma_0 + 2 sum_{k>=1} gamma_k, gamma_k = pi_j (P^k)_jj - pi_j^2 (the
    # Markov-chain CLT variance; common practice), summed until the terms vanish.
    rng = np.random.default_rng(5)
    P = random_chain(rng, 5, density=0.5)
    pi = gth(P)
    s2 = indicator_asymptotic_variance(P)
    Q = np.eye(5)
    series = pi * (1 - pi)
    for _ in range(400):
        Q = Q @ P
        series = series + 2 * (pi * np.diag(Q) - pi**2)
    assert np.max(np.abs(s2 - series) / series) < 1e-10


def test_final_step_noise_is_binomial():
    check = check_plan(shuttle_chain(), Plan("depot", 301, replicates=400))
    p = check.expected_estimate
    assert np.allclose(check.noise_sd, np.sqrt(p * (1 - p) / 400), rtol=1e-14, atol=0)


def test_noise_between_closed_classes():
    # From 'hub', half the replicates are absorbed in 'left' and half in 'right' (a fair
    # split, invented); each replicate's time average of 'left' tends to 0 or 1, so the
    # spread between replicates is sqrt(1/4 / R) whatever the run length.
    P = np.array([[1, 0, 0], [0.25, 0.5, 0.25], [0, 0, 1.0]])
    check = check_plan(P, Plan(1, 10**6, estimator="average", replicates=25))
    assert check.noise_sd[0] == pytest.approx(0.5 / 5, rel=1e-12)
    assert check.noise_sd[2] == pytest.approx(0.5 / 5, rel=1e-12)
    assert check.verdict == "sound"


# --------------------------------------------------------------------------
# against simulation (seeded; statistical tolerances stated)
# --------------------------------------------------------------------------
def _simulate(P, pi0, steps, R, rng):
    """All states visited by R replicates, shape (steps + 1, R)."""
    cum = np.cumsum(P, axis=1)
    cum[:, -1] = 1.0
    x = rng.choice(len(pi0), size=R, p=pi0)
    path = [x]
    for _ in range(steps):
        u = rng.random(R)
        x = np.minimum((u[:, None] > cum[x]).sum(axis=1), len(pi0) - 1)
        path.append(x)
    return np.array(path)


def _pump():
    # Invented: a pump's condition (good, worn, failed, under repair), one step per day.
    return np.array(
        [
            [0.90, 0.08, 0.02, 0.00],
            [0.00, 0.85, 0.10, 0.05],
            [0.00, 0.00, 0.30, 0.70],
            [0.60, 0.10, 0.00, 0.30],
        ]
    )


def test_final_step_estimate_against_simulation():
    # Counts of R replicates at step B+T are multinomial(R, expected_estimate):
    # chi-square goodness of fit at alpha = 1e-6.
    from scipy.stats import chisquare

    P = _pump()
    plan = Plan(0, 9, burn_in=3, replicates=20000)
    check = check_plan(P, plan)
    rng = np.random.default_rng(1234)
    path = _simulate(P, check.start_law, 12, plan.replicates, rng)
    counts = np.bincount(path[-1], minlength=4)
    assert chisquare(counts, check.expected_estimate * plan.replicates).pvalue > 1e-6
    # and per state within 5 binomial standard errors (noise_sd is that standard error)
    share = counts / plan.replicates
    assert np.all(np.abs(share - check.expected_estimate) <= 5 * check.noise_sd)


def test_time_average_estimate_and_noise_against_simulation():
    P = _pump()
    R, B, T, s = 1000, 4, 1200, 2
    pi = gth(P)
    # (1) mean: from a fixed start, the mean of R replicate averages vs the exact law,
    #     within 5 empirical standard errors per state (two-sided normal tail 5.7e-7).
    check = check_plan(P, Plan(0, T, burn_in=B, stride=s, estimator="average", replicates=R))
    rng = np.random.default_rng(4321)
    path = _simulate(P, check.start_law, B + T, R, rng)
    samples = path[B : B + T : s]  # times B, B+s, ..., B+(m-1)s
    m = samples.shape[0]
    assert m == T // s
    per_rep = np.stack([(samples == j).mean(axis=0) for j in range(4)], axis=1)  # (R, 4)
    se = per_rep.std(axis=0, ddof=1) / math.sqrt(R)
    assert np.all(np.abs(per_rep.mean(axis=0) - check.expected_estimate) <= 5 * se)
    # (2) variance: from the stationary start, the exact variance of an m-sample average
    #     of the sampled chain A = P^s is (1/m)[g0 + 2 sum_{k<m} (1 - k/m) g_k], g_k the
    #     autocovariances (common practice).  The large-m formula used by the plan check
    #     must agree with it to within the neglected terms, bounded by
    #     2 sum_{k>=m} |g_k| + (2/m) sum_k k |g_k| (over m) ...
    stat = check_plan(P, Plan(pi, T, stride=s, estimator="average", replicates=R))
    A = np.linalg.matrix_power(P, s)
    Q = np.eye(4)
    g = [pi * (1 - pi)]
    for _ in range(3 * m):
        Q = Q @ A
        g.append(pi * np.diag(Q) - pi**2)
    g = np.array(g)
    k = np.arange(len(g))[:, None]
    exact_var = (g[0] + 2 * ((1 - k[1:m] / m) * g[1:m]).sum(axis=0)) / m
    bound = (2 * np.abs(g[m:]).sum(axis=0) + 2 / m * (k * np.abs(g)).sum(axis=0)) / m
    plan_var = stat.noise_sd**2 * R
    assert np.all(np.abs(plan_var - exact_var) <= bound + 1e-15)
    # ... and the simulated spread of R stationary replicates agrees with the exact
    #     variance within 5 standard errors of a sample variance, sqrt(2/(R-1)) relative
    #     (normal approximation of the m-sample averages).
    path = _simulate(P, pi, T, R, np.random.default_rng(777))
    samples = path[0:T:s]
    per_rep = np.stack([(samples == j).mean(axis=0) for j in range(4)], axis=1)
    emp = per_rep.var(axis=0, ddof=1)
    assert np.all(np.abs(emp / exact_var - 1) <= 5 * math.sqrt(2 / (R - 1)))


# --------------------------------------------------------------------------
# the plan object, errors and JSON
# --------------------------------------------------------------------------
@pytest.mark.parametrize(
    "kwargs,match",
    [
        (dict(steps=0), "steps must be between 1"),
        (dict(steps=10, burn_in=-1), "burn_in must be between 0"),
        (dict(steps=10, stride=0), "stride must be between 1"),
        (dict(steps=10, replicates=0), "replicates must be between 1"),
        (dict(steps=10, estimator="median"), "estimator must be 'final' or 'average'"),
        (dict(steps=10, tolerance=0.0), "tolerance must be between 0 and 1"),
        (dict(steps=10, tolerance=1.5), "tolerance must be between 0 and 1"),
        (dict(steps=5, stride=6, estimator="average"), "stride 6 is longer than the run"),
        (dict(steps=2.5), "steps must be a whole number"),
    ],
)
def test_plan_rejects_bad_values(kwargs, match):
    with pytest.raises(OptionError, match=match):
        Plan(0, **kwargs)


@pytest.mark.parametrize(
    "start,match",
    [
        (7, "start state index 7 is out of range"),
        ("nowhere", "start 'nowhere': no such state"),
        ([0.5, 0.6, 0.0], "sums to 1.1"),
        ([1.0, 0.0], "shape"),
        ([1.5, -0.5, 0.0], "negative"),
    ],
)
def test_bad_start_is_named(start, match):
    with pytest.raises(OptionError, match=match):
        check_plan(quarantine_chain(), Plan(start, 10))


def test_invalid_chain_raises_validation_error():
    chain = Chain.from_matrix([[0.5, 0.4], [0.5, 0.5]])
    with pytest.raises(ValidationError, match="sum to 0.9"):
        check_plan(chain, Plan(0, 10))


def test_bad_matrix_raises_value_error():
    with pytest.raises(ValueError, match="row 1 of P sums to"):
        check_plan(np.array([[1.0, 0.0], [0.2, 0.2]]), Plan(0, 5))


def test_json_has_the_issue_keys_by_state_id():
    import json

    from core.jsonout import dumps

    check = check_plan(quarantine_chain(), Plan("quarantine", 10**4, estimator="average"))
    doc = json.loads(dumps(check))
    for key in ("expected_estimate", "long_run", "tv", "verdict", "min_steps", "noise_sd"):
        assert key in doc
    assert set(doc["expected_estimate"]) == {"quarantine", "aisle", "dock"}
    assert doc["verdict"] == "misleading"
    assert isinstance(doc["min_steps"], int)
    assert doc["plan"]["start"] == "quarantine"
    assert doc["long_run"]["quarantine"] == 0.0
    assert doc["step"] == {"value": 1.0, "unit": "second"}
    periodic = json.loads(dumps(check_plan(shuttle_chain(), Plan("depot", 300))))
    assert periodic["min_steps"] is None and "period 3" in periodic["min_steps_reason"]


def test_sentence_speaks_in_the_step_unit():
    check = check_plan(shuttle_chain(), Plan("depot", 300, estimator="average"))
    assert check.sentence.startswith("Sound")
    assert "minute" in check.sentence or "hours" in check.sentence or "days" in check.sentence
    bad = check_plan(quarantine_chain(), Plan("quarantine", 10**4))
    assert bad.sentence.startswith("Misleading")
    # 3.0e9 seconds is about 94.9 years (365.25-day years)
    assert "94.9 years" in bad.sentence


def test_plan_against_the_replicate_simulation_engine():
    # The plan's exact laws against core.simulate (an independent sampler: exact integer
    # alias tables), which follows the same run convention: a burn-in of B steps, then T
    # steps; the ensemble at step B + T, the kept draws at B, B + s, ..., B + (m-1)s with
    # m = T // s.  The same (B, T, s) is given to both, with no translation.
    from scipy.stats import chisquare

    from core.simulate import compare, run

    P = _pump()
    R, B, T, s = 4000, 3, 600, 3
    final = check_plan(P, Plan(1, T, burn_in=B, replicates=R))
    res = run(P, replicates=R, steps=T, burn_in=B, start=1, seed=20240601)
    assert res.step == B + T
    # multinomial counts at the final step: chi-square at alpha = 1e-6
    assert chisquare(res.ensemble, final.expected_estimate * R).pvalue > 1e-6
    # the engine's own exact law at its final step is the plan's (two implementations, 1e-12)
    assert np.allclose(compare(res, P).exact_at_step, final.expected_estimate, rtol=0, atol=1e-12)
    avg = check_plan(P, Plan(1, T, burn_in=B, stride=s, estimator="average", replicates=R))
    m = T // s
    res = run(P, replicates=R, steps=T, burn_in=B, stride=s, start=1, seed=99, tracked=R)
    assert res.kept == m
    per_rep = res.replicate_counts() / m  # (R, n) time averages of every replicate
    se = per_rep.std(axis=0, ddof=1) / math.sqrt(R)
    # mean within 5 standard errors per state (two-sided normal tail 5.7e-7)
    assert np.all(np.abs(per_rep.mean(axis=0) - avg.expected_estimate) <= 5 * se)
    assert np.allclose(res.time_average, per_rep.mean(axis=0), rtol=1e-12)
    # the exact mean of the kept draws the engine reports is the plan's estimate (1e-12)
    assert np.allclose(compare(res, P).window_mean, avg.expected_estimate, rtol=0, atol=1e-12)


@pytest.mark.parametrize("estimator,B,s", [("final", 0, 1), ("final", 7, 1), ("average", 0, 1), ("average", 5, 3)])
def test_bias_curve_matches_pointwise_checks(estimator, B, s):
    # The shared, incremental curve against one independent check per run length.
    rng = np.random.default_rng(11)
    P = random_chain(rng, 6, density=0.3, transient=True)
    plan = Plan(0, max(s, 1), burn_in=B, stride=s, estimator=estimator)
    grid = [s, 3 * s + 1, 10 * s, 50, 50, 999, 10**6, 10**9 + 7, 4 * s]
    curve = bias_curve(P, plan, grid)
    from dataclasses import replace

    for T, y in zip(grid, curve):
        want = check_plan(P, replace(plan, steps=T)).tv
        assert y == pytest.approx(want, rel=1e-9, abs=1e-15)
    with pytest.raises(OptionError, match="run lengths must be between 1"):
        bias_curve(P, plan, [0])
