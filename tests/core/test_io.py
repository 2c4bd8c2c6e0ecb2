"""Chain files, CSV matrices and validated-matrix exports."""
import hashlib
import json
import os
import time

import jsonschema
import pytest

from core import io as cio
from core.errors import ChainFileError, ValidationError
from core.model import Chain, State, Transition

GOOD = {
    "format": "longrun-chain",
    "version": 1,
    "name": "Gear box",
    "description": "invented",
    "step": {"value": 8, "unit": "hour"},
    "states": [{"id": "ok", "label": "Running", "x": 1.5, "y": -2.0}, {"id": "down"}],
    "transitions": [
        {"from": "ok", "to": "down", "p": "2.5e-11"},
        {"from": "ok", "to": "ok", "p": "rest"},
        {"from": "down", "to": "ok", "p": 0.25},
        {"from": "down", "to": "down", "p": "3/4"},
    ],
    "owner": {"team": "maintenance", "tags": [1, 2]},
}


def test_schema_is_draft_2020_12_and_accepts_good_file():
    s = cio.schema()
    assert s["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    jsonschema.Draft202012Validator.check_schema(s)
    jsonschema.Draft202012Validator(s).validate(GOOD)


def test_round_trip_is_lossless():
    c = cio.loads_chain(json.dumps(GOOD))
    assert c.is_valid
    text = cio.dumps_chain(c)
    doc = json.loads(text)
    assert doc == GOOD  # typed text, numbers, unknown keys, order of content all kept
    assert cio.loads_chain(text) == c


def test_unknown_keys_in_states_and_transitions_kept():
    g = json.loads(json.dumps(GOOD))
    g["states"][0]["colour_hint"] = "warm"
    g["transitions"][0]["note"] = "from the vendor sheet"
    c = cio.loads_chain(json.dumps(g))
    assert json.loads(cio.dumps_chain(c)) == g


def test_invalid_chain_still_loads_so_nothing_is_lost():
    g = json.loads(json.dumps(GOOD))
    g["transitions"][3]["p"] = "0.9"
    c = cio.loads_chain(json.dumps(g))
    assert [p.code for p in c.problems] == ["row-sum"]
    assert json.loads(cio.dumps_chain(c)) == g


@pytest.mark.parametrize(
    "mutate, needle",
    [
        (lambda d: d.update(format="other-tool"), 'format is "other-tool"'),
        (lambda d: d.pop("format"), 'no "format"'),
        (lambda d: d.update(version=2), "version 2, written by a newer Longrun"),
        (lambda d: d["states"][1].update(id=5), "states[1].id: expected text, found 5"),
        (lambda d: d["transitions"][0].pop("p"), "transitions[0]: the required key 'p' is missing"),
        (lambda d: d["transitions"][2].update(p=[0.25]), "transitions[2].p: a probability must be a number or text"),
        (lambda d: d.update(states={}), "states: expected a list"),
        (lambda d: d["step"].update(value=0), "step.value: must be greater than 0"),
    ],
)
def test_bad_files_name_the_place(mutate, needle):
    g = json.loads(json.dumps(GOOD))
    mutate(g)
    with pytest.raises(ChainFileError) as info:
        cio.loads_chain(json.dumps(g), source="model.json")
    assert needle in str(info.value)
    assert str(info.value).startswith("model.json")


def test_json_syntax_error_gives_line_and_column():
    text = json.dumps(GOOD, indent=2).replace('"version": 1,', '"version": 1')
    with pytest.raises(ChainFileError, match=r"line 4, column 3: not valid JSON"):
        cio.loads_chain(text, source="x.json")


def test_non_utf8_and_empty_and_not_object():
    with pytest.raises(ChainFileError, match="not UTF-8"):
        cio.loads_chain(b'{"name": "\xff"}')
    with pytest.raises(ChainFileError, match="empty"):
        cio.loads_chain("  \n")
    with pytest.raises(ChainFileError, match="expected a JSON object"):
        cio.loads_chain("[1, 2]")


def test_deep_nesting_refused_without_parsing():
    with pytest.raises(ChainFileError, match="nested more than 64 levels"):
        cio.loads_chain("[" * 100000 + "]" * 100000)


def test_file_size_limit(tmp_path, monkeypatch):
    p = tmp_path / "big.json"
    p.write_text(json.dumps(GOOD))
    monkeypatch.setattr(cio, "MAX_FILE_BYTES", 100)
    with pytest.raises(ChainFileError, match="larger than the limit.*LONGRUN_MAX_FILE_MB"):
        cio.load_chain(p)


def test_missing_file_and_folder(tmp_path):
    with pytest.raises(ChainFileError, match="no such file"):
        cio.load_chain(tmp_path / "nope.json")
    with pytest.raises(ChainFileError, match="folder"):
        cio.load_chain(tmp_path)


def test_atomic_save_keeps_old_file_on_failure(tmp_path, monkeypatch):
    p = tmp_path / "m.json"
    c = cio.loads_chain(json.dumps(GOOD))
    cio.save_chain(c, p)
    before = p.read_bytes()

    def boom(*a, **k):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "replace", boom)
    with pytest.raises(ChainFileError, match="disk is full.*not changed"):
        cio.save_chain(c.with_meta(name="changed"), p)
    assert p.read_bytes() == before
    assert [f.name for f in tmp_path.iterdir()] == ["m.json"]  # no temp file left behind


