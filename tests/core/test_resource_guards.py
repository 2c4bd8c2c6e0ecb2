"""Resource guards: every limit refuses clearly, naming the limit and how to change it.

A request too big for the machine (replicates x states in a simulation, states in the
dense analysis, the size of a report, of a file read, of an observation CSV) must be
refused before the work starts, with a message that states the limit and the option or
environment variable that changes it, exit status 2 at the command line, and no
traceback; never a freeze or an out-of-memory kill.  Raising the limit must then let
the same request through.  Common practice for tools that take untrusted input and
user-sized workloads (fail early, say why, say how).

Environment variables (``LONGRUN_MAX_FILE_MB``, ``LONGRUN_MAX_ROWS``, ...) are read when a
limit is used; they are checked in a fresh process, exactly as a user sets them in a
shell, and a value that is not a whole number is refused with its name, never ignored.
The report command runs in a subprocess too, so Qt never enters this Qt-free test process.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
import tracemalloc
from pathlib import Path

import numpy as np
import pytest

from core.analysis import analyze
from core.cli import main
from core.errors import LimitError, ValidationError
from core.io import load_chain, read_matrix_csv, save_chain
from core.model import DENSE_STATE_LIMIT, Chain, State, Transition
from core.simulate import DEFAULT_MEMORY_LIMIT, MEMORY_ENV, ReplicateSimulation

ROOT = Path(__file__).resolve().parents[2]
PUMP = ROOT / "sample_models" / "pump_wear.json"
MiB = 1024 * 1024


_DRIVER = textwrap.dedent("""
    import contextlib, io, json, sys
    from core.cli import main
    results = []
    for argv in json.loads(sys.argv[1]):
        out, err = io.StringIO(), io.StringIO()
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            try:
                code = main(argv)
            except SystemExit as exc:
                code = exc.code
        results.append([code, out.getvalue(), err.getvalue()])
    sys.stdout.write(json.dumps(results))
