"""The replicate simulation engine and its comparison with exact values (core.simulate).

Statistical checks use fixed seeds and stated tolerances: chi-square tests at
alpha = 1e-6 (Bonferroni-corrected where several are made), or 5 standard
errors.  Exact values come from the core engine (evolution, passage,
structure); chains with published values are from the shared reference list
(Grinstead & Snell, Introduction to Probability, ch. 11; Levin, Peres &
Wilmer, Markov Chains and Mixing Times, 2nd ed.).
"""
import math
import threading
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from core import diagnostics as D
from core.errors import LimitError, OptionError
from core.evolution import distribution_at
from core.passage import limit_law
from core.simulate import (MEMORY_ENV, ReplicateSimulation, cell_table, compare, curve_grid, estimate_memory,
                           memory_limit_from_env, parse_bytes, run, start_law)
from core.structure import classify

# G&S Example 11.1, Land of Oz (REFERENCES E1): stationary (2/5, 1/5, 2/5) [seen]
OZ = np.array([[0.5, 0.25, 0.25], [0.5, 0.0, 0.5], [0.25, 0.25, 0.5]])
OZ_PI = np.array([0.4, 0.2, 0.4])
# G&S Example 11.17, Ehrenfest urn with 4 balls (REFERENCES E3): period 2, subclasses {0,2,4}, {1,3} [seen]
EHRENFEST = np.array([[0, 1, 0, 0, 0], [0.25, 0, 0.75, 0, 0], [0, 0.5, 0, 0.5, 0],
                      [0, 0, 0.75, 0, 0.25], [0, 0, 0, 1, 0]])


def _random_chain(rng, n, density):
    P = rng.random((n, n)) * (rng.random((n, n)) < density)
    P[np.arange(n), rng.integers(0, n, n)] += 0.1  # no empty row
    return P / P.sum(axis=1, keepdims=True)


def _alpha_per(tests: int, alpha: float = 1e-6) -> float:
    return alpha / tests


# ---------------------------------------------------------------------------
# cell tables: exact masses


@pytest.mark.parametrize("kind", ["split", "wide", "direct"])
def test_dyadic_probabilities_are_reproduced_exactly(kind):
    P = np.array([[0.5, 0.25, 0.125, 0.125], [0, 1, 0, 0], [0.75, 0, 0, 0.25], [2**-40, 0, 0, 1 - 2**-40]])
    t = cell_table(P, kind=kind)
    assert np.array_equal(t.realised_matrix(), P)


@pytest.mark.parametrize("kind", ["split", "wide", "direct"])
@settings(max_examples=25)
@given(seed=st.integers(0, 10**6), n=st.integers(1, 12), density=st.floats(0.05, 1.0))
def test_masses_are_nearest_integers_and_rows_sum_exactly(kind, seed, n, density):
    # Every entry but the row's largest gets round(p * 2**k) units; the largest absorbs the rounding of the
    # row sum; every row sums to exactly 2**k; the support is kept (all p here exceed 2**-k).
    P = _random_chain(np.random.default_rng(seed), n, density)
    t = cell_table(P, kind=kind)
    k = t.bits + t.unit_bits
    for i, row in enumerate(t.masses()):
        assert sum(row.values()) == 2**k
        assert set(row) == set(np.flatnonzero(P[i]).tolist())
        big = int(np.argmax(P[i]))
        for j, w in row.items():
            exact = Fraction(float(P[i, j])) * 2**k
            if j != big:
                assert abs(w - exact) <= Fraction(1, 2)
            else:
                # the row's float sum is within n ulps of 1: the correction is tiny in relative terms
                assert abs(w - exact) <= 2**k * 1e-14


def test_tiny_probability_is_kept():
    # A trap left with probability 1e-12 must not be rounded away
    P = np.array([[1 - 1e-12, 1e-12], [0.5, 0.5]])
    for kind in ("split", "wide", "direct"):
        R = cell_table(P, kind=kind).realised_matrix()
        assert R[0, 1] == pytest.approx(1e-12, rel=1e-9)


def test_table_rejects_bad_matrices():
    with pytest.raises(ValueError, match="sums to"):
        cell_table([[0.5, 0.4], [0.5, 0.5]])
    with pytest.raises(ValueError, match="negative"):
        cell_table([[1.5, -0.5], [0.5, 0.5]])
    with pytest.raises(ValueError, match="fewer than"):
        cell_table(np.full((4, 4), 0.25), bits=1)


