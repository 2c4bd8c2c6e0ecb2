"""Communicating classes, closed and transient classes, period and cyclic subclasses.

Everything here depends only on the sparsity pattern of ``P`` (which entries
are strictly positive), so it is exact: no tolerance is involved.

References
----------
D.A. Levin, Y. Peres & E.L. Wilmer, *Markov Chains and Mixing Times*, 2nd ed.
(AMS 2017), §1.3 (irreducibility, period, Lemma 1.6), §1.7 (classification of
states: essential/inessential classes).

J.P. Jarvis & D.R. Shier, "Graph-theoretic analysis of finite Markov chains",
ch. 17 of Shier & Wallenius (eds.), *Applied Mathematical Modeling* (CRC, 1999):
the period of a strongly connected class is the gcd over its edges ``u -> v``
of ``level(u) + 1 - level(v)`` for breadth-first levels; cyclic subclasses are
``level mod period``.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["CommClass", "Structure", "classify"]


@dataclass(frozen=True)
class CommClass:
    """One communicating class.

    Attributes
    ----------
    states : tuple of int
        Sorted row indices of the class.
    closed : bool
        True when no transition leaves the class (a recurrent, "essential"
        class); False for a transient class.
    period : int or None
        gcd of the lengths of the cycles through the class; ``None`` only for a
        class without any cycle (a single transient state without self-loop).
    cyclic_subclasses : tuple of tuple of int
        ``period`` sorted groups ``C_0, ..., C_{d-1}``; every transition inside
        the class goes from ``C_r`` to ``C_{r+1 mod d}``.  ``C_0`` holds the
        class's smallest state.  A single group when the period is 1 or None.
    """

    states: tuple[int, ...]
    closed: bool
    period: int | None
    cyclic_subclasses: tuple[tuple[int, ...], ...]

    @property
    def size(self) -> int:
        return len(self.states)

    @property
    def aperiodic(self) -> bool:
        """True when the period is 1."""
        return self.period == 1


@dataclass(frozen=True)
class Structure:
    """The class structure of a chain.

    Attributes
    ----------
    classes : tuple of CommClass
        Ordered by their smallest state index.
    class_of : (n,) ndarray of int
        ``class_of[i]`` is the index into ``classes`` of the class of state i.
    closed : tuple of int
        Indices into ``classes`` of the closed (recurrent) classes, ascending.
    transient : tuple of int
        Indices into ``classes`` of the transient classes, ascending.
    absorbing_states : tuple of int
        States ``i`` with ``P[i, i] == 1`` (closed classes of one state).
    irreducible : bool
        True when there is a single class.
    """

    classes: tuple[CommClass, ...]
    class_of: np.ndarray
    closed: tuple[int, ...]
    transient: tuple[int, ...]
    absorbing_states: tuple[int, ...]
    irreducible: bool

    @property
    def n(self) -> int:
        """Number of states."""
        return int(self.class_of.shape[0])

    @property
    def closed_classes(self) -> tuple[CommClass, ...]:
        """The closed classes, in the order of :attr:`closed`."""
        return tuple(self.classes[k] for k in self.closed)

    @property
    def transient_states(self) -> tuple[int, ...]:
        """Sorted indices of all states in transient classes."""
        return tuple(int(i) for i in np.flatnonzero(~self.recurrent_mask))

    @property
    def recurrent_mask(self) -> np.ndarray:
        """(n,) bool array, True for states of closed classes."""
        closed = np.zeros(len(self.classes), dtype=bool)
        closed[list(self.closed)] = True
        return closed[self.class_of]

    @property
    def ergodic(self) -> bool:
        """True when there is exactly one closed class and it is aperiodic.

        Then ``P^t(x, .)`` converges to the unique stationary law from every
        start ``x`` (transient states allowed), and the mixing time is defined.
        """
        return len(self.closed) == 1 and self.classes[self.closed[0]].period == 1

    def __eq__(self, other):  # ndarray field: compare by value
        if not isinstance(other, Structure):
            return NotImplemented
        return self.classes == other.classes and np.array_equal(self.class_of, other.class_of)

    __hash__ = None  # type: ignore[assignment]


def _pattern(P) -> "scipy.sparse.csr_matrix":  # noqa: F821
    from scipy import sparse

    P = np.asarray(P)
    if P.ndim != 2 or P.shape[0] != P.shape[1]:
        raise ValueError(f"P must be a square matrix, not of shape {P.shape}")
    if not np.all(np.isfinite(P)):
        raise ValueError("P has entries that are not finite numbers")
    return sparse.csr_matrix(P > 0)


def classify(P) -> Structure:
    """Communicating classes, closedness, periods and cyclic subclasses of ``P``.

    Parameters
    ----------
    P : (n, n) array_like
        Transition matrix; only its pattern (entries ``> 0``) is used.

    Returns
    -------
    Structure

    Notes
    -----
    Strongly connected components come from
    ``scipy.sparse.csgraph.connected_components(connection="strong")``.  A class
    is closed when no edge leaves it.  The period of each class with an internal
    edge is found by one breadth-first search inside the class (Jarvis & Shier):
    with BFS levels ``l``, ``d = gcd(l(u) + 1 - l(v))`` over the class's edges,
    and the cyclic subclass of ``v`` is ``l(v) mod d``.  Linear in the number of
    positive entries.

    References
    ----------
    Levin, Peres & Wilmer (2017), §1.3 and §1.7; Jarvis & Shier (1999).

    Examples
    --------
    >>> s = classify([[0, 1], [1, 0]])
    >>> s.irreducible, s.classes[0].period, s.classes[0].cyclic_subclasses
    (True, 2, ((0,), (1,)))
    """
    from scipy.sparse import csgraph

    A = _pattern(P)
    n = A.shape[0]
    ncomp, labels = csgraph.connected_components(A, directed=True, connection="strong")
    labels = np.asarray(labels)
    # Renumber classes by their smallest state.
    first = np.full(ncomp, n, dtype=np.int64)
    np.minimum.at(first, labels, np.arange(n))
    order = np.argsort(first, kind="stable")
    rank = np.empty(ncomp, dtype=np.int64)
    rank[order] = np.arange(ncomp)
    class_of = rank[labels]

    coo = A.tocoo()
    src, dst = coo.row.astype(np.int64), coo.col.astype(np.int64)
    cs, cd = class_of[src], class_of[dst]
    leaving = np.zeros(ncomp, dtype=bool)
    leaving[cs[cs != cd]] = True
    inside = cs == cd

    members = [[] for _ in range(ncomp)]
    for i in range(n):
        members[class_of[i]].append(i)

    # BFS levels inside each class, all classes at once: a BFS from each class's
    # smallest state over the graph restricted to internal edges.
    level = np.full(n, -1, dtype=np.int64)
    from scipy import sparse

    internal = sparse.csr_matrix(
        (np.ones(int(inside.sum()), dtype=np.int8), (src[inside], dst[inside])), shape=(n, n)
    )
    for k in range(ncomp):
        root = members[k][0]
        if len(members[k]) == 1:
            level[root] = 0
            continue
        nodes, pred = csgraph.breadth_first_order(internal, root, directed=True, return_predecessors=True)
        level[root] = 0
        for v in nodes[1:]:
            level[v] = level[pred[v]] + 1

    # gcd of level differences along internal edges, per class.
    diff = np.abs(level[src[inside]] + 1 - level[dst[inside]])
    cls_edges = cs[inside]
    periods: list[int | None] = [None] * ncomp
    if diff.size:
        ord_ = np.argsort(cls_edges, kind="stable")
        cls_sorted, diff_sorted = cls_edges[ord_], diff[ord_]
        starts = np.flatnonzero(np.r_[True, cls_sorted[1:] != cls_sorted[:-1]])
        g = np.gcd.reduceat(diff_sorted, starts)
        for k, d in zip(cls_sorted[starts], g):
            periods[int(k)] = int(d)
    classes = []
    for k in range(ncomp):
        st = tuple(members[k])
        d = periods[k]
        if d is not None and d == 0:  # cannot happen: a cycle has positive length
            d = None
        if d is None or d == 1:
            subs = (st,)
        else:
            groups: list[list[int]] = [[] for _ in range(d)]
            for i in st:
                groups[int(level[i] % d)].append(i)
            subs = tuple(tuple(g) for g in groups)
        classes.append(CommClass(st, not bool(leaving[k]), d, subs))
    closed = tuple(k for k in range(ncomp) if classes[k].closed)
    transient = tuple(k for k in range(ncomp) if not classes[k].closed)
    absorbing = tuple(classes[k].states[0] for k in closed if classes[k].size == 1)
    class_of.setflags(write=False)
    return Structure(tuple(classes), class_of, closed, transient, absorbing, ncomp == 1)

