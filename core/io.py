"""Reading and writing chain files, CSV matrices and validated-matrix exports.

Chain files are JSON in Longrun's own format (see ``core/chain.schema.json``).
Reading is bounded: files larger than :data:`MAX_FILE_BYTES` or nested deeper
than :data:`MAX_NESTING` are refused before parsing, so a hostile or broken
file cannot exhaust memory or the interpreter's stack.  Every failure raises
:class:`~core.errors.ChainFileError` with the file and the place inside it.
Writes are atomic: a temporary file in the same folder, flushed and fsynced,
then ``os.replace``.
"""
from __future__ import annotations

import csv
import hashlib
import io
import json
import math
import os
import re
import tempfile
import time
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Any

from .errors import ChainFileError, ValidationError
from .limits import env_whole
from .model import ROW_SUM_TOLERANCE, Chain, State, Step, Transition

__all__ = [
    "FORMAT",
    "VERSION",
    "VALIDATED_FORMAT",
    "MAX_FILE_BYTES",
    "MAX_NESTING",
    "schema",
    "load_chain",
    "loads_chain",
    "chain_to_dict",
    "dumps_chain",
    "pretty_json",
    "save_chain",
    "atomic_write_text",
    "atomic_write_bytes",
    "read_matrix_csv",
    "reads_matrix_csv",
    "matrix_csv_text",
    "validated_matrix",
    "verify_validated_matrix",
    "canonical_bytes",
]

FORMAT = "longrun-chain"
VERSION = 1
VALIDATED_FORMAT = "longrun-validated-matrix"


#: Largest chain or CSV file read, in bytes, unless ``LONGRUN_MAX_FILE_MB`` sets another (in MiB).
MAX_FILE_BYTES = 64 * 1024 * 1024


def max_file_bytes() -> int:
    """The file size limit now: ``LONGRUN_MAX_FILE_MB`` MiB, or :data:`MAX_FILE_BYTES`."""
    mb = env_whole("LONGRUN_MAX_FILE_MB", 0, unit="MiB")
    return mb * 1024 * 1024 if mb else MAX_FILE_BYTES


def state_limit() -> int:
    """The dense-analysis state limit now: ``LONGRUN_MAX_STATES``, or the default of :class:`Chain`."""
    return env_whole("LONGRUN_MAX_STATES", Chain.state_limit, unit="states")
#: Deepest JSON nesting accepted (objects and arrays).
MAX_NESTING = 64

_TOP_ORDER = ("format", "version", "name", "description", "step", "states", "transitions")
_STATE_KEYS = ("id", "label", "x", "y")
_TRANSITION_KEYS = ("from", "to", "p")


@lru_cache(maxsize=1)
def schema() -> dict:
    """The JSON Schema (Draft 2020-12) of the chain file format."""
    text = resources.files("core").joinpath("chain.schema.json").read_text(encoding="utf-8")
    return json.loads(text)


@lru_cache(maxsize=1)
def _validator():
    import jsonschema

    cls = jsonschema.Draft202012Validator
    cls.check_schema(schema())
    return cls(schema())


# --------------------------------------------------------------------------
# reading
# --------------------------------------------------------------------------
def _read_bytes(path: str | os.PathLike) -> bytes:
    p = Path(path)
    try:
        size = p.stat().st_size
    except FileNotFoundError:
        raise ChainFileError("no such file", path=str(path)) from None
    except OSError as exc:
        raise ChainFileError(f"cannot read the file ({exc.strerror})", path=str(path)) from None
    if p.is_dir():
        raise ChainFileError("this is a folder, not a file", path=str(path))
    limit = max_file_bytes()
    if size > limit:
        raise ChainFileError(
            f"the file is {size / 2**20:.1f} MiB, larger than the limit of "
            f"{limit / 2**20:.0f} MiB (raise it with the LONGRUN_MAX_FILE_MB "
            "environment variable)",
            path=str(path),
        )
    try:
        with open(p, "rb") as fh:
            data = fh.read(limit + 1)
    except OSError as exc:
        raise ChainFileError(f"cannot read the file ({exc.strerror})", path=str(path)) from None
    if len(data) > limit:
        raise ChainFileError("the file grew past the size limit while being read", path=str(path))
    return data


