"""Law at step t (huge t), total variation, d(t), mixing time."""
import itertools
from fractions import Fraction as F
from math import comb

import mpmath
import numpy as np
import pytest

from core.errors import LimitError
from core.evolution import (
    PowerLadder,
    distribution_at,
    matrix_power,
    mixing,
    mixing_time,
    mixing_time_from,
    stochastic_product,
    tv_curve,
    tv_distance,
    worst_tv,
)

OZ = [[0.5, 0.25, 0.25], [0.5, 0, 0.5], [0.25, 0.25, 0.5]]
EHRENFEST4 = [[0, 1, 0, 0, 0], [0.25, 0, 0.75, 0, 0], [0, 0.5, 0, 0.5, 0], [0, 0, 0.75, 0, 0.25], [0, 0, 0, 1, 0]]


def two_state(p, q):
    return np.array([[1 - p, p], [q, 1 - q]], dtype=float)


def test_tv_distance_definitions():
    # LPW 2nd ed. (4.1) = Proposition 4.2: max_A |mu(A) - nu(A)| = 1/2 sum |mu - nu| (seen).
    mu = np.array([0.5, 0.3, 0.2, 0.0])
    nu = np.array([0.1, 0.3, 0.4, 0.2])
    best = max(abs(mu[list(A)].sum() - nu[list(A)].sum())
               for r in range(5) for A in itertools.combinations(range(4), r))
    assert tv_distance(mu, nu) == pytest.approx(best, rel=1e-15)
    assert tv_distance(mu, mu) == 0


def test_two_state_power_closed_form():
    # LPW 2nd ed. Example 1.1, (1.8) (seen): P^t = Pi + lambda^t (I - Pi), lambda = 1 - p - q;
    # fixture p = 3/10, q = 1/10 of the reference list E8 (computed exactly).
    p, q = F(3, 10), F(1, 10)
    P = two_state(float(p), float(q))
    pi = [q / (p + q), p / (p + q)]
    lam = 1 - p - q
    for t in (1, 5, 10):
        exact = [[pi[j] + lam**t * ((1 if i == j else 0) - pi[j]) for j in range(2)] for i in range(2)]
        assert np.max(np.abs(matrix_power(P, t) - np.array(exact, dtype=float)) / np.array(exact, dtype=float)) <= 1e-14


def test_two_state_d_and_mixing_time():
    # Reference list E8 (computed from LPW Example 4.1 / (1.8)): d(t) = (3/4)(3/5)^t for t = 0..11;
    # t_mix(1/4) = 3, t_mix(1/100) = 9.
    P = two_state(0.3, 0.1)
    for t in range(12):
        assert worst_tv(P, t) == pytest.approx(float(F(3, 4) * F(3, 5) ** t), rel=1e-13)
    assert mixing_time(P) == 3
    assert mixing_time(P, 0.01) == 9


def test_land_of_oz_powers():
    # Reference list E1 (exact): P^2 and P^6; G&S Example 11.2 shows P^6 to 3 decimals (seen).
    P2 = [[F(7, 16), F(3, 16), F(3, 8)], [F(3, 8), F(1, 4), F(3, 8)], [F(3, 8), F(3, 16), F(7, 16)]]
    P6 = [[F(1639, 4096), F(819, 4096), F(819, 2048)], [F(819, 2048), F(205, 1024), F(819, 2048)],
          [F(819, 2048), F(819, 4096), F(1639, 4096)]]
    for t, ref in ((2, P2), (6, P6)):
        ref = np.array(ref, dtype=float)
        assert np.max(np.abs(matrix_power(OZ, t) - ref) / ref) <= 1e-15
    assert np.allclose(distribution_at(OZ, [1, 0, 0], 6), np.array(P6, dtype=float)[0], rtol=1e-15, atol=0)


def test_land_of_oz_mixing():
    # Reference list E1 (computed): d(t) = (4/5)(1/4)^t, so t_mix(1/4) = 1 and t_mix(1e-3) = 5.
    for t in range(8):
        assert worst_tv(OZ, t) == pytest.approx(0.8 * 0.25**t, rel=1e-12)
    assert mixing_time(OZ) == 1
    assert mixing_time(OZ, 1e-3) == 5


def lazy_hypercube(n):
    N = 2**n
    P = np.zeros((N, N))
    for x in range(N):
        P[x, x] = 0.5
        for i in range(n):
            P[x, x ^ (1 << i)] = 0.5 / n
    return P


def weight_projection(n):
    # LPW 2nd ed. Lemma 2.5 (seen): the Hamming weight of the lazy hypercube walk is a Markov chain.
    P = np.zeros((n + 1, n + 1))
    for k in range(n + 1):
        if k > 0:
            P[k, k - 1] = k / (2 * n)
        if k < n:
            P[k, k + 1] = (n - k) / (2 * n)
        P[k, k] = 0.5
    return P


HYPERCUBE_TMIX = {1: 1, 2: 1, 3: 3, 4: 5, 5: 6, 6: 8, 7: 10, 8: 12, 9: 14, 10: 16}


