"""Fuzzing the chain-file and CSV readers: every failure is a clear ChainFileError.

Malformed, truncated, deeply nested, wrongly typed, non-UTF-8 and huge inputs
must never raise anything else (no traceback reaches a user) and never hang
(size and nesting are bounded before parsing).  Common practice for file
readers that face untrusted input.
"""
import json
import subprocess
import sys

from hypothesis import given, settings
from hypothesis import strategies as st

from core import io as cio
from core.errors import ChainFileError
from core.model import Chain

GOOD = {
    "format": "longrun-chain",
    "version": 1,
    "states": [{"id": "a"}, {"id": "b"}],
    "transitions": [{"from": "a", "to": "b", "p": "1/2"}, {"from": "a", "to": "a", "p": "rest"},
                    {"from": "b", "to": "a", "p": 1}],
}
GOOD_TEXT = json.dumps(GOOD)

json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=True, allow_infinity=True) | st.text(max_size=8),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=6), inner, max_size=4),
    max_leaves=20,
)


def _load(data):
    try:
        c = cio.loads_chain(data, source="fuzz.json")
    except ChainFileError as exc:
        assert str(exc).startswith("fuzz.json")
        return None
    assert isinstance(c, Chain)
    _ = c.problems  # validation never raises either
    return c


@given(st.binary(max_size=400))
def test_random_bytes(data):
    _load(data)


@given(st.integers(min_value=0, max_value=len(GOOD_TEXT)))
def test_truncated_files(k):
    _load(GOOD_TEXT[:k])


@given(st.integers(min_value=0, max_value=len(GOOD_TEXT) - 1), st.binary(min_size=1, max_size=4))
def test_corrupted_bytes(pos, junk):
    data = GOOD_TEXT.encode()
    _load(data[:pos] + junk + data[pos + len(junk):])


@given(
    st.sampled_from(["format", "version", "name", "description", "step", "states", "transitions"]),
    json_values,
)
def test_wrongly_typed_top_level_values(key, value):
    doc = dict(GOOD)
    doc[key] = value
    _load(json.dumps(doc, allow_nan=True))


@given(st.sampled_from(["id", "label", "x", "y"]), json_values)
def test_wrongly_typed_state_fields(key, value):
    doc = json.loads(GOOD_TEXT)
    doc["states"][0][key] = value
    _load(json.dumps(doc, allow_nan=True))


@given(st.sampled_from(["from", "to", "p"]), json_values)
def test_wrongly_typed_transition_fields(key, value):
    doc = json.loads(GOOD_TEXT)
    doc["transitions"][0][key] = value
    _load(json.dumps(doc, allow_nan=True))


@given(st.integers(min_value=1, max_value=5000), st.sampled_from(["[", "{\"a\":"]))
def test_deep_nesting(depth, opener):
    _load(opener * depth)


@settings(max_examples=25)
@given(st.text(max_size=300))
def test_csv_random_text(text):
    try:
        c = cio.reads_matrix_csv(text, source="fuzz.csv")
    except ChainFileError as exc:
        assert str(exc).startswith("fuzz.csv")
        return
    _ = c.problems


@given(st.lists(st.lists(st.text(alphabet="ab01./;,\t rest-e", max_size=5), max_size=4), max_size=5))
def test_csv_random_grids(rows):
    text = "\n".join(",".join(r) for r in rows)
    try:
        cio.reads_matrix_csv(text, source="fuzz.csv")
    except ChainFileError:
        pass


def test_huge_file_refused_quickly(tmp_path, monkeypatch):
    f = tmp_path / "huge.json"
    f.write_bytes(b" " * (2 * 1024 * 1024))
    monkeypatch.setattr(cio, "MAX_FILE_BYTES", 1024 * 1024)
    try:
        cio.load_chain(f)
    except ChainFileError as exc:
        assert "larger than the limit" in str(exc)
    else:  # pragma: no cover
        raise AssertionError("a file over the limit was read")


def test_deep_nesting_in_a_subprocess_gives_clean_exit(tmp_path):
    f = tmp_path / "deep.json"
    f.write_text("[" * 200000)
    r = subprocess.run([sys.executable, "-m", "core", "validate", str(f)], capture_output=True, text=True,
                       timeout=60)
    assert r.returncode == 2 and "nested more than" in r.stderr and "Traceback" not in r.stderr


# ---------------------------------------------------------------------------
# the same malformed input through the command line: exit 2 and a message, never a traceback

MALFORMED = st.one_of(
    st.binary(max_size=300),
    st.integers(min_value=0, max_value=len(GOOD_TEXT) - 2).map(lambda k: GOOD_TEXT[:k].encode()),
    st.tuples(st.integers(min_value=0, max_value=len(GOOD_TEXT) - 1), st.binary(min_size=1, max_size=4)).map(
        lambda t: GOOD_TEXT.encode()[: t[0]] + t[1] + GOOD_TEXT.encode()[t[0] + len(t[1]):]),
    st.tuples(st.sampled_from(["states", "transitions", "version", "format", "step"]), json_values).map(
        lambda kv: json.dumps({**GOOD, kv[0]: kv[1]}, allow_nan=True).encode()),
)


def _cli(argv):
    import contextlib
    import io

    from core.cli import main

    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)  # anything but a clean exit status propagates and fails the test
    return code, out.getvalue(), err.getvalue()


@settings(max_examples=40)
@given(MALFORMED, st.sampled_from(["validate", "analyze"]), st.sampled_from([".json", ".csv"]))
def test_cli_on_malformed_files_exits_2_with_a_message(data, command, suffix):
    import tempfile
    from pathlib import Path

    with tempfile.TemporaryDirectory() as folder:
        f = Path(folder) / f"input{suffix}"
        f.write_bytes(data)
        try:
            cio.read_matrix_csv(f) if suffix == ".csv" else cio.load_chain(f)
            readable = True
        except ChainFileError:
            readable = False
        code, out, err = _cli([command, str(f)])
    if not readable:
        assert code == 2
        assert err.startswith("longrun: error: ") and str(f) in err
    else:  # it parsed (possibly with validation problems): 0 when valid, else 2 naming the problems
        assert code in (0, 2)
        if code == 2:
            assert str(f) in err and ("problem" in err or "error" in err)
    assert "Traceback" not in err


def test_cli_subprocess_on_malformed_files_prints_no_traceback(tmp_path):
    samples = {
        "truncated.json": GOOD_TEXT[: len(GOOD_TEXT) // 2].encode(),
        "noise.json": bytes(range(256)),
        "latin1.csv": "from,\xe9tat\n\xe9tat,1\n".encode("latin-1"),
        "typed.json": json.dumps({**GOOD, "states": {"a": 1}}).encode(),
    }
    for name, data in samples.items():
        (tmp_path / name).write_bytes(data)
    for name, command in zip(samples, ("validate", "analyze", "validate", "analyze")):
        r = subprocess.run([sys.executable, "-m", "core", command, str(tmp_path / name)], capture_output=True,
                           text=True, timeout=60)
        assert r.returncode == 2, (name, command, r.stderr)
        assert r.stderr.startswith("longrun: error: ") and name in r.stderr
        assert "Traceback" not in r.stderr and r.stdout == ""
