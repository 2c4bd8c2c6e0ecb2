"""Eigenvalues, SLEM, gap, relaxation time, reversibility, LPW bounds."""
from math import comb, log

import mpmath
import numpy as np
import pytest

from core.evolution import mixing_time
from core.passage import kemeny_constant
from core.spectral import detailed_balance, spectrum

OZ = [[0.5, 0.25, 0.25], [0.5, 0, 0.5], [0.25, 0.25, 0.5]]
EHRENFEST4 = [[0, 1, 0, 0, 0], [0.25, 0, 0.75, 0, 0], [0, 0.5, 0, 0.5, 0], [0, 0, 0.75, 0, 0.25], [0, 0, 0, 1, 0]]


def sorted_real(z):
    return np.sort(np.asarray(z).real)


def test_land_of_oz():
    # Reference list E1 (exact): eigenvalues 1, 1/4, -1/4; reversible; so slem 1/4, gap 3/4,
    # t_rel 4/3 (LPW §12.2 definitions).
    s = spectrum(OZ)
    assert np.allclose(sorted_real(s.eigenvalues), [-0.25, 0.25, 1], rtol=0, atol=1e-15)
    assert np.all(s.eigenvalues.imag == 0)
    assert s.slem == pytest.approx(0.25, rel=1e-15)
    assert s.gap == pytest.approx(0.75, rel=1e-15)
    assert s.relaxation_time == pytest.approx(4 / 3, rel=1e-15)
    assert s.reversible and s.balance_violation <= 1e-15
    # LPW 2nd ed. Thm 12.4 / 12.5 (seen) with pi_min = 1/5, eps = 1/4:
    assert s.bounds.upper == pytest.approx(4 / 3 * log(1 / (0.25 * 0.2)), rel=1e-14)
    assert s.bounds.lower == pytest.approx((4 / 3 - 1) * log(2), rel=1e-14)
    assert s.bounds.lower <= mixing_time(OZ) <= s.bounds.upper


def test_kemeny_constant_is_sum_over_eigenvalues():
    # Reference list E1: K = 32/15 = sum over lambda != 1 of 1/(1 - lambda) (computed exactly).
    s = spectrum(OZ)
    others = s.one_minus[1:]
    assert float(np.sum(1 / others).real) == pytest.approx(32 / 15, rel=1e-14)
    assert kemeny_constant(OZ) == pytest.approx(float(np.sum(1 / others).real), rel=1e-14)


def test_ehrenfest_eigenvalue_minus_one():
    # Reference list E3: eigenvalues 1, 1/2, 0, -1/2, -1 (period 2, G&S "ergodic but not regular").
    s = spectrum(EHRENFEST4)
    assert np.allclose(sorted_real(s.eigenvalues), [-1, -0.5, 0, 0.5, 1], rtol=0, atol=1e-15)
    assert -1 in s.eigenvalues  # set exactly: a period-2 class has eigenvalue -1 (Perron-Frobenius)
    assert s.slem == 1.0 and s.gap == 0.0 and s.relaxation_time is None
    assert s.reversible  # birth-death chain (LPW §2.5)
    assert s.bounds is None  # periodic: LPW Thm 12.5 needs aperiodicity


def test_two_state_bounds():
    # Reference list E8 (computed from LPW Thms 12.4, 12.5): p = 3/10, q = 1/10 -> t_rel = 5/2,
    # upper bound 6.931471805599453, lower bound 1.0397207708399179, t_mix = 3.
    P = [[0.7, 0.3], [0.1, 0.9]]
    s = spectrum(P)
    assert s.eigenvalues[1] == pytest.approx(0.6, rel=1e-15)
    assert s.relaxation_time == pytest.approx(2.5, rel=1e-14)
    assert s.bounds.upper == pytest.approx(6.931471805599453, rel=1e-14)
    assert s.bounds.lower == pytest.approx(1.0397207708399179, rel=1e-14)
    assert s.bounds.lower <= mixing_time(P) <= s.bounds.upper


def lazy_hypercube(n):
    N = 2**n
    P = np.zeros((N, N))
    for x in range(N):
        P[x, x] = 0.5
        for i in range(n):
            P[x, x ^ (1 << i)] = 0.5 / n
    return P