@pytest.mark.parametrize("n", [1, 2, 3, 4, 5])
def test_hypercube_mixing_time_full_chain(n):
    # Reference list E8 (computed exactly on the weight projection, cross-checked on the full chain
    # for n = 3, 4): exact t_mix(1/4) of the lazy walk on {0,1}^n.
    assert mixing_time(lazy_hypercube(n)) == HYPERCUBE_TMIX[n]


@pytest.mark.parametrize("n", sorted(HYPERCUBE_TMIX))
def test_hypercube_mixing_time_projection(n):
    # From 0, P^t(0, .) is uniform on each Hamming sphere, so the distance of the full chain equals
    # that of the projection (LPW Lemma 2.5); the walk is transitive, so 0 is a worst start.
    pi = np.array([comb(n, k) for k in range(n + 1)]) / 2**n
    e = np.zeros(n + 1)
    e[0] = 1
    assert mixing_time_from(weight_projection(n), e, 0.25, target=pi) == HYPERCUBE_TMIX[n]


def test_huge_t_two_state_closed_form():
    # distribution_at for t = 1e15 against the closed form of LPW (1.8) at 50 digits.
    p, q = 3e-14, 1e-14
    P = two_state(p, q)
    t = 10**15
    got = distribution_at(P, [1.0, 0.0], t)
    with mpmath.workdps(50):
        mp, mq = mpmath.mpf(p), mpmath.mpf(q)
        pi1 = mp / (mp + mq)
        lam = 1 - mp - mq
        x1 = pi1 * (1 - lam**t)
    assert abs(got[1] / float(x1) - 1) <= 1e-12
    assert abs(got[0] / float(1 - x1) - 1) <= 1e-12


def test_tiny_gap_two_state_mixing_time_exact():
    # p = q = 1e-13: d(t) = (1/2)(1 - 2p)^t, so t_mix(1/4) = ceil(log(1/2)/log(1 - 2p)) (LPW (1.8));
    # ~3.5e12 steps in about 80 products (issue requirement), exact to the step here.
    p = 1e-13
    m = mixing(two_state(p, p))
    with mpmath.workdps(50):
        ref = int(mpmath.ceil(mpmath.log(mpmath.mpf(0.5)) / mpmath.log(1 - 2 * mpmath.mpf(p))))
    assert m.steps == ref
    assert m.products <= 90


def mp_mixing_time(P, eps, dps=50):
    """t_mix(eps) of the chain whose off-diagonals are exactly the floats of P, via an mpmath
    eigendecomposition at `dps` digits (P^t = V diag(w^t) V^-1) and integer bisection."""
    n = len(P)
    with mpmath.workdps(dps):
        A = mpmath.matrix(n, n)
        for i in range(n):
            for j in range(n):
                if i != j:
                    A[i, j] = mpmath.mpf(float(P[i, j]))
            A[i, i] = 1 - mpmath.fsum(A[i, j] for j in range(n) if j != i)
        w, V = mpmath.eig(A)
        Vi = V**-1
        k1 = min(range(n), key=lambda k: abs(w[k] - 1))
        pi = [Vi[k1, j] * V[0, k1] for j in range(n)]
        s = mpmath.fsum(pi)
        pi = [x / s for x in pi]

        def d(t):
            D = mpmath.diag([x**t for x in w])
            Pt = V * D * Vi
            return max(mpmath.fsum(abs(mpmath.re(Pt[i, j]) - mpmath.re(pi[j])) for j in range(n)) / 2
                       for i in range(n))

        hi = 1
        while d(hi) > eps:
            hi *= 2
        lo = hi // 2  # d(lo) > eps (or lo = 0)
        while hi - lo > 1:
            mid = (lo + hi) // 2
            if d(mid) > eps:
                lo = mid
            else:
                hi = mid
        return hi


@pytest.mark.parametrize("coupling", [1e-6, 1e-10, 1e-13])
def test_nearly_decomposable_mixing_time_vs_mpmath(coupling):
    # Issue requirement: 6 significant digits when the spectral gap is ~1e-13.
    d = coupling
    P = np.array([
        [0.6, 0.4 - d, d, 0.0],
        [0.3, 0.7, 0.0, 0.0],
        [0.0, 0.0, 0.2, 0.8],
        [0.0, 2 * d, 0.5, 0.5 - 2 * d],
    ])
    ref = mp_mixing_time(P, mpmath.mpf("0.25"))
    got = mixing(P)
    assert abs(got.steps - ref) <= 1e-6 * ref
    assert got.products <= 2 * ref.bit_length() + 2


def test_plain_squaring_would_drift_but_ours_stays_stochastic():
    # Why the products are restored (module notes): row sums stay 1 while numpy's matrix_power drifts.
    P = two_state(1e-13, 1e-13)
    ours = matrix_power(P, 2**40)
    assert np.max(np.abs(ours.sum(axis=1) - 1)) <= 2e-16
    plain = np.linalg.matrix_power(P, 2**40)
    assert np.max(np.abs(plain.sum(axis=1) - 1)) > 1e-6


