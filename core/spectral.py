"""Eigenvalues, second-largest modulus, spectral gap, relaxation time, reversibility, mixing bounds.

The spectrum of ``P`` is the union of the spectra of its class blocks (put the
classes in an order where transitions only go forward and ``P`` is block
triangular).  Each block is handled as ``L = I - P_CC`` assembled from
off-diagonal entries (its diagonal is the off-diagonal row sum plus the exits),
so ``mu = 1 - lambda`` is computed directly instead of by subtracting
eigenvalues of ``P`` from 1.

* A closed class contributes one exact eigenvalue 1; the rest are the
  eigenvalues of the deflated ``(m-1) x (m-1)`` matrix
  ``L' = I - (Q - 1 q^T)`` (``Q``: the class without one state ``r``, ``q``:
  the row of ``r``), which has no zero eigenvalue.
* A dense eigensolver gets ``mu`` with an absolute error ~ eps ||L'||, which is
  no good when ``mu`` is tiny (nearly decomposable chains, rare exits).  Then
  the small eigenvalues are taken instead as ``1 / nu`` for the large
  eigenvalues ``nu`` of ``K = L'^{-1}``, which a dense eigensolver gets to
  small *relative* error.  ``K`` itself is formed accurately from the
  fundamental matrix ``N = (I - Q)^{-1}`` of the chain killed at ``r``
  (state reduction, only non-negative terms) by Sherman-Morrison,
  ``K = N - (N 1)(q^T N) pi_r`` with ``pi_r = 1 / (1 + q^T N 1)``.  For a
  transient class ``K = N`` directly.  Eigenvalues with
  ``|mu| < sqrt(||L'|| / ||K||)`` come from ``K``, the others from ``L'``.
* A closed class of period ``d`` has the ``d``-th roots of unity as
  eigenvalues (Perron-Frobenius); they are set exactly, so its gap is exactly 0.

Relative accuracy of the gap is thus kept when the second-largest eigenvalue
is close to 1 (the slow case that matters for mixing).  An eigenvalue close to
another point of the unit circle (a nearly periodic chain) gets absolute
accuracy ~1e-16.

References
----------
D.A. Levin, Y. Peres & E.L. Wilmer, *Markov Chains and Mixing Times*, 2nd ed.
(AMS 2017), ch. 12: absolute spectral gap, relaxation time (§12.2),
Theorem 12.4 (upper bound), Theorem 12.5 (lower bound); §1.6 (reversibility,
detailed balance).

C.D. Meyer, "The role of the group generalized inverse in the theory of finite
Markov chains", *SIAM Review* 17(3):443-464 (1975) (deflation and
inverses of ``I - P``; from memory).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Spectrum", "MixingBounds", "spectrum", "detailed_balance", "REVERSIBILITY_TOLERANCE"]

#: Largest relative violation ``|pi_i P_ij - pi_j P_ji| / max(...)`` of
#: detailed balance for a chain to count as reversible.  Typed probabilities
#: are rounded to float64 (relative 1.1e-16) and GTH is accurate to a few ulps
#: times n, so 1e-9 separates rounding from a real imbalance (common practice,
#: matching the row-sum tolerance of validation).
REVERSIBILITY_TOLERANCE = 1e-9

#: Refine the small eigenvalues of a block through its inverse when the
#: smallest |mu| is below this fraction of ||L||.
REFINE_BELOW = 1e-3


@dataclass(frozen=True)
class MixingBounds:
    """Relaxation-time bounds on ``t_mix(epsilon)`` for a reversible, irreducible, aperiodic chain.

    Attributes
    ----------
    epsilon : float
    lower : float
        ``(t_rel - 1) log(1 / (2 epsilon))`` (LPW 2nd ed., Theorem 12.5).
    upper : float
        ``t_rel log(1 / (epsilon pi_min))`` (LPW 2nd ed., Theorem 12.4).
    """

    epsilon: float
    lower: float
    upper: float


@dataclass(frozen=True)
class Spectrum:
    """Spectral data of a transition matrix.

    Attributes
    ----------
    eigenvalues : (n,) complex ndarray
        All eigenvalues of ``P``, largest modulus first (the unit eigenvalues,
        one per closed class, lead).
    one_minus : (n,) complex ndarray
        ``1 - eigenvalues``, computed directly (accurate when tiny), same order.
    block : (n,) int ndarray
        Index into ``structure.classes`` of the class block each eigenvalue
        comes from.
    slem : float
        Second-largest eigenvalue modulus: the largest ``|lambda|`` once one
        eigenvalue 1 per closed class is set aside (0 if nothing is left).
    gap : float
        Absolute spectral gap ``1 - slem``, with relative accuracy when small.
    relaxation_time : float or None
        ``1 / gap``; None when the gap is 0, which happens for a periodic
        closed class (each closed class sets its own eigenvalue 1 aside).
    reversible : bool
        The chain is irreducible and satisfies detailed balance within
        :data:`REVERSIBILITY_TOLERANCE`.
    class_reversible : tuple of bool
        Detailed balance of each closed class (order of ``structure.closed``).
    balance_violation : float or None
        Largest relative violation of detailed balance (irreducible chains).
    bounds : MixingBounds or None
        For reversible, irreducible, aperiodic chains with a positive gap.
    refined : bool
        True when some eigenvalues were refined through an inverse.
    """

    eigenvalues: np.ndarray
    one_minus: np.ndarray
    block: np.ndarray
    slem: float
    gap: float
    relaxation_time: float | None
    reversible: bool
    class_reversible: tuple[bool, ...]
    balance_violation: float | None
    bounds: MixingBounds | None
    refined: bool

    def to_json(self) -> dict:
        return {
            "slem": self.slem,
            "gap": self.gap,
            "relaxation_time": self.relaxation_time,
            "reversible": self.reversible,
            "bounds": None
            if self.bounds is None
            else {"epsilon": self.bounds.epsilon, "lower": self.bounds.lower, "upper": self.bounds.upper},
            "eigenvalues": [[float(z.real), float(z.imag)] for z in self.eigenvalues],
            "one_minus_eigenvalues": [[float(z.real), float(z.imag)] for z in self.one_minus],
        }


def detailed_balance(P, pi) -> float:
    """Largest relative violation of ``pi_i P_ij = pi_j P_ji`` over pairs ``i != j``.

    Returns ``inf`` when the zero patterns of ``P`` and ``P^T`` differ, 0 for a
    perfectly balanced chain.  (LPW 2nd ed., (1.29).)
    """
    P = np.asarray(P, dtype=np.float64)
    pi = np.asarray(pi, dtype=np.float64)
    F = pi[:, None] * P
    np.fill_diagonal(F, 0.0)
    Ft = F.T
    if np.any((F > 0) != (Ft > 0)):
        return float("inf")
    big = np.maximum(F, Ft)
    with np.errstate(invalid="ignore", divide="ignore"):
        r = np.where(big > 0, np.abs(F - Ft) / np.where(big > 0, big, 1.0), 0.0)
    return float(r.max()) if r.size else 0.0


def _inf_norm(A: np.ndarray) -> float:
    return float(np.abs(A).sum(axis=1).max()) if A.size else 0.0


def _combine(mu_a: np.ndarray, mu_b: np.ndarray, tau: float) -> np.ndarray:
    """Small eigenvalues from ``mu_b`` (``|mu| < tau``), the others from ``mu_a``."""
    a = mu_a[np.argsort(np.abs(mu_a), kind="stable")]
    b = mu_b[np.argsort(np.abs(mu_b), kind="stable")]
    k = int(np.count_nonzero(np.abs(b) < tau))

    def splits_pair(v, k):
        if k <= 0 or k >= v.size:
            return False
        x, y = v[k - 1], v[k]
        return x.imag != 0 and abs(x - np.conj(y)) <= 1e-8 * abs(y)

    while k < a.size and (splits_pair(a, k) or splits_pair(b, k)):
        k += 1
    return np.concatenate([b[:k], a[k:]])


def _block_mu(L: np.ndarray, make_inverse) -> tuple[np.ndarray, bool]:
    """Eigenvalues of ``L`` with small ones refined through ``make_inverse()``."""
    mu_a = np.linalg.eigvals(L) if L.size else np.zeros(0, dtype=complex)
    mu_a = mu_a.astype(complex)
    nL = _inf_norm(L)
    if mu_a.size == 0 or np.min(np.abs(mu_a)) >= REFINE_BELOW * nL:
        return mu_a, False
    K = make_inverse()
    nK = _inf_norm(K)
    nu = np.linalg.eigvals(K).astype(complex)
    with np.errstate(divide="ignore"):
        mu_b = np.where(nu != 0, 1.0 / np.where(nu != 0, nu, 1.0), np.inf)
    tau = np.sqrt(nL / nK) if nK > 0 else np.inf
    return _combine(mu_a, mu_b, tau), True


def _offdiag_rowsum(A: np.ndarray) -> np.ndarray:
    B = A.copy()
    np.fill_diagonal(B, 0.0)
    return B.sum(axis=1)


def _closed_block_mu(Pc: np.ndarray, pi: np.ndarray) -> tuple[np.ndarray, bool]:
    """``1 - lambda`` for the eigenvalues of a closed class other than one 1."""
    from .stationary import inverse_mmatrix

    m = Pc.shape[0]
    if m == 1:
        return np.zeros(0, dtype=complex), False
    r = int(np.argmax(pi))
    o = np.array([i for i in range(m) if i != r])
    Q = Pc[np.ix_(o, o)]
    q = Pc[r, o]
    exits = Pc[o, r]
    Lp = -Q + q[None, :]
    # diagonal: off-diagonal row sum inside Q, plus the exit to r, plus q_i
    Lp[np.diag_indices(m - 1)] = _offdiag_rowsum(Q) + exits + q

    def inverse():
        N = inverse_mmatrix(Q, exits)
        t = N.sum(axis=1)
        pir = 1.0 / (1.0 + q @ t)
        return N - np.outer(t, q @ N) * pir

    return _block_mu(Lp, inverse)


def _transient_block_mu(Q: np.ndarray, exits: np.ndarray) -> tuple[np.ndarray, bool]:
    from .stationary import inverse_mmatrix

    L = -Q.copy()
    L[np.diag_indices(Q.shape[0])] = _offdiag_rowsum(Q) + exits
    return _block_mu(L, lambda: inverse_mmatrix(Q, exits))


def _one_minus_root(j: int, d: int) -> complex:
    """``1 - exp(2 pi i j / d)``, exact for the real and imaginary roots."""
    if 2 * j == d:
        return complex(2.0, 0.0)
    if 4 * j == d:
        return complex(1.0, -1.0)
    if 4 * j == 3 * d:
        return complex(1.0, 1.0)
    a = np.pi * j / d
    return complex(2.0 * np.sin(a) ** 2, -np.sin(2.0 * a))


def _snap_roots(mu: np.ndarray, d: int) -> tuple[np.ndarray, np.ndarray]:
    """Set the eigenvalues nearest the d-th roots of unity (other than 1) exactly."""
    mu = mu.copy()
    exact = np.zeros(mu.size, dtype=bool)
    for j in range(1, d):
        target = _one_minus_root(j, d)
        dist = np.abs(mu - target)
        dist[exact] = np.inf
        i = int(np.argmin(dist))
        mu[i] = target
        exact[i] = True
    return mu, exact


def _one_minus_modulus(mu: np.ndarray) -> np.ndarray:
    """``1 - |1 - mu|`` without cancellation for small ``mu``."""
    lam_abs = np.abs(1.0 - mu)
    small = np.abs(mu) < 0.5
    out = 1.0 - lam_abs
    ms = mu[small]
    out[small] = (2.0 * ms.real - np.abs(ms) ** 2) / (1.0 + lam_abs[small])
    return out


def spectrum(P, structure=None, *, epsilon: float = 0.25, laws=None) -> Spectrum:
    """Eigenvalues, SLEM, absolute spectral gap, relaxation time, reversibility and bounds.

    Parameters
    ----------
    P : (n, n) array_like
    structure : Structure, optional
    epsilon : float
        For the mixing-time bounds.
    laws : tuple of (n,) ndarray, optional
        Stationary laws from :func:`core.stationary.stationary_laws`.

    Returns
    -------
    Spectrum

    Notes
    -----
    See the module notes for how tiny ``1 - lambda`` keep relative accuracy.
    ``slem`` excludes one eigenvalue 1 per closed class; ``gap = 1 - slem``
    (LPW's absolute spectral gap ``gamma_*``) and ``relaxation_time = 1/gap``
    (LPW §12.2), None when the gap is 0.

    References
    ----------
    LPW 2nd ed., ch. 12, Theorems 12.4 and 12.5.

    Examples
    --------
    >>> s = spectrum([[0.5, 0.25, 0.25], [0.5, 0.0, 0.5], [0.25, 0.25, 0.5]])  # Land of Oz
    >>> s.slem, s.gap, s.reversible
    (0.25, 0.75, True)
    """
    from .stationary import stationary_laws
    from .structure import classify

    P = np.asarray(P, dtype=np.float64)
    if structure is None:
        structure = classify(P)
    if laws is None:
        laws = stationary_laws(P, structure)
    n = P.shape[0]
    mus, blocks, exact_mask, units = [], [], [], []
    refined = False
    law_of = dict(zip(structure.closed, laws))
    class_rev = []
    for k, cls in enumerate(structure.classes):
        st = np.asarray(cls.states)
        Pc = P[np.ix_(st, st)]
        if cls.closed:
            pi = law_of[k][st]
            mu, ref = _closed_block_mu(Pc, pi)
            ex = np.zeros(mu.size, dtype=bool)
            if cls.period is not None and cls.period > 1:
                mu, ex = _snap_roots(mu, cls.period)
            mus += [np.zeros(1, dtype=complex), mu]
            exact_mask += [np.ones(1, dtype=bool), ex]
            units += [np.ones(1, dtype=bool), np.zeros(mu.size, dtype=bool)]
            blocks += [np.full(1 + mu.size, k)]
            class_rev.append(detailed_balance(Pc, pi) <= REVERSIBILITY_TOLERANCE)
        else:
            outside = np.ones(n, dtype=bool)
            outside[st] = False
            exits = P[np.ix_(st, np.flatnonzero(outside))].sum(axis=1)
            mu, ref = _transient_block_mu(Pc, exits)
            mus.append(mu)
            exact_mask.append(np.zeros(mu.size, dtype=bool))
            units.append(np.zeros(mu.size, dtype=bool))
            blocks.append(np.full(mu.size, k))
        refined = refined or ref
    mu = np.concatenate(mus)
    block = np.concatenate(blocks)
    exact = np.concatenate(exact_mask)
    unit = np.concatenate(units)
    g = _one_minus_modulus(mu)
    g[exact] = 0.0
    g[unit] = 0.0
    # order: unit eigenvalues first, then by modulus (descending), then angle
    lam = 1.0 - mu
    lam[unit] = 1.0
    order = np.lexsort((np.angle(lam), g, ~unit))
    mu, lam, block, g, unit = mu[order], lam[order], block[order], g[order], unit[order]
    others = g[~unit]
    if others.size:
        gap = float(max(0.0, others.min()))
        slem = float(max(0.0, 1.0 - gap)) if gap < 0.5 else float(np.abs(lam[~unit][np.argmin(others)]))
    else:
        gap, slem = 1.0, 0.0
    t_rel = None if gap <= 0.0 else 1.0 / gap
    violation = None
    reversible = False
    if structure.irreducible:
        violation = detailed_balance(P, laws[0])
        reversible = violation <= REVERSIBILITY_TOLERANCE
    bounds = None
    eps = float(epsilon)
    if reversible and structure.classes[0].period == 1 and t_rel is not None:
        pi_min = float(laws[0].min())
        bounds = MixingBounds(
            eps,
            lower=(t_rel - 1.0) * float(np.log(1.0 / (2.0 * eps))),
            upper=t_rel * float(np.log(1.0 / (eps * pi_min))),
        )
    for a in (lam, mu, block):
        a.setflags(write=False)
    return Spectrum(lam, mu, block, slem, gap, t_rel, bool(reversible), tuple(bool(x) for x in class_rev),
                    violation, bounds, refined)