def test_hypercube_spectrum():
    # LPW 2nd ed. §12.3.1 (memory): the lazy walk on {0,1}^n has eigenvalues 1 - k/n with
    # multiplicity C(n, k); t_rel = n (reference list E8).
    n = 4
    s = spectrum(lazy_hypercube(n))
    expected = np.sort(np.concatenate([[1 - k / n] * comb(n, k) for k in range(n + 1)]))
    assert np.allclose(sorted_real(s.eigenvalues), expected, rtol=0, atol=1e-14)
    assert s.relaxation_time == pytest.approx(n, rel=1e-13)
    assert s.reversible
    assert s.bounds.lower <= mixing_time(lazy_hypercube(n)) <= s.bounds.upper


def test_random_walk_on_graph_is_reversible_and_bounds_hold():
    # LPW Example 1.12 / 1.21 (seen): the walk on a graph is reversible. Kite graph of the reference
    # list E9, made lazy so that it is aperiodic.
    edges = [(0, 1), (0, 2), (1, 2), (2, 3), (3, 4)]
    P = np.zeros((5, 5))
    for u, v in edges:
        P[u, v] = P[v, u] = 1
    P = P / P.sum(axis=1, keepdims=True)
    P = 0.5 * (np.eye(5) + P)
    s = spectrum(P)
    assert s.reversible
    for eps in (0.25, 0.1, 0.01):
        s = spectrum(P, epsilon=eps)
        assert s.bounds.lower <= mixing_time(P, eps) <= s.bounds.upper


def test_non_reversible_cycle():
    # A walk going clockwise w.p. 2/3 on a 3-cycle: the flow around the cycle breaks detailed
    # balance (LPW §1.6; pi uniform, pi_i P_ij = 2/9 != 1/9).
    P = np.array([[0, 2 / 3, 1 / 3], [1 / 3, 0, 2 / 3], [2 / 3, 1 / 3, 0]])
    s = spectrum(P)
    assert not s.reversible and s.bounds is None
    assert s.balance_violation == pytest.approx(0.5, rel=1e-14)
    # a transition without its reverse
    assert detailed_balance([[0.5, 0.5, 0], [0, 0.5, 0.5], [0.5, 0, 0.5]], [1 / 3] * 3) == float("inf")


def test_period_three_roots_of_unity():
    # A deterministic 3-cycle: eigenvalues are the cube roots of unity (Perron-Frobenius,
    # LPW Exercise 1.6 type fact, common practice), gap exactly 0.
    P = np.array([[0, 1, 0], [0, 0, 1], [1, 0, 0]])
    s = spectrum(P)
    assert s.gap == 0.0 and s.relaxation_time is None
    w = np.exp(2j * np.pi * np.arange(3) / 3)
    for z in w:
        assert np.min(np.abs(s.eigenvalues - z)) <= 1e-15


def test_several_closed_classes():
    # One eigenvalue 1 per closed class is set aside (issue definition of slem).
    s = spectrum(np.eye(3))
    assert s.slem == 0.0 and s.gap == 1.0 and s.relaxation_time == 1.0
    P = [[1, 0, 0, 0], [0.25, 0.5, 0.25, 0], [0, 0, 0.5, 0.5], [0, 0, 0.5, 0.5]]
    s = spectrum(P)
    assert np.allclose(sorted_real(s.eigenvalues), [0, 0.5, 1, 1], atol=1e-15, rtol=0)
    assert s.slem == pytest.approx(0.5, rel=1e-15)
    assert not s.reversible  # not irreducible


def mp_smallest_nonzero_mu(P, dps=50):
    """Smallest |mu| > 0 among eigenvalues of L = I - P (off-diagonals exactly the floats of P)."""
    n = len(P)
    with mpmath.workdps(dps):
        L = mpmath.matrix(n, n)
        for i in range(n):
            for j in range(n):
                if i != j:
                    L[i, j] = -mpmath.mpf(float(P[i, j]))
            L[i, i] = -mpmath.fsum(L[i, j] for j in range(n) if j != i)
        ev = sorted(mpmath.eig(L, left=False, right=False), key=abs)
        return ev[1]