def test_save_into_read_only_folder(tmp_path, monkeypatch):
    # Root ignores folder permissions, so the refusal is simulated where the
    # operating system would raise it (creating the temporary file).
    import tempfile

    def refuse(*a, **k):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(tempfile, "mkstemp", refuse)
    with pytest.raises(ChainFileError, match="no permission"):
        cio.save_chain(Chain(), tmp_path / "m.json")
    assert not (tmp_path / "m.json").exists()


def test_save_into_missing_folder(tmp_path):
    with pytest.raises(ChainFileError, match="folder does not exist"):
        cio.save_chain(Chain(), tmp_path / "missing" / "m.json")


# --------------------------------------------------------------------------
# CSV
# --------------------------------------------------------------------------
def test_csv_round_trip_and_column_order():
    text = "from\\to,b,a\na,1/4,rest\nb,0.5,0.5\n"
    c = cio.reads_matrix_csv(text)
    assert c.ids == ("a", "b") and c.is_valid
    assert c.matrix().tolist() == [[0.75, 0.25], [0.5, 0.5]]
    back = cio.reads_matrix_csv(cio.matrix_csv_text(c))
    assert back.matrix().tolist() == c.matrix().tolist()
    typed = cio.matrix_csv_text(c, as_typed=True)
    assert "rest" in typed and "1/4" in typed


def test_csv_semicolon_and_tab():
    assert cio.reads_matrix_csv("x;a;b\na;0.5;0.5\nb;1;0\n").is_valid
    assert cio.reads_matrix_csv("x\ta\tb\na\t0.5\t0.5\nb\t1\t0\n").is_valid


@pytest.mark.parametrize(
    "text, needle",
    [
        ("", "empty"),
        ("x,a\n", "header row of state ids and one row"),
        ("x,a,a\na,1,0\n", "'a' appears twice in the header"),
        ("x,a,b\na,1,0\nc,0,1\n", "line 3: row state 'c' is not in the header"),
        ("x,a,b\na,1,0,0.5\nb,0,1\n", "line 2: the row has 3 values"),
        ("x,a,b\na,1,0\n", "'b' have a column but no row"),
        ("x,a,b\na,1,0\na,0,1\n", "line 3: state 'a' has two rows"),
    ],
)
def test_csv_errors_have_line_numbers(text, needle):
    with pytest.raises(ChainFileError, match=needle.replace("(", r"\(").replace(")", r"\)")):
        cio.reads_matrix_csv(text)


def test_csv_cell_problems_are_validation_problems():
    c = cio.reads_matrix_csv("x,a,b\na,abc,0\nb,0,1\n")
    assert [p.code for p in c.problems] == ["unparseable"]
    assert "'a' -> 'a'" in c.problems[0].message and "'abc'" in c.problems[0].message


# --------------------------------------------------------------------------
# validated-matrix export
# --------------------------------------------------------------------------
def test_validated_export_hash_verifies_and_detects_tampering(tmp_path):
    c = cio.loads_chain(json.dumps(GOOD))
    doc = cio.write_validated_matrix(c, tmp_path / "v.json")
    on_disk = json.loads((tmp_path / "v.json").read_text())
    assert on_disk == doc
    assert doc["states"] == ["ok", "down"]
    assert doc["matrix"][0] == [1 - 2.5e-11, 2.5e-11]
    assert doc["row_sums"] == [1.0, 1.0]
    assert doc["tolerance"] == 1e-9 and len(doc["checks"]) >= 5
    # the receiver recomputes the hash from the documented canonical form
    body = {k: v for k, v in on_disk.items() if k != "sha256"}
    canon = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()
    assert hashlib.sha256(canon).hexdigest() == doc["sha256"]
    assert cio.verify_validated_matrix(on_disk)
    on_disk["matrix"][1][0] = 0.26
    assert not cio.verify_validated_matrix(on_disk)


def test_validated_export_refuses_invalid_chain():
    c = Chain(states=(State("a"),), transitions=(Transition("a", "a", "0.5"),))
    with pytest.raises(ValidationError, match="sum to 0.5"):
        cio.validated_matrix(c)


def test_validated_export_is_refused_as_chain_file():
    c = cio.loads_chain(json.dumps(GOOD))
    with pytest.raises(ChainFileError, match="validated-matrix export"):
        cio.loads_chain(json.dumps(cio.validated_matrix(c)))


def test_a_save_removes_old_temporaries_of_killed_saves_of_that_file_only(tmp_path):
    # A save killed between creating its temporary file and the rename leaves `.NAME.XXXXXXXX.tmp`
    # (tests/app/test_fault_tolerance.py kills saves to show it); the next save of the same file
    # removes such leftovers once they are older than 10 minutes, and nothing else.
    target = tmp_path / "fleet.json"
    old = time.time() - 3600
    stale = [tmp_path / ".fleet.json.a1b2c3d4.tmp", tmp_path / ".fleet.json.zz_9yy_8.tmp"]
    fresh = tmp_path / ".fleet.json.q1w2e3r4.tmp"  # a save in progress elsewhere: seconds old
    others = [tmp_path / ".other.json.a1b2c3d4.tmp", tmp_path / "fleet.json.a1b2c3d4.tmp",
              tmp_path / ".fleet.json.toolongname.tmp", tmp_path / "notes.tmp"]
    for f in stale + others + [fresh]:
        f.write_bytes(b"partial")
    for f in stale + others:
        os.utime(f, (old, old))
    cio.atomic_write_bytes(target, b"{}")
    assert target.read_bytes() == b"{}"
    assert not any(f.exists() for f in stale)
    assert fresh.exists() and all(f.exists() for f in others)
