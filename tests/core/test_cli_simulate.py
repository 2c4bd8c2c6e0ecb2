"""`longrun simulate`: options, exit codes, messages, the --json contract, the progress bar."""
import json
from pathlib import Path

import numpy as np
import pytest

from core.cli import main
from core.commands import simulate as cmd

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample_models" / "pump_wear.json"

CONTRACT = ("steps", "replicates", "ensemble", "time_average", "exact_at_T", "long_run", "tv_ensemble",
            "tv_time_average", "rhat", "seed")


def _json(capsys, *argv):
    assert main(["simulate", str(SAMPLE), *argv, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_json_contract_keys_and_values(capsys):
    doc = _json(capsys, "-R", "200", "-T", "500", "--seed", "7")
    for key in CONTRACT:
        assert key in doc, key
    ids = ["new", "worn", "degraded", "failed"]
    assert doc["steps"] == 500 and doc["replicates"] == 200 and doc["seed"] == 7
    assert list(doc["ensemble"]) == ids and sum(doc["ensemble"].values()) == 200
    assert sum(doc["time_average"].values()) == pytest.approx(1.0)
    assert sum(doc["exact_at_T"].values()) == pytest.approx(1.0)
    assert sum(doc["long_run"].values()) == pytest.approx(1.0)
    assert 0 <= doc["tv_ensemble"] <= 1 and 0 <= doc["tv_time_average"] <= 1
    assert all(isinstance(v, float) for v in doc["rhat"].values())
    assert doc["status"] in ("consistent", "biased", "uncertain", "misleading", "mismatch")
    assert doc["start"] == {"new": 1.0}
    assert doc["burn_in"] == 0 and doc["stride"] == 1 and doc["total_steps"] == 500 and doc["step"] == 500


def test_json_follows_the_plan_convention(capsys):
    # --steps T counts the steps after --burn-in B; "exact_at_T" is pi0 P^(B+T) (checked by direct
    # matrix powers, numpy.linalg.matrix_power) and equals check-plan's final-step law for the same B, T.
    from core.io import load_chain

    doc = _json(capsys, "-R", "50", "-T", "30", "--burn-in", "12", "--stride", "4", "--seed", "9")
    assert (doc["steps"], doc["burn_in"], doc["stride"], doc["total_steps"], doc["step"]) == (30, 12, 4, 42, 42)
    assert doc["kept"] == 30 // 4
    P = load_chain(SAMPLE).matrix()
    want = np.linalg.matrix_power(P, 42)[0]
    assert list(doc["exact_at_T"].values()) == pytest.approx(want.tolist(), abs=1e-12)
    assert main(["check-plan", str(SAMPLE), "--steps", "30", "--burn-in", "12", "--json"]) == 0
    plan = json.loads(capsys.readouterr().out)
    assert list(doc["exact_at_T"].values()) == pytest.approx(list(plan["expected_estimate"].values()), abs=1e-12)


def test_json_is_reproducible_from_the_seed(capsys):
    a = _json(capsys, "-R", "50", "-T", "300", "--seed", "123", "--burn-in", "10", "--stride", "2")
    b = _json(capsys, "-R", "50", "-T", "300", "--seed", "123", "--burn-in", "10", "--stride", "2")
    for d in (a, b):
        d.pop("engine")
    assert a == b
    assert a["kept"] == 300 // 2 and a["total_steps"] == 310


def test_json_long_run_matches_the_exact_engine(capsys):
    from core.io import load_chain
    from core.passage import limit_law

    doc = _json(capsys, "-R", "20", "-T", "100", "--seed", "1", "--start", "failed")
    P = load_chain(SAMPLE).matrix()
    want = limit_law(P, np.eye(4)[3])
    assert list(doc["long_run"].values()) == pytest.approx(want.tolist(), abs=1e-15)
    assert doc["start"] == {"failed": 1.0}


def test_readable_output_has_table_distances_and_verdict(capsys):
    assert main(["simulate", str(SAMPLE), "--replicates", "300", "--steps", "2000", "--seed", "5"]) == 0
    out = capsys.readouterr().out
    for sid in ("new", "worn", "degraded", "failed"):
        assert any(line.strip().startswith(sid) for line in out.splitlines())
    assert "ensemble vs pi0 P^(B+T)" in out and "time average vs long run" in out
    assert "burn-in      none" in out and "2,000 in all" in out
    lines = [ln for ln in out.splitlines() if ln.strip()]
    assert lines[-2].split(":")[0] in ("CONSISTENT", "BIASED", "UNCERTAIN", "MISLEADING", "MISMATCH")
    assert "the first state; choose with --start" in out
    assert "not the world" in out  # the caution


def test_deterministic_cycle_reads_plainly(capsys, tmp_path):
    # A deterministic 3-cycle: every replicate spends exactly a third of 300 steps in each state,
    # so the MCSE is 0 and the ESS undefined; the ensemble sits on one state, where a chi-square
    # test has no degrees of freedom.
    f = tmp_path / "ring.json"
    f.write_text(json.dumps({"format": "longrun-chain", "version": 1, "name": "ring",
                             "states": [{"id": s} for s in "abc"],
                             "transitions": [{"from": a, "to": b, "p": 1} for a, b in ("ab", "bc", "ca")]}))
    assert main(["simulate", str(f), "-R", "1000", "-T", "300", "--seed", "1"]) == 0
    out = capsys.readouterr().out
    rows = [ln.split() for ln in out.splitlines() if ln.strip()[:2] in ("a ", "b ", "c ")]
    assert [r[5] for r in rows] == ["0", "0", "0"] and [r[-1] for r in rows] == ["n/a"] * 3
    assert "no chi-square test (the exact law puts all its mass on one state)" in out
    assert "e-17" not in out and "e+3" not in out


def test_uniform_start(capsys):
    doc = _json(capsys, "-R", "40", "-T", "50", "--seed", "2", "--start", "uniform")
    assert doc["start"] == {k: 0.25 for k in ("new", "worn", "degraded", "failed")}


@pytest.mark.parametrize("argv,needle", [
    (["--replicates", "0", "--steps", "10"], "--replicates/-R: must be at least 1"),
    (["--replicates", "-5", "--steps", "10"], "replicates"),
    (["--replicates", "2e6", "--steps", "10"], "replicates must be between 1 and 1e+06"),
    (["--replicates", "10", "--steps", "0"], "must be at least 1"),
    (["--replicates", "10", "--steps", "10", "--start", "boiler"], "--start 'boiler': no such state"),
    (["--replicates", "10", "--steps", "10", "--stride", "11"], "stride (11) must be at most steps (10)"),
    (["--replicates", "10", "--steps", "10", "--burn-in", "-1"], "--burn-in"),
    (["--replicates", "10", "--steps", "10", "--memory-limit", "a lot"], "not a memory size"),
    (["--replicates", "1e6", "--steps", "10", "--memory-limit", "10MB"], "over the memory limit"),
])
def test_bad_options_exit_2_with_a_clear_message(capsys, argv, needle):
    try:
        code = main(["simulate", str(SAMPLE), *argv])
    except SystemExit as exc:  # argparse's own errors exit directly
        code = exc.code
    assert code == 2
    err = capsys.readouterr().err
    assert needle in err
    assert "Traceback" not in err


def test_memory_guard_from_environment(capsys, monkeypatch):
    monkeypatch.setenv("LONGRUN_SIMULATE_MEMORY", "1MiB")
    assert main(["simulate", str(SAMPLE), "-R", "100000", "-T", "10"]) == 2
    err = capsys.readouterr().err
    assert "memory limit of 1 MiB" in err and "--memory-limit" in err


def test_invalid_chain_exits_2(tmp_path, capsys):
    f = tmp_path / "bad.json"
    f.write_text(json.dumps({"format": "longrun-chain", "version": 1, "states": [{"id": "a"}],
                             "transitions": [{"from": "a", "to": "a", "p": "0.5"}]}))
    assert main(["simulate", str(f), "-R", "5", "-T", "5"]) == 2
    assert "not valid" in capsys.readouterr().err


def test_no_progress_bar_when_stderr_is_not_a_terminal(capsys, monkeypatch):
    monkeypatch.setattr(cmd, "PROGRESS_AFTER", 0.0)
    assert main(["simulate", str(SAMPLE), "-R", "100", "-T", "3000", "--seed", "1"]) == 0
    assert capsys.readouterr().err == ""


def test_progress_bar_on_a_terminal_but_never_with_json(capsys, monkeypatch):
    monkeypatch.setattr(cmd, "PROGRESS_AFTER", 0.0)
    monkeypatch.setattr(cmd, "stderr_is_tty", lambda: True)
    assert main(["simulate", str(SAMPLE), "-R", "100", "-T", "3000", "--seed", "1"]) == 0
    err = capsys.readouterr().err
    assert "replicate-steps/s" in err and "100.0%" in err and err.endswith("\r")
    assert main(["simulate", str(SAMPLE), "-R", "100", "-T", "3000", "--seed", "1", "--json"]) == 0
    assert capsys.readouterr().err == ""


def test_progress_bar_waits_about_a_second(capsys, monkeypatch):
    monkeypatch.setattr(cmd, "stderr_is_tty", lambda: True)
    assert main(["simulate", str(SAMPLE), "-R", "10", "-T", "100", "--seed", "1"]) == 0
    assert capsys.readouterr().err == ""  # a run this short never shows a bar


def test_tolerance_option(capsys):
    doc = _json(capsys, "-R", "100", "-T", "200", "--seed", "3", "--tolerance", "0.2")
    assert doc["tolerance"] == 0.2
    try:
        code = main(["simulate", str(SAMPLE), "-R", "10", "-T", "10", "--tolerance", "2"])
    except SystemExit as exc:
        code = exc.code
    assert code == 2 and "between 0 and 1" in capsys.readouterr().err


def test_json_names_states_in_notes_and_findings(capsys):
    # The findings and R-hat notes name states by their ids, never by row index
    doc = _json(capsys, "-R", "30", "-T", "20", "--seed", "4")
    assert all("state 0" not in f for f in doc["findings"])
    for sid, note in doc["rhat_notes"].items():
        assert sid in ("new", "worn", "degraded", "failed") and note


def test_exact_distance_is_printed_to_its_accuracy(capsys, exact_tv):
    # d_start(B+T) = TV(pi0 P^t, pi) against mpmath at 80 digits (tests/core/conftest.py): at t = 20
    # the printed value agrees to its 3 digits; at t = 2000 the exact value is ~1e-52 and double
    # precision can only say it is below the rounding level.
    import mpmath as mp

    from core.io import load_chain

    P = load_chain(SAMPLE).matrix()
    for T in (20, 2000):
        assert main(["simulate", str(SAMPLE), "-R", "200", "-T", str(T), "--seed", "3"]) == 0
        out = capsys.readouterr().out
        shown = next(ln for ln in out.splitlines() if ln.strip().startswith("d_start(B+T)")).split()[1]
        if T == 20:
            assert float(shown) == pytest.approx(float(exact_tv(P, 0, T)), rel=5e-3)
        else:
            assert exact_tv(P, 0, T) < mp.mpf("1e-40")
            assert shown == "<" and "is below 1e-12 (zero to rounding)" in out
