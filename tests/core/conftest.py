"""Helpers shared by the core tests: exact references computed with mpmath."""
import mpmath as mp
import pytest


def _exact_tv(P, start: int, t: int, dps: int = 80):
    """TV(e_start P^t, pi) at ``dps`` digits (mpmath): rows renormalised exactly, pi by solving
    pi (P - I) = 0 with sum(pi) = 1 (an irreducible chain), P^t by mpmath's matrix power."""
    n = len(P)
    with mp.workdps(dps):
        M = mp.matrix([[float(x) for x in row] for row in P])
        for i in range(n):
            s = mp.fsum(M[i, j] for j in range(n))
            for j in range(n):
                M[i, j] /= s
        A = M.T - mp.eye(n)
        for j in range(n):
            A[n - 1, j] = 1
        pi = mp.lu_solve(A, mp.matrix([0] * (n - 1) + [1]))
        row = (M ** t)[start, :]
        return mp.fsum(abs(row[j] - pi[j]) for j in range(n)) / 2


@pytest.fixture
def exact_tv():
    """``exact_tv(P, start, t)``: the distance from the long-run law after t steps, by mpmath."""
    return _exact_tv
