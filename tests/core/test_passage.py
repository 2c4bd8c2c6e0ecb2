"""Absorption probabilities, expected steps, Cesaro limit, mean first passage, Kemeny's constant."""
from fractions import Fraction as F

import mpmath
import numpy as np
import pytest

from core.passage import (
    absorption,
    hitting_times,
    kemeny_constant,
    limit_law,
    limit_matrix,
    mean_first_passage,
)

OZ = [[0.5, 0.25, 0.25], [0.5, 0, 0.5], [0.25, 0.25, 0.5]]
DRUNKARD = [[1, 0, 0, 0, 0], [0.5, 0, 0.5, 0, 0], [0, 0.5, 0, 0.5, 0], [0, 0, 0.5, 0, 0.5], [0, 0, 0, 0, 1]]
EHRENFEST4 = [[0, 1, 0, 0, 0], [0.25, 0, 0.75, 0, 0], [0, 0.5, 0, 0.5, 0], [0, 0, 0.75, 0, 0.25], [0, 0, 0, 1, 0]]


def close(x, ref, rtol):
    x = np.asarray(x, dtype=float)
    ref = np.asarray([[float(v) for v in r] for r in ref] if np.ndim(ref) == 2 else [float(v) for v in ref])
    return np.all(np.abs(x - ref) <= rtol * np.abs(ref))


def gamblers_ruin(N, p):
    """States 0..N, 0 and N absorbing, up with p, down with 1-p."""
    P = np.zeros((N + 1, N + 1))
    P[0, 0] = P[N, N] = 1
    for i in range(1, N):
        P[i, i + 1] = float(p)
        P[i, i - 1] = float(1 - p)
    return P


def test_drunkards_walk():
    # Grinstead & Snell, Introduction to Probability, §11.2, Examples 11.13-11.16: t = (3, 4, 3),
    # B = [[3/4,1/4],[1/2,1/2],[1/4,3/4]] (memory, follow from the seen N); variance (8, 8, 8) from
    # the G&S §11.2 exercise formula (2N - I)t - t_sq (memory; reference list E2, verified).
    a = absorption(DRUNKARD)
    assert a.closed == (0, 2)
    assert close(a.expected_steps[1:4], [3, 4, 3], 1e-15)
    assert close(a.probabilities[1:4], [[F(3, 4), F(1, 4)], [F(1, 2), F(1, 2)], [F(1, 4), F(3, 4)]], 1e-15)
    assert close(a.steps_variance[1:4], [8, 8, 8], 1e-14)
    assert list(a.probabilities[0]) == [1, 0] and list(a.probabilities[4]) == [0, 1]
    assert a.expected_steps[0] == 0 and a.expected_steps[4] == 0


def test_drunkards_walk_two_thirds_right():
    # G&S §11.2 exercise, step right w.p. 2/3 (values seen in a worked solution; reference list E2):
    # Nc = (17/5, 18/5, 11/5), NR = [[7/15,8/15],[1/5,4/5],[1/15,14/15]].
    P = gamblers_ruin(4, F(2, 3))
    a = absorption(P)
    assert close(a.expected_steps[1:4], [F(17, 5), F(18, 5), F(11, 5)], 4e-16)
    assert close(a.probabilities[1:4], [[F(7, 15), F(8, 15)], [F(1, 5), F(4, 5)], [F(1, 15), F(14, 15)]], 4e-16)


def test_land_of_oz_rain_absorbing():
    # G&S §11.2 Exercise 6 (text seen in student write-ups; reference list E1): Nc = (8/3, 10/3), NR = (1, 1).
    P = np.array(OZ)
    P[0] = [1, 0, 0]
    a = absorption(P)
    assert close(a.expected_steps[1:], [F(8, 3), F(10, 3)], 4e-16)
    assert np.all(a.probabilities[1:, 0] == 1)