""")


def cli(*commands, env=None, cwd=None, timeout=120):
    """Run each command line of ``commands`` through ``longrun``'s entry point in one fresh process.

    The environment is set before anything is imported, as a user sets it in a shell.
    Returns ``[(exit status, stdout, stderr), ...]``.
    """
    full = dict(os.environ, OPENBLAS_NUM_THREADS="1", QT_QPA_PLATFORM="offscreen", PYTHONPATH=str(ROOT))
    full.update(env or {})
    argvs = [[str(a) for a in argv] for argv in commands]
    r = subprocess.run([sys.executable, "-c", _DRIVER, json.dumps(argvs)], capture_output=True, text=True,
                       env=full, cwd=str(cwd or ROOT), timeout=timeout)
    assert r.returncode == 0, r.stderr  # the driver itself never fails
    return [tuple(x) for x in json.loads(r.stdout)]


def run(capsys, *argv):
    code = main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, out.out, out.err


def assert_clean_refusal(code, err, *needles):
    assert code == 2, err
    assert "Traceback" not in err
    assert err.startswith("longrun: error:"), err
    for needle in needles:
        assert needle in err, f"{needle!r} not in {err!r}"


def ring(n: int) -> Chain:
    ids = [f"s{i}" for i in range(n)]
    return Chain(states=tuple(State(s) for s in ids),
                 transitions=tuple(Transition(ids[i], ids[(i + 1) % n], "1") for i in range(n)), name=f"ring{n}")


def ring_csv(path: Path, n: int) -> Path:
    ids = [f"s{i}" for i in range(n)]
    lines = ["from," + ",".join(ids)]
    lines += [ids[i] + "," + ",".join("1" if j == (i + 1) % n else "0" for j in range(n)) for i in range(n)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def dense_chain_file(path: Path, n: int, seed: int = 3) -> Path:
    rng = np.random.default_rng(seed)
    W = rng.random((n, n)) + 0.01
    P = W / W.sum(axis=1, keepdims=True)
    ids = [f"q{i}" for i in range(n)]
    trans = [Transition(ids[i], ids[j], repr(float(P[i, j]))) for i in range(n) for j in range(n) if j != i]
    trans += [Transition(ids[i], ids[i], "rest") for i in range(n)]
    save_chain(Chain(states=tuple(State(s) for s in ids), transitions=tuple(trans), name="dense"), path)
    return path


# ---------------------------------------------------------------------------
# replicates x states memory in simulate


def test_simulation_guard_api_names_the_estimate_the_limit_and_how_to_raise_it():
    P = load_chain(PUMP).matrix()
    with pytest.raises(LimitError) as info:
        ReplicateSimulation(P, replicates=10**6, steps=1000, tracked=10**6, memory_limit=64 * MiB)
    msg = str(info.value)
    assert "this run needs about" in msg and "over the memory limit of 64 MiB" in msg
    assert "tracked" in msg and "replicates" in msg  # the parts that make it big are named
    assert "--memory-limit" in msg and MEMORY_ENV in msg
    # the same run under a limit that covers its estimate is accepted (construction only: not run here)
    sim = ReplicateSimulation(P, replicates=10**6, steps=1000, tracked=10**6, memory_limit=4 * 1024 * MiB)
    assert sim.memory["total"] > 64 * MiB


def test_simulation_guard_refuses_before_allocating():
    # 1500 dense states, 10^6 replicates all tracked: the counters alone would take about
    # 2 * 10^6 * 9 * 1500 * 4 bytes = 108 GB.  The refusal must cost no more than a few copies of P.
    rng = np.random.default_rng(5)
    W = rng.random((1500, 1500))
    P = W / W.sum(axis=1, keepdims=True)
    tracemalloc.start()
    try:
        with pytest.raises(LimitError, match=r"over the memory limit of 2 GiB"):
            ReplicateSimulation(P, replicates=10**6, steps=10**4, tracked=10**6)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    print(f"\nrefused run: peak traced memory {peak / MiB:.1f} MiB for a {P.nbytes / MiB:.1f} MiB matrix")
    assert peak < 4 * P.nbytes  # a check copy and a support mask, nothing of the run's size
    assert DEFAULT_MEMORY_LIMIT == 2 * 1024 * MiB


def test_simulate_command_refuses_with_exit_2_and_accepts_a_raised_limit(capsys, monkeypatch):
    code, _, err = run(capsys, "simulate", PUMP, "-R", "1000", "-T", "200", "--seed", "1", "--memory-limit", "1MiB")
    assert_clean_refusal(code, err, "over the memory limit of 1 MiB", "--memory-limit", MEMORY_ENV)
    code, out, err = run(capsys, "simulate", PUMP, "-R", "1000", "-T", "200", "--seed", "1", "--memory-limit",
                         "64MiB", "--json")
    assert code == 0, err
    assert json.loads(out)["replicates"] == 1000
    # the environment variable is the other way to set it
    monkeypatch.setenv(MEMORY_ENV, "1MiB")
    code, _, err = run(capsys, "simulate", PUMP, "-R", "1000", "-T", "200", "--seed", "1")
    assert_clean_refusal(code, err, "over the memory limit of 1 MiB", MEMORY_ENV)
    # the option wins over the environment
    code, out, err = run(capsys, "simulate", PUMP, "-R", "1000", "-T", "200", "--seed", "1", "--memory-limit",
                         "64MiB", "--json")
    assert code == 0, err
    # a limit that is not a size is named
    monkeypatch.setenv(MEMORY_ENV, "plenty")
    code, _, err = run(capsys, "simulate", PUMP, "-R", "10", "-T", "10")
    assert_clean_refusal(code, err, MEMORY_ENV, "'plenty' is not a memory size")
    monkeypatch.delenv(MEMORY_ENV)
    code, _, err = run(capsys, "simulate", PUMP, "-R", "10", "-T", "10", "--memory-limit=-5GB")
    assert_clean_refusal(code, err, "'-5GB' is not a memory size")


def test_replicate_count_limit_names_the_option(capsys):
    code, _, err = run(capsys, "simulate", PUMP, "-R", "2e6", "-T", "10")
    assert_clean_refusal(code, err, "replicates must be between 1 and 1e+06, not 2000000")


@pytest.mark.timeout(120)
def test_default_memory_guard_holds_under_an_address_space_limit(tmp_path):
    # The run below needs ~4.3 GB by the guard's estimate (10^6 tracked replicates x 60 states of
    # counters).  Under a 1.5 GiB address-space limit an allocation of that size would raise
    # MemoryError (a traceback, exit 1); the guard must refuse first, with exit 2.
    f = dense_chain_file(tmp_path / "sixty.json", 60)
    script = textwrap.dedent(f"""
        import resource, sys
        resource.setrlimit(resource.RLIMIT_AS, (1536 * 2**20, resource.RLIM_INFINITY))
        from core.cli import main
        sys.exit(main(["simulate", {str(f)!r}, "-R", "1e6", "--tracked", "1e6", "-T", "1e4", "--seed", "1"]))
    """)
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", PYTHONPATH=str(ROOT))
    env.pop(MEMORY_ENV, None)
    r = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, env=env, timeout=100)
    assert_clean_refusal(r.returncode, r.stderr, "over the memory limit of 2 GiB", "--memory-limit", MEMORY_ENV)


# ---------------------------------------------------------------------------
# analysis size: the dense-analysis state limit


def test_default_state_limit_refuses_5001_states(tmp_path, capsys):
    f = tmp_path / "big.json"
    save_chain(ring(DENSE_STATE_LIMIT + 1), f)
    code, _, err = run(capsys, "analyze", f)
    assert_clean_refusal(code, err, "5001 states, more than the limit of 5000", "--max-states",
                         "LONGRUN_MAX_STATES")


@pytest.mark.parametrize("kind", ["json", "csv"])
def test_state_limit_option_and_variable_work_for_chain_files_and_matrix_csv(tmp_path, capsys, monkeypatch, kind):
    f = tmp_path / f"ring6.{kind}"
    if kind == "json":
        save_chain(ring(6), f)
    else:
        ring_csv(f, 6)
    need = ("6 states, more than the limit of 5", "--max-states", "LONGRUN_MAX_STATES")
    code, _, err = run(capsys, "analyze", f, "--max-states", "5")
    assert_clean_refusal(code, err, *need)
    code, _, err = run(capsys, "simulate", f, "-R", "10", "-T", "10", "--max-states", "5")
    assert_clean_refusal(code, err, *need)
    monkeypatch.setenv("LONGRUN_MAX_STATES", "5")
    code, _, err = run(capsys, "analyze", f)
    assert_clean_refusal(code, err, *need)
    code, _, err = run(capsys, "simulate", f, "-R", "10", "-T", "10")
    assert_clean_refusal(code, err, *need)
    code, out, err = run(capsys, "analyze", f, "--max-states", "6", "--json")  # the option wins
    assert code == 0, err
    assert len(json.loads(out)["states"]) == 6
    monkeypatch.setenv("LONGRUN_MAX_STATES", "6")
    code, out, err = run(capsys, "analyze", f)
    assert code == 0, err
    code, _, err = run(capsys, "analyze", f, "--max-states", "0")
    assert_clean_refusal(code, err, "--max-states must be at least 1")


def test_state_limit_in_the_api_is_a_validation_problem(monkeypatch):
    monkeypatch.setenv("LONGRUN_MAX_STATES", "5")
    from core.io import dumps_chain, loads_chain

    chain = loads_chain(dumps_chain(ring(6)))
    assert chain.state_limit == 5
    [problem] = chain.problems
    assert problem.code == "too-many-states" and "LONGRUN_MAX_STATES" in problem.message
    with pytest.raises(ValidationError, match="more than the limit of 5"):
        analyze(chain)
    with pytest.raises(ValidationError, match="more than the limit of 5"):
        chain.matrix()


def test_matrix_csv_reader_follows_the_state_limit_variable(tmp_path, monkeypatch):
    f = ring_csv(tmp_path / "ring6.csv", 6)
    monkeypatch.setenv("LONGRUN_MAX_STATES", "5")
    assert read_matrix_csv(f).state_limit == 5
    assert [p.code for p in read_matrix_csv(f).problems] == ["too-many-states"]
    monkeypatch.setenv("LONGRUN_MAX_STATES", "9000")
    assert read_matrix_csv(f).state_limit == 9000 and not read_matrix_csv(f).problems


# ---------------------------------------------------------------------------
# report size


@pytest.mark.timeout(120)
def test_report_size_limit_by_option_and_variable_leaves_an_existing_file_alone(tmp_path):
    out = tmp_path / "report.html"
    kept = "an earlier report the user keeps"
    out.write_text(kept, encoding="utf-8")
    # the option (which wins over the variable), a bad variable, a bad option
    (code, _, err), (code_bad, _, err_bad), (code0, _, err0) = cli(
        ["report", PUMP, "-o", out, "--max-size-mb", "0.02"], ["report", PUMP, "-o", out],
        ["report", PUMP, "-o", out, "--max-size-mb", "0"], env={"LONGRUN_MAX_REPORT_MB": "big"})
    assert_clean_refusal(code, err, "more than the limit of", "MiB", "--max-size-mb", "LONGRUN_MAX_REPORT_MB",
                         "--max-table-states")
    assert_clean_refusal(code_bad, err_bad, "LONGRUN_MAX_REPORT_MB='big' is not a number")
    assert_clean_refusal(code0, err0, "--max-size-mb must be positive")
    assert out.read_text(encoding="utf-8") == kept
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report.html"]  # no partial or temporary file
    # the variable alone
    [(code, _, err)] = cli(["report", PUMP, "-o", out], env={"LONGRUN_MAX_REPORT_MB": "0.02"})
    assert_clean_refusal(code, err, "more than the limit of", "LONGRUN_MAX_REPORT_MB")
    assert out.read_text(encoding="utf-8") == kept


# ---------------------------------------------------------------------------
# file size


def _big_chain_text(megabytes: float) -> str:
    doc = {"format": "longrun-chain", "version": 1, "description": "x" * int(megabytes * MiB),
           "states": [{"id": "a"}], "transitions": [{"from": "a", "to": "a", "p": 1}]}
    return json.dumps(doc)


@pytest.mark.timeout(120)
def test_file_size_limit_for_chain_files_matrix_csv_and_observations(tmp_path):
    (tmp_path / "big.json").write_text(_big_chain_text(1.5), encoding="utf-8")
    csv = ring_csv(tmp_path / "big.csv", 6)
    with open(csv, "a", encoding="utf-8") as fh:
        fh.write((" " * 1023 + "\n") * 1536)  # blank lines: a big file with a small matrix
    obs = tmp_path / "obs.csv"
    obs.write_text(("# " + "x" * 1022 + "\n") * 1536 + "state\n" + "a\nb\n" * 20, encoding="utf-8")  # comments
    commands = (["validate", "big.json"], ["analyze", "big.csv"],
                ["fit", "obs.csv", "-o", "fitted.json", "--draws", "0"])
    for code, _, err in cli(*commands, env={"LONGRUN_MAX_FILE_MB": "1"}, cwd=tmp_path):
        assert_clean_refusal(code, err, "larger than the limit of 1 MiB", "LONGRUN_MAX_FILE_MB")
    assert not (tmp_path / "fitted.json").exists()
    for code, _, err in cli(*commands, env={"LONGRUN_MAX_FILE_MB": "2"}, cwd=tmp_path):
        assert code == 0, err
    assert load_chain(tmp_path / "fitted.json").n == 2


@pytest.mark.timeout(120)
@pytest.mark.parametrize("variable, argv", [
    ("LONGRUN_MAX_FILE_MB", ["validate", PUMP]),
    ("LONGRUN_MAX_STATES", ["analyze", PUMP]),
    ("LONGRUN_MAX_ROWS", ["fit", ROOT / "sample_models" / "data" / "daily_moves.csv", "-o", "fitted.json",
                          "--draws", "0", "--column", "daily_return", "--id-column", "fund",
                          "--time-column", "date", "--cuts=-1%,1%"]),
])
def test_malformed_limit_variables_are_refused_by_name(tmp_path, variable, argv):
    # A limit the user set wrongly must not silently fall back to the default
    for value in ("lots", "0", "-3", "1.5"):
        [(code, _, err)] = cli(argv, env={variable: value}, cwd=tmp_path)
        assert_clean_refusal(code, err, f"{variable}={value!r} is not a whole number", "unset it for the default")
    assert not (tmp_path / "fitted.json").exists()
    [(code, _, err)] = cli(argv, env={variable: "2e3"}, cwd=tmp_path)  # a whole number in another spelling
    assert code == 0, err


def test_default_file_size_limit_is_checked_before_reading(tmp_path, capsys):
    f = tmp_path / "sparse.json"
    with open(f, "wb") as fh:  # a 65 MiB sparse file: refused from its size, never read
        fh.truncate(65 * MiB)
    tracemalloc.start()
    try:
        code, _, err = run(capsys, "validate", f)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert_clean_refusal(code, err, "65.0 MiB, larger than the limit of 64 MiB", "LONGRUN_MAX_FILE_MB")
    assert peak < 8 * MiB


# ---------------------------------------------------------------------------
# observation rows in `longrun fit`


@pytest.mark.timeout(120)
def test_observation_row_limit_in_fit(tmp_path):
    rows = tmp_path / "rows.csv"
    labels = ["up", "down", "down", "up", "idle"] * 21  # 105 observations
    rows.write_text("state\n" + "\n".join(labels[:101]) + "\n", encoding="utf-8")
    (tmp_path / "exact.csv").write_text("state\n" + "\n".join(labels[:100]) + "\n", encoding="utf-8")
    [(code, _, err), (code_ok, _, err_ok)] = cli(
        ["fit", rows, "-o", tmp_path / "f.json", "--draws", "0"],
        ["fit", tmp_path / "exact.csv", "-o", tmp_path / "g.json", "--draws", "0"], env={"LONGRUN_MAX_ROWS": "100"})
    assert_clean_refusal(code, err, "more than 100 data rows", "LONGRUN_MAX_ROWS")
    assert not (tmp_path / "f.json").exists()
    assert code_ok == 0, err_ok
    fitted = load_chain(tmp_path / "g.json")
    assert sorted(s.display_name for s in fitted.states) == ["down", "idle", "up"]
    assert sum(map(sum, fitted.extra["transition_counts"]["matrix"])) == 99  # 100 observations, one sequence


def test_default_observation_row_limit(monkeypatch):
    from core import datafile

    assert datafile.MAX_ROWS == 1_000_000  # the documented default (the subprocess test above sets another)
    monkeypatch.setattr(datafile, "MAX_ROWS", 3)
    with pytest.raises(LimitError, match=r"many.csv: more than 3 data rows.*LONGRUN_MAX_ROWS"):
        datafile.parse_table("state\na\nb\na\nb\n", source="many.csv")
    assert len(datafile.parse_table("state\na\nb\na\n", source="few.csv").rows) == 3


# ---------------------------------------------------------------------------
# the memory estimate the guard checks must not be below what a run takes


def _random_matrix(n, per_row, seed):
    rng = np.random.default_rng(seed)
    P = np.zeros((n, n))
    for i in range(n):
        cols = rng.choice(n, size=min(n, per_row), replace=False)
        P[i, cols] = rng.random(cols.size) + 1e-3
    return P / P.sum(axis=1, keepdims=True)


@pytest.mark.parametrize("n, per_row, replicates, tracked", [
    (4, 4, 200_000, 1000),      # many replicates of a small chain
    (60, 60, 5000, 5000),       # every replicate tracked
    (1000, 1000, 500, 500),     # a dense chain: the cell table and its construction dominate
    (3000, 20, 200, 200),       # a sparse chain of many states
])
def test_memory_estimate_bounds_the_measured_peak(n, per_row, replicates, tracked):
    P = _random_matrix(n, per_row, seed=n)
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        sim = ReplicateSimulation(P, replicates=replicates, steps=40, burn_in=5, seed=3, tracked=tracked)
        for _ in sim.snapshots(every=10):
            pass
        result = sim.result()
        peak = tracemalloc.get_traced_memory()[1] - base
    finally:
        tracemalloc.stop()
    estimate = sim.memory["total"]
    print(f"\nn={n}, {per_row} per row, R={replicates}: estimate {estimate / MiB:.1f} MiB, measured peak "
          f"{peak / MiB:.1f} MiB (ratio {peak / estimate:.2f})")
    assert result.ensemble.sum() == replicates
    assert peak <= estimate