def test_dense_rows_get_a_direct_table_and_it_realises_the_wide_masses():
    # Both layouts quantise to the same 2**64 units per row; they are built by different
    # constructions (Vose's general pairing vs Walker's own-cell layout) and must agree exactly.
    rng = np.random.default_rng(8)
    dense = rng.random((300, 300))
    dense /= dense.sum(axis=1, keepdims=True)
    d = cell_table(dense)
    assert (d.kind, d.bits, d.coarse_bits) == ("direct", 9, 7)
    assert d.masses() == cell_table(dense, kind="wide", bits=9).masses()
    assert d.nbytes == 300 * 512 * 10
    # few successors per row: a split table with few mixed cells
    assert cell_table(_random_chain(rng, 200, 0.01)).kind == "split"
    # many states with few successors: a direct table (100 MiB here) would dwarf the split one
    sparse = np.zeros((2500, 2500))
    for i in range(2500):
        sparse[i, rng.choice(2500, 5, replace=False)] = 0.2
    t = cell_table(sparse)
    assert t.kind == "split" and t.nbytes < 1 << 20


def test_direct_table_needs_a_cell_per_state():
    ring = np.roll(np.eye(5), 1, axis=1)  # one successor each: 4 cells hold a row, not 5 states
    with pytest.raises(ValueError, match="one per state"):
        cell_table(ring, kind="direct", bits=2)
    with pytest.raises(ValueError, match="between 1 and 12"):
        cell_table(np.full((5, 5), 0.2), kind="direct", bits=13)


class _Words:
    """A stand-in bit generator handing out given 64-bit words."""

    def __init__(self, words):
        self.words = np.asarray(words, dtype=np.uint64)

    def random_raw(self, size):
        out, self.words = self.words[:size], self.words[size:]
        return np.concatenate([out, np.zeros(size - out.size, dtype=np.uint64)])


@pytest.mark.parametrize("bits", [3, 12])
def test_direct_kernel_settles_fractions_at_every_threshold_exactly(bits):
    # A replicate's 16 random bits are its cell c (top `bits`) and the top g = 16 - bits bits of
    # its fraction; on a tie with the cell's coarse threshold, a coin's top 48 bits complete the
    # fraction.  Fractions just below, at and above each cell's exact threshold (ties among them)
    # must go where the layout says: the cell's own state below the threshold, the alias from it
    # on.  Both kernels, coins read in replicate order.
    P = np.array([[0.5, 0.3, 0.2 - 1e-12, 1e-12, 0], [0.2, 0.2, 0.2, 0.2, 0.2], [0, 0, 0, 0, 1],
                  [1 / 3, 0, 1 / 3, 1 / 3, 0], [0.125, 0.125, 0.25, 0.5, 0]])
    t = cell_table(P, kind="direct", bits=bits)
    g = t.coarse_bits
    U = 1 << (64 - bits)
    for i in range(5):
        v16, coins, expect = [], [], []
        for c in range(t.L):
            q = int(t.exact[i * t.L + c])
            rec = int(t.cells[i * t.L + c])
            for frac in sorted({0, q - 1, q, q + 1, U - 1, (q >> 48) << 48, ((q >> 48) << 48) - 1}):
                if 0 <= frac < U:
                    v16.append((c << g) | (frac >> 48))
                    if frac >> 48 == rec & ((1 << g) - 1):  # a tie: the coin carries the rest
                        coins.append((frac & ((1 << 48) - 1)) << 16)
                    expect.append(c if frac < q else rec >> g)
        assert all(P[i, j] > 0 for j in expect)
        assert coins  # ties are exercised
        words = np.array(v16 + [0] * (-len(v16) % 4), dtype=np.uint16).view(np.uint64)
        for kernel in ("vector", "scalar"):
            sim = ReplicateSimulation(P, replicates=len(v16), steps=1, start=i, seed=0, table=t,
                                      _kernel=kernel, paths=0)
            sim._cells_bg = _Words(words)
            sim._coins._bg = _Words(coins)
            sim.advance(1)
            assert sim.states().tolist() == expect, (i, kernel)


def test_mixed_cells_are_at_most_successors_minus_one():
    # Vose's construction: at most k - 1 of a row's cells are shared (k successors)
    rng = np.random.default_rng(3)
    P = _random_chain(rng, 30, 0.3)
    t = cell_table(P, kind="split")
    assert t.mixed.size <= int(((P > 0).sum(axis=1) - 1).sum())


# ---------------------------------------------------------------------------
# the sampler is right: one-step transition counts


