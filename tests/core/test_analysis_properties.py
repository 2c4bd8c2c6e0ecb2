"""Property tests over random chains (sparse, reducible, periodic), cross-checked with networkx.

Invariants checked (common practice unless a source is named):
pi P = pi and laws sum to 1 (LPW §1.5); classes = networkx strongly connected components,
closed classes = networkx attracting components; period 1 <=> networkx is_aperiodic, and the
period equals the gcd of the class's cycle lengths (LPW §1.3), enumerated with networkx
simple_cycles; absorption rows sum to 1 and solve the first-step equations (G&S §11.2);
the Cesaro limit is stationary; mean first passage times solve M = 1 + P M0 with Kac's
pi_i M_ii = 1 (LPW Prop. 1.19); d(t_mix) <= eps < d(t_mix - 1) (LPW (4.30)).
"""
from math import gcd

import networkx as nx
import numpy as np
from hypothesis import given, strategies as st

from core.evolution import mixing_time, worst_tv
from core.passage import absorption, limit_matrix, mean_first_passage
from core.spectral import spectrum
from core.stationary import stationary_laws
from core.structure import classify

WEIGHTS = st.one_of(st.floats(0.01, 1.0), st.sampled_from([1e-12, 1e-6, 0.5, 1.0]))


def _normalise(W):
    return W / W.sum(axis=1, keepdims=True)


@st.composite
def sparse_chains(draw):
    n = draw(st.integers(1, 8))
    W = np.zeros((n, n))
    for i in range(n):
        targets = draw(st.lists(st.integers(0, n - 1), min_size=1, max_size=n, unique=True))
        for j in targets:
            W[i, j] = draw(WEIGHTS)
    return _normalise(W)


@st.composite
def periodic_chains(draw):
    d = draw(st.integers(2, 4))
    n = draw(st.integers(d, 9))
    labels = list(range(d)) + [draw(st.integers(0, d - 1)) for _ in range(n - d)]
    groups = [[i for i in range(n) if labels[i] == r] for r in range(d)]
    W = np.zeros((n, n))
    for i in range(n):
        nxt = groups[(labels[i] + 1) % d]
        targets = draw(st.lists(st.sampled_from(nxt), min_size=1, max_size=len(nxt), unique=True))
        for j in targets:
            W[i, j] = draw(WEIGHTS)
    return _normalise(W)


@st.composite
def reducible_chains(draw):
    # blocks in a row; each block may lead forward to later blocks
    sizes = draw(st.lists(st.integers(1, 3), min_size=2, max_size=4))
    n = sum(sizes)
    starts = np.cumsum([0] + sizes)
    W = np.zeros((n, n))
    for b, size in enumerate(sizes):
        lo, hi = starts[b], starts[b + 1]
        for i in range(lo, hi):
            inside = draw(st.lists(st.integers(lo, hi - 1), min_size=1, max_size=size, unique=True))
            for j in inside:
                W[i, j] = draw(WEIGHTS)
            if hi < n and draw(st.booleans()):
                j = draw(st.integers(hi, n - 1))
                W[i, j] = draw(WEIGHTS)
    return _normalise(W)


CHAINS = st.one_of(sparse_chains(), periodic_chains(), reducible_chains())


def graph(P):
    G = nx.DiGraph()
    G.add_nodes_from(range(len(P)))
    G.add_edges_from(zip(*np.nonzero(P > 0)))
    return G


def cycle_gcd(H):
    g = 0
    for cyc in nx.simple_cycles(H):
        g = gcd(g, len(cyc))
        if g == 1:
            break
    return g


@given(CHAINS)
def test_classes_agree_with_networkx(P):
    s = classify(P)
    G = graph(P)
    assert {frozenset(c.states) for c in s.classes} == {frozenset(c) for c in nx.strongly_connected_components(G)}
    closed = {frozenset(s.classes[k].states) for k in s.closed}
    assert closed == {frozenset(c) for c in nx.attracting_components(G)}
    assert all(s.class_of[i] == k for k, c in enumerate(s.classes) for i in c.states)
    assert [c.states[0] for c in s.classes] == sorted(c.states[0] for c in s.classes)
    for c in s.classes:
        H = G.subgraph(c.states)
        if H.number_of_edges() == 0:
            assert c.period is None
            continue
        assert (c.period == 1) == nx.is_aperiodic(H)
        assert c.period == cycle_gcd(H)
        where = {i: r for r, sub in enumerate(c.cyclic_subclasses) for i in sub}
        assert sorted(where) == list(c.states)
        for u, v in H.edges:
            assert where[v] == (where[u] + 1) % c.period


@given(CHAINS)
def test_stationary_laws_absorption_and_limit(P):
    s = classify(P)
    laws = stationary_laws(P, s)
    assert len(laws) == len(s.closed)
    for k, pi in zip(s.closed, laws):
        assert abs(pi.sum() - 1) <= 1e-14
        assert np.max(np.abs(pi @ P - pi)) <= 1e-14
        support = set(np.flatnonzero(pi > 0))
        assert support == set(s.classes[k].states)
    a = absorption(P, s)
    assert np.allclose(a.probabilities.sum(axis=1), 1, rtol=0, atol=1e-14)
    T = list(s.transient_states)
    if T:
        Q = P[np.ix_(T, T)]
        # first-step equations B = Q B + R and t = 1 + Q t
        R = np.column_stack([P[np.ix_(T, list(s.classes[k].states))].sum(axis=1) for k in s.closed])
        B = a.probabilities[T]
        assert np.max(np.abs(B - (Q @ B + R))) <= 1e-10
        t = a.expected_steps[T]
        assert np.max(np.abs(t - (1 + Q @ t)) / t) <= 1e-9
        assert np.all(a.steps_variance[T] >= 0)
    L = limit_matrix(P, s, laws=laws, absorb=a)
    assert np.allclose(L.sum(axis=1), 1, rtol=0, atol=1e-14)
    assert np.max(np.abs(L @ P - L)) <= 1e-13


@given(CHAINS)
def test_passage_and_spectrum_of_closed_classes(P):
    s = classify(P)
    laws = stationary_laws(P, s)
    for k, pi in zip(s.closed, laws):
        st_ = list(s.classes[k].states)
        Pc = P[np.ix_(st_, st_)]
        M = mean_first_passage(Pc)
        M0 = M.copy()
        np.fill_diagonal(M0, 0)
        assert np.max(np.abs(1 + Pc @ M0 - M) / M) <= 1e-9
        assert np.max(np.abs(pi[st_] * np.diag(M) - 1)) <= 1e-12
    sp = spectrum(P, s, laws=laws)
    assert sp.eigenvalues.shape == (len(P),)
    assert abs(np.sum(sp.eigenvalues) - np.trace(P)) <= 1e-9
    assert abs(np.sum(sp.eigenvalues**2) - np.trace(P @ P)) <= 1e-9
    assert 0 <= sp.gap <= 1 and abs(sp.slem + sp.gap - 1) <= 1e-15
    if any(s.classes[k].period not in (1, None) for k in s.closed):
        assert sp.gap == 0


@given(CHAINS, st.sampled_from([0.25, 0.1, 0.01]))
def test_mixing_time_definition(P, eps):
    s = classify(P)
    t = mixing_time(P, eps)
    if not s.ergodic:
        assert t is None
        return
    assert t is not None
    assert worst_tv(P, t) <= eps
    if t > 0:
        assert worst_tv(P, t - 1) > eps