def _decode(data: bytes, source: str | None) -> str:
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise ChainFileError(
            f"the file is not UTF-8 text (byte {exc.start} cannot be decoded); "
            "save it as UTF-8",
            path=source,
            where=f"line {line}",
        ) from None


def _check_nesting(text: str, source: str | None) -> None:
    """Refuse JSON nested deeper than MAX_NESTING without parsing it."""
    depth = 0
    in_str = False
    esc = False
    line = 1
    for ch in text:
        if in_str:
            if esc:
                esc = False
            elif ch == "\\":
                esc = True
            elif ch == '"':
                in_str = False
            elif ch == "\n":
                line += 1
            continue
        if ch == '"':
            in_str = True
        elif ch in "[{":
            depth += 1
            if depth > MAX_NESTING:
                raise ChainFileError(
                    f"the JSON is nested more than {MAX_NESTING} levels deep; "
                    "a chain file needs 4",
                    path=source,
                    where=f"line {line}",
                )
        elif ch in "]}":
            depth -= 1
        elif ch == "\n":
            line += 1


def _json_path(parts) -> str:
    out = ""
    for p in parts:
        out += f"[{p}]" if isinstance(p, int) else (f".{p}" if out else str(p))
    return out or "the top level"


def _schema_message(err) -> str:
    where = _json_path(list(err.absolute_path))
    v = err.validator
    inst = err.instance
    if v == "required":
        missing = err.message.split("'")[1] if "'" in err.message else err.message
        return f"{where}: the required key '{missing}' is missing"
    if v == "type":
        want = err.validator_value
        want = " or ".join(want) if isinstance(want, list) else want
        return f"{where}: expected {_TYPE_WORDS.get(want, want)}, found {json.dumps(inst)[:60]}"
    if v == "oneOf" and where.endswith(".p"):
        return f"{where}: a probability must be a number or text, found {json.dumps(inst)[:60]}"
    if v == "minLength":
        return f"{where}: must not be empty"
    if v in ("exclusiveMinimum", "minimum"):
        return f"{where}: must be greater than {err.validator_value}, found {inst!r}"
    return f"{where}: {err.message}"


_TYPE_WORDS = {
    "string": "text",
    "number": "a number",
    "integer": "a whole number",
    "object": "an object {...}",
    "array": "a list [...]",
}


def loads_chain(text: str | bytes, *, source: str | None = None) -> Chain:
    """Parse a chain file's content.

    Parameters
    ----------
    text : str or bytes
        The JSON document.
    source : str, optional
        Name of the file, used in messages.

    Returns
    -------
    Chain
        The chain as written; it may still have validation problems
        (see :attr:`Chain.problems`): loading never loses a user's model.

    Raises
    ------
    ChainFileError
        When the content is not JSON, not a Longrun chain file, from a newer
        version, or does not fit the schema.  The message names the place.
    """
    if isinstance(text, bytes):
        if len(text) > max_file_bytes():
            raise ChainFileError("the content is larger than the size limit", path=source)
        text = _decode(text, source)
    if text.startswith("\ufeff"):
        text = text[1:]
    if not text.strip():
        raise ChainFileError("the file is empty", path=source)
    _check_nesting(text, source)
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as exc:
        raise ChainFileError(
            f"not valid JSON ({exc.msg})", path=source, where=f"line {exc.lineno}, column {exc.colno}"
        ) from None
    except (RecursionError, ValueError) as exc:
        raise ChainFileError(f"not valid JSON ({exc})", path=source) from None
    return chain_from_dict(doc, source=source)