@pytest.mark.parametrize("kind,bits", [("split", None), ("wide", None), ("direct", None), ("direct", 12)])
@pytest.mark.parametrize("kernel", ["vector", "scalar"])
def test_one_step_transitions_follow_P(kind, bits, kernel):
    # (a direct table of 2**12 cells keeps 4 coarse threshold bits: one replicate-step in 16 ties)
    # Pearson chi-square per row at alpha = 1e-6 / rows (Bonferroni).
    rng = np.random.default_rng(4)
    n = 6
    P = _random_chain(rng, n, 0.6)
    P[0] = [1e-3, 0.999 - 1e-9, 1e-9, 0, 0, 0]
    table = cell_table(P, kind=kind, bits=bits)
    R = 60000 if kernel == "vector" else 4
    pairs = np.zeros((n, n), dtype=np.int64)
    sim = ReplicateSimulation(P, replicates=R, steps=2000 if kernel == "scalar" else 3, start="uniform",
                              seed=77, table=table, _kernel=kernel, paths=0)
    while not sim.done:
        x0 = sim.states()
        sim.advance(1)
        np.add.at(pairs, (x0, sim.states()), 1)
    for i in range(n):
        g = D.chisquare_gof(pairs[i], P[i])
        assert g.impossible == 0
        assert not (g.pvalue < _alpha_per(n)), (i, g)


def test_ensemble_is_a_sample_of_the_exact_law():
    # Replicates are independent: the ensemble at t is multinomial(R, pi0 P^t) (chi-square, alpha 1e-6)
    rng = np.random.default_rng(5)
    P = _random_chain(rng, 40, 0.2)
    sim = ReplicateSimulation(P, replicates=200000, steps=7, start=3, seed=8, paths=0)
    res = sim.run()
    assert D.chisquare_gof(res.ensemble, distribution_at(P, np.eye(40)[3], 7)).pvalue > 1e-6


def test_dense_chain_ensemble_is_a_sample_of_the_exact_law():
    # The same check on a dense 300-state chain (a direct table, chosen by default), from a start
    # law and from one state; the exact law by plain numpy matrix products (alpha 1e-6 each).
    rng = np.random.default_rng(15)
    P = rng.random((300, 300)) ** 3
    P /= P.sum(axis=1, keepdims=True)
    assert cell_table(P).kind == "direct"
    for start, pi0 in [(7, np.eye(300)[7]), (None, np.full(300, 1 / 300))]:
        res = ReplicateSimulation(P, replicates=300000, steps=2, start=start, seed=9, paths=0).run()
        exact = pi0 @ P @ P
        assert D.chisquare_gof(res.ensemble, exact).pvalue > 1e-6


def test_start_law_is_sampled():
    law = np.array([0.1, 0.0, 0.6, 0.3])
    P = np.full((4, 4), 0.25)
    sim = ReplicateSimulation(P, replicates=50000, steps=1, start=law, seed=9)
    g = D.chisquare_gof(sim.ensemble(), law)
    assert g.impossible == 0 and g.pvalue > 1e-6


def test_start_options():
    assert start_law(3, None).tolist() == [1 / 3] * 3
    assert start_law(3, "uniform").tolist() == [1 / 3] * 3
    assert start_law(3, 2).tolist() == [0, 0, 1]
    with pytest.raises(OptionError, match="out of range"):
        start_law(3, 5)
    with pytest.raises(OptionError, match="sums to"):
        start_law(3, [0.5, 0.2, 0.2])
    with pytest.raises(OptionError, match="3 entries"):
        start_law(3, [1.0])


# ---------------------------------------------------------------------------
# reproducibility and streaming


def _fingerprint(sim):
    r = sim.result()
    return (r.ensemble.tolist(), r.occupancy.tolist(), r.batch_counts.tolist(), r.paths.tolist(), r.kept,
            sim.states().tolist())


@pytest.mark.parametrize("kind", ["split", "wide", "direct"])
@pytest.mark.parametrize("burn_in", [0, 13])
def test_same_seed_same_result_whatever_the_chunks_and_snapshots(kind, burn_in):
    P = _random_chain(np.random.default_rng(6), 12, 0.5)
    table = cell_table(P, kind=kind)
    opts = dict(replicates=37, steps=300, burn_in=burn_in, stride=3, seed=2024, table=table, tracked=20, paths=5,
                path_length=40)
    prints = []
    for every, chunk in [(None, None), (1, 1), (7, 3), (1000, 1000), (5, 64)]:
        sim = ReplicateSimulation(P, **opts)
        for _ in sim.snapshots(every=every, chunk=chunk):
            pass
        assert sim.t == burn_in + 300
        prints.append(_fingerprint(sim))
    # advance() in uneven pieces gives the same too
    sim = ReplicateSimulation(P, **opts)
    for k in (1, 2, 50, 100, 200):
        sim.advance(k)
    prints.append(_fingerprint(sim))
    assert all(p == prints[0] for p in prints)


@pytest.mark.parametrize("kind, bits", [("split", None), ("wide", None), ("direct", None),
                                        ("direct", 12)])  # 12 bits: 4 coarse bits, one word in 16 ties
