"""Stationary laws by the GTH algorithm, and the state-reduction kernel behind it.

The kernel :func:`eliminate` removes states one at a time from a (sub)stochastic
matrix the way Grassmann, Taksar & Heyman do: the pivot of a state is the sum of
its *off-diagonal* probabilities (plus its probabilities of leaving the set),
never ``1 - P[i, i]``, and every update adds non-negative numbers.  There is no
subtractive cancellation anywhere, so results keep componentwise *relative*
accuracy even when states are coupled by probabilities of 1e-15.  The same
kernel gives absorption probabilities and expected times (:mod:`core.passage`)
and accurate inverses of ``I - Q`` (:mod:`core.spectral`).

The elimination is blocked: states are removed in panels of ``block`` states
and the rest of the matrix is updated with one matrix product per panel (the
product of non-negative matrices is itself componentwise accurate), so the
O(n^3) work runs at BLAS-3 speed.

References
----------
W.K. Grassmann, M.I. Taksar & D.P. Heyman, "Regenerative analysis and steady
state distributions for Markov chains", *Operations Research* 33(5):1107-1116
(1985) -- the GTH algorithm.

C.A. O'Cinneide, "Entrywise perturbation theory and error analysis for Markov
chains", *Numerische Mathematik* 65:109-120 (1993) -- GTH gives every
component with small relative error (value from memory).

J. Kohlas, "Numerical computation of mean passage times and absorption
probabilities in Markov and semi-Markov models", *Zeitschrift für Operations
Research* 30:A197-A207 (1986) -- state reduction for passage quantities
(from memory).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["gth", "stationary_laws", "eliminate", "Elimination", "solve_mmatrix", "inverse_mmatrix"]

#: Panel width of the blocked elimination.
BLOCK = 48


@dataclass(frozen=True)
class Elimination:
    """Result of :func:`eliminate` (arrays are owned by the caller).

    Attributes
    ----------
    A : (n, n) ndarray
        Worked matrix.  For each eliminated state ``k`` (``k >= stop``):
        ``A[k, :k]`` is its row at the moment it was eliminated (the
        probabilities of moving to each state still present), ``A[:k, k]`` is
        its column at that moment divided by ``pivots[k]``.  ``A[:stop, :stop]``
        holds the off-diagonal entries of the reduced (censored) chain on the
        states ``0 .. stop-1``; its diagonal is meaningless.
    X : (n, c) ndarray
        The extra columns (exit probabilities and rewards), transformed the same
        way: ``X[k]`` is frozen at the moment ``k`` was eliminated, ``X[:stop]``
        belongs to the reduced chain.
    pivots : (n,) ndarray
        ``pivots[k]`` for ``k >= stop``: the probability of leaving ``k`` in the
        chain censored to the states present when ``k`` was eliminated (sum of
        its off-diagonal row entries plus its exit probabilities).
    stop : int
    """

    A: np.ndarray
    X: np.ndarray
    pivots: np.ndarray
    stop: int

    def lower(self) -> np.ndarray:
        """``D - L``: the lower factor (pivots on the diagonal, minus the rows)."""
        n = self.A.shape[0]
        s = self.stop
        M = -np.tril(self.A[s:, s:], -1)
        M[np.diag_indices(n - s)] = self.pivots[s:]
        return M

    def upper(self) -> np.ndarray:
        """``I - C``: the unit upper factor (minus the scaled columns)."""
        n = self.A.shape[0]
        s = self.stop
        M = -np.triu(self.A[s:, s:], 1)
        M[np.diag_indices(n - s)] = 1.0
        return M


def eliminate(A, X=None, *, nprob: int | None = None, stop: int = 0, block: int = BLOCK,
              overwrite: bool = False) -> Elimination:
    """Remove states ``n-1, n-2, ..., stop`` by state reduction (GTH style).

    Parameters
    ----------
    A : (n, n) array_like
        Non-negative transition probabilities among the ``n`` states; only the
        off-diagonal entries are read.
    X : (n, c) array_like, optional
        Extra non-negative columns carried along.  The first ``nprob`` are
        probabilities of leaving the set of ``n`` states (into absorbing targets)
        and count in the pivots; the others are rewards (for instance the
        expected time per step, a column of ones) and do not.
    nprob : int, optional
        Number of probability columns in ``X`` (default: all of them).
    stop : int
        States ``0 .. stop-1`` are kept: the result holds the chain censored
        to them.
    block : int
        Panel width.
    overwrite : bool
        Work in ``A`` and ``X`` themselves (they must be C-contiguous float64).

    Returns
    -------
    Elimination

    Raises
    ------
    ArithmeticError
        If a pivot is zero: a state being eliminated cannot leave the states
        still present (the input is not transient/irreducible as required, or
        its probabilities underflow).

    Notes
    -----
    Eliminating state ``k`` (its pivot ``s_k = sum_{j<k} a_kj + sum_e x_ke``)
    replaces ``a_ij`` by ``a_ij + a_ik a_kj / s_k`` and ``x_ie`` by
    ``x_ie + a_ik x_ke / s_k`` for the states ``i, j < k`` still present.  In
    matrix terms this is the factorisation ``I - Q = (I - C)(D - L)`` of the
    M-matrix ``I - Q`` (the diagonal of ``I - Q`` being the off-diagonal row
    sums plus exits), computed without subtraction.
    """
    A = np.array(A, dtype=np.float64, order="C", copy=not overwrite)
    n = A.shape[0]
    if A.ndim != 2 or A.shape[1] != n:
        raise ValueError(f"A must be square, not of shape {A.shape}")
    if X is None:
        X = np.zeros((n, 0))
    X = np.array(X, dtype=np.float64, order="C", copy=not overwrite)
    if X.ndim == 1:
        X = X[:, None]
    if X.shape[0] != n:
        raise ValueError(f"X has {X.shape[0]} rows for {n} states")
    c = X.shape[1]
    nprob = c if nprob is None else int(nprob)
    if not 0 <= stop <= n:
        raise ValueError(f"stop must be in 0..{n}, not {stop}")
    s = np.full(n, np.nan)
    k = n - 1
    while k >= stop:
        lo = max(stop, k - block + 1)
        for m in range(k, lo - 1, -1):
            sm = A[m, :m].sum() + X[m, :nprob].sum()
            if not sm > 0.0:
                raise ArithmeticError(f"state reduction: zero pivot at state {m}")
            s[m] = sm
            if lo > 0:
                col = A[:lo, m]
                if m < k:
                    col += A[:lo, m + 1:k + 1] @ A[m + 1:k + 1, m]
                col /= sm
                A[:lo, m] = col
            if m > lo:
                cp = A[lo:m, m] / sm
                A[lo:m, m] = cp
                A[lo:m, :m] += np.outer(cp, A[m, :m])
                if c:
                    X[lo:m] += np.outer(cp, X[m])
        if lo > 0:
            C = A[:lo, lo:k + 1]
            A[:lo, :lo] += C @ A[lo:k + 1, :lo]
            if c:
                X[:lo] += C @ X[lo:k + 1]
        k = lo - 1
    return Elimination(A, X, s, stop)


def _solve_lower(E: Elimination, rhs: np.ndarray) -> np.ndarray:
    from scipy.linalg import solve_triangular

    return solve_triangular(E.lower(), rhs, lower=True, check_finite=False)


def _solve_upper(E: Elimination, rhs: np.ndarray) -> np.ndarray:
    from scipy.linalg import solve_triangular

    return solve_triangular(E.upper(), rhs, lower=False, unit_diagonal=True, check_finite=False)


def solve_mmatrix(Q, exits, rhs) -> np.ndarray:
    """Solve ``(I - Q) x = rhs`` accurately for a transient block ``Q``.

    Parameters
    ----------
    Q : (m, m) array_like
        Non-negative probabilities among transient states (diagonal ignored).
    exits : (m,) array_like
        Probability of leaving the block from each state; the diagonal of
        ``I - Q`` is taken as ``exits + (off-diagonal row sums of Q)``.
    rhs : (m,) or (m, c) array_like
        Non-negative right-hand side(s).

    Returns
    -------
    x : ndarray shaped like ``rhs``
        Non-negative, each component with small relative error.
    """
    rhs = np.asarray(rhs, dtype=np.float64)
    vec = rhs.ndim == 1
    E = eliminate(Q, np.asarray(exits, dtype=np.float64).reshape(-1, 1), nprob=1)
    y = _solve_upper(E, rhs.reshape(len(rhs), -1))
    x = _solve_lower(E, y)
    return x[:, 0] if vec else x


def inverse_mmatrix(Q, exits) -> np.ndarray:
    """``N = (I - Q)^{-1}`` (the fundamental matrix of a transient block), accurately.

    Same conventions as :func:`solve_mmatrix`.  Every entry of ``N`` is
    non-negative and computed with small relative error (only additions of
    non-negative numbers, divisions and multiplications are used).
    """
    Q = np.asarray(Q, dtype=np.float64)
    return solve_mmatrix(Q, exits, np.eye(Q.shape[0]))


def gth(P, *, check: bool = True) -> np.ndarray:
    """Stationary law of an irreducible chain by the GTH algorithm.

    Parameters
    ----------
    P : (n, n) array_like
        Irreducible transition matrix.  The diagonal is never read.
    check : bool
        Verify irreducibility first (linear in the number of positive entries).

    Returns
    -------
    pi : (n,) ndarray
        The stationary law (``pi P = pi``, ``sum(pi) = 1``), every component
        positive and with small relative error.

    Raises
    ------
    ValueError
        If ``check`` and ``P`` is not irreducible.
    ArithmeticError
        If a zero pivot appears (not irreducible, with ``check=False``) or the
        law over/underflows.

    Notes
    -----
    States ``n-1, ..., 1`` are eliminated (:func:`eliminate`), then
    ``x_0 = 1`` and ``x_k = sum_{i<k} x_i c_ik`` (back substitution through the
    unit upper factor), and ``pi = x / sum(x)``.  Cost ~ n^3/3 flops in
    matrix products.

    References
    ----------
    Grassmann, Taksar & Heyman, Operations Research 33 (1985).

    Examples
    --------
    >>> gth([[0.5, 0.25, 0.25], [0.5, 0.0, 0.5], [0.25, 0.25, 0.5]])  # Land of Oz
    array([0.4, 0.2, 0.4])
    """
    from scipy.linalg import solve_triangular

    P = np.asarray(P, dtype=np.float64)
    n = P.shape[0]
    if check:
        from .structure import classify

        if not classify(P).irreducible:
            raise ValueError("gth needs an irreducible chain; use stationary_laws for a reducible one")
    if n == 1:
        return np.ones(1)
    E = eliminate(P, stop=1)
    e0 = np.zeros(n)
    e0[0] = 1.0
    # x (I - C) = e_0  <=>  (I - C)^T x = e_0, lower unit triangular.
    U = -np.triu(E.A, 1)
    U[np.diag_indices(n)] = 1.0
    x = solve_triangular(U, e0, trans="T", lower=False, unit_diagonal=True, check_finite=False)
    total = x.sum()
    if not np.isfinite(total) or total <= 0:
        raise ArithmeticError("GTH: the stationary law over- or underflows")
    return x / total


def stationary_laws(P, structure=None) -> tuple[np.ndarray, ...]:
    """Stationary law of each closed class.

    Parameters
    ----------
    P : (n, n) array_like
        Transition matrix.
    structure : core.structure.Structure, optional
        From :func:`core.structure.classify` (computed when omitted).

    Returns
    -------
    tuple of (n,) ndarray
        One law per closed class, in the order of ``structure.closed``; zero
        outside the class.  Every stationary law of ``P`` is a convex
        combination of these (LPW 2nd ed., §1.7).
    """
    from .structure import classify

    P = np.asarray(P, dtype=np.float64)
    if structure is None:
        structure = classify(P)
    n = P.shape[0]
    out = []
    for k in structure.closed:
        st = np.asarray(structure.classes[k].states)
        pi = np.zeros(n)
        pi[st] = gth(P[np.ix_(st, st)], check=False)
        pi.setflags(write=False)
        out.append(pi)
    return tuple(out)
