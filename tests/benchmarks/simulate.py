"""Benchmark of the replicate simulation engine (a script, not collected by pytest).

Prints, in one run, replicate-steps per second of :mod:`core.simulate` at
R = 100000 replicates for chains of 10, 100 and 1000 states (dense random
rows, and sparse rows with a few successors each), next to:

(a) the raw rate of ``numpy.random.Generator.random`` filling float64 arrays
    of the same total count (R numbers per step, T steps), with the same bit
    generator the engine uses (PCG64, numpy's default): the practical limit of
    a vectorised approach that draws one random number per replicate-step;
(b) a plain per-step Python loop calling ``Generator.choice(n, p=P[x])`` for
    each replicate (what a hand-written script does), timed on a few thousand
    replicate-steps.

Two engine rates are printed: "stepping" (the steps themselves as the engine
runs them: drawing, sampling, the retained sample paths; what burn-in and
non-kept steps cost) and "with statistics" (stride 1, every draw kept: the
pooled occupancy count of all R replicates and the batch counts of the 1000
tracked replicates are updated at every step).  The targets are on the
stepping rate: >= 0.4 of (a) for n <= 100, >= 0.15 for n = 1000, and >= 500
times (b).

Timings are the best of several interleaved rounds (baseline and engine
alternate), so that other load on the machine disturbs the ratios less.
Run: ``.venv/bin/python tests/benchmarks/simulate.py`` (``--quick`` for fewer rounds).
"""
from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from core.simulate import ReplicateSimulation, cell_table  # noqa: E402

R = 100_000
T = 40


def dense(n, seed=0):
    rng = np.random.default_rng(seed)
    P = rng.random((n, n))
    return P / P.sum(axis=1, keepdims=True)


def sparse(n, k, seed=0):
    rng = np.random.default_rng(seed)
    P = np.zeros((n, n))
    for i in range(n):
        P[i, rng.choice(n, k, replace=False)] = rng.random(k) + 0.01
    return P / P.sum(axis=1, keepdims=True)


def raw_fill(rng, buf, steps):
    t = time.perf_counter()
    for _ in range(steps):
        rng.random(out=buf)
    return time.perf_counter() - t


def engine(P, table, *, stats: bool):
    # T steps in all either way: every draw kept (B = 0), or one kept draw after a burn-in of T - 1 steps
    sim = ReplicateSimulation(P, replicates=R, steps=T if stats else 1, seed=1, table=table,
                              burn_in=0 if stats else T - 1)
    t = time.perf_counter()
    sim.advance(T)
    return time.perf_counter() - t


def choice_loop(P, reps, steps, seed=2):
    rng = np.random.default_rng(seed)
    n = P.shape[0]
    x = list(rng.integers(0, n, reps))
    t = time.perf_counter()
    for _ in range(steps):
        for r in range(reps):
            x[r] = rng.choice(n, p=P[x[r]])
    return (time.perf_counter() - t) / (reps * steps)


def main(argv):
    rounds = 3 if "--quick" in argv else 9
    rng = np.random.Generator(np.random.PCG64(12345))
    buf = np.empty(R)
    cases = [("dense n=10", dense(10)), ("dense n=100", dense(100)), ("sparse n=100 (5/row)", sparse(100, 5)),
             ("sparse n=1000 (10/row)", sparse(1000, 10)), ("dense n=1000", dense(1000))]
    print(f"replicates R = {R:,}, steps per measurement T = {T}, best of {rounds} interleaved rounds")
    print("baseline (a): numpy.random.Generator(PCG64).random(out=float64 array of R) once per step;")
    print("engine: PCG64 raw 64-bit words via BitGenerator.random_raw (split and direct tables: 16 bits")
    print("per replicate-step plus one word per mixed cell or tie; wide tables: one word per replicate-step)")
    print()
    results = []
    for name, P in cases:
        t0 = time.perf_counter()
        table = cell_table(P)
        build = time.perf_counter() - t0
        best_raw = best_step = best_stat = float("inf")
        for _ in range(rounds):
            best_raw = min(best_raw, raw_fill(rng, buf, T))
            best_step = min(best_step, engine(P, table, stats=False))
            best_raw = min(best_raw, raw_fill(rng, buf, T))
            best_stat = min(best_stat, engine(P, table, stats=True))
        loop_sec = choice_loop(P, reps=200, steps=10)
        raw_rate = R * T / best_raw
        step_rate = R * T / best_step
        stat_rate = R * T / best_stat
        results.append((name, P.shape[0], step_rate / raw_rate, stat_rate / raw_rate, step_rate * loop_sec))
        print(f"{name:24s} table {table.kind:5s} 2^{table.bits} cells/row, mixed {table.mixed_fraction:6.2%}, "
              f"{table.nbytes / 2**20:6.2f} MiB, built in {build:5.2f} s")
        print(f"{'':24s} raw fill {raw_rate:9.3g}/s  stepping {step_rate:9.3g}/s  with statistics "
              f"{stat_rate:9.3g}/s  choice loop {1 / loop_sec:9.3g}/s")
    print()
    for name, n, step_ratio, stat_ratio, speedup in results:
        target = 0.4 if n <= 100 else 0.15
        print(f"ratio {name:24s} stepping/raw {step_ratio:5.3f} (target >= {target}), with statistics/raw "
              f"{stat_ratio:5.3f}, stepping/choice loop {speedup:8.0f}x (target >= 500x)")


if __name__ == "__main__":
    main(sys.argv[1:])