@pytest.mark.parametrize(
    "i, N, p, prob, steps",
    [
        # Biased gambler's ruin closed form (standard, memory), fixtures of the reference list E9
        # checked there by exact fundamental-matrix solves.
        (3, 10, F(2, 5), F(2432, 58025), F(29951, 2321)),
        (3, 10, F(1, 2), F(3, 10), F(21)),
        (5, 10, F(9, 19), F(59049, 159049), F(204755, 8371)),
        (1, 4, F(2, 3), F(8, 15), F(17, 5)),
    ],
)
def test_gamblers_ruin(i, N, p, prob, steps):
    a = absorption(gamblers_ruin(N, p))
    assert abs(a.probabilities[i, 1] / float(prob) - 1) <= 1e-14
    assert abs(a.expected_steps[i] / float(steps) - 1) <= 1e-14


def test_fair_gamblers_ruin_closed_form():
    # LPW 2nd ed. Proposition 2.1, (2.1)-(2.2) (seen): P_k{hit n} = k/n, E_k tau = k(n - k).
    n = 12
    a = absorption(gamblers_ruin(n, F(1, 2)))
    k = np.arange(1, n)
    assert np.all(np.abs(a.probabilities[1:n, 1] - k / n) <= 1e-14 * k / n)
    assert np.all(np.abs(a.expected_steps[1:n] - k * (n - k)) <= 1e-13 * k * (n - k))


def test_uniform_jump_to_larger_integer():
    # G&S §11.2 exercise (text seen): on 1..5 jump to a uniformly chosen larger integer; 5 absorbing.
    # Expected steps from 1 = H_4 = 25/12 (reference list E5, verified).
    P = np.zeros((5, 5))
    for i in range(4):
        P[i, i + 1:] = 1 / (4 - i)
    P[4, 4] = 1
    assert abs(absorption(P).expected_steps[0] - 25 / 12) <= 1e-15 * 25 / 12


def test_coupon_collector():
    # LPW 2nd ed. Proposition 2.3 (seen): E tau = n H_n; for n = 6 that is 147/10.
    n = 6
    P = np.zeros((n + 1, n + 1))
    for k in range(n):
        P[k, k] = k / n
        P[k, k + 1] = (n - k) / n
    P[n, n] = 1
    assert abs(absorption(P).expected_steps[0] - 14.7) <= 1e-15 * 14.7


def test_rare_exit_trap():
    # Issue requirement: left with probability 1e-12 per step, the expected stay is 1e12 steps
    # (geometric number of steps, common practice), to relative error ~1e-12 or better.
    e = 1e-12
    P = np.array([[1 - e, e * 0.25, e * 0.75], [0, 1, 0], [0, 0, 1]])
    a = absorption(P)
    assert abs(a.expected_steps[0] / 1e12 - 1) <= 1e-15
    assert close(a.probabilities[0], [0.25, 0.75], 1e-15)
    # variance of a geometric count of trials: (1 - e)/e^2 (common practice)
    assert abs(a.steps_variance[0] / ((1 - e) / e**2) - 1) <= 1e-10


def test_rare_exits_through_a_transient_chain_vs_mpmath():
    # Three transient states in a row, each leaking 1e-13 to one of two absorbing states;
    # componentwise relative accuracy vs an mpmath solve at 50 digits of the chain whose
    # off-diagonal entries are exactly the floats used.
    d = 1e-13
    P = np.zeros((5, 5))
    P[0, 1], P[0, 3] = 0.5, d
    P[1, 0], P[1, 2], P[1, 4] = 0.3, 0.6, 2 * d
    P[2, 1], P[2, 3] = 0.9, 3 * d
    P[3, 3] = P[4, 4] = 1
    for i in range(3):
        P[i, i] = 1 - (P[i].sum() - P[i, i])
    a = absorption(P)
    with mpmath.workdps(50):
        Q = mpmath.matrix(3, 3)
        R = mpmath.matrix(3, 2)
        for i in range(3):
            for j in range(3):
                if i != j:
                    Q[i, j] = -mpmath.mpf(P[i, j])
            R[i, 0], R[i, 1] = mpmath.mpf(P[i, 3]), mpmath.mpf(P[i, 4])
            Q[i, i] = mpmath.fsum(mpmath.mpf(P[i, j]) for j in range(5) if j != i)
        t = mpmath.lu_solve(Q, mpmath.matrix([1, 1, 1]))
        B0 = mpmath.lu_solve(Q, R[:, 0])
    for i in range(3):
        assert abs(a.expected_steps[i] / float(t[i]) - 1) <= 1e-13
        assert abs(a.probabilities[i, 0] / float(B0[i]) - 1) <= 1e-13