def test_scalar_and_vector_kernels_agree_bit_for_bit(kind, bits):
    P = _random_chain(np.random.default_rng(7), 9, 0.7)
    table = cell_table(P, kind=kind, bits=bits)
    out = []
    for kernel in ("scalar", "vector"):
        sim = ReplicateSimulation(P, replicates=3, steps=500, seed=11, table=table, _kernel=kernel,
                                  burn_in=20, path_length=100)
        sim.run()
        out.append(_fingerprint(sim))
    assert out[0] == out[1]


def test_different_seeds_differ_and_seed_is_reported():
    a = run(OZ, replicates=50, steps=50, seed=1)
    b = run(OZ, replicates=50, steps=50, seed=2)
    assert a.seed == 1 and b.seed == 2
    assert a.occupancy.tolist() != b.occupancy.tolist()
    c = run(OZ, replicates=5, steps=5)  # fresh entropy, reported so the run can be repeated
    assert run(OZ, replicates=5, steps=5, seed=c.seed).occupancy.tolist() == c.occupancy.tolist()


def test_snapshots_report_progress():
    # The run convention of core.plan: burn-in B = 4, then T = 95 steps (99 in all); the kept draws are the
    # states at steps B, B + s, ..., B + (m-1) s with m = floor(T / s) = 47, i.e. 4, 6, ..., 96.
    sim = ReplicateSimulation(OZ, replicates=100, steps=95, seed=3, burn_in=4, stride=2)
    assert sim.total_steps == 99 and sim.kept_planned == 47
    kept_steps = [4 + 2 * j for j in range(95 // 2)]
    snaps = list(sim.snapshots(every=10))
    assert [s.step for s in snaps] == [10, 20, 30, 40, 50, 60, 70, 80, 90, 99]
    assert snaps[-1].done and not snaps[-1].cancelled and snaps[-1].progress == 1.0
    for s in snaps:
        assert s.steps == 95 and s.burn_in == 4 and s.total_steps == 99
        assert s.progress == s.step / 99
        assert s.ensemble.sum() == 100
        assert s.kept == sum(1 for t in kept_steps if t <= s.step)
        assert s.occupancy.sum() == s.kept * 100
        assert not s.ensemble.flags.writeable
    assert sim.result().kept == 47 and sim.result().total_steps == 99


def test_kept_draws_and_final_step_follow_the_plan_convention():
    # A deterministic 3-cycle 0 -> 1 -> 2 -> 0 makes the convention visible exactly: X_t = t mod 3 from 0.
    # B = 0, s = 1, T = 4: the kept draws are X_0 .. X_3 = 0, 1, 2, 0 and the ensemble is X_4 = 1.
    C = np.array([[0.0, 1.0, 0.0], [0.0, 0.0, 1.0], [1.0, 0.0, 0.0]])
    for kernel in ("scalar", "vector"):
        res = run(C, replicates=20, steps=4, start=0, seed=1, _kernel=kernel)
        assert res.kept == 4 and res.step == res.total_steps == 4
        assert res.occupancy.tolist() == [2 * 20, 1 * 20, 1 * 20]
        assert res.ensemble.tolist() == [0, 20, 0]
        # B = 2, T = 5, s = 2: m = 2 draws, at steps 2 and 4 (states 2 and 1); the ensemble is X_7 = 1
        res = run(C, replicates=20, steps=5, burn_in=2, stride=2, start=0, seed=1, _kernel=kernel)
        assert res.kept == 2 and res.step == 7
        assert res.occupancy.tolist() == [0, 20, 20]
        assert res.ensemble.tolist() == [0, 20, 0]
    # a snapshot before any step already holds the start as the first kept draw when B = 0
    sim = ReplicateSimulation(C, replicates=5, steps=3, start=2, seed=1)
    s0 = sim.snapshot()
    assert s0.step == 0 and s0.kept == 1 and s0.occupancy.tolist() == [0, 0, 5]
    # ... and none when there is a burn-in; a burn-in longer than T is fine
    sim = ReplicateSimulation(C, replicates=5, steps=3, burn_in=10, start=2, seed=1)
    assert sim.snapshot().kept == 0 and sim.total_steps == 13


def test_exact_values_are_those_of_the_plan_check():
    # compare() and core.plan.check_plan describe the same run for the same (B, T, s): the ensemble's law
    # pi0 P^(B+T) and the kept draws' mean (1/m) sum_{j<m} pi0 P^(B+js), m = floor(T/s), both checked by
    # direct summation with numpy.linalg.matrix_power (the definitions of core.plan's docstring / the
    # plan-check issue) to 1e-12.
    from core.plan import Plan, check_plan

    P = _random_chain(np.random.default_rng(31), 5, 0.6)
    B, T, s = 7, 23, 3
    pi0 = np.eye(5)[2]
    rep = compare(run(P, replicates=50, steps=T, burn_in=B, stride=s, start=2, seed=30), P)
    m = T // s
    final = pi0 @ np.linalg.matrix_power(P, B + T)
    mean = sum(pi0 @ np.linalg.matrix_power(P, B + j * s) for j in range(m)) / m
    assert rep.step == B + T and rep.result.kept == m
    assert np.allclose(rep.exact_at_step, final, rtol=0, atol=1e-12)
    assert np.allclose(rep.window_mean, mean, rtol=0, atol=1e-12)
    plan_final = check_plan(P, Plan(2, T, burn_in=B, stride=s, estimator="final"))
    plan_avg = check_plan(P, Plan(2, T, burn_in=B, stride=s, estimator="average"))
    assert np.allclose(rep.exact_at_step, plan_final.expected_estimate, rtol=0, atol=1e-12)
    assert np.allclose(rep.window_mean, plan_avg.expected_estimate, rtol=0, atol=1e-12)
    doc = rep.to_json()
    assert (doc["steps"], doc["burn_in"], doc["stride"], doc["total_steps"], doc["kept"]) == (T, B, s, B + T, m)
    assert doc["curve"]["steps"][-1] == B + T


def test_paths_are_bounded_and_end_at_the_current_states():
    sim = ReplicateSimulation(OZ, replicates=20, steps=1000, seed=4, paths=6, path_length=50)
    snap = None
    for snap in sim.snapshots(every=333):
        assert snap.paths.shape == (6, min(50, snap.step + 1))
        assert snap.paths[:, -1].tolist() == sim.states()[:6].tolist()
    assert snap.path_start == 1000 - 49


def test_paths_from_the_start_are_the_whole_run():
    sim = ReplicateSimulation(OZ, replicates=4, steps=30, seed=4, paths=4, path_length=31, start=1)
    sim.run()
    p = sim.result().paths
    assert p.shape == (4, 31) and (p[:, 0] == 1).all()
    # every move in the paths is a possible transition
    assert all(OZ[a, b] > 0 for row in p for a, b in zip(row[:-1], row[1:]))


def test_cancel_stops_within_one_chunk():
    sim = ReplicateSimulation(OZ, replicates=1000, steps=10**6, seed=5)
    gen = sim.snapshots(every=10, chunk=10)
    first = next(gen)
    sim.cancel()
    rest = list(gen)
    assert len(rest) == 1 and rest[0].cancelled and not rest[0].done
    assert rest[0].step - first.step <= 10
    assert sim.result().cancelled and sim.result().step == rest[0].step


def test_cancel_from_another_thread():
    # The app drives the generator in a worker thread and cancels from the GUI thread.
    sim = ReplicateSimulation(OZ, replicates=1000, steps=10**7, seed=6)
    started = threading.Event()
    seen = []

    def worker():
        for snap in sim.snapshots(every=50, chunk=50):
            seen.append(snap.step)
            started.set()

    th = threading.Thread(target=worker)
    th.start()
    assert started.wait(30)
    at = sim.t
    sim.cancel()
    th.join(30)
    assert not th.is_alive()
    assert sim.cancelled and sim.t < 10**7
    assert sim.t - at <= 50 + 50  # the chunk running when cancel() came, and no more than one after it


def test_closing_the_generator_stops_the_run():
    sim = ReplicateSimulation(OZ, replicates=100, steps=10**6, seed=7)
    gen = sim.snapshots(every=100, chunk=100)
    next(gen)
    gen.close()
    t = sim.t
    assert t == 100 and not sim.done


# ---------------------------------------------------------------------------
# options, guards


@pytest.mark.parametrize("kw,match", [
    (dict(replicates=0, steps=10), "replicates must be between 1"),
    (dict(replicates=10**6 + 1, steps=10), "replicates must be between 1"),
    (dict(replicates=10, steps=0), "steps must be between 1"),
    (dict(replicates=10, steps=10, burn_in=-1), "burn_in must be between 0"),
    (dict(replicates=10, steps=10, stride=11), r"stride \(11\) must be at most steps \(10\)"),
    (dict(replicates=10, steps=10, stride=0), "stride must be"),
    (dict(replicates=10, steps=10**12, burn_in=1), "burn_in \\+ steps"),
    (dict(replicates=2.5, steps=10), "whole number"),
    (dict(replicates=10, steps=10, start=7), "out of range"),
])
def test_bad_options_are_named(kw, match):
    with pytest.raises(OptionError, match=match):
        ReplicateSimulation(OZ, **kw)


def test_memory_guard_names_the_limit_and_how_to_raise_it():
    with pytest.raises(LimitError, match=r"over the memory limit of 1 MiB.*--memory-limit.*LONGRUN_SIMULATE"):
        ReplicateSimulation(OZ, replicates=10**6, steps=10, memory_limit=2**20)


def test_memory_guard_counts_tracked_replicates():
    est = estimate_memory(1000, 10**6, tracked=10**6, kept=100)
    assert est["tracked"] >= 2 * 10**6 * 1000 * 4 * 9  # 8 batches + a remainder slot, 4-byte counts, and a copy
    with pytest.raises(LimitError, match="tracked"):
        ReplicateSimulation(np.full((1000, 1000), 1e-3), replicates=10**6, steps=100, tracked=10**6)


def test_memory_limit_from_environment(monkeypatch):
    monkeypatch.setenv(MEMORY_ENV, "3GiB")
    assert memory_limit_from_env() == 3 * 1024**3
    monkeypatch.setenv(MEMORY_ENV, "lots")
    with pytest.raises(OptionError, match=MEMORY_ENV):
        memory_limit_from_env()
    assert parse_bytes("500MB") == 500 * 10**6 and parse_bytes("1e9") == 10**9
    with pytest.raises(OptionError, match="not a memory size"):
        parse_bytes("-3GB")


def test_tracked_replicates_default_and_cap():
    sim = ReplicateSimulation(OZ, replicates=5000, steps=20, seed=1)
    assert sim.tracked == 1000
    assert ReplicateSimulation(OZ, replicates=30, steps=20, seed=1).tracked == 30


# ---------------------------------------------------------------------------
# the scenarios


@pytest.mark.parametrize("burn_in", [0, 5])
def test_periodic_chain_ensemble_stays_in_the_cyclic_subclass(burn_in):
    # Ehrenfest urn (G&S Ex. 11.17, E3): period 2, cyclic classes {0,2,4} and {1,3} [seen].  Started in
    # state 0, at every even step the ensemble has exactly zero mass on {1, 3}, at every odd step on {0,2,4}
    # (steps count from the start, burn-in included).
    s = classify(EHRENFEST)
    cls = s.classes[s.closed[0]]
    assert cls.period == 2 and set(map(frozenset, cls.cyclic_subclasses)) == {frozenset({0, 2, 4}),
                                                                            frozenset({1, 3})}
    sim = ReplicateSimulation(EHRENFEST, replicates=20000, steps=200, burn_in=burn_in, start=0, seed=12)
    seen = []
    for snap in sim.snapshots(every=1):
        seen.append(snap.step)
        odd = snap.step % 2
        assert snap.ensemble[[0, 2, 4]].sum() == (0 if odd else 20000)
        assert snap.ensemble[[1, 3]].sum() == (20000 if odd else 0)
    assert seen == list(range(1, burn_in + 201))


def test_period_three_chain_ensemble_at_multiples_of_the_period():
    # E11 fixture {0:[1],1:[2],2:[0,3],3:[4],4:[5],5:[0]} (cycles of length 3 and 6): period 3, cyclic classes
    # {0,3}, {1,4}, {2,5} [computed].
    P = np.zeros((6, 6))
    P[0, 1] = P[1, 2] = P[3, 4] = P[4, 5] = P[5, 0] = 1
    P[2, 0] = P[2, 3] = 0.5
    s = classify(P)
    sub = s.classes[s.closed[0]].cyclic_subclasses
    assert s.classes[s.closed[0]].period == 3 and sorted(sub) == [(0, 3), (1, 4), (2, 5)]
    mine = next(c for c in sub if 0 in c)
    sim = ReplicateSimulation(P, replicates=5000, steps=300, start=0, seed=13, _kernel="vector")
    for snap in sim.snapshots(every=3):
        assert snap.ensemble[list(mine)].sum() == 5000


def _trap_chain(leave=1e-4, back=1e-9):
    # state 0: a trap left with probability `leave`; {1, 2} mix quickly and return to 0 w.p. `back`
    return np.array([[1 - leave, leave, 0.0],
                     [back, 0.5 - back, 0.5],
                     [0.0, 0.5, 0.5]])


def test_trap_short_run_is_flagged_as_misleading():
    P = _trap_chain()
    pi = limit_law(P, [1.0, 0.0, 0.0])
    assert pi[0] < 1e-4  # the exact long-run law puts ~0 in the trap (back/leave = 1e-5)
    res = run(P, replicates=200, steps=1000, start=0, seed=14)
    rep = compare(res, P)
    assert rep.time_average[0] > 0.9  # the short run's time average stays in the trap
    assert rep.status == "misleading" and 0 in rep.disagree
    assert "MISLEADING" in rep.verdict
    assert rep.tv_time_average > 0.9
    # the ensemble still agrees with pi0 P^T: the sampler is right, the run is too short
    assert rep.gof.pvalue > 1e-6
    assert rep.tv_window > 0.9  # exactly: this window itself is biased


def test_trap_long_burn_in_is_consistent():
    # With a burn-in long enough to leave the trap (mean exit time 1/leave = 100 steps), the time average
    # agrees with the long-run law.
    P = _trap_chain(leave=0.05)
    rep = compare(run(P, replicates=500, steps=3000, burn_in=1000, start=0, seed=15), P)
    assert rep.status == "consistent", rep.verdict


def test_consistent_run_matches_published_stationary_law():
    # Land of Oz (G&S Ex. 11.1, E1): the time average agrees with (2/5, 1/5, 2/5) within 5 MCSE.
    res = run(OZ, replicates=2000, steps=2000, start=1, seed=16)
    rep = compare(res, OZ)
    assert np.allclose(rep.long_run, OZ_PI, atol=1e-15)
    assert np.all(np.abs(rep.time_average - OZ_PI) < 5 * rep.mcse.se)
    assert rep.status == "consistent"
    assert np.all(np.abs(rep.rhat - 1) < 0.01)


def test_mcse_matches_the_two_state_closed_form():
    # Two-state chain (LPW Example 1.1, E8) with p = 3/10, q = 1/10: the time average of the indicator of
    # state 0 has asymptotic variance pi(1-pi)(1+lam)/(1-lam), lam = 1-p-q (a closed form of the AR(1)-like
    # autocorrelation lam^t of a two-state chain; common practice).  The replicate MCSE is a sample sd from
    # K = 1000 replicates: relative error ~ 1/sqrt(2(K-1)); tolerance 5 of those (plus the O(1/N) start bias).
    p, q = 0.3, 0.1
    P = np.array([[1 - p, p], [q, 1 - q]])
    pi0_ = q / (p + q)
    lam = 1 - p - q
    N, R = 4000, 1000
    res = run(P, replicates=R, steps=N, start="uniform", seed=17)
    rep = compare(res, P)
    want = math.sqrt(pi0_ * (1 - pi0_) * (1 + lam) / (1 - lam) / (N * R))
    assert abs(rep.mcse.se[0] / want - 1) < 5 / math.sqrt(2 * (R - 1)) + 0.01
    # ESS = p(1-p)/MCSE^2 ~ N R (1-lam)/(1+lam)
    assert abs(rep.mcse.ess[0] / (N * R * (1 - lam) / (1 + lam)) - 1) < 10 / math.sqrt(2 * (R - 1)) + 0.02


def test_single_replicate_uses_batch_means():
    res = run(OZ, replicates=1, steps=20000, seed=18)
    rep = compare(res, OZ)
    assert "batch means (32 batches" in rep.mcse.method
    assert np.all(np.abs(rep.time_average - OZ_PI) < 5 * rep.mcse.se)
    assert rep.rhat is not None and np.all(rep.rhat < 1.05)


def test_engine_rhat_equals_direct_rank_rhat_on_stored_paths():
    # Store every state of every replicate (paths = R, long enough), rebuild the kept draws, split them in
    # the engine's halves (whole batches) and compare with rank_rhat on the arrays.
    P = _trap_chain(leave=0.02, back=0.01)
    R, T, B, s = 12, 401, 10, 3
    sim = ReplicateSimulation(P, replicates=R, steps=T, burn_in=B, stride=s, start=0, seed=19, tracked=R,
                              paths=R, path_length=B + T + 1)
    res = sim.run()
    rep = compare(res, P)
    paths = res.paths  # (R, B + T + 1), column t is the state at step t
    assert paths.shape == (R, B + T + 1)
    m = T // s
    kept = paths[:, B:B + (m - 1) * s + 1:s]  # steps B, B + s, ..., B + (m-1)s (core.plan's convention)
    assert kept.shape[1] == res.kept == m
    assert res.ensemble.tolist() == np.bincount(paths[:, B + T], minlength=3).tolist()
    draws = rep.rhat_draws
    assert draws == 2 * (res.batches // 2) * res.batch_length
    x = kept[:, :draws]
    for j in range(3):
        ind = (x == j).astype(float)
        want = D.rank_rhat(ind).rhat
        got = rep.rhat[j]
        assert got == pytest.approx(want, rel=1e-10) or (math.isnan(want) and math.isnan(got))
        assert rep.rhat_split[j] == pytest.approx(D.split_rhat(ind), rel=1e-10)
    # pooled time average and per-replicate counts agree with the stored draws
    assert res.occupancy.tolist() == np.bincount(kept.ravel(), minlength=3).tolist()
    assert res.replicate_counts().tolist() == [np.bincount(k, minlength=3).tolist() for k in kept]


def test_undefined_and_infinite_rhat_are_explained():
    # Two absorbing states reached in one step from a transient start: after a burn-in of 1, every replicate is
    # constant (W = 0) but replicates differ (B > 0): R-hat is infinite for states 1 and 2; state 0 is never
    # occupied in a kept draw: undefined.
    P = np.array([[0, 0.5, 0.5], [0, 1, 0], [0, 0, 1]])
    rep = compare(run(P, replicates=40, steps=50, burn_in=1, start=0, seed=20), P)
    assert math.isnan(rep.rhat[0]) and "never occupied" in rep.rhat_notes[0]
    assert math.isinf(rep.rhat[1]) and math.isinf(rep.rhat[2])
    assert "disagree" in rep.rhat_notes[1]
    doc = rep.to_json(["start", "left", "right"])
    assert doc["rhat"]["start"] is None and doc["rhat"]["left"] is None
    assert "never occupied" in doc["rhat_notes"]["start"]
    assert any("2 closed classes" in f for f in rep.findings)


def test_curve_is_the_exact_distance_from_the_long_run():
    # d_start(t) for the Land of Oz from a state: every point is TV(pi0 P^t, pi) computed independently here
    rep = compare(run(OZ, replicates=10, steps=10**4, start=0, seed=21, tracked=10), OZ)
    g = rep.curve_steps
    assert g[0] == 0 and g[-1] == 10**4 and np.all(np.diff(g) > 0)
    for t, d in zip(g[:8], rep.curve_tv[:8]):
        mu = np.linalg.matrix_power(OZ, int(t))[0]
        assert d == pytest.approx(0.5 * np.abs(mu - OZ_PI).sum(), abs=1e-12)
    assert curve_grid(5).tolist() == [0, 1, 2, 3, 4, 5]


def test_report_json_has_the_contract_keys():
    rep = compare(run(OZ, replicates=30, steps=100, seed=22), OZ)
    doc = rep.to_json(["R", "N", "S"])
    for key in ("steps", "replicates", "ensemble", "time_average", "exact_at_T", "long_run", "tv_ensemble",
                "tv_time_average", "rhat", "seed"):
        assert key in doc
    assert set(doc["ensemble"]) == {"R", "N", "S"} and sum(doc["ensemble"].values()) == 30
    assert doc["steps"] == 100 and doc["seed"] == 22
    assert doc["burn_in"] == 0 and doc["stride"] == 1 and doc["total_steps"] == 100 and doc["kept"] == 100


def test_cancelled_run_reports_the_steps_done():
    sim = ReplicateSimulation(OZ, replicates=100, steps=10**6, seed=23)
    gen = sim.snapshots(every=100, chunk=100)
    for _ in range(3):
        next(gen)
    sim.cancel()
    list(gen)
    rep = compare(sim.result(), OZ)
    assert rep.step == sim.t < 10**6
    assert any("cancelled" in f for f in rep.findings)
    assert rep.exact_at_step == pytest.approx(distribution_at(OZ, np.eye(3)[0], sim.t))


def test_small_start_up_bias_is_biased_not_misleading():
    # Land of Oz from 'N' (state 1) over only 100 steps: the window's exact mean is off the stationary law by
    # the start-up transient (TV ~ 1e-3); 20000 replicates resolve it, but it is below the 0.05 tolerance.
    res = run(OZ, replicates=20000, steps=100, start=1, seed=24)
    rep = compare(res, OZ, ids=["R", "N", "S"])
    assert 0 < rep.tv_window < 0.05
    assert rep.status == "biased" and "BIASED" in rep.verdict
    strict = compare(res, OZ, tolerance=1e-4)
    assert strict.status == "misleading"
    # the same run with a burn-in long past the transient (d(t) = 0.8 * 4^-t, E1) is consistent
    rep2 = compare(run(OZ, replicates=20000, steps=120, burn_in=20, start=1, seed=24), OZ)
    assert rep2.status == "consistent", rep2.verdict


def test_iter_simulate_returns_the_result():
    from core.simulate import iter_simulate

    gen = iter_simulate(OZ, replicates=50, steps=30, seed=25, every=10)
    steps = []
    try:
        while True:
            steps.append(next(gen).step)
    except StopIteration as stop:
        res = stop.value
    assert steps == [10, 20, 30] and res.step == 30 and res.ensemble.sum() == 50


def test_running_rhat_is_available_after_two_batches_and_matches_the_final():
    sim = ReplicateSimulation(OZ, replicates=50, steps=800, seed=26)
    assert sim.running_rhat() is None
    seen = []
    for snap in sim.snapshots(every=100):
        seen.append(sim.running_rhat())
    assert seen[0] is None and seen[1] is not None  # 8 batches of 100 draws: two complete at step 200
    assert np.array_equal(seen[-1], compare(sim.result(), OZ).rhat)
