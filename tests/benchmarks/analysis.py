"""Benchmark of the exact long-run analysis (a script, not collected by pytest).

Prints, in one run:

1. Speed: time of the full analysis (classes, stationary laws, absorption, limit
   laws, spectrum, mean first passage and Kemeny, mixing time) divided by the
   time of one ``numpy.linalg.eig`` of the same dense matrix, for n = 10, 100,
   1000, on a dense random chain and on a dense nearly decomposable one (whose
   spectrum needs the refinement step).  Target: <= 10 at n = 1000.
2. Accuracy on nearly decomposable chains: largest componentwise relative
   error of the stationary law against an mpmath solve at 50 digits, for this
   engine (GTH), ``numpy.linalg.eig`` (left eigenvector of the eigenvalue
   nearest 1) and a plain linear solve (``numpy.linalg.solve`` of
   ``pi (P - I) = 0`` with one equation replaced by ``sum pi = 1``), couplings
   1e-1 down to 1e-15; plus the relative error of the spectral gap (engine vs
   ``1 - |lambda_2|`` from ``eig``).  Target: <= 1e-13 at coupling 1e-15.
3. A mixing time of ~1e12 steps: products used and agreement with mpmath.
4. Validation of what the user typed (exact rational row sums): the time to
   validate a dense chain of n states typed as decimals (n^2 transitions),
   divided by the time to merely read the same texts as ``fractions.Fraction``
   values and add them up row by row, the plain way to sum them exactly.

Run: ``.venv/bin/python tests/benchmarks/analysis.py`` (add ``--quick`` to skip n = 1000).
Timings are the best of a few runs, so that other load on the machine
disturbs them less.
"""
from __future__ import annotations

import sys
import time
from pathlib import Path

import mpmath
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from core.analysis import analyze_matrix  # noqa: E402
from core.evolution import mixing  # noqa: E402
from core.spectral import spectrum  # noqa: E402
from core.stationary import gth  # noqa: E402


def best_time(fn, repeat):
    best = float("inf")
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def dense_random(n, rng):
    P = rng.random((n, n))
    return P / P.sum(axis=1, keepdims=True)