def chain_from_dict(doc: Any, *, source: str | None = None) -> Chain:
    """Build a :class:`Chain` from a parsed chain document (see :func:`loads_chain`)."""
    if not isinstance(doc, dict):
        raise ChainFileError(
            f"expected a JSON object at the top level, found {type(doc).__name__}", path=source
        )
    fmt = doc.get("format")
    if fmt != FORMAT:
        if fmt == VALIDATED_FORMAT:
            msg = (
                "this is a validated-matrix export, not an editable chain file; "
                "import its matrix as CSV, or open the chain file it was made from"
            )
        elif fmt is None:
            msg = f"not a Longrun chain file (there is no \"format\": \"{FORMAT}\" key)"
        else:
            msg = f"not a Longrun chain file (its format is {json.dumps(fmt)[:80]}, expected \"{FORMAT}\")"
        raise ChainFileError(msg, path=source)
    ver = doc.get("version")
    if isinstance(ver, int) and not isinstance(ver, bool) and ver > VERSION:
        raise ChainFileError(
            f"the file is format version {ver}, written by a newer Longrun; this one reads "
            f"version {VERSION} (update Longrun to open it)",
            path=source,
        )
    errors = sorted(_validator().iter_errors(doc), key=lambda e: list(map(str, e.absolute_path)))
    if errors:
        msgs = [_schema_message(e) for e in errors[:50]]
        more = f" (and {len(errors) - 50} more)" if len(errors) > 50 else ""
        raise ChainFileError(
            "the file does not fit the chain format:\n  - " + "\n  - ".join(msgs) + more,
            path=source,
        )
    states = tuple(
        State(
            id=s["id"],
            label=s.get("label"),
            x=float(s["x"]) if "x" in s else None,
            y=float(s["y"]) if "y" in s else None,
            extra={k: v for k, v in s.items() if k not in _STATE_KEYS},
        )
        for s in doc["states"]
    )
    for s in states:
        for c in (s.x, s.y):
            if c is not None and not math.isfinite(c):
                raise ChainFileError(f"state {s.id!r} has a position that is not a finite number", path=source)
    transitions = tuple(
        Transition(
            t["from"], t["to"], t["p"], extra={k: v for k, v in t.items() if k not in _TRANSITION_KEYS}
        )
        for t in doc["transitions"]
    )
    step = None
    if "step" in doc:
        step = Step(float(doc["step"]["value"]), doc["step"]["unit"])
    extra = {k: v for k, v in doc.items() if k not in _TOP_ORDER}
    return Chain(
        states=states,
        transitions=transitions,
        name=doc.get("name", ""),
        description=doc.get("description", ""),
        step=step,
        extra=extra,
        state_limit=state_limit(),
    )


def load_chain(path: str | os.PathLike) -> Chain:
    """Read a chain file (see :func:`loads_chain`)."""
    return loads_chain(_read_bytes(path), source=str(path))


# --------------------------------------------------------------------------
# writing
# --------------------------------------------------------------------------
def _num(v: float) -> int | float:
    return int(v) if float(v).is_integer() and abs(v) < 2**53 else float(v)


def chain_to_dict(chain: Chain) -> dict:
    """The chain as a JSON-ready dict in the file format (keys in a fixed order)."""
    doc: dict[str, Any] = {"format": FORMAT, "version": VERSION}
    if chain.name:
        doc["name"] = chain.name
    if chain.description:
        doc["description"] = chain.description
    if chain.step is not None:
        doc["step"] = {"value": _num(chain.step.value), "unit": chain.step.unit}
    states = []
    for s in chain.states:
        d: dict[str, Any] = {"id": s.id}
        if s.label is not None:
            d["label"] = s.label
        if s.x is not None:
            d["x"] = s.x
        if s.y is not None:
            d["y"] = s.y
        d.update(s.extra)
        states.append(d)
    doc["states"] = states
    doc["transitions"] = [{"from": t.source, "to": t.target, "p": t.p, **t.extra} for t in chain.transitions]
    for k, v in chain.extra.items():
        doc[k] = v
    return doc


def pretty_json(obj: Any, *, indent: int = 2, width: int = 110) -> str:
    """JSON text for people: two-space indent, but any object or list that
    holds no nested containers and fits in ``width`` characters stays on one
    line (a state, a transition, a matrix row).  Strict JSON, floats in full
    precision, non-ASCII kept, trailing newline.
    """

    def flat(v: Any) -> bool:
        if isinstance(v, dict):
            return all(not isinstance(x, (dict, list)) for x in v.values())
        if isinstance(v, list):
            return all(not isinstance(x, (dict, list)) for x in v)
        return True

    def one_line(v: Any) -> str:
        return json.dumps(v, ensure_ascii=False, allow_nan=False, separators=(", ", ": "))

    def render(v: Any, level: int) -> str:
        pad = " " * (indent * level)
        if not isinstance(v, (dict, list)) or not v:
            return one_line(v)
        text = one_line(v)
        if flat(v) and len(text) + len(pad) <= width:
            return text
        inner = " " * (indent * (level + 1))
        if isinstance(v, dict):
            items = [f"{inner}{json.dumps(str(k), ensure_ascii=False)}: {render(x, level + 1)}" for k, x in v.items()]
            return "{\n" + ",\n".join(items) + "\n" + pad + "}"
        items = [f"{inner}{render(x, level + 1)}" for x in v]
        return "[\n" + ",\n".join(items) + "\n" + pad + "]"

    return render(obj, 0) + "\n"


