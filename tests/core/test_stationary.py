"""GTH stationary laws and the state-reduction kernel."""
from fractions import Fraction as F
from math import comb

import mpmath
import numpy as np
import pytest

from core.stationary import eliminate, gth, inverse_mmatrix, solve_mmatrix, stationary_laws
from core.structure import classify

OZ = [[0.5, 0.25, 0.25], [0.5, 0, 0.5], [0.25, 0.25, 0.5]]
EHRENFEST4 = [[0, 1, 0, 0, 0], [0.25, 0, 0.75, 0, 0], [0, 0.5, 0, 0.5, 0], [0, 0, 0.75, 0, 0.25], [0, 0, 0, 1, 0]]


def rel_err(x, ref):
    x = np.asarray(x, dtype=float)
    ref = np.asarray([float(v) for v in ref])
    return float(np.max(np.abs(x - ref) / np.abs(ref)))


def graph_walk(edges, n):
    P = np.zeros((n, n))
    for u, v in edges:
        P[u, v] = P[v, u] = 1
    return P / P.sum(axis=1, keepdims=True)


def test_land_of_oz():
    # Grinstead & Snell, Introduction to Probability, Examples 11.19-11.20: w = (2/5, 1/5, 2/5) (seen).
    assert rel_err(gth(OZ), [F(2, 5), F(1, 5), F(2, 5)]) <= 4e-16


def test_ehrenfest_binomial():
    # LPW 2nd ed. §2.3 / Exercise 2.5, G&S Example 11.17: Binomial(4, 1/2) (seen).
    assert rel_err(gth(EHRENFEST4), [F(comb(4, k), 16) for k in range(5)]) <= 4e-16


def test_random_walk_on_graph_degree_law():
    # LPW 2nd ed. Examples 1.10/1.12: edges 1-2, 1-3, 2-3, 2-4, 3-4, 3-5 (0-indexed here);
    # pi = deg / 2|E| = (2, 3, 4, 2, 1)/12 (seen).
    P = graph_walk([(0, 1), (0, 2), (1, 2), (1, 3), (2, 3), (2, 4)], 5)
    assert rel_err(gth(P), [F(d, 12) for d in (2, 3, 4, 2, 1)]) <= 4e-16
    # Kite graph of the reference list E9 (computed from LPW Example 1.12's formula).
    P = graph_walk([(0, 1), (0, 2), (1, 2), (2, 3), (3, 4)], 5)
    assert rel_err(gth(P), [F(1, 5), F(1, 5), F(3, 10), F(1, 5), F(1, 10)]) <= 4e-16


def test_birth_death_chain():
    # LPW 2nd ed. Proposition 2.8 (seen): w_k = prod p_{i-1}/q_i; fixture from the reference list E9:
    # p = (1/3, 1/2, 2/5, 1/4), q = (., 1/6, 1/4, 1/2, 3/4) -> pi = (15, 30, 60, 48, 16)/169 (computed).
    p = [F(1, 3), F(1, 2), F(2, 5), F(1, 4)]
    q = [None, F(1, 6), F(1, 4), F(1, 2), F(3, 4)]
    P = np.zeros((5, 5))
    for k in range(5):
        if k < 4:
            P[k, k + 1] = p[k]
        if k > 0:
            P[k, k - 1] = q[k]
        P[k, k] = 1 - (p[k] if k < 4 else 0) - (q[k] if k > 0 else 0)
    assert rel_err(gth(P), [F(v, 169) for v in (15, 30, 60, 48, 16)]) <= 1e-15


def test_diagonal_is_never_read():
    # GTH uses off-diagonal entries only (Grassmann, Taksar & Heyman 1985).
    P = np.array(OZ)
    Q = P.copy()
    np.fill_diagonal(Q, [7.0, -3.0, np.nan])
    assert np.array_equal(gth(P), gth(Q, check=False))


def ncd_chain(coupling, seed=1234, blocks=(3, 2, 3)):
    """Nearly completely decomposable chain: dense blocks coupled with probabilities ~coupling."""
    rng = np.random.default_rng(seed)
    n = sum(blocks)
    P = np.zeros((n, n))
    start = 0
    for b in blocks:
        sl = slice(start, start + b)
        P[sl, sl] = rng.uniform(0.1, 1.0, (b, b))
        start += b
    P /= P.sum(axis=1, keepdims=True)
    # couple consecutive blocks in a ring
    ends = np.cumsum(blocks)
    starts = ends - np.array(blocks)
    for k in range(len(blocks)):
        i = ends[k] - 1
        j = starts[(k + 1) % len(blocks)]
        P[i, j] = coupling * rng.uniform(0.5, 2.0)
        P[j, i] = coupling * rng.uniform(0.5, 2.0)
    off = P.copy()
    np.fill_diagonal(off, 0)
    np.fill_diagonal(P, 1.0 - off.sum(axis=1))
    return P