def test_stochastic_product_keeps_small_entries():
    A = np.array([[1 - 1e-15, 1e-15], [0.5, 0.5]])
    C = stochastic_product(A, A)
    assert C[0, 1] == pytest.approx(1e-15 * (1 - 1e-15) + 1e-15 * 0.5, rel=1e-15)
    assert np.all(C.sum(axis=1) == 1)


def brute_force_tmix(P, eps, pi, tmax=5000):
    Pt = np.eye(len(P))
    for t in range(tmax):
        if 0.5 * np.abs(Pt - pi).sum(axis=1).max() <= eps:
            return t
        Pt = Pt @ P
    raise AssertionError("not mixed")


@pytest.mark.parametrize("seed", range(6))
def test_mixing_time_matches_step_by_step(seed):
    from core.stationary import gth

    rng = np.random.default_rng(1234 + seed)
    n = 7
    P = rng.random((n, n)) * (rng.random((n, n)) < 0.5)
    P[np.arange(n), (np.arange(n) + 1) % n] += 0.02
    P[0, 0] += 0.01
    P /= P.sum(axis=1, keepdims=True)
    pi = gth(P)
    for eps in (0.25, 0.05, 1e-3):
        assert mixing_time(P, eps) == brute_force_tmix(P, eps, pi)


def test_mixing_time_with_transient_states():
    # One aperiodic closed class {1, 2} reached from transient 0: d(t) is taken over all starts
    # to the unique stationary law (LPW (4.22); issue requirement).
    P = np.array([[0.9, 0.1, 0.0], [0.0, 0.5, 0.5], [0.0, 0.3, 0.7]])
    pi = np.array([0, 0.375, 0.625])
    assert mixing_time(P) == brute_force_tmix(P, 0.25, pi)
    assert mixing_time(P, 0.01) == brute_force_tmix(P, 0.01, pi)


def test_mixing_time_undefined():
    # Several closed classes (drunkard's walk) or a periodic class (Ehrenfest): d(t) does not tend to 0.
    drunk = [[1, 0, 0], [0.5, 0, 0.5], [0, 0, 1]]
    assert mixing_time(drunk) is None
    assert mixing(drunk).reason == "several closed classes"
    assert mixing_time(EHRENFEST4) is None
    assert mixing(EHRENFEST4).reason == "periodic"


def test_mixing_time_beyond_range():
    P = two_state(1e-300, 1e-300)
    assert mixing(P).reason == "too large"
    with pytest.raises(LimitError, match="exceeds"):
        mixing_time(P)


def test_bounded_memory_ladder_gives_same_answer():
    P = np.array([[0.6, 0.4 - 1e-9, 1e-9], [0.3, 0.7, 0.0], [0.0, 2e-9, 1 - 2e-9]])
    full = mixing(PowerLadder(P))
    small = PowerLadder(P, budget=3 * 8 * 9)  # room for three 3x3 matrices
    lean = mixing(small)
    assert lean.steps == full.steps
    assert lean.products > full.products  # recomputation instead of storage


def test_tv_curve_and_start_mixing():
    P = np.array(OZ)
    pi = np.array([0.4, 0.2, 0.4])
    steps = [0, 1, 2, 3, 10, 10, 40]
    curve = tv_curve(P, [0, 1, 0], steps)
    for t, c in zip(steps, curve):
        assert c == pytest.approx(tv_distance(distribution_at(P, [0, 1, 0], t), pi), abs=1e-16)
    # From N: TV = (4/5)(1/4)^t exactly (the worst start of E1; computed).
    assert curve[1] == pytest.approx(0.2, rel=1e-14)
    assert mixing_time_from(P, [0, 1, 0], 1e-3) == 5
    assert mixing_time_from(EHRENFEST4, [1, 0, 0, 0, 0], 0.25) is None
    with pytest.raises(ValueError, match="sorted"):
        tv_curve(P, [1, 0, 0], [3, 1])


def test_total_variation_never_increases():
    # LPW 2nd ed. Exercise 4.2 (seen): d(t) is non-increasing.
    rng = np.random.default_rng(1234)
    P = rng.random((6, 6)) ** 3
    P /= P.sum(axis=1, keepdims=True)
    ladder = PowerLadder(P)
    d = [worst_tv(ladder, t) for t in range(30)]
    assert all(b <= a + 1e-15 for a, b in zip(d, d[1:]))


def test_bad_step_counts():
    with pytest.raises(ValueError, match=">= 0"):
        distribution_at(OZ, [1, 0, 0], -1)
    with pytest.raises(ValueError, match="too large"):
        distribution_at(OZ, [1, 0, 0], 2**70)
    with pytest.raises(ValueError, match="whole number"):
        matrix_power(OZ, 2.5)
    with pytest.raises(ValueError, match="closed classes"):
        worst_tv([[1, 0], [0, 1]], 3)
    with pytest.raises(ValueError, match="epsilon"):
        mixing_time(OZ, 1.5)
