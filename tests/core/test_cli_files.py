"""`longrun validate` and `longrun export`: exit codes, messages, outputs."""
import json
import subprocess
import sys
from pathlib import Path

import pytest

from core.cli import main
from core.io import verify_validated_matrix

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample_models" / "pump_wear.json"

BROKEN = {
    "format": "longrun-chain",
    "version": 1,
    "states": [{"id": "pump"}, {"id": "b"}],
    "transitions": [
        {"from": "pump", "to": "b", "p": "0.7"},
        {"from": "pump", "to": "pump", "p": "0.5"},
        {"from": "b", "to": "zz", "p": "1"},
    ],
}


def test_validate_valid_sample(capsys):
    assert main(["validate", str(SAMPLE)]) == 0
    assert "valid (4 states" in capsys.readouterr().out


def test_validate_lists_every_problem_with_its_place(tmp_path, capsys):
    f = tmp_path / "broken.json"
    f.write_text(json.dumps(BROKEN))
    assert main(["validate", str(f)]) == 2
    err = capsys.readouterr().err.splitlines()
    assert err[0].endswith("3 problems:")
    assert f"{f}: state 'pump': probabilities sum to 1.2 (must be 1)" in err
    assert any("'b' -> 'zz'" in line and "does not exist" in line for line in err)
    assert any("'b' has no outgoing probability" in line for line in err)


def test_export_json_and_csv(tmp_path, capsys):
    out = tmp_path / "m.json"
    assert main(["export", str(SAMPLE), "--to", str(out)]) == 0
    doc = json.loads(out.read_text())
    assert verify_validated_matrix(doc) and doc["states"] == ["new", "worn", "degraded", "failed"]
    assert main(["validate", str(out)]) == 0
    assert "SHA-256 matches" in capsys.readouterr().out
    csv_out = tmp_path / "m.csv"
    assert main(["export", str(SAMPLE), "--to", str(csv_out)]) == 0
    assert csv_out.read_text().splitlines()[0] == "from\\to,new,worn,degraded,failed"


def test_export_refuses_invalid_and_bad_suffix(tmp_path, capsys):
    f = tmp_path / "broken.json"
    f.write_text(json.dumps(BROKEN))
    assert main(["export", str(f), "--to", str(tmp_path / "o.json")]) == 2
    assert "probabilities sum to 1.2" in capsys.readouterr().err
    assert not (tmp_path / "o.json").exists()
    assert main(["export", str(SAMPLE), "--to", str(tmp_path / "o.xlsx")]) == 2
    assert "must end in .json or .csv" in capsys.readouterr().err


def test_tampered_export_is_detected(tmp_path, capsys):
    out = tmp_path / "m.json"
    main(["export", str(SAMPLE), "--to", str(out)])
    doc = json.loads(out.read_text())
    doc["matrix"][0][0] = 0.5
    out.write_text(json.dumps(doc))
    assert main(["validate", str(out)]) == 2
    assert "SHA-256 does not match" in capsys.readouterr().err


@pytest.mark.parametrize(
    "content, needle",
    [
        (b"\xff\xfe\x00garbage", "not UTF-8"),
        (b'{"format": "longrun-chain", "version": 1, "states": [', "not valid JSON"),
        (b'{"format": "longrun-chain", "version": 7, "states": [], "transitions": []}', "newer Longrun"),
    ],
)
def test_bad_files_exit_2_without_traceback(tmp_path, content, needle):
    f = tmp_path / "bad.json"
    f.write_bytes(content)
    r = subprocess.run([sys.executable, "-m", "core", "validate", str(f)], capture_output=True, text=True)
    assert r.returncode == 2
    assert needle in r.stderr and "Traceback" not in r.stderr
    assert r.stderr.startswith("longrun: error: ")


def test_unknown_option_exits_2(capsys):
    with pytest.raises(SystemExit) as info:
        main(["validate"])
    assert info.value.code == 2
    assert "required" in capsys.readouterr().err
