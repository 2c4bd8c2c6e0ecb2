"""`longrun check-plan`: readable and JSON output, options, errors."""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from core.cli import main
from core.io import dumps_chain, load_chain
from core.model import Chain, Step
from core.plan import Plan, check_plan

ROOT = Path(__file__).resolve().parents[2]


def quarantine(tmp_path) -> Path:
    # Invented: a parcel robot in a quarantine bay, released w.p. 1e-9 a second (see test_plan).
    doc = {
        "format": "longrun-chain",
        "version": 1,
        "name": "Quarantined parcel robot",
        "description": "Illustrative, invented scenario.",
        "step": {"value": 1, "unit": "second"},
        "states": [{"id": "quarantine"}, {"id": "aisle"}, {"id": "dock"}],
        "transitions": [
            {"from": "quarantine", "to": "aisle", "p": "2.5e-10"},
            {"from": "quarantine", "to": "dock", "p": "7.5e-10"},
            {"from": "quarantine", "to": "quarantine", "p": "rest"},
            {"from": "aisle", "to": "aisle", "p": "0.7"},
            {"from": "aisle", "to": "dock", "p": "0.3"},
            {"from": "dock", "to": "aisle", "p": "0.1"},
            {"from": "dock", "to": "dock", "p": "rest"},
        ],
    }
    f = tmp_path / "quarantine.json"
    f.write_text(json.dumps(doc))
    return f