def nearly_decomposable(n, coupling, rng, blocks=4):
    """Dense blocks on the diagonal, off-block entries ~coupling (diagonal = 1 - off-diagonal sum)."""
    sizes = [n // blocks + (1 if i < n % blocks else 0) for i in range(blocks)]
    P = coupling * rng.uniform(0.5, 1.5, (n, n))
    start = 0
    for b in sizes:
        sl = slice(start, start + b)
        blk = rng.random((b, b))
        P[sl, sl] = blk / blk.sum(axis=1, keepdims=True) * (1 - coupling * n)
        start += b
    np.fill_diagonal(P, 0)
    np.fill_diagonal(P, 1 - P.sum(axis=1))
    return P


def speed_table(sizes):
    rng = np.random.default_rng(1234)
    print("1. Full analysis time / one numpy.linalg.eig (best of several runs)")
    print(f"   {'n':>5} {'chain':<22} {'eig [s]':>9} {'analysis [s]':>13} {'ratio':>7}")
    for n in sizes:
        repeat = 7 if n <= 100 else 2
        for label, P in (("dense random", dense_random(n, rng)),
                         ("nearly decomposable", nearly_decomposable(n, 1e-13 / n, rng))):
            analyze_matrix(P)  # warm-up (imports, caches)
            te = best_time(lambda: np.linalg.eig(P), repeat)
            ta = best_time(lambda: analyze_matrix(P), repeat)
            print(f"   {n:>5} {label:<22} {te:>9.4f} {ta:>13.4f} {ta / te:>7.2f}")
    print("   target: ratio <= 10 at n = 1000")
    print()


def ncd_small(coupling, seed=1234, blocks=(4, 3, 5)):
    rng = np.random.default_rng(seed)
    n = sum(blocks)
    P = np.zeros((n, n))
    start = 0
    for b in blocks:
        sl = slice(start, start + b)
        P[sl, sl] = rng.uniform(0.1, 1.0, (b, b))
        start += b
    P /= P.sum(axis=1, keepdims=True)
    ends = np.cumsum(blocks)
    starts = ends - np.array(blocks)
    for k in range(len(blocks)):
        i, j = ends[k] - 1, starts[(k + 1) % len(blocks)]
        P[i, j] = coupling * rng.uniform(0.5, 2.0)
        P[j, i] = coupling * rng.uniform(0.5, 2.0)
    off = P.copy()
    np.fill_diagonal(off, 0)
    np.fill_diagonal(P, 1 - off.sum(axis=1))
    return P


def mp_reference(P, dps=50):
    """Stationary law and smallest nonzero 1 - lambda of the chain whose off-diagonal entries are
    exactly the floats of P (its diagonal is 1 minus their sum, exactly)."""
    n = len(P)
    with mpmath.workdps(dps):
        L = mpmath.matrix(n, n)
        for i in range(n):
            for j in range(n):
                if i != j:
                    L[i, j] = -mpmath.mpf(float(P[i, j]))
            L[i, i] = -mpmath.fsum(L[i, j] for j in range(n) if j != i)
        A = L.T
        for j in range(n):
            A[n - 1, j] = 1
        x = mpmath.lu_solve(A, mpmath.matrix([0] * (n - 1) + [1]))
        ev = sorted(mpmath.eig(L, left=False, right=False), key=abs)
        return np.array([float(v) for v in x]), [x[i] for i in range(n)], float(mpmath.re(ev[1]))


def rel_err(x, ref_mp):
    return max(float(abs((mpmath.mpf(float(a)) - r) / r)) for a, r in zip(x, ref_mp))


def eig_law(P):
    w, V = np.linalg.eig(P.T)
    k = int(np.argmin(np.abs(w - 1)))
    v = np.real(V[:, k])
    return v / v.sum()


def solve_law(P):
    n = len(P)
    A = (P - np.eye(n)).T.copy()
    A[-1] = 1
    b = np.zeros(n)
    b[-1] = 1
    return np.linalg.solve(A, b)


def accuracy_table():
    print("2. Nearly decomposable chains (3 blocks, 12 states): largest componentwise relative error")
    print("   vs mpmath at 50 digits")
    print(f"   {'coupling':>9} {'GTH (engine)':>13} {'numpy eig':>11} {'plain solve':>12}"
          f" {'gap engine':>11} {'gap eig':>9}")
    worst = 0.0
    for e in range(1, 16):
        c = 10.0**-e
        P = ncd_small(c)
        _, ref, gap_ref = mp_reference(P)
        g = rel_err(gth(P), ref)
        ee = rel_err(eig_law(P), ref)
        se = rel_err(solve_law(P), ref)
        gap_engine = abs(spectrum(P).gap / gap_ref - 1)
        lam = np.sort(np.abs(np.linalg.eigvals(P)))
        gap_eig = abs((1 - lam[-2]) / gap_ref - 1)
        if e == 15:
            worst = g
        print(f"   {c:>9.0e} {g:>13.2e} {ee:>11.2e} {se:>12.2e} {gap_engine:>11.2e} {gap_eig:>9.2e}")
    print(f"   target: <= 1e-13 at coupling 1e-15 (engine: {worst:.2e})")
    print()


def mixing_line():
    print("3. Mixing time with spectral gap ~1e-13 (4 states, two blocks)")
    d = 1e-13
    P = np.array([[0.6, 0.4 - d, d, 0.0], [0.3, 0.7, 0.0, 0.0], [0.0, 0.0, 0.2, 0.8], [0.0, 2 * d, 0.5, 0.5 - 2 * d]])
    t = time.perf_counter()
    m = mixing(P)
    dt = time.perf_counter() - t
    # reference: d(t) from an mpmath eigendecomposition at 50 digits, integer bisection
    n = 4
    with mpmath.workdps(50):
        A = mpmath.matrix(n, n)
        for i in range(n):
            for j in range(n):
                if i != j:
                    A[i, j] = mpmath.mpf(P[i, j])
            A[i, i] = 1 - mpmath.fsum(A[i, j] for j in range(n) if j != i)
        w, V = mpmath.eig(A)
        Vi = V**-1
        k1 = min(range(n), key=lambda k: abs(w[k] - 1))
        pi = [Vi[k1, j] * V[0, k1] for j in range(n)]
        s = mpmath.fsum(pi)
        pi = [x / s for x in pi]

        def dist(tt):
            Pt = V * mpmath.diag([x**tt for x in w]) * Vi
            return max(mpmath.fsum(abs(mpmath.re(Pt[i, j] - pi[j])) for j in range(n)) / 2 for i in range(n))

        lo, hi = 0, 1
        while dist(hi) > 0.25:
            lo, hi = hi, hi * 2
        while hi - lo > 1:
            mid = (lo + hi) // 2
            lo, hi = (mid, hi) if dist(mid) > 0.25 else (lo, mid)
    print(f"   engine t_mix(1/4) = {m.steps} with {m.products} matrix products in {dt * 1e3:.1f} ms;"
          f" mpmath: {hi}; relative difference {abs(m.steps - hi) / hi:.1e}")
    plain = np.linalg.matrix_power(P, 2**40)
    print(f"   (plain numpy matrix_power to 2^40: row sums off by {np.max(np.abs(plain.sum(axis=1) - 1)):.1e})")


def validation_line(n):
    from fractions import Fraction

    from core.model import Chain, State, Transition

    rng = np.random.default_rng(5)
    P = rng.random((n, n))
    P /= P.sum(axis=1, keepdims=True)
    ids = [f"s{i}" for i in range(n)]
    texts = [[repr(float(x)) for x in row] for row in P]
    trans = tuple(Transition(ids[i], ids[j], texts[i][j]) for i in range(n) for j in range(n))
    chain = Chain(states=tuple(State(s) for s in ids), transitions=trans)
    t0 = time.perf_counter()
    problems = chain.problems
    t_validate = time.perf_counter() - t0
    t0 = time.perf_counter()
    sums = [sum((Fraction(x) for x in row), Fraction(0)) for row in texts]
    t_plain = time.perf_counter() - t0
    assert all(abs(s - 1) < Fraction(1, 10**9) for s in sums)
    print(f"\nvalidation of a dense {n}-state chain typed as decimals ({n * n:,} transitions): "
          f"{t_validate:.2f} s ({t_validate / (n * n) * 1e6:.1f} us each; "
          f"{len(problems)} problems); reading and summing the texts as Fractions: {t_plain:.2f} s")
    print(f"ratio validation / plain Fraction sums {t_validate / t_plain:.2f}")


def main(argv):
    sizes = (10, 100) if "--quick" in argv else (10, 100, 1000)
    speed_table(sizes)
    accuracy_table()
    mixing_line()
    validation_line(300 if "--quick" in argv else 1000)


if __name__ == "__main__":
    main(sys.argv[1:])
