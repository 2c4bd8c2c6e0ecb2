"""The law at step t for huge t, total variation distance, d(t) and the mixing time.

Powers ``P^(2^k)`` are built by repeated squaring and *kept stochastic*: after
every product, a row whose off-diagonal mass ``r_i`` is at most 1/2 gets its
diagonal reset to ``1 - r_i`` (the off-diagonal sum is formed with the diagonal
zeroed, so no cancellation), and any other row is divided by its sum.  Both
keep every entry's relative accuracy, and neither lets the rounding error in
the row sums double with each squaring, which is what makes plain repeated
squaring drift (by ~1e-4 at t ~ 1e12 when the spectral gap is ~1e-13).

Mixing time (Levin, Peres & Wilmer, *Markov Chains and Mixing Times*, 2nd ed.,
AMS 2017, (4.22), (4.30)): ``d(t) = max_x ||P^t(x, .) - pi||_TV`` and
``t_mix(eps) = min{t : d(t) <= eps}``.  Because ``d`` is non-increasing
(LPW Exercise 4.2), it is found by doubling (``P, P^2, P^4, ...`` until
``d <= eps``) and then binary lifting from the top bit down, reusing the cached
squares: about ``2 log2(t_mix)`` matrix products in all, ~80 for
``t_mix ~ 1e12``.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Iterator, Sequence

import numpy as np

__all__ = [
    "tv_distance",
    "stochastic_product",
    "PowerLadder",
    "distribution_at",
    "matrix_power",
    "worst_tv",
    "Mixing",
    "mixing",
    "mixing_time",
    "mixing_time_from",
    "tv_curve",
    "MAX_BITS",
]

#: Largest number of binary digits of a step count (t < 2**MAX_BITS).
MAX_BITS = 63
#: Memory allowed for cached powers (bytes); beyond it, powers are recomputed.
LADDER_BUDGET = 1 << 30


def tv_distance(mu, nu) -> float:
    """Total variation distance ``max_A |mu(A) - nu(A)| = 1/2 sum_x |mu(x) - nu(x)|``.

    Parameters
    ----------
    mu, nu : (n,) array_like
        Probability vectors.

    References
    ----------
    LPW 2nd ed., (4.1) and Proposition 4.2.

    Examples
    --------
    >>> tv_distance([1, 0], [0.5, 0.5])
    0.5
    """
    mu = np.asarray(mu, dtype=np.float64)
    nu = np.asarray(nu, dtype=np.float64)
    return float(0.5 * np.abs(mu - nu).sum())


def _restore_rows(C: np.ndarray) -> np.ndarray:
    """Make a product of stochastic matrices stochastic again, in place."""
    n = C.shape[0]
    idx = np.arange(n)
    d = C[idx, idx].copy()
    C[idx, idx] = 0.0
    r = C.sum(axis=1)  # off-diagonal mass, no cancellation
    small = r <= 0.5
    # rows with a dominant diagonal: the diagonal is 1 - r, accurate
    C[idx[small], idx[small]] = 1.0 - r[small]
    big = ~small
    if big.any():
        C[idx[big], idx[big]] = d[big]
        C[big] /= (r[big] + d[big])[:, None]
    return C


def stochastic_product(A, B) -> np.ndarray:
    """``A @ B`` for stochastic ``A, B``, restored to exactly stochastic rows.

    See the module notes: rows with off-diagonal mass at most 1/2 get the
    diagonal ``1 - (off-diagonal sum)``, other rows are normalised.  Entries
    keep their relative accuracy.
    """
    C = np.asarray(A) @ np.asarray(B)
    np.maximum(C, 0.0, out=C)
    return _restore_rows(C)


def _renorm(v: np.ndarray) -> np.ndarray:
    s = v.sum()
    return v / s if s > 0 else v


class PowerLadder:
    """The squares ``P^(2^k)``, computed once, kept stochastic, cached.

    Pass a ladder instead of ``P`` to the functions of this module to reuse the
    squares across calls (they accept either).

    Parameters
    ----------
    P : (n, n) array_like
        Row-stochastic matrix.
    budget : int
        Bytes of cached squares allowed.  Beyond it, squares are kept only as
        sparse checkpoints and recomputed when needed (more products, bounded
        memory).

    Attributes
    ----------
    products : int
        Number of n x n matrix products done so far (squarings and others).
    """

    def __init__(self, P, *, budget: int = LADDER_BUDGET):
        if isinstance(P, PowerLadder):
            raise TypeError("already a PowerLadder")
        P = np.array(P, dtype=np.float64)
        if P.ndim != 2 or P.shape[0] != P.shape[1]:
            raise ValueError(f"P must be a square matrix, not of shape {P.shape}")
        self.P = _restore_rows(np.maximum(P, 0.0))
        self.P.setflags(write=False)
        self.n = P.shape[0]
        self.products = 0
        self._slots = max(3, int(budget // max(1, 8 * self.n * self.n)))
        self._cache: dict[int, np.ndarray] = {0: self.P}
        self._top = 0  # highest index computed so far
        self._top_matrix = self.P
        self._fixed: int | None = None  # first k with P^(2^(k+1)) == P^(2^k)

    # -- products ---------------------------------------------------------
    def multiply(self, A, B) -> np.ndarray:
        """Stochastic product, counted in :attr:`products`."""
        self.products += 1
        return stochastic_product(A, B)

    def _square(self, A: np.ndarray) -> np.ndarray:
        return self.multiply(A, A)

    def _keep(self, k: int, A: np.ndarray) -> None:
        # Keep every square while memory allows; then keep checkpoints only
        # (indices divisible by a growing stride) plus the top.
        self._cache[k] = A
        if len(self._cache) > self._slots:
            stride = 2
            while True:
                keep = {j: M for j, M in self._cache.items() if j % stride == 0 or j == self._top}
                if len(keep) <= self._slots or stride > MAX_BITS:
                    self._cache = keep
                    break
                stride *= 2

    def square(self, k: int) -> np.ndarray:
        """``P^(2^k)`` (read-only array)."""
        if k < 0:
            raise ValueError("k must be >= 0")
        if self._fixed is not None and k > self._fixed:
            k = self._fixed
        if k in self._cache:
            return self._cache[k]
        if k > self._top:
            A = self._top_matrix
            while self._top < k:
                B = self._square(A)
                B.setflags(write=False)
                self._top += 1
                if self._fixed is None and _same(A, B):
                    # A is a fixed point of squaring: every higher square is A
                    self._top -= 1
                    self._fixed = self._top
                    return A
                self._top_matrix = B
                self._keep(self._top, B)
                A = B
            return A
        # recompute from the nearest checkpoint below
        j = max(i for i in self._cache if i < k)
        A = self._cache[j]
        while j < k:
            A = self._square(A)
            j += 1
        A.setflags(write=False)
        return A

    def descending(self, hi: int) -> Iterator[tuple[int, np.ndarray]]:
        """Yield ``(k, P^(2^k))`` for ``k = hi-1, ..., 0`` with bounded memory."""
        if hi <= 0:
            return
        self.square(hi - 1)
        if len(self._cache) >= min(hi, self._top + 1) and all(k in self._cache for k in range(min(hi, self._top + 1))):
            for k in range(hi - 1, -1, -1):
                yield k, self.square(k)
            return
        yield from self._reverse(0, hi, self.P, max(2, self._slots - len(self._cache)))

    def _reverse(self, lo: int, hi: int, A_lo: np.ndarray, slots: int):
        # Recursive checkpointing: O(log) extra memory, O(K log K) squarings.
        if self._fixed is not None and lo >= self._fixed:
            for k in range(hi - 1, lo - 1, -1):
                yield k, self.square(k)
            return
        if hi - lo <= max(1, slots):
            seg = [A_lo]
            for _ in range(lo + 1, hi):
                seg.append(self._square(seg[-1]))
            for k in range(hi - 1, lo - 1, -1):
                yield k, seg[k - lo]
            return
        mid = (lo + hi) // 2
        A = A_lo
        for _ in range(lo, mid):
            A = self._square(A)
        yield from self._reverse(mid, hi, A, slots - 1)
        del A
        yield from self._reverse(lo, mid, A_lo, slots)

    def power(self, t: int) -> np.ndarray:
        """``P^t`` (a new array)."""
        t = _check_t(t)
        R = np.eye(self.n)
        k = 0
        first = True
        while t:
            if t & 1:
                S = self.square(k)
                R = S.copy() if first else self.multiply(R, S)
                first = False
            t >>= 1
            k += 1
        return R

    def apply(self, v, t: int) -> np.ndarray:
        """``v P^t`` for a row vector (or rows of a matrix) ``v``."""
        t = _check_t(t)
        v = np.array(v, dtype=np.float64)
        k = 0
        while t:
            if t & 1:
                v = np.maximum(v @ self.square(k), 0.0)
                v = _renorm(v) if v.ndim == 1 else v / v.sum(axis=-1, keepdims=True)
            t >>= 1
            k += 1
        return v


def _same(A: np.ndarray, B: np.ndarray) -> bool:
    """True when B equals A to rounding, entry by entry (a fixed point)."""
    return bool(np.all(np.abs(A - B) <= 4 * np.finfo(float).eps * np.maximum(A, B)))


def _check_t(t) -> int:
    if isinstance(t, (bool, np.bool_)) or not isinstance(t, (int, np.integer)):
        if isinstance(t, float) and t.is_integer():
            t = int(t)
        else:
            raise ValueError(f"the step count must be a whole number, not {t!r}")
    t = int(t)
    if t < 0:
        raise ValueError(f"the step count must be >= 0, not {t}")
    if t.bit_length() > MAX_BITS:
        raise ValueError(f"the step count {t} is too large (must be below 2**{MAX_BITS})")
    return t


def _ladder(P) -> PowerLadder:
    return P if isinstance(P, PowerLadder) else PowerLadder(P)


def distribution_at(P, pi0, t: int) -> np.ndarray:
    """The law ``pi0 P^t`` after ``t`` steps, for any ``t < 2**63``.

    Parameters
    ----------
    P : (n, n) array_like or PowerLadder
    pi0 : (n,) array_like
        Start law.
    t : int

    Returns
    -------
    (n,) ndarray
        Non-negative, summing to 1.

    Notes
    -----
    Repeated squaring kept stochastic (module notes): ``popcount(t)``
    vector-matrix products and ``log2(t)`` squarings (fewer once the squares
    stop changing).

    Examples
    --------
    >>> distribution_at([[0.5, 0.5], [0.0, 1.0]], [1.0, 0.0], 3)
    array([0.125, 0.875])
    """
    L = _ladder(P)
    pi0 = np.asarray(pi0, dtype=np.float64)
    if pi0.shape != (L.n,):
        raise ValueError(f"pi0 must have {L.n} entries, not shape {pi0.shape}")
    return L.apply(pi0, t)


def matrix_power(P, t: int) -> np.ndarray:
    """``P^t`` by repeated squaring, kept stochastic (see module notes)."""
    return _ladder(P).power(t)


def _default_pi(P_or_L, pi):
    if pi is not None:
        return np.asarray(pi, dtype=np.float64)
    from .stationary import stationary_laws
    from .structure import classify

    P = P_or_L.P if isinstance(P_or_L, PowerLadder) else np.asarray(P_or_L, dtype=np.float64)
    s = classify(P)
    if len(s.closed) != 1:
        raise ValueError(
            f"the chain has {len(s.closed)} closed classes, so no unique stationary law: pass pi"
        )
    return stationary_laws(P, s)[0]


def _worst(M: np.ndarray, pi: np.ndarray) -> float:
    return float(0.5 * np.abs(M - pi[None, :]).sum(axis=1).max())


def worst_tv(P, t: int, *, pi=None) -> float:
    """``d(t) = max_x ||P^t(x, .) - pi||_TV`` (LPW 2nd ed., (4.22)).

    Parameters
    ----------
    P : (n, n) array_like or PowerLadder
    t : int
    pi : (n,) array_like, optional
        Target law; default the unique stationary law (the chain must have a
        single closed class, transient states allowed).
    """
    L = _ladder(P)
    pi = _default_pi(L, pi)
    return _worst(L.power(t), pi)


@dataclass(frozen=True)
class Mixing:
    """Mixing time with its context.

    Attributes
    ----------
    epsilon : float
    steps : int or None
        ``t_mix(epsilon)``; None when not defined (see ``reason``) or beyond
        ``2**62`` steps.
    reason : str or None
        Why ``steps`` is None: ``"several closed classes"``, ``"periodic"``
        or ``"too large"``.
    products : int
        Matrix products used.
    """

    epsilon: float
    steps: int | None
    reason: str | None
    products: int


def _check_eps(epsilon) -> float:
    e = float(epsilon)
    if not 0.0 < e < 1.0:
        raise ValueError(f"epsilon must be between 0 and 1 (exclusive), not {epsilon!r}")
    return e


def mixing(P, epsilon: float = 0.25, *, pi=None, structure=None) -> Mixing:
    """Mixing time ``t_mix(epsilon)`` with the reason when it is not defined.

    Defined when the chain has exactly one closed class and that class is
    aperiodic (transient states allowed: ``d(t)`` is then taken over all starts
    against the unique stationary law).  With several closed classes or a
    periodic closed class ``d(t)`` does not tend to 0 and ``steps`` is None.

    Parameters
    ----------
    P : (n, n) array_like or PowerLadder
    epsilon : float
        In (0, 1); LPW's ``t_mix`` is ``epsilon = 1/4``.
    pi : (n,) array_like, optional
        The stationary law if already known (from :func:`core.stationary.gth`).
    structure : Structure, optional

    Notes
    -----
    Doubling ``P^(2^k)`` until ``d <= epsilon`` (at ``k = K``), then binary
    lifting from bit ``K-2`` down to 0 over the cached squares, using that
    ``d(t)`` is non-increasing (LPW Exercise 4.2).  Costs about ``2K`` matrix
    products.  A mixing time of ``2**62`` steps or more gives ``steps=None``
    with reason ``"too large"``.
    """
    from .structure import classify

    eps = _check_eps(epsilon)
    L = _ladder(P)
    start_products = L.products
    if structure is None:
        structure = classify(L.P)
    if len(structure.closed) != 1:
        return Mixing(eps, None, "several closed classes", 0)
    if structure.classes[structure.closed[0]].period != 1:
        return Mixing(eps, None, "periodic", 0)
    pi = _default_pi(L, pi)
    if _worst(np.eye(L.n), pi) <= eps:
        return Mixing(eps, 0, None, 0)
    K = 0
    while _worst(L.square(K), pi) > eps:
        K += 1
        if K > MAX_BITS - 1:
            return Mixing(eps, None, "too large", L.products - start_products)
    if K == 0:
        return Mixing(eps, 1, None, L.products - start_products)
    # largest t with d(t) > eps lies in [2^(K-1), 2^K)
    B = None
    t = 0
    for k, S in L.descending(K):
        if B is None:  # k == K-1: d(2^(K-1)) > eps by construction
            B = S
            t = 1 << k
            continue
        C = L.multiply(B, S)
        if _worst(C, pi) > eps:
            B, t = C, t + (1 << k)
    return Mixing(eps, t + 1, None, L.products - start_products)


def mixing_time(P, epsilon: float = 0.25, *, pi=None) -> int | None:
    """``t_mix(epsilon) = min{t : d(t) <= epsilon}`` (LPW 2nd ed., (4.30)).

    Returns None when it is not defined: several closed classes, or a periodic
    closed class.  A chain with one aperiodic closed class and transient states
    has a mixing time (``d(t)`` over every start, to the unique stationary law).

    Raises
    ------
    core.errors.LimitError
        When the mixing time is ``2**62`` steps or more.

    Examples
    --------
    >>> mixing_time([[0.7, 0.3], [0.1, 0.9]])   # LPW Example 4.1 type chain
    3
    """
    m = mixing(P, epsilon, pi=pi)
    if m.reason == "too large":
        from .errors import LimitError

        raise LimitError(f"the mixing time exceeds 2**{MAX_BITS - 1} (about 4.6e18) steps")
    return m.steps


def mixing_time_from(P, pi0, epsilon: float = 0.25, *, target=None) -> int | None:
    """First ``t`` with ``||pi0 P^t - target||_TV <= epsilon`` (a start-specific mixing time).

    Parameters
    ----------
    P : (n, n) array_like or PowerLadder
    pi0 : (n,) array_like
        Start law.
    target : (n,) array_like, optional
        Must be stationary (``target P = target``); default the long-run law
        from ``pi0`` (:func:`core.passage.limit_law`).

    Returns
    -------
    int or None
        None when the distance never gets to ``epsilon`` (a periodic closed
        class reached from ``pi0``) or only after ``2**62`` steps or more.

    Notes
    -----
    For a stationary target the distance is non-increasing in ``t`` (total
    variation contracts under ``P``), so doubling then binary lifting applies,
    with vector-matrix products over the cached squares.
    """
    eps = _check_eps(epsilon)
    L = _ladder(P)
    v0 = np.asarray(pi0, dtype=np.float64)
    if target is None:
        from .passage import limit_law

        target = limit_law(L.P, v0)
    target = np.asarray(target, dtype=np.float64)
    if _reaches_periodic(L.P, v0):
        return None

    def dist(v):
        return 0.5 * np.abs(v - target).sum()

    if dist(v0) <= eps:
        return 0
    K = 0
    while dist(L.apply(v0, 1 << K)) > eps:
        K += 1
        if K > MAX_BITS - 1:
            return None
        if L._fixed is not None and K > L._fixed + 1:
            return None  # the squares no longer change and the distance stays above eps
    if K == 0:
        return 1
    v = None
    t = 0
    for k, S in L.descending(K):
        if v is None:
            v = L.apply(v0, 1 << k)
            t = 1 << k
            continue
        w = _renorm(np.maximum(v @ S, 0.0))
        if dist(w) > eps:
            v, t = w, t + (1 << k)
    return t + 1


def _reaches_periodic(P: np.ndarray, v0: np.ndarray) -> bool:
    """True when the law ``v0`` puts mass on a periodic closed class in the long run."""
    from .passage import absorption
    from .structure import classify

    s = classify(P)
    B = absorption(P, s).probabilities
    mass = v0 @ B
    return any(mass[c] > 0 and s.classes[k].period != 1 for c, k in enumerate(s.closed))


def tv_curve(P, pi0, steps: Sequence[int], *, target=None) -> np.ndarray:
    """``||pi0 P^t - target||_TV`` for each ``t`` in ``steps``.

    Parameters
    ----------
    P : (n, n) array_like or PowerLadder
    pi0 : (n,) array_like
        Start law.
    steps : sequence of int
        Non-decreasing step counts ``>= 0``.
    target : (n,) array_like, optional
        Default: the long-run (Cesaro) law from ``pi0``
        (:func:`core.passage.limit_law`).

    Returns
    -------
    (len(steps),) ndarray

    Notes
    -----
    The law is advanced from one step count to the next by the binary digits of
    the difference, over the cached squares.
    """
    L = _ladder(P)
    v = np.asarray(pi0, dtype=np.float64)
    if v.shape != (L.n,):
        raise ValueError(f"pi0 must have {L.n} entries, not shape {v.shape}")
    if target is None:
        from .passage import limit_law

        target = limit_law(L.P, v)
    target = np.asarray(target, dtype=np.float64)
    ts = [_check_t(t) for t in steps]
    if any(b < a for a, b in zip(ts, ts[1:])):
        raise ValueError("steps must be sorted (non-decreasing)")
    out = np.empty(len(ts))
    cur = 0
    for i, t in enumerate(ts):
        if t > cur:
            v = L.apply(v, t - cur)
            cur = t
        out[i] = 0.5 * np.abs(v - target).sum()
    return out