def run_json(capsys, *argv):
    assert main(["check-plan", *map(str, argv), "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_readable_report_of_a_misleading_plan(tmp_path, capsys):
    f = quarantine(tmp_path)
    assert main(["check-plan", str(f), "--steps", "1e4"]) == 0
    out = capsys.readouterr().out
    assert "Plan check: Quarantined parcel robot" in out
    assert "'quarantine' (the first state; choose with --start)" in out
    assert "MISLEADING" in out
    assert "shortest sound run      3.00e9 steps" in out
    assert "years" in out  # 3e9 seconds in words
    for sid in ("quarantine", "aisle", "dock"):
        assert sid in out
    assert out.rstrip().splitlines()[-1]  # the plain sentence closes the report
    assert "Misleading: a run of 10,000 steps" in out


def test_json_carries_the_issue_keys_and_matches_the_api(tmp_path, capsys):
    f = quarantine(tmp_path)
    doc = run_json(capsys, f, "--steps", 10000, "--start", "quarantine", "--replicates", 500)
    for key in ("expected_estimate", "long_run", "tv", "verdict", "min_steps", "noise_sd"):
        assert key in doc
    want = check_plan(load_chain(f), Plan("quarantine", 10000, replicates=500))
    assert doc["verdict"] == want.verdict == "misleading"
    assert doc["tv"] == want.tv
    assert doc["min_steps"] == want.min_steps
    assert doc["expected_estimate"] == dict(zip(want.ids, want.expected_estimate.tolist()))
    assert doc["noise_sd"] == dict(zip(want.ids, want.noise_sd.tolist()))
    assert doc["plan"]["replicates"] == 500 and doc["plan"]["start"] == "quarantine"
    assert doc["file"] == str(f)


def test_options_reach_the_plan(tmp_path, capsys):
    f = quarantine(tmp_path)
    doc = run_json(
        capsys, f, "--steps", "1e11", "--burn-in", 1000, "--stride", 10, "--estimator", "average",
        "--tolerance", 0.01, "--start", "aisle",
    )
    assert doc["plan"] == {
        "start": "aisle", "steps": 10**11, "burn_in": 1000, "stride": 10, "replicates": 100,
        "estimator": "average", "tolerance": 0.01,
    }
    assert doc["samples_per_replicate"] == 10**10
    assert doc["verdict"] == "sound"


def test_periodic_sample_has_null_min_steps(capsys):
    sample = ROOT / "sample_models" / "tanker_rotation.json"
    doc = run_json(capsys, sample, "--steps", 300)
    assert doc["verdict"] == "misleading" and doc["min_steps"] is None
    assert "period 3" in doc["min_steps_reason"]
    avg = run_json(capsys, sample, "--steps", 300, "--estimator", "average")
    assert avg["verdict"] == "sound"


def test_large_chain_table_is_cut(tmp_path, capsys):
    n = 40
    rng = np.random.default_rng(2)
    P = rng.random((n, n))
    P /= P.sum(axis=1, keepdims=True)
    f = tmp_path / "big.json"
    f.write_text(dumps_chain(Chain.from_matrix(P, step=Step(1, "hour"))))
    assert main(["check-plan", str(f), "--steps", "50"]) == 0
    out = capsys.readouterr().out
    assert "(15 more states with smaller bias; --json lists all)" in out


@pytest.mark.parametrize(
    "extra,message",
    [
        (["--start", "nowhere"], "--start 'nowhere': no such state"),
        (["--estimator", "average", "--stride", "20000"], "stride 20000 is longer than the run"),
    ],
)
def test_user_errors_exit_2_with_a_message(tmp_path, capsys, extra, message):
    f = quarantine(tmp_path)
    assert main(["check-plan", str(f), "--steps", "10000", *extra]) == 2
    assert message in capsys.readouterr().err


@pytest.mark.parametrize(
    "extra,message",
    [
        (["--steps", "0"], "must be at least 1"),
        (["--steps", "2.5"], "not a whole number"),
        (["--steps", "10", "--tolerance", "1.5"], "between 0 and 1"),
        (["--steps", "10", "--estimator", "median"], "invalid choice"),
        ([], "--steps"),
    ],
)
def test_bad_options_are_refused(tmp_path, capsys, extra, message):
    f = quarantine(tmp_path)
    with pytest.raises(SystemExit) as exc:
        main(["check-plan", str(f), *extra])
    assert exc.value.code == 2
    assert message in capsys.readouterr().err


def test_invalid_chain_is_refused_with_its_problems(tmp_path, capsys):
    f = tmp_path / "bad.json"
    f.write_text(json.dumps({
        "format": "longrun-chain", "version": 1, "states": [{"id": "a"}],
        "transitions": [{"from": "a", "to": "a", "p": "0.5"}],
    }))
    assert main(["check-plan", str(f), "--steps", "10"]) == 2
    err = capsys.readouterr().err
    assert "state 'a': probabilities sum to 0.5 (must be 1)" in err


def test_console_entry_point(tmp_path):
    f = quarantine(tmp_path)
    out = subprocess.run(
        [sys.executable, "-m", "core", "check-plan", str(f), "--steps", "1e11", "--json"],
        capture_output=True, text=True, cwd=ROOT, check=True,
    )
    assert json.loads(out.stdout)["verdict"] == "sound"


def test_a_plan_at_the_long_run_law_reads_as_such(capsys, exact_tv):
    # After 2,000 days the pump sample is exactly at TV ~1e-52 from its long-run law (mpmath,
    # tests/core/conftest.py): the report must not print double-precision rounding (~1e-16) as a
    # bias; it says the distance is below 1e-12, the biases are 0 and no burn-in is needed.
    import mpmath as mp

    sample = ROOT / "sample_models" / "pump_wear.json"
    assert exact_tv(load_chain(sample).matrix(), 0, 2000) < mp.mpf("1e-40")
    assert main(["check-plan", str(sample), "-R", "1000", "-T", "2000"]) == 0
    out = capsys.readouterr().out
    assert "converges to a law less than 1e-12 away" in out
    rows = [ln.split() for ln in out.splitlines() if ln.split()[:1] in (["new"], ["worn"], ["degraded"], ["failed"])]
    assert len(rows) == 4 and all(r[3] == "0" for r in rows)
    assert "shortest sound burn-in  none needed at this run length" in out
    assert "lands within 1e-12 of the long-run law" in " ".join(out.split())
    assert "e-16" not in out and "e-17" not in out