def dumps_chain(chain: Chain) -> str:
    """The chain file text (JSON, UTF-8, two-space indent, trailing newline)."""
    return pretty_json(chain_to_dict(chain))


def atomic_write_text(path: str | os.PathLike, text: str) -> None:
    """Write ``text`` (UTF-8) to ``path`` atomically; see :func:`atomic_write_bytes`."""
    atomic_write_bytes(path, text.encode("utf-8"))


#: A temporary file of an interrupted save older than this (seconds) is removed by the next save.
STALE_TEMPORARY_AGE = 600.0


def _remove_stale_temporaries(folder: Path, name: str) -> None:
    """Remove what killed saves of ``name`` left behind: ``.NAME.XXXXXXXX.tmp`` older than 10 minutes.

    Only names of exactly the pattern :func:`atomic_write_bytes` creates are
    touched, and only old ones (a save in progress elsewhere is seconds old).
    """
    pattern = re.compile(r"\." + re.escape(name) + r"\.[A-Za-z0-9_]{8}\.tmp")
    now = time.time()
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return
    for e in entries:
        if not pattern.fullmatch(e.name):
            continue
        try:
            if e.is_file(follow_symlinks=False) and now - e.stat(follow_symlinks=False).st_mtime > STALE_TEMPORARY_AGE:
                os.unlink(e.path)
        except OSError:
            pass


def atomic_write_bytes(path: str | os.PathLike, data: bytes, *, what: str = "save") -> None:
    """Write ``data`` to ``path`` atomically (temp file, fsync, ``os.replace``).

    The previous content stays intact if anything fails, and the error is
    raised as :class:`ChainFileError` naming the cause (full disk, no
    permission, missing folder); ``what`` names the action in the message
    (``"could not save"``, ``"could not write the report"``).
    """
    p = Path(path)
    folder = p.parent if str(p.parent) else Path(".")
    tmp = None
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{p.name}.", suffix=".tmp", dir=folder)
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        if p.exists():
            try:
                os.chmod(tmp, p.stat().st_mode & 0o777)
            except OSError:
                pass
        else:
            os.chmod(tmp, 0o666 & ~_umask())
        os.replace(tmp, p)
        tmp = None
        _remove_stale_temporaries(folder, p.name)
        try:
            dfd = os.open(folder, os.O_RDONLY)
            try:
                os.fsync(dfd)
            finally:
                os.close(dfd)
        except OSError:
            pass
    except OSError as exc:
        reason = exc.strerror or str(exc)
        if exc.errno == 28:
            reason = "the disk is full"
        elif exc.errno in (13, 30):
            reason = "no permission to write there (the folder is read-only or protected)"
        elif exc.errno == 2:
            reason = "the folder does not exist"
        raise ChainFileError(f"could not {what}: {reason}; the file on disk was not changed", path=str(path)) from None
    finally:
        if tmp is not None:
            try:
                os.unlink(tmp)
            except OSError:
                pass


def _umask() -> int:
    m = os.umask(0)
    os.umask(m)
    return m


def save_chain(chain: Chain, path: str | os.PathLike) -> None:
    """Save ``chain`` to ``path`` atomically, invalid or not (nothing the user made is lost)."""
    atomic_write_text(path, dumps_chain(chain))