def ncd(d):
    return np.array([
        [0.5, 0.5 - d, d, 0.0],
        [0.3, 0.7 - d, 0.0, d],
        [d, 0.0, 0.4 - d, 0.6],
        [0.0, 2 * d, 0.2, 0.8 - 2 * d],
    ])


@pytest.mark.parametrize("coupling", [1e-3, 1e-6, 1e-9, 1e-12, 1e-13, 1e-15])
def test_tiny_gap_relative_accuracy_vs_mpmath(coupling):
    # Issue requirement: tiny gaps keep relative accuracy; reference: mpmath eigenvalues at 50 digits.
    P = ncd(coupling)
    ref = mp_smallest_nonzero_mu(P)
    s = spectrum(P)
    assert abs(s.gap / float(mpmath.re(ref)) - 1) <= 1e-12
    assert abs(s.relaxation_time * float(mpmath.re(ref)) - 1) <= 1e-12


def test_tiny_gap_larger_block_chain():
    # Two 6-state blocks coupled with 1e-14 (seeded random blocks).
    rng = np.random.default_rng(1234)
    n = 12
    P = np.zeros((n, n))
    P[:6, :6] = rng.uniform(0.1, 1, (6, 6))
    P[6:, 6:] = rng.uniform(0.1, 1, (6, 6))
    P /= P.sum(axis=1, keepdims=True)
    P[5, 6], P[6, 5], P[0, 11] = 1e-14, 3e-14, 2e-14
    off = P.copy()
    np.fill_diagonal(off, 0)
    np.fill_diagonal(P, 1 - off.sum(axis=1))
    ref = mp_smallest_nonzero_mu(P, dps=40)
    s = spectrum(P)
    assert s.refined
    assert abs(s.gap / float(mpmath.re(ref)) - 1) <= 1e-12
    # the other eigenvalues agree with numpy's to absolute accuracy
    ours = np.sort_complex(s.eigenvalues)
    theirs = np.sort_complex(np.linalg.eigvals(P))
    assert np.max(np.abs(ours - theirs)) <= 1e-12


def test_rare_exit_transient_eigenvalue():
    # A transient state kept with probability 1 - 1e-12: its eigenvalue 1 - 1e-12 is the slem, and
    # the gap 1e-12 keeps its relative accuracy (exit probability built from off-diagonals).
    e = 1e-12
    P = np.array([[1 - e, e, 0], [0, 0.5, 0.5], [0, 0.5, 0.5]])
    s = spectrum(P)
    assert abs(s.gap / e - 1) <= 1e-14
    assert abs(s.relaxation_time * e - 1) <= 1e-14


def test_eigenvalues_match_numpy_on_random_chain():
    rng = np.random.default_rng(1234)
    n = 30
    P = rng.random((n, n)) ** 2
    P /= P.sum(axis=1, keepdims=True)
    s = spectrum(P)
    # trace identities: sum lambda = tr P, sum lambda^2 = tr P^2 (common practice)
    assert abs(np.sum(s.eigenvalues) - np.trace(P)) <= 1e-12
    assert abs(np.sum(s.eigenvalues**2) - np.trace(P @ P)) <= 1e-12
    ref = np.sort(np.abs(np.linalg.eigvals(P)))
    assert s.slem == pytest.approx(ref[-2], rel=1e-12)


def test_birth_death_chain_is_reversible():
    # LPW 2nd ed. §2.5 (seen): every birth-death chain satisfies detailed balance. Fixture of the
    # reference list E9 (LPW Prop. 2.8): p = (1/3, 1/2, 2/5, 1/4), q = (., 1/6, 1/4, 1/2, 3/4).
    p = [1 / 3, 1 / 2, 2 / 5, 1 / 4]
    q = [0, 1 / 6, 1 / 4, 1 / 2, 3 / 4]
    P = np.zeros((5, 5))
    for k in range(5):
        if k < 4:
            P[k, k + 1] = p[k]
        if k > 0:
            P[k, k - 1] = q[k]
        P[k, k] = 1 - P[k].sum()
    s = spectrum(P)
    assert s.reversible and s.balance_violation <= 1e-14
    assert np.all(np.abs(s.eigenvalues.imag) == 0)  # reversible: real spectrum (LPW Lemma 12.2)
    assert s.bounds.lower <= mixing_time(P) <= s.bounds.upper