def test_limit_law_is_mass_times_stationary():
    # Cesaro limit from any start = sum over closed classes of absorption mass times the
    # class's stationary law (G&S §11.2 with §11.3; LPW §1.7).
    P = np.array([
        [0.5, 0.5, 0, 0, 0],   # closed class {0, 1}
        [0.2, 0.8, 0, 0, 0],
        [0.1, 0, 0.6, 0.3, 0],  # transient
        [0, 0, 0, 0, 1],        # -> periodic class {3, 4}
        [0, 0, 0, 1, 0],
    ])
    lim = limit_law(P, [0, 0, 1, 0, 0])
    # from 2: into {0,1} w.p. 0.1/0.4 = 1/4, into {3,4} w.p. 3/4; laws (2/7, 5/7) and (1/2, 1/2)
    ref = [0.25 * 2 / 7, 0.25 * 5 / 7, 0, 0.375, 0.375]
    assert np.allclose(lim, ref, rtol=1e-15, atol=0)
    assert np.allclose(limit_law(P, [0.5, 0, 0, 0.5, 0]), [1 / 7, 2.5 / 7, 0, 0.25, 0.25], rtol=1e-15, atol=0)
    M = limit_matrix(P)
    assert np.allclose(M[2], ref, rtol=1e-15, atol=0)
    assert np.allclose(M.sum(axis=1), 1, rtol=0, atol=1e-15)


def test_limit_of_drunkards_walk():
    # G&S Example 11.15 absorption probabilities give the long-run law from the middle: 1/2, 1/2.
    assert np.allclose(limit_law(DRUNKARD, [0, 0, 1, 0, 0]), [0.5, 0, 0, 0, 0.5], rtol=1e-15, atol=0)


def test_land_of_oz_mean_first_passage_and_kac():
    # G&S §11.5 (memory; reference list E1, verified two ways): M (m_ii = 0) =
    # [[0,4,10/3],[8/3,0,8/3],[10/3,4,0]], mean recurrence times (5/2, 5, 5/2) (Kac, LPW Prop. 1.19).
    M = mean_first_passage(OZ)
    ref = [[F(5, 2), 4, F(10, 3)], [F(8, 3), 5, F(8, 3)], [F(10, 3), 4, F(5, 2)]]
    assert close(M, ref, 4e-16)


def test_land_of_oz_kemeny_constant():
    # Kemeny & Snell, Finite Markov Chains, ch. 4 (memory); G&S §11.5 chain: K = 32/15 (reference list
    # E1, verified by exact computation).
    assert abs(kemeny_constant(OZ) - 32 / 15) <= 4e-16 * 32 / 15


def test_ehrenfest_passage_times():
    # Reference list E3 (G&S Example 11.17 chain, verified exactly): return times (16,4,8/3,4,16),
    # m_{0,4} = m_{4,0} = 64/3, m_{0,2} = 8/3.
    M = mean_first_passage(EHRENFEST4)
    assert close(np.diag(M), [16, 4, F(8, 3), 4, 16], 1e-15)
    assert close([M[0, 4], M[4, 0], M[0, 2]], [F(64, 3), F(64, 3), F(8, 3)], 1e-15)


@pytest.mark.parametrize("N", [6, 10])
def test_ehrenfest_return_to_empty_urn(N):
    # Reference list E3: E_0 tau_0^+ = 2^N for the Ehrenfest urn with N balls (Kac with the binomial law).
    P = np.zeros((N + 1, N + 1))
    for k in range(N + 1):
        if k > 0:
            P[k, k - 1] = k / N
        if k < N:
            P[k, k + 1] = (N - k) / N
    assert abs(mean_first_passage(P)[0, 0] - 2**N) <= 1e-14 * 2**N


