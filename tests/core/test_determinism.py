"""Determinism: one seed, one simulation, whoever runs it and however it is sliced.

``longrun simulate --seed N --json`` must print the same document every time: twice in
one process, in two separate processes (with different hash seeds, so nothing may depend
on dict or set order or on object addresses), through the API with any chunk size or
snapshot interval, with the scalar or the vectorised kernel, and in a worker thread as
the app runs it.  A run without ``--seed`` reports the seed it drew, and rerunning with
that seed reproduces it.  Only the engine's timing fields (elapsed seconds, speed) may
differ.  Reproducibility from a recorded seed is common practice for stochastic
simulation (numpy's ``SeedSequence`` is built for it).

The app's simulation panel is compared with the command line (same seed, same counts)
in ``tests/app/test_long_session.py``, where Qt is available.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
from pathlib import Path

import pytest

from core.cli import main
from core.io import load_chain
from core.simulate import ReplicateSimulation, compare

ROOT = Path(__file__).resolve().parents[2]
PUMP = ROOT / "sample_models" / "pump_wear.json"
TANKER = ROOT / "sample_models" / "tanker_rotation.json"
TIMING = ("elapsed_seconds", "replicate_steps_per_second")


def untimed(doc: dict) -> dict:
    doc = json.loads(json.dumps(doc))
    for key in TIMING:
        doc["engine"].pop(key)
    return doc


def cli_json(capsys, *argv) -> dict:
    assert main(["simulate", *map(str, argv), "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def cli_json_in_process_of_its_own(*argv, hash_seed: str) -> dict:
    env = dict(os.environ, PYTHONHASHSEED=hash_seed, OPENBLAS_NUM_THREADS="1", PYTHONPATH=str(ROOT))
    r = subprocess.run([sys.executable, "-m", "core", "simulate", *map(str, argv), "--json"], capture_output=True,
                       text=True, env=env, cwd=str(ROOT), timeout=120)
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout)


RUN = ("-R", "300", "-T", "2000", "--burn-in", "37", "--stride", "3", "--seed", "20240611", "--start", "worn")


def test_same_seed_same_json_twice_in_one_process(capsys):
    a = cli_json(capsys, PUMP, *RUN)
    b = cli_json(capsys, PUMP, *RUN)
    assert untimed(a) == untimed(b)
    assert a["seed"] == 20240611


@pytest.mark.timeout(120)
def test_same_seed_same_json_across_processes(capsys):
    here = untimed(cli_json(capsys, PUMP, *RUN))  # this process has its own random hash seed
    there = untimed(cli_json_in_process_of_its_own(PUMP, *RUN, hash_seed="4242"))
    assert there == here


def test_a_fresh_seed_is_reported_and_reproduces_the_run(capsys):
    fresh = cli_json(capsys, TANKER, "-R", "40", "-T", "500")
    seed = fresh["seed"]
    assert isinstance(seed, int) and seed > 2**64  # 128 bits of fresh entropy
    again = cli_json(capsys, TANKER, "-R", "40", "-T", "500", "--seed", seed)
    assert untimed(again) == untimed(fresh)


@pytest.mark.parametrize("seed", [0, 1, 2**128 - 1])
def test_extreme_seeds_are_reproducible_and_differ(capsys, seed):
    a = cli_json(capsys, PUMP, "-R", "64", "-T", "300", "--seed", seed)
    b = cli_json(capsys, PUMP, "-R", "64", "-T", "300", "--seed", seed)
    assert untimed(a) == untimed(b) and a["seed"] == seed
    other = cli_json(capsys, PUMP, "-R", "64", "-T", "300", "--seed", (seed + 1) % 2**128)
    assert other["ensemble"] != a["ensemble"] or other["time_average"] != a["time_average"]


def _api_report(P, ids, *, chunk, every, kernel=None, replicates=300):
    sim = ReplicateSimulation(P, replicates=replicates, steps=2000, burn_in=37, stride=3, seed=20240611,
                              start=ids.index("worn"), _kernel=kernel)
    for _ in sim.snapshots(every=every, chunk=chunk):
        pass
    return sim, compare(sim.result(), P, ids=ids).to_json()


@pytest.mark.parametrize("chunk, every", [(1, 1), (7, 50), (64, None), (1000, 999), (10**6, 10**6)])
def test_the_api_with_any_chunk_size_gives_the_commands_numbers(capsys, chunk, every):
    chain = load_chain(PUMP)
    P = chain.matrix()
    cli = untimed(cli_json(capsys, PUMP, *RUN))
    sim, doc = _api_report(P, list(chain.ids), chunk=chunk, every=every)
    doc = untimed({**doc, "engine": dict(doc["engine"])})
    for key in ("file", "name"):
        cli.pop(key)
    assert doc == cli
    assert sim.t == 37 + 2000


def test_scalar_and_vector_kernels_and_a_worker_thread_agree(capsys):
    chain = load_chain(TANKER)
    P = chain.matrix()
    ids = list(chain.ids)
    start = ids[0]

    def counts(kernel, *, in_thread=False):
        out = {}

        def work():
            sim = ReplicateSimulation(P, replicates=12, steps=3000, burn_in=5, stride=2, seed=99, start=0,
                                      _kernel=kernel)
            for _ in sim.snapshots(every=250):
                pass
            r = sim.result()
            out["v"] = (r.ensemble.tolist(), r.occupancy.tolist(), r.batch_counts.tolist(), r.paths.tolist())

        if in_thread:
            t = threading.Thread(target=work)
            t.start()
            t.join(60)
            assert not t.is_alive()
        else:
            work()
        return out["v"]

    scalar = counts("scalar")
    assert counts("vector") == scalar
    assert counts(None, in_thread=True) == scalar
    # and the command line (12 replicates: the scalar kernel) counts the same ensemble
    doc = cli_json(capsys, TANKER, "-R", "12", "-T", "3000", "--burn-in", "5", "--stride", "2", "--seed", "99",
                   "--start", start)
    assert [doc["ensemble"][s] for s in ids] == scalar[0]
    m = 3000 // 2
    assert [doc["time_average"][s] for s in ids] == pytest.approx([c / (12 * m) for c in scalar[1]], abs=0, rel=0)


def test_snapshots_are_the_same_sequence_whatever_the_chunk():
    # the live view (snapshot every k steps) sees identical frames for any chunk size
    P = load_chain(PUMP).matrix()

    def frames(chunk):
        sim = ReplicateSimulation(P, replicates=200, steps=500, seed=5, start="uniform")
        return [(s.step, s.ensemble.tolist(), s.occupancy.tolist()) for s in sim.snapshots(every=50, chunk=chunk)]

    first = frames(1)
    assert [f[0] for f in first] == list(range(50, 501, 50))
    for chunk in (3, 50, 128, 10**5):
        assert frames(chunk) == first


def test_seeds_beyond_float_precision_are_read_exactly(capsys):
    # 2**53 and 2**53 + 1 are one float; as seeds they must stay two different runs
    a = cli_json(capsys, PUMP, "-R", "64", "-T", "300", "--seed", 2**53)
    b = cli_json(capsys, PUMP, "-R", "64", "-T", "300", "--seed", 2**53 + 1)
    assert (a["seed"], b["seed"]) == (2**53, 2**53 + 1)
    assert (a["ensemble"], a["time_average"]) != (b["ensemble"], b["time_average"])
    with pytest.raises(SystemExit) as info:
        main(["simulate", str(PUMP), "-R", "5", "-T", "5", "--seed", str(2**128)])
    assert info.value.code == 2
    assert "larger than the largest seed, 2**128 - 1" in capsys.readouterr().err