# --------------------------------------------------------------------------
# CSV matrices
# --------------------------------------------------------------------------
def reads_matrix_csv(text: str, *, source: str | None = None, name: str = "") -> Chain:
    """Read a square matrix from CSV text.

    The first row holds the column state ids (its first cell is ignored), the
    first column the row state ids; the two lists must match as sets (columns
    may be in another order).  Cells hold probabilities as text (any form
    :func:`~core.model.parse_probability` accepts); empty cells are 0.  The
    delimiter is detected among comma, semicolon and tab.

    Raises
    ------
    ChainFileError
        With the line number of the problem.
    """
    if text.startswith("\ufeff"):
        text = text[1:]
    if not text.strip():
        raise ChainFileError("the CSV file is empty", path=source)
    sample = text[:4096]
    first = sample.splitlines()[0] if sample.splitlines() else ""
    counts = {d: first.count(d) for d in ",;\t"}
    delim = max(counts, key=counts.get) if max(counts.values()) > 0 else ","
    try:
        rows = list(csv.reader(io.StringIO(text), delimiter=delim))
    except csv.Error as exc:
        raise ChainFileError(f"cannot read the CSV ({exc})", path=source) from None
    rows = [(k + 1, r) for k, r in enumerate(rows) if any(c.strip() for c in r)]
    if len(rows) < 2:
        raise ChainFileError(
            "a matrix CSV needs a header row of state ids and one row per state", path=source
        )
    _, header = rows[0]
    cols = [c.strip() for c in header[1:]]
    while cols and not cols[-1]:
        cols.pop()
    if not cols:
        raise ChainFileError("the header row has no state ids after its first cell", path=source, where="line 1")
    for k, c in enumerate(cols):
        if not c:
            raise ChainFileError(f"column {k + 2} of the header has no state id", path=source, where="line 1")
    if len(set(cols)) != len(cols):
        dup = next(c for c in cols if cols.count(c) > 1)
        raise ChainFileError(f"state {dup!r} appears twice in the header", path=source, where="line 1")
    row_ids: list[str] = []
    trans: list[Transition] = []
    for line, r in rows[1:]:
        rid = r[0].strip() if r else ""
        if not rid:
            raise ChainFileError("the row has no state id in its first cell", path=source, where=f"line {line}")
        if rid in row_ids:
            raise ChainFileError(f"state {rid!r} has two rows", path=source, where=f"line {line}")
        if rid not in cols:
            raise ChainFileError(
                f"row state {rid!r} is not in the header's state ids", path=source, where=f"line {line}"
            )
        cells = r[1:]
        extra_cells = [c for c in cells[len(cols):] if c.strip()]
        if extra_cells:
            raise ChainFileError(
                f"the row has {len(cells)} values but the header has {len(cols)} states",
                path=source,
                where=f"line {line}",
            )
        row_ids.append(rid)
        for c, cell in zip(cols, cells):
            cell = cell.strip()
            if cell and cell not in ("0", "0.0"):
                trans.append(Transition(rid, c, cell))
    missing = [c for c in cols if c not in row_ids]
    if missing:
        raise ChainFileError(
            f"states {', '.join(map(repr, missing))} have a column but no row", path=source
        )
    states = tuple(State(c) for c in row_ids)
    return Chain(states=states, transitions=tuple(trans), name=name,
                 state_limit=state_limit())


def read_matrix_csv(path: str | os.PathLike) -> Chain:
    """Read a matrix CSV file (see :func:`reads_matrix_csv`)."""
    text = _decode(_read_bytes(path), str(path))
    return reads_matrix_csv(text, source=str(path), name=Path(path).stem)


def matrix_csv_text(chain: Chain, *, as_typed: bool = False) -> str:
    """The chain's matrix as CSV (header row and first column: state ids).

    With ``as_typed`` the cells hold what the user typed (``1/3``, ``rest``);
    otherwise the validated floats in full precision (the chain must be valid).
    """
    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    ids = list(chain.ids)
    w.writerow(["from\\to", *ids])
    if as_typed:
        cell = {(t.source, t.target): str(t.p) for t in chain.transitions}
        for a in ids:
            w.writerow([a, *[cell.get((a, b), "0") for b in ids]])
    else:
        P = chain.matrix()
        for i, a in enumerate(ids):
            w.writerow([a, *[repr(float(v)) if v else "0" for v in P[i]]])
    return out.getvalue()


# --------------------------------------------------------------------------
# validated-matrix export
# --------------------------------------------------------------------------
VALIDATION_CHECKS = (
    "file fits the JSON Schema of the chain format",
    "state ids are unique and non-empty",
    "every transition names existing states",
    "no transition is given twice",
    "every probability is a finite number in [0, 1]",
    "at most one 'rest' per state and none negative",
    "every state has outgoing probability",
    "every row sums to 1 within the tolerance (exact rational arithmetic)",
    "number of states within the dense-analysis limit",
)