@pytest.mark.parametrize("n, p, q, expected", [(5, 0.5, 0.25, F(129, 8)), (8, 0.2, 0.4, F(2510))])
def test_birth_death_hitting_time(n, p, q, expected):
    # LPW 2nd ed. (2.14) (seen): E_0 tau_n = (1/(p - q)) [n - q (1 - (q/p)^n)/(p - q)];
    # fixtures computed in the reference list E9. The walk holds at 0 w.p. 1 - p.
    P = np.zeros((n + 1, n + 1))
    for k in range(n + 1):
        if k < n:
            P[k, k + 1] = p
        if k > 0:
            P[k, k - 1] = q
        P[k, k] = 1 - P[k].sum()
    assert abs(hitting_times(P, [n])[0] / float(expected) - 1) <= 1e-13
    assert abs(mean_first_passage(P)[0, n] / float(expected) - 1) <= 1e-13


def test_hitting_times_infinite_when_target_may_be_missed():
    # From 1 the drunkard may end at 0 and never reach 4: the expected time to hit 4 is infinite.
    h = hitting_times(DRUNKARD, [4])
    assert h[4] == 0 and np.all(np.isinf(h[:4]))
    h = hitting_times(DRUNKARD, [0, 4])
    assert close(h[1:4], [3, 4, 3], 1e-15)


def test_passage_identities_random_chain():
    # First-step analysis M = 1 + P M0 (M0: zero diagonal) and Kac pi_i M_ii = 1
    # (G&S §11.5, LPW Prop. 1.19); Kemeny's constant independent of the start (Kemeny & Snell ch. 4).
    from core.stationary import gth

    rng = np.random.default_rng(1234)
    n = 37
    P = rng.random((n, n)) * (rng.random((n, n)) < 0.3)
    P[np.arange(n), (np.arange(n) + 1) % n] += 0.05
    P /= P.sum(axis=1, keepdims=True)
    M = mean_first_passage(P)
    pi = gth(P)
    M0 = M.copy()
    np.fill_diagonal(M0, 0)
    assert np.max(np.abs(1 + P @ M0 - M) / M) <= 1e-13
    assert np.max(np.abs(pi * np.diag(M) - 1)) <= 1e-13
    K = M0 @ pi
    assert np.max(np.abs(K - K[0])) <= 1e-12 * K[0]
    assert abs(kemeny_constant(P) - K[0]) <= 1e-12 * K[0]


def test_passage_times_inside_blocks_of_nearly_decomposable_chain():
    # Two blocks coupled with 1e-15: passage times inside a block are O(1), across blocks ~1e15.
    # Componentwise relative accuracy against an mpmath solve at 50 digits of E_i tau_j
    # (first-step equations of the chain whose off-diagonals are exactly the floats used).
    d = 1e-15
    P = np.array([
        [0.0, 0.6, 0.4 - d, d, 0.0],
        [0.5, 0.0, 0.5, 0.0, 0.0],
        [0.3, 0.7, 0.0, 0.0, 0.0],
        [2 * d, 0.0, 0.0, 0.0, 1 - 2 * d],
        [0.0, 0.0, 0.0, 0.9, 0.1],
    ])
    n = 5
    M = mean_first_passage(P)
    with mpmath.workdps(50):
        for j in range(n):
            others = [i for i in range(n) if i != j]
            A = mpmath.matrix(n - 1, n - 1)
            for a, i in enumerate(others):
                for b, k in enumerate(others):
                    if i != k:
                        A[a, b] = -mpmath.mpf(P[i, k])
                A[a, a] = mpmath.fsum(mpmath.mpf(P[i, k]) for k in range(n) if k != i)
            m = mpmath.lu_solve(A, mpmath.matrix([1] * (n - 1)))
            for a, i in enumerate(others):
                assert abs(M[i, j] / float(m[a]) - 1) <= 1e-13, (i, j)
