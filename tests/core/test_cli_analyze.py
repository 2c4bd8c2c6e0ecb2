"""``longrun analyze``: JSON contract, readable report, user errors (exit 2, no traceback)."""
import json

import pytest

from core.cli import main

GAMBLER = {
    "format": "longrun-chain",
    "version": 1,
    "name": "Small gamble",
    "step": {"value": 1, "unit": "round"},
    "states": [{"id": s} for s in ("broke", "one", "two", "three", "rich")],
    "transitions": [
        {"from": "broke", "to": "broke", "p": 1},
        {"from": "one", "to": "two", "p": "2/3"},
        {"from": "one", "to": "broke", "p": "rest"},
        {"from": "two", "to": "three", "p": "2/3"},
        {"from": "two", "to": "one", "p": "rest"},
        {"from": "three", "to": "rich", "p": "2/3"},
        {"from": "three", "to": "two", "p": "rest"},
        {"from": "rich", "to": "rich", "p": 1},
    ],
}


def write(tmp_path, doc, name="chain.json"):
    p = tmp_path / name
    p.write_text(json.dumps(doc), encoding="utf-8")
    return str(p)


def run(capsys, *argv):
    code = main(list(argv))
    out = capsys.readouterr()
    return code, out.out, out.err


def test_json_output(tmp_path, capsys):
    # Gambler's ruin with p = 2/3, N = 4 = the drunkard variant of Grinstead & Snell §11.2
    # (values seen in a worked solution; reference list E2/E9): from 1, ruin 7/15, time 17/5.
    code, out, err = run(capsys, "analyze", write(tmp_path, GAMBLER), "--json")
    assert code == 0 and err == ""
    doc = json.loads(out)
    assert doc["states"] == ["broke", "one", "two", "three", "rich"]
    assert [c["closed"] for c in doc["classes"]] == [True, False, True]
    assert doc["classes"][1]["states"] == ["one", "two", "three"]
    assert doc["absorption"]["one"]["0"] == pytest.approx(7 / 15, rel=1e-15)
    assert doc["absorption"]["one"]["2"] == pytest.approx(8 / 15, rel=1e-15)
    assert doc["expected_steps_to_absorption"] == pytest.approx({"one": 3.4, "two": 3.6, "three": 2.2}, rel=1e-15)
    assert doc["limit"]["two"] == pytest.approx({"broke": 0.2, "rich": 0.8}, rel=1e-15)
    assert doc["mixing_time"] == {"epsilon": 0.25, "steps": None, "reason": "several closed classes"}
    assert set(doc["spectral"]) >= {"slem", "gap", "relaxation_time"}
    assert [s["class"] for s in doc["stationary"]] == [0, 2]


def test_epsilon_and_start(tmp_path, capsys):
    code, out, _ = run(capsys, "analyze", write(tmp_path, GAMBLER), "--json", "--epsilon", "0.01", "--start", "three")
    assert code == 0
    doc = json.loads(out)
    assert doc["mixing_time"]["epsilon"] == 0.01
    assert doc["start"]["state"] == "three"
    assert doc["start"]["absorption"]["2"] == pytest.approx(14 / 15, rel=1e-15)


def test_readable_report(tmp_path, capsys):
    code, out, err = run(capsys, "analyze", write(tmp_path, GAMBLER))
    assert code == 0 and err == ""
    assert "Small gamble: long-run analysis" in out
    assert "transient" in out and "absorbing" in out
    assert "3.4 steps (3.4 rounds)" in out
    assert "Caution:" in out


def test_unknown_start_state(tmp_path, capsys):
    code, out, err = run(capsys, "analyze", write(tmp_path, GAMBLER), "--start", "millionaire")
    assert code == 2 and out == ""
    assert "--start 'millionaire': no such state" in err
    assert "Traceback" not in err


def test_invalid_chain_file(tmp_path, capsys):
    doc = json.loads(json.dumps(GAMBLER))
    doc["transitions"][1]["p"] = "1.2"  # above 1, and the rest of row "one" would be negative
    code, out, err = run(capsys, "analyze", write(tmp_path, doc))
    assert code == 2 and out == ""
    assert "one" in err and "Traceback" not in err


def test_unreadable_file(tmp_path, capsys):
    code, _, err = run(capsys, "analyze", str(tmp_path / "missing.json"))
    assert code == 2 and "Traceback" not in err and err
    p = tmp_path / "broken.json"
    p.write_text("{not json", encoding="utf-8")
    code, _, err = run(capsys, "analyze", str(p))
    assert code == 2 and "Traceback" not in err and err


@pytest.mark.parametrize("eps", ["0", "1", "1.5", "abc"])
def test_bad_epsilon(tmp_path, capsys, eps):
    with pytest.raises(SystemExit) as exc:
        main(["analyze", write(tmp_path, GAMBLER), "--epsilon", eps])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert "--epsilon" in err and "Traceback" not in err


def test_analyze_json_carries_findings_and_text_lists_them(capsys):
    """The findings of the findings engine appear in both outputs (issue contract)."""
    import json as _json
    from pathlib import Path as _Path

    from core.cli import main as _main

    sample = _Path(__file__).resolve().parents[2] / "sample_models" / "tanker_rotation.json"
    assert _main(["analyze", str(sample), "--json"]) == 0
    doc = _json.loads(capsys.readouterr().out)
    (f,) = [f for f in doc["findings"] if f["code"] == "periodic"]
    assert f["severity"] == "warning" and set(f["states"]) == set(doc["states"])
    assert {"code", "severity", "title", "states"} <= set(f)
    assert _main(["analyze", str(sample)]) == 0
    text = capsys.readouterr().out
    assert "Findings\n  [warning] The chain cycles with period 3" in text
    assert text.rstrip().splitlines()[-1].startswith("Caution:")