def canonical_bytes(doc: dict) -> bytes:
    """Canonical UTF-8 JSON of ``doc`` without its ``sha256`` key.

    Keys sorted, no whitespace (separators ``,`` and ``:``), floats in shortest
    round-trip form, non-ASCII characters kept.  This is what the SHA-256 of a
    validated-matrix export covers.
    """
    body = {k: v for k, v in doc.items() if k != "sha256"}
    return json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode(
        "utf-8"
    )


def validated_matrix(chain: Chain) -> dict:
    """The validated-matrix export of a chain.

    Returns
    -------
    dict
        ``format``, ``version``, ``name``, ``states`` (ids in matrix order),
        ``labels``, ``step`` (or null), ``matrix`` (dense floats),
        ``row_sums`` (float sums of each row), ``tolerance``, ``checks`` (the
        checks passed) and ``sha256`` (hex digest of :func:`canonical_bytes`).

    Raises
    ------
    ValidationError
        If the chain is not valid: only a valid matrix is exported.
    """
    P = chain.matrix()
    doc = {
        "format": VALIDATED_FORMAT,
        "version": 1,
        "name": chain.name,
        "states": list(chain.ids),
        "labels": [s.display_name for s in chain.states],
        "step": None if chain.step is None else {"value": _num(chain.step.value), "unit": chain.step.unit},
        "matrix": [[float(v) for v in row] for row in P],
        "row_sums": [math.fsum(row) for row in P.tolist()],
        "tolerance": ROW_SUM_TOLERANCE,
        "checks": list(VALIDATION_CHECKS),
    }
    doc["sha256"] = hashlib.sha256(canonical_bytes(doc)).hexdigest()
    return doc


def verify_validated_matrix(doc: dict) -> bool:
    """True when ``doc['sha256']`` matches the canonical content of ``doc``."""
    if not isinstance(doc, dict) or doc.get("format") != VALIDATED_FORMAT or "sha256" not in doc:
        return False
    return hashlib.sha256(canonical_bytes(doc)).hexdigest() == doc["sha256"]


def check_validated_matrix(doc: Any) -> list[str]:
    """Everything wrong with a received validated-matrix export (empty if sound).

    Recomputes the SHA-256 over the canonical content, and re-checks the matrix
    itself: square, as many rows as states, finite entries in [0, 1], each row
    summing to 1 within the stated tolerance.
    """
    if not isinstance(doc, dict) or doc.get("format") != VALIDATED_FORMAT:
        return ["not a validated-matrix export"]
    out: list[str] = []
    if "sha256" not in doc:
        out.append("there is no sha256 key")
    elif not verify_validated_matrix(doc):
        out.append("the SHA-256 does not match the content: the file was changed after export")
    states, M = doc.get("states"), doc.get("matrix")
    tol = doc.get("tolerance", ROW_SUM_TOLERANCE)
    if not isinstance(states, list) or not isinstance(M, list) or len(M) != len(states):
        out.append("'matrix' must have one row per entry of 'states'")
        return out
    if not isinstance(tol, (int, float)) or not 0 <= tol < 1:
        out.append(f"the tolerance {tol!r} is not a number in [0, 1)")
        tol = ROW_SUM_TOLERANCE
    for i, row in enumerate(M):
        name = states[i]
        if not isinstance(row, list) or len(row) != len(states):
            out.append(f"row of state {name!r} does not have {len(states)} entries")
            continue
        if not all(isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) for v in row):
            out.append(f"row of state {name!r} holds a value that is not a finite number")
            continue
        if any(v < 0 or v > 1 for v in row):
            out.append(f"row of state {name!r} holds a value outside [0, 1]")
        total = math.fsum(row)
        if abs(total - 1) > tol:
            out.append(f"row of state {name!r} sums to {total!r} (must be 1 within {tol})")
    return out


def write_validated_matrix(chain: Chain, path: str | os.PathLike) -> dict:
    """Write :func:`validated_matrix` as JSON to ``path`` (atomic); return the document."""
    doc = validated_matrix(chain)
    atomic_write_text(path, pretty_json(doc))
    return doc


def ensure_valid(chain: Chain, source: str | None = None) -> Chain:
    """Raise :class:`ValidationError` (with ``source``) unless ``chain`` is valid."""
    if chain.problems:
        raise ValidationError(chain.problems, source=source)
    return chain