def mp_stationary(P, dps=50):
    """Stationary law of the chain whose off-diagonal entries are exactly the floats of P
    (diagonal = 1 - off-diagonal sum, exactly), by an mpmath solve at `dps` digits."""
    n = len(P)
    with mpmath.workdps(dps):
        A = mpmath.matrix(n, n)
        for i in range(n):
            for j in range(n):
                if i != j:
                    A[j, i] = mpmath.mpf(float(P[i, j]))
            A[i, i] = -mpmath.fsum(mpmath.mpf(float(P[i, j])) for j in range(n) if j != i)
        for j in range(n):
            A[n - 1, j] = 1
        b = mpmath.matrix([0] * (n - 1) + [1])
        x = mpmath.lu_solve(A, b)
        return [x[i] for i in range(n)]


@pytest.mark.parametrize("coupling", [1e-3, 1e-6, 1e-9, 1e-12, 1e-13, 1e-14, 1e-15])
def test_nearly_decomposable_componentwise_relative_accuracy(coupling):
    # Issue target: <= 1e-13 componentwise relative error against an mpmath solve at 50 digits
    # (O'Cinneide 1993: GTH is entrywise accurate, from memory).
    P = ncd_chain(coupling)
    ref = mp_stationary(P)
    assert rel_err(gth(P), ref) <= 1e-13


def test_nearly_decomposable_large_blocks():
    P = ncd_chain(1e-15, seed=99, blocks=(24, 15, 21))
    ref = mp_stationary(P, dps=40)
    assert rel_err(gth(P), ref) <= 1e-13


def test_blocked_elimination_matches_unblocked():
    rng = np.random.default_rng(1234)
    n = 230
    P = rng.random((n, n)) ** 6
    P /= P.sum(axis=1, keepdims=True)
    pis = []
    for block in (1, 7, 48, 500):
        E = eliminate(P, stop=1, block=block)
        assert np.all(E.pivots[1:] > 0)
        from scipy.linalg import solve_triangular

        U = -np.triu(E.A, 1)
        np.fill_diagonal(U, 1.0)
        e0 = np.zeros(n)
        e0[0] = 1
        x = solve_triangular(U, e0, trans="T", unit_diagonal=True)
        pis.append(x / x.sum())
    for pi in pis[1:]:
        assert np.max(np.abs(pi - pis[0]) / pis[0]) <= 1e-13
    assert np.max(np.abs(pis[2] @ P - pis[2])) <= 1e-16


def test_reducible_laws_zero_outside_class():
    # Drunkard's walk with a lazy two-state trap added on the right (invented fixture for the
    # structure; each closed class's law is its own stationary law, LPW §1.7).
    P = np.array([
        [1, 0, 0, 0, 0],
        [0.5, 0, 0.5, 0, 0],
        [0, 0.5, 0, 0.5, 0],
        [0, 0, 0.5, 0.25, 0.25],
        [0, 0, 0, 0, 1],
    ])
    laws = stationary_laws(P)
    assert len(laws) == 2
    assert list(laws[0]) == [1, 0, 0, 0, 0]
    assert list(laws[1]) == [0, 0, 0, 0, 1]
    P2 = np.zeros((4, 4))
    P2[0, 1] = 1
    P2[1, 2] = P2[1, 3] = 0.5
    P2[2, 3] = 1
    P2[3, 2] = 0.5
    P2[3, 3] = 0.5
    (law,) = stationary_laws(P2, classify(P2))
    assert law[0] == 0 and law[1] == 0
    assert rel_err(law[2:], [F(1, 3), F(2, 3)]) <= 4e-16


def test_gth_rejects_reducible():
    with pytest.raises(ValueError, match="irreducible"):
        gth([[1, 0], [0.5, 0.5]])
    with pytest.raises(ArithmeticError):
        gth([[0.5, 0.5], [0, 1]], check=False)  # state 1 cannot be left: zero pivot


def test_fundamental_matrix_of_drunkards_walk():
    # Grinstead & Snell Example 11.14 (seen): N = (I - Q)^-1 = [[3/2,1,1/2],[1,2,1],[1/2,1,3/2]].
    Q = np.array([[0, 0.5, 0], [0.5, 0, 0.5], [0, 0.5, 0]])
    exits = np.array([0.5, 0, 0.5])
    N = inverse_mmatrix(Q, exits)
    ref = [[1.5, 1, 0.5], [1, 2, 1], [0.5, 1, 1.5]]
    assert np.max(np.abs(N - ref)) <= 1e-15
    # G&S §11.2 Exercise 6 (Land of Oz with R absorbing; reference list E1, memory, verified):
    Q = np.array([[0, 0.5], [0.25, 0.5]])
    N = inverse_mmatrix(Q, [0.5, 0.25])
    assert np.max(np.abs(N - [[4 / 3, 4 / 3], [2 / 3, 8 / 3]])) <= 1e-15


def test_mmatrix_solve_with_tiny_exit():
    # A trap left with probability 1e-12 per step: expected stay 1e12 steps (issue requirement;
    # geometric law, common practice).
    x = solve_mmatrix([[0.0]], [1e-12], [1.0])
    assert abs(x[0] / 1e12 - 1) <= 1e-15
