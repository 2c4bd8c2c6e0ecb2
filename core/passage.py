"""Absorption, expected steps, the long-run (Cesaro) law, first passage times, Kemeny's constant.

All quantities come from state reduction (:func:`core.stationary.eliminate`):
the pivot of a transient state is its probability of leaving, formed from
off-diagonal entries and exits, never ``1 - P[i, i]``.  A trap left with
probability 1e-12 per step therefore has an expected stay of 1e12 steps to full
relative accuracy, and absorption probabilities keep their relative accuracy
however rare the way out is.

References
----------
C.M. Grinstead & J.L. Snell, *Introduction to Probability*, 2nd rev. ed.
(AMS 1997), §11.2 (absorbing chains: N = (I - Q)^-1, t = N1, B = NR) and
§11.5 (mean first passage, mean recurrence times, fundamental matrix).

J.G. Kemeny & J.L. Snell, *Finite Markov Chains* (Van Nostrand 1960), ch. 4
(Kemeny's constant, from memory).

W.K. Grassmann, M.I. Taksar & D.P. Heyman, Operations Research 33 (1985);
J. Kohlas, Z. Oper. Res. 30 (1986) (state reduction for passage times, from
memory).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .stationary import eliminate

__all__ = [
    "Absorption",
    "absorption",
    "limit_law",
    "limit_matrix",
    "mean_first_passage",
    "hitting_times",
    "kemeny_constant",
]


@dataclass(frozen=True)
class Absorption:
    """Where the chain ends up, and how long it takes to get there.

    Attributes
    ----------
    probabilities : (n, c) ndarray
        ``probabilities[i, m]`` = probability of eventually entering closed
        class ``structure.closed[m]`` from state ``i``.  The row of a recurrent
        state is the indicator of its own class; rows sum to 1.
    expected_steps : (n,) ndarray
        Expected number of steps before entering a closed class (0 for
        recurrent states).  G&S §11.2 ``t = N 1``.
    steps_variance : (n,) ndarray
        Variance of that number of steps (G&S §11.2: ``(2N - I) t - t_sq``),
        0 for recurrent states.
    closed : tuple of int
        The class indices the columns refer to (``structure.closed``).
    """

    probabilities: np.ndarray
    expected_steps: np.ndarray
    steps_variance: np.ndarray
    closed: tuple[int, ...]


def _structure(P, structure):
    if structure is None:
        from .structure import classify

        structure = classify(P)
    return structure


def absorption(P, structure=None) -> Absorption:
    """Absorption probabilities into each closed class and expected steps to absorption.

    Parameters
    ----------
    P : (n, n) array_like
    structure : Structure, optional

    Returns
    -------
    Absorption

    Notes
    -----
    The transient states are eliminated one by one (GTH-style state
    reduction) with, as extra columns, their probabilities of entering each
    closed class (probabilities) and a column of ones (the reward "one step").
    That is the factorisation ``I - Q = (I - C)(D - L)`` computed without
    subtraction; back substitution gives ``B = N R`` and ``t = N 1`` with small
    componentwise relative error, and ``E[T^2] = N (2t - 1)`` by one more
    solve.

    References
    ----------
    Grinstead & Snell (1997), §11.2, Theorems 11.5 and 11.6.

    Examples
    --------
    >>> a = absorption([[1, 0, 0], [0.5, 0, 0.5], [0, 0, 1]])
    >>> a.probabilities[1], float(a.expected_steps[1])
    (array([0.5, 0.5]), 1.0)
    """
    from scipy.linalg import solve_triangular

    P = np.asarray(P, dtype=np.float64)
    structure = _structure(P, structure)
    n = P.shape[0]
    closed = structure.closed
    c = len(closed)
    probs = np.zeros((n, c))
    steps = np.zeros(n)
    var = np.zeros(n)
    for m, k in enumerate(closed):
        probs[list(structure.classes[k].states), m] = 1.0
    T = np.asarray(structure.transient_states, dtype=np.int64)
    if T.size:
        Q = P[np.ix_(T, T)]
        # exits into each closed class: a sum of non-negative entries
        R = np.zeros((T.size, c))
        for m, k in enumerate(closed):
            st = list(structure.classes[k].states)
            R[:, m] = P[np.ix_(T, st)].sum(axis=1)
        X = np.hstack([R, np.ones((T.size, 1))])
        E = eliminate(Q, X, nprob=c, overwrite=True)
        Lw = E.lower()
        Y = solve_triangular(Lw, E.X, lower=True, check_finite=False)
        B = np.maximum(Y[:, :c], 0.0)
        # Each row sums to 1 in exact arithmetic; dividing by the computed sum
        # changes every entry by a relative rounding error only.
        B /= B.sum(axis=1, keepdims=True)
        t = Y[:, c]
        # second moment: E[T^2] = N (2t - 1), with 2t - 1 >= 1 (t >= 1)
        y2 = solve_triangular(E.upper(), 2.0 * t - 1.0, lower=False, unit_diagonal=True, check_finite=False)
        t2 = solve_triangular(Lw, y2, lower=True, check_finite=False)
        probs[T] = B
        steps[T] = t
        var[T] = np.maximum(t2 - t * t, 0.0)
    for a in (probs, steps, var):
        a.setflags(write=False)
    return Absorption(probs, steps, var, tuple(closed))


def limit_matrix(P, structure=None, *, laws=None, absorb=None) -> np.ndarray:
    """Long-run (Cesaro) law from every start state, as the rows of an (n, n) matrix.

    ``lim (1/T) sum_{t<T} P^t = sum_m B[:, m] pi_m`` with ``B`` the absorption
    probabilities and ``pi_m`` the stationary law of closed class m.
    """
    from .stationary import stationary_laws

    P = np.asarray(P, dtype=np.float64)
    structure = _structure(P, structure)
    if laws is None:
        laws = stationary_laws(P, structure)
    if absorb is None:
        absorb = absorption(P, structure)
    n = P.shape[0]
    if not laws:
        return np.zeros((n, n))
    return absorb.probabilities @ np.vstack(laws)


def limit_law(P, pi0, structure=None) -> np.ndarray:
    """The long-run (Cesaro) law from the start law ``pi0``.

    Parameters
    ----------
    P : (n, n) array_like
    pi0 : (n,) array_like
        Start law.
    structure : Structure, optional

    Returns
    -------
    (n,) ndarray
        ``lim (1/T) sum_{t<T} pi0 P^t = sum_m (pi0 B[:, m]) pi_m``: the mass
        that ends in each closed class times that class's stationary law.
        Equal to ``lim pi0 P^t`` when every closed class reached is aperiodic.

    Examples
    --------
    >>> limit_law([[1, 0, 0], [0.25, 0.5, 0.25], [0, 0, 1]], [0, 1, 0])
    array([0.5, 0. , 0.5])
    """
    from .stationary import stationary_laws

    P = np.asarray(P, dtype=np.float64)
    structure = _structure(P, structure)
    pi0 = np.asarray(pi0, dtype=np.float64)
    if pi0.shape != (P.shape[0],):
        raise ValueError(f"pi0 must have {P.shape[0]} entries, not shape {pi0.shape}")
    laws = stationary_laws(P, structure)
    mass = pi0 @ absorption(P, structure).probabilities
    out = np.zeros(P.shape[0])
    for w, pi in zip(mass, laws):
        out += w * pi
    return out


def hitting_times(P, target) -> np.ndarray:
    """Expected steps to reach the set ``target`` from each state (0 on the target).

    Parameters
    ----------
    P : (n, n) array_like
    target : sequence of int
        States to reach.  Every state must reach ``target`` with probability 1,
        otherwise the expected time is infinite and ``inf`` is returned there.

    Returns
    -------
    (n,) ndarray
    """
    P = np.asarray(P, dtype=np.float64)
    n = P.shape[0]
    tgt = np.zeros(n, dtype=bool)
    tgt[np.asarray(list(target), dtype=np.int64)] = True
    out = np.zeros(n)
    rest = np.flatnonzero(~tgt)
    if not rest.size:
        return out
    # States that cannot reach the target with probability 1 get inf: make the
    # target absorbing and look at absorption into it.
    Pa = P.copy()
    T = np.flatnonzero(tgt)
    Pa[T] = 0.0
    Pa[T, T] = 1.0
    from .structure import classify

    s = classify(Pa)
    a = absorption(Pa, s)
    # Mass ending outside the target is exactly 0 when no path leads elsewhere
    # (state reduction adds only non-negative terms).
    elsewhere = np.zeros(n)
    for m, k in enumerate(s.closed):
        if not tgt[s.classes[k].states[0]]:
            elsewhere += a.probabilities[:, m]
    bad = (elsewhere > 0) & ~tgt
    out[bad] = np.inf
    good = np.flatnonzero(~bad & ~tgt)
    if good.size:
        from .stationary import solve_mmatrix

        Q = P[np.ix_(good, good)]
        exits = P[np.ix_(good, T)].sum(axis=1)
        out[good] = solve_mmatrix(Q, exits, np.ones(good.size))
    return out


def _mfpt_rec(A: np.ndarray, h: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """All-pairs mean first passage times of a censored chain (semi-Markov).

    ``A``: (m, m) transition probabilities (off-diagonal read), ``h``: expected
    original steps per transition from each state.  Returns ``(M, ret)`` with
    ``M[i, j] = E_i tau_j`` (0 on the diagonal) and ``ret[j]`` the mean
    return time to ``j``.
    """
    from scipy.linalg import solve_triangular

    m = A.shape[0]
    if m == 1:
        return np.zeros((1, 1)), h.copy()
    if m == 2:
        # two states: leave i with probability a_ij per step of mean length h_i
        a01, a10 = A[0, 1], A[1, 0]
        if not (a01 > 0 and a10 > 0):
            raise ArithmeticError("mean first passage: the chain is not irreducible")
        M = np.array([[0.0, h[0] / a01], [h[1] / a10, 0.0]])
        ret = np.array([h[0] + a01 * h[1] / a10, h[1] + a10 * h[0] / a01])
        return M, ret
    M = np.zeros((m, m))
    ret = np.empty(m)
    m1 = m // 2
    halves = (np.arange(m1), np.arange(m1, m))
    for keep, drop in (halves, halves[::-1]):
        perm = np.concatenate([keep, drop])
        k = keep.size
        E = eliminate(A[np.ix_(perm, perm)], h[perm].reshape(-1, 1), nprob=0, stop=k, overwrite=True)
        Mk, rk = _mfpt_rec(E.A[:k, :k].copy(), E.X[:k, 0].copy())
        # back substitution for the eliminated states, all targets in `keep` at once:
        # s_g m_gj - sum_{g' < g} a_gg' m_g'j = h_g + sum_{l in keep} a_gl m_lj
        rhs = E.X[k:, 0][:, None] + E.A[k:, :k] @ Mk
        Md = solve_triangular(E.lower(), rhs, lower=True, check_finite=False)
        M[np.ix_(keep, keep)] = Mk
        M[np.ix_(drop, keep)] = Md
        ret[keep] = rk
    return M, ret


def mean_first_passage(P) -> np.ndarray:
    """Mean first passage times of an irreducible chain.

    Parameters
    ----------
    P : (n, n) array_like
        Irreducible transition matrix (diagonal not read).

    Returns
    -------
    M : (n, n) ndarray
        ``M[i, j] = E_i tau_j`` for ``i != j`` (steps to first reach ``j``) and
        ``M[i, i]`` = mean return time to ``i`` (``= 1 / pi_i``, Kac).

    Notes
    -----
    Divide and conquer over state reduction: to get the columns of the states
    in one half, the other half is eliminated (its states' records are kept),
    the censored chain on the half is solved recursively (a semi-Markov chain:
    each of its steps carries the expected number of original steps), and the
    eliminated states are back-substituted.  Only non-negative numbers are
    added, so every entry keeps its relative accuracy (for example the passage
    times inside each block of a nearly decomposable chain, which a formula
    through the group inverse would lose).  About n^3 flops.

    References
    ----------
    Grinstead & Snell (1997), §11.5 (mean first passage and recurrence
    times); Kohlas (1986) for passage times by state reduction (from memory).

    Examples
    --------
    >>> mean_first_passage([[0.5, 0.25, 0.25], [0.5, 0, 0.5], [0.25, 0.25, 0.5]])[0]  # Land of Oz
    array([2.5       , 4.        , 3.33333333])
    """
    P = np.asarray(P, dtype=np.float64)
    n = P.shape[0]
    if P.ndim != 2 or P.shape[1] != n:
        raise ValueError(f"P must be square, not of shape {P.shape}")
    M, ret = _mfpt_rec(P.copy(), np.ones(n))
    M[np.diag_indices(n)] = ret
    return M


def kemeny_constant(P, *, pi=None, passage=None) -> float:
    """Kemeny's constant ``K = sum_j pi_j E_i tau_j`` of an irreducible chain.

    The sum (with ``E_i tau_i = 0``) is the same for every start ``i``
    (Kemeny & Snell 1960, ch. 4; G&S §11.5 exercise).  It equals
    ``sum_{lambda != 1} 1 / (1 - lambda)`` over the other eigenvalues.

    Parameters
    ----------
    P : (n, n) array_like
        Irreducible.
    pi : (n,) array_like, optional
        Stationary law (GTH when omitted).
    passage : (n, n) array_like, optional
        :func:`mean_first_passage` if already computed.

    Returns
    -------
    float
        Computed as ``pi M0 pi`` (``M0`` = passage times with zero diagonal),
        a sum of positive terms.

    Examples
    --------
    >>> round(kemeny_constant([[0.5, 0.25, 0.25], [0.5, 0, 0.5], [0.25, 0.25, 0.5]]) * 15, 9)  # 32/15
    32.0
    """
    from .stationary import gth

    P = np.asarray(P, dtype=np.float64)
    if pi is None:
        pi = gth(P)
    M = np.array(mean_first_passage(P) if passage is None else passage, dtype=np.float64)
    M[np.diag_indices(M.shape[0])] = 0.0
    return float(pi @ M @ pi)
