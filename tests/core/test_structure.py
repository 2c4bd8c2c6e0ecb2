"""Communicating classes, closed/transient classes, periods and cyclic subclasses.

Reference values are from the team's reference list (tests cite the source and
whether a value was seen in it, recalled from memory, or computed from a
published formula).
"""
import numpy as np
import pytest

from core.structure import classify


def walk(adjacency, n=None):
    """Transition matrix choosing uniformly among out-neighbours."""
    n = n or len(adjacency)
    P = np.zeros((n, n))
    for u, vs in adjacency.items():
        for v in vs:
            P[u, v] = 1.0 / len(vs)
    return P


def cycle_walk(n):
    return walk({i: [(i - 1) % n, (i + 1) % n] for i in range(n)})


EHRENFEST4 = [[0, 1, 0, 0, 0], [0.25, 0, 0.75, 0, 0], [0, 0.5, 0, 0.5, 0], [0, 0, 0.75, 0, 0.25], [0, 0, 0, 1, 0]]
DRUNKARD = [[1, 0, 0, 0, 0], [0.5, 0, 0.5, 0, 0], [0, 0.5, 0, 0.5, 0], [0, 0, 0.5, 0, 0.5], [0, 0, 0, 0, 1]]
OZ = [[0.5, 0.25, 0.25], [0.5, 0, 0.5], [0.25, 0.25, 0.5]]


def test_ehrenfest_period_two_and_cyclic_classes():
    # Grinstead & Snell, Introduction to Probability, Example 11.17 (P seen); period 2 with cyclic
    # classes {0,2,4}, {1,3} (LPW 2nd ed. §2.3; reference list E3/E11, verified by computation).
    s = classify(EHRENFEST4)
    assert s.irreducible
    (c,) = s.classes
    assert c.closed and c.period == 2
    assert c.cyclic_subclasses == ((0, 2, 4), (1, 3))


@pytest.mark.parametrize(
    "adjacency, period, subclasses",
    [
        # Jarvis & Shier BFS method; fixtures computed in the reference list E11
        ({0: [1], 1: [2], 2: [0, 3], 3: [4], 4: [5], 5: [0]}, 3, ((0, 3), (1, 4), (2, 5))),
        ({0: [1], 1: [2], 2: [0, 3], 3: [0]}, 1, ((0, 1, 2, 3),)),
        ({0: [1], 1: [0, 2], 2: [1, 3], 3: [2, 4], 4: [3]}, 2, ((0, 2, 4), (1, 3))),
    ],
)
def test_period_fixtures(adjacency, period, subclasses):
    s = classify(walk(adjacency))
    assert s.irreducible
    assert s.classes[0].period == period
    assert s.classes[0].cyclic_subclasses == subclasses


@pytest.mark.parametrize("n, period", [(4, 2), (5, 1), (6, 2), (9, 1), (10, 2)])
def test_cycle_walk_periods(n, period):
    # LPW 2nd ed. Example 1.8 / Fig. 1.3: the walk on Z_n is periodic (period 2) for even n,
    # aperiodic for odd n (seen).
    assert classify(cycle_walk(n)).classes[0].period == period


def test_flip_flop_period_two():
    # Grinstead & Snell Example 11.16, P = [[0,1],[1,0]] has period 2 (reference list E11).
    s = classify([[0, 1], [1, 0]])
    assert s.classes[0].period == 2
    assert s.classes[0].cyclic_subclasses == ((0,), (1,))


def test_successive_cyclic_subclasses():
    # LPW 2nd ed. Exercise 1.6: transitions go from each cyclic class to the next (seen).
    P = walk({0: [1, 3], 1: [2], 2: [0, 4], 3: [4], 4: [5], 5: [0]})
    s = classify(P)
    c = s.classes[0]
    where = {i: r for r, sub in enumerate(c.cyclic_subclasses) for i in sub}
    for u, v in zip(*np.nonzero(P)):
        assert where[v] == (where[u] + 1) % c.period


def test_drunkards_walk_classes():
    # Grinstead & Snell Examples 11.13-11.16: states 0 and 4 absorbing, 1-3 transient (seen).
    s = classify(DRUNKARD)
    assert not s.irreducible
    assert [c.states for c in s.classes] == [(0,), (1, 2, 3), (4,)]
    assert s.closed == (0, 2) and s.transient == (1,)
    assert s.absorbing_states == (0, 4)
    assert s.transient_states == (1, 2, 3)
    assert s.classes[1].period == 2  # the transient walk 1-2-3 alternates parity
    assert list(s.class_of) == [0, 1, 1, 1, 2]
    assert list(s.recurrent_mask) == [True, False, False, False, True]
    assert not s.ergodic


def test_transient_state_without_cycle_has_no_period():
    # A state left at once and never re-entered lies on no cycle: its period is undefined
    # (common practice; LPW §1.3 defines the period through return times, none here).
    s = classify([[0, 1, 0], [0, 0.5, 0.5], [0, 0.5, 0.5]])
    assert s.classes[0].states == (0,)
    assert s.classes[0].period is None and not s.classes[0].closed
    assert s.classes[0].cyclic_subclasses == ((0,),)
    assert s.classes[1].period == 1 and s.classes[1].closed
    assert s.ergodic


def test_land_of_oz_irreducible_aperiodic():
    # Grinstead & Snell Example 11.1: the Land of Oz chain is regular (seen).
    s = classify(OZ)
    assert s.irreducible and s.ergodic
    assert s.classes[0].period == 1 and s.absorbing_states == ()


def test_classes_ordered_by_smallest_state():
    P = np.eye(4)[[2, 3, 0, 1]]  # 0<->2 and 1<->3
    s = classify(P)
    assert [c.states for c in s.classes] == [(0, 2), (1, 3)]
    assert [c.period for c in s.classes] == [2, 2]
    assert s.closed == (0, 1)


def test_tiny_probabilities_count_as_edges():
    # Structure depends on which entries are positive, however small (common practice).
    e = 1e-300
    s = classify([[1 - e, e], [0, 1]])
    assert s.closed == (1,) and s.transient == (0,)


def test_rejects_non_square():
    with pytest.raises(ValueError, match="square"):
        classify(np.ones((2, 3)))


def test_large_sparse_chain_is_fast_and_consistent():
    # A 3000-state ring with a chord: one class, period gcd(3000, 1501) = 1 (common practice).
    n = 3000
    P = np.zeros((n, n))
    P[np.arange(n), (np.arange(n) + 1) % n] = 1.0
    P[0, 1] = 0.5
    P[0, 1500] = 0.5  # cycle of length 1501 through the chord
    s = classify(P)
    assert s.irreducible and s.classes[0].period == 1
