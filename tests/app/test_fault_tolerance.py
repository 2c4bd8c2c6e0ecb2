"""No data loss: crashes, kills mid-save, full disks, read-only folders and broken files.

* Kill the app (SIGKILL, in a subprocess) in the middle of a session of edits: the next
  start offers the recovery file, and it restores the edits up to the last autosave
  (the file on disk is untouched).
* Kill a process while it saves a large chain, many times at random moments: the file
  on disk is always exactly the complete old or the complete new version.
* A full disk, a quota, an I/O error, a read-only or protected folder on save from the
  app: a dialog that says why, the document stays unsaved and unchanged, nothing on disk
  is deleted or changed, and saving works again once the cause is gone.  The same
  failures are also produced for real by the operating system in subprocesses (a file
  size limit, and an unprivileged user facing a read-only folder).
* Malformed files opened in the app: a dialog, and the open document is unchanged.

Atomic replacement (write a temporary file, fsync, rename over the target) is the
standard technique for crash-safe saves: POSIX ``rename(2)`` replaces the target
atomically (IEEE Std 1003.1, rename(); value from memory).  Everything else here is
common practice for desktop applications that hold a user's work.
"""
from __future__ import annotations

import errno
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import textwrap
import threading
import time
from pathlib import Path

import pytest

from core import io as cio
from core.errors import ChainFileError
from core.io import load_chain, save_chain
from core.model import Chain, State, Transition

REPO = Path(__file__).resolve().parents[2]
SAMPLES = REPO / "sample_models"


@pytest.fixture
def pump(tmp_path):
    folder = tmp_path / "work"
    folder.mkdir()
    p = folder / "pump.json"
    shutil.copy(SAMPLES / "pump_wear.json", p)
    return p


def child_env(**extra):
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen", PYTHONPATH=str(REPO), OPENBLAS_NUM_THREADS="1")
    env.update(extra)
    return env


def temp_files(folder: Path) -> list[Path]:
    return sorted(folder.glob(".*.tmp"))


# ---------------------------------------------------------------------------
# kill the app mid-edit: the recovery file restores the unsaved edits

#: A deterministic stream of edits through the document's undoable edit methods.  The
#: crashing session and the test both run it, so the test knows the chain after k edits.
EDITS = textwrap.dedent('''
    def random_edit(doc, rng):
        chain = doc.chain
        ids = list(chain.ids)
        r = rng.random()
        if r < 0.15 or len(ids) < 3:
            sid = doc.new_state_id("x")
            doc.add_state(round(rng.uniform(-300, 300), 2), round(rng.uniform(-300, 300), 2), sid=sid)
        elif r < 0.55:
            p = rng.choice(["0.1", "1/3", "rest", "2.5e-4", "5%", "0.999", None])
            doc.set_transition(rng.choice(ids), rng.choice(ids), p)
        elif r < 0.70:
            doc.move_states({rng.choice(ids): (rng.uniform(-400, 400), rng.uniform(-400, 400))})
        elif r < 0.80:
            doc.set_label(rng.choice(ids), rng.choice(["Spare", "", "Ünïcode ✓ label", "On hold"]))
        elif r < 0.90:
            old = rng.choice(ids)
            new = old + "_r"
            if new not in chain.index:
                doc.rename_state(old, new)
        elif len(ids) > 3:
            doc.delete(states=[rng.choice(ids)])
''')

CRASHING_SESSION = textwrap.dedent('''
    import os, random, sys
    os.environ["QT_QPA_PLATFORM"] = "offscreen"
    from app.main import create_application
    app = create_application()
    from PySide6.QtCore import QTimer
    from app.settings import Settings
    from app.window import MainWindow
    exec(sys.argv[3])
    w = MainWindow(Settings(), restore_layout=False)
    assert w.open_path(sys.argv[1], ask=False)
    w.show()
    edits = random.Random(int(sys.argv[2]))   # what is edited
    pauses = random.Random(int(sys.argv[2]) + 1)  # when: bursts of edits, then a pause
    done = [0]
    w.autosaver.saved.connect(lambda path: print("AUTOSAVED", done[0], flush=True))
    def tick():
        random_edit(w.document, edits)
        done[0] += 1
        print("EDIT", done[0], flush=True)
        QTimer.singleShot(5 if pauses.random() < 0.7 else 150, tick)
    QTimer.singleShot(0, tick)
    app.exec()
''')


def _replay(start: Chain, seed: int, k: int) -> list[Chain]:
    """The chains after 0, 1, ..., k edits of the stream, on a fresh document."""
    from app.document import Document

    ns: dict = {}
    exec(EDITS, ns)
    doc = Document(start)
    rng = random.Random(seed)
    out = [doc.chain]
    for _ in range(k):
        ns["random_edit"](doc, rng)
        out.append(doc.chain)
    return out


@pytest.mark.timeout(120)
@pytest.mark.parametrize("seed", [2027])
def test_kill_mid_edit_then_the_recovery_file_restores_the_unsaved_edits(window, dialogs, pump, seed):
    from app.layout import fill_missing_positions
    from app.settings import Settings

    s = Settings()
    s.set("recovery/settle_ms", 50)
    s.sync()
    original = pump.read_bytes()
    timing = random.Random(seed)
    want_saves = timing.randint(2, 5)
    proc = subprocess.Popen([sys.executable, "-c", CRASHING_SESSION, str(pump), str(seed), EDITS], cwd=str(REPO),
                            env=child_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    watchdog = threading.Timer(60, proc.kill)
    watchdog.start()
    lines: list[str] = []
    try:
        saves = 0
        for line in proc.stdout:
            lines.append(line.strip())
            if line.startswith("AUTOSAVED"):
                saves += 1
                if saves >= want_saves:
                    break
        assert saves >= want_saves, proc.stderr.read()
        time.sleep(timing.uniform(0.0, 0.2))  # keep editing for a moment, then die mid-session
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(30)
        lines += [ln.strip() for ln in proc.stdout.read().splitlines()]
    finally:
        watchdog.cancel()
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait(30)
        proc.stdout.close()
        proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL
    assert pump.read_bytes() == original  # the file on disk was never touched
    last_saved = max(int(ln.split()[1]) for ln in lines if ln.startswith("AUTOSAVED"))
    last_edit = max(int(ln.split()[1]) for ln in lines if ln.startswith("EDIT"))
    assert last_edit >= last_saved > 0

    dialogs.recovery_answers.append("recover")
    assert window.offer_recovery()
    doc = window.document
    assert doc.path == pump.resolve() and doc.is_dirty
    chains = _replay(fill_missing_positions(load_chain(pump)), seed, last_edit + 1)
    # the recovered work is the chain after some k edits, k at least the last autosave the
    # session reported (a later one may have been written just before the kill)
    matches = [k for k in range(last_saved, last_edit + 2) if chains[k] == doc.chain]
    assert matches, "the recovered chain is none of the chains the session autosaved"
    k = matches[-1]
    print(f"\nseed {seed}: killed after {last_edit} edits and {want_saves}+ autosaves; "
          f"recovered the chain after {k} edits ({last_edit - k} edits since the last autosave lost)")
    assert chains[k] != chains[0]  # the unsaved work really came back
    # saving the recovered work keeps it; undo goes back to the file on disk
    assert window.file_save()
    assert load_chain(pump) == doc.chain
    window.actions_by_name["undo"].trigger()
    assert doc.chain == fill_missing_positions(load_chain(SAMPLES / "pump_wear.json"))


# ---------------------------------------------------------------------------
# kill mid-save: the file on disk is always the complete old or the complete new version

#: One process imports the savers once and forks a saver per kill (a fork costs
#: milliseconds, a fresh interpreter a quarter of a second), so the test can kill dozens
#: of savers at random moments.  Mode "io" writes with core.io.atomic_write_text (the
#: app's save writes exactly dumps_chain(chain) through it); mode "doc" saves through
#: the app's Document.save, alternating an edit and its undo.
SAVER = textwrap.dedent('''
    import os, sys
    os.environ["QT_QPA_PLATFORM"] = "offscreen"
    from core.io import atomic_write_text, load_chain
    from app.document import Document
    target, a_path, b_path = sys.argv[1:4]
    texts = [open(a_path, encoding="utf-8").read(), open(b_path, encoding="utf-8").read()]
    chains = [load_chain(a_path), load_chain(b_path)]
    print("READY", flush=True)
    for line in sys.stdin:
        mode, k = line.split()
        k = int(k)
        pid = os.fork()
        if pid == 0:
            if mode == "io":
                while True:
                    atomic_write_text(target, texts[k % 2])
                    k += 1
            doc = Document(chains[k % 2], target)
            while True:
                doc.push(chains[(k + 1) % 2], "edit")
                doc.save()
                doc.undo_stack.undo()
                doc.save()
        print(pid, flush=True)
        os.waitpid(pid, 0)
        print("REAPED", flush=True)
''')


def big_chain(n: int, seed: int, name: str) -> Chain:
    rng = random.Random(seed)
    ids = [f"unit-{i:04d}" for i in range(n)]
    states = tuple(State(s, f"Unit {i} ({name})", float(i % 40) * 90.0, float(i // 40) * 90.0)
                   for i, s in enumerate(ids))
    trans = []
    for i, s in enumerate(ids):
        for j in sorted(rng.sample(range(n), 12)):
            if j != i:
                trans.append(Transition(s, ids[j], f"{rng.randint(1, 999)}/100000"))
        trans.append(Transition(s, s, "rest"))
    return Chain(states=states, transitions=tuple(trans), name=name, description="x" * 2000)


@pytest.mark.timeout(180)
def test_kill_mid_save_many_times_leaves_the_old_or_the_new_version(tmp_path):
    folder = tmp_path / "target"
    folder.mkdir()
    target = folder / "fleet.json"
    old, new = big_chain(700, 1, "before"), big_chain(700, 2, "after")
    versions = {}
    for name, chain in (("old", old), ("new", new)):
        p = tmp_path / f"{name}.json"
        save_chain(chain, p)
        versions[p.read_bytes()] = name
    a, b = tmp_path / "old.json", tmp_path / "new.json"
    assert len(versions) == 2 and len(a.read_bytes()) > 500_000
    shutil.copy(a, target)
    zygote = subprocess.Popen([sys.executable, "-c", SAVER, str(target), str(a), str(b)], cwd=str(REPO),
                              env=child_env(), stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True)
    watchdog = threading.Timer(150, zygote.kill)
    watchdog.start()
    rng = random.Random(8)
    plan = ["io"] * 36 + ["doc"] * 4
    seen = {"old": 0, "new": 0}
    mid_write = 0
    try:
        assert zygote.stdout.readline().strip() == "READY", zygote.stderr.read()
        for k, mode in enumerate(plan):
            zygote.stdin.write(f"{mode} {k}\n")
            zygote.stdin.flush()
            pid = int(zygote.stdout.readline())
            time.sleep(rng.uniform(0.002, 0.05 if mode == "io" else 0.3))
            os.kill(pid, signal.SIGKILL)
            assert zygote.stdout.readline().strip() == "REAPED"
            data = target.read_bytes()
            assert data in versions, (f"kill {k + 1} ({mode}): the file is neither version "
                                      f"({len(data)} bytes)")
            seen[versions[data]] += 1
            mid_write += bool(temp_files(folder))  # killed between creating its temporary file and the rename
            for t in temp_files(folder):  # a killed save may leave its temporary file; never the target
                t.unlink()
    finally:
        watchdog.cancel()
        zygote.stdin.close()
        zygote.wait(30)
        zygote.stdout.close()
        zygote.stderr.close()
    print(f"\n{len(plan)} kills mid-save ({plan.count('io')} in atomic_write_text, {plan.count('doc')} in "
          f"Document.save): the file was the old version {seen['old']} times and the new one {seen['new']} "
          f"times, never anything else; {mid_write} kills left a temporary file (killed mid-write)")
    assert seen["old"] + seen["new"] == len(plan)
    assert mid_write >= len(plan) // 4  # the kills really landed inside saves
    assert seen["old"] and seen["new"]  # and both versions were on disk at some kill


# ---------------------------------------------------------------------------
# a full disk or a read-only folder on save from the app


class _FailingFile:
    """A file that accepts part of the data, then fails like a full disk."""

    def __init__(self, fh, err):
        self._fh, self._err = fh, err

    def write(self, data):
        self._fh.write(data[: len(data) // 2])
        raise OSError(self._err, os.strerror(self._err))

    def __getattr__(self, name):
        return getattr(self._fh, name)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self._fh.close()
        return False


def _fail_write(err):
    real = os.fdopen

    def fdopen(fd, mode="r", *args, **kwargs):
        fh = real(fd, mode, *args, **kwargs)
        return _FailingFile(fh, err) if "w" in mode else fh

    return ("os", "fdopen", fdopen)


def _raise(err):
    def fail(*args, **kwargs):
        raise OSError(err, os.strerror(err))

    return fail


FAULTS = {
    # name: (what to replace, words the dialog must contain)
    "disk full while writing": (_fail_write(errno.ENOSPC), "the disk is full"),
    "disk full at fsync": (("os", "fsync", _raise(errno.ENOSPC)), "the disk is full"),
    "quota exceeded while writing": (_fail_write(errno.EDQUOT), os.strerror(errno.EDQUOT)),
    "I/O error at fsync": (("os", "fsync", _raise(errno.EIO)), os.strerror(errno.EIO)),
    "read-only file system": (("tempfile", "mkstemp", _raise(errno.EROFS)), "read-only or protected"),
    "folder without write permission": (("tempfile", "mkstemp", _raise(errno.EACCES)), "read-only or protected"),
    "file protected against replacement": (("os", "replace", _raise(errno.EPERM)), os.strerror(errno.EPERM)),
}


@pytest.mark.parametrize("fault", sorted(FAULTS))
def test_save_failure_from_the_app_says_why_keeps_the_work_and_deletes_nothing(window, dialogs, pump, qtbot, fault):
    (module, attr, replacement), words = FAULTS[fault]
    folder = pump.parent
    sibling = folder / "notes.txt"
    sibling.write_text("the user's other file", encoding="utf-8")
    assert window.open_path(pump, ask=False)
    doc = window.document
    doc.set_transition("new", "worn", "1/45")
    doc.add_state(300.0, 300.0, sid="scrapped")
    doc.set_transition("failed", "scrapped", "0.01")
    edited, steps = doc.chain, doc.undo_stack.count()
    assert window.autosaver.save_now()
    recovery = window.autosaver.file
    original = pump.read_bytes()
    target = {"os": os, "tempfile": cio.tempfile}[module]
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(target, attr, replacement)
        assert not window.file_save()
    title, summary, problems = dialogs.problems[-1]
    assert title == "Could not save"
    assert "“pump.json” was not saved" in summary and words in summary, summary
    assert "the file on disk was not changed" in summary and "still here" in summary
    assert problems
    # the work is still there, unsaved; nothing on disk changed or vanished
    assert doc.chain is edited and doc.undo_stack.count() == steps
    assert doc.is_dirty and window.isWindowModified()
    assert doc.path == pump.resolve()
    assert pump.read_bytes() == original
    assert sibling.read_text(encoding="utf-8") == "the user's other file"
    assert temp_files(folder) == []
    assert recovery.is_file()  # the crash copy stays until the work is really saved
    # Save As into the same broken place does not move the document to the new name
    dialogs.save_paths.append(str(folder / "elsewhere.json"))
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(target, attr, replacement)
        assert not window.file_save_as()
    assert doc.path == pump.resolve() and not (folder / "elsewhere.json").exists()
    # once the cause is gone, saving works and the document is clean
    assert window.file_save()
    assert load_chain(pump) == edited
    assert not doc.is_dirty and not recovery.exists()
    assert sorted(p.name for p in folder.iterdir()) == ["notes.txt", "pump.json"]


OS_LEVEL_SAVE = textwrap.dedent('''
    import os, resource, signal, sys
    from core.errors import ChainFileError
    from core.io import load_chain, save_chain
    how, target = sys.argv[1], sys.argv[2]
    chain = load_chain(target)
    big = chain.with_meta(description="y" * 300_000)
    if how == "file-size-limit":
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # the write then fails with EFBIG
        resource.setrlimit(resource.RLIMIT_FSIZE, (64 * 1024, 64 * 1024))
    else:  # an unprivileged user facing a read-only folder (root ignores permissions)
        os.setgid(65534)
        os.setuid(65534)
    try:
        save_chain(big, target)
    except ChainFileError as exc:
        print(exc)
        sys.exit(3)
    sys.exit(0)
''')


@pytest.mark.parametrize("how, words", [("file-size-limit", os.strerror(errno.EFBIG)),
                                        ("read-only-folder", "no permission to write there")])
def test_save_failures_raised_by_the_operating_system(how, words):
    # a folder every user can reach (pytest's own temporary folders are private to root),
    # holding a read-only folder with the user's file
    base = Path(tempfile.mkdtemp(prefix="longrun-readonly-", dir="/tmp"))
    try:
        base.chmod(0o755)
        folder = base / "shared"
        folder.mkdir()
        target = folder / "pump.json"
        shutil.copy(SAMPLES / "pump_wear.json", target)
        target.chmod(0o644)
        original = target.read_bytes()
        if how == "read-only-folder":
            folder.chmod(0o555)
        try:
            r = subprocess.run([sys.executable, "-c", OS_LEVEL_SAVE, how, str(target)], cwd=str(REPO),
                               env=child_env(), capture_output=True, text=True, timeout=60)
        finally:
            folder.chmod(0o755)
        assert r.returncode == 3, r.stdout + r.stderr
        assert "Traceback" not in r.stderr
        assert f"could not save: {words}" in r.stdout and "the file on disk was not changed" in r.stdout
        assert target.read_bytes() == original
        assert sorted(p.name for p in folder.iterdir()) == ["pump.json"]
    finally:
        shutil.rmtree(base)


# ---------------------------------------------------------------------------
# malformed files opened in the app: a dialog, and the open document is unchanged


def _malformed(folder: Path) -> list[Path]:
    good = (SAMPLES / "pump_wear.json").read_text(encoding="utf-8")
    rng = random.Random(5)
    files = []

    def add(name, data):
        p = folder / name
        p.write_bytes(data if isinstance(data, bytes) else data.encode("utf-8"))
        files.append(p)

    for k, cut in enumerate(sorted(rng.sample(range(1, len(good) - 3), 6))):
        add(f"truncated{k}.json", good[:cut])
    for k in range(4):
        add(f"noise{k}.json", bytes(rng.randrange(256) for _ in range(rng.randint(1, 300))))
    add("latin1.json", good.replace("Pump", "Pümp").encode("latin-1"))
    add("deep.json", "[" * 100_000)
    add("empty.json", "")
    add("array.json", "[1, 2, 3]")
    doc = json.loads(good)
    doc["states"] = {"new": "As new"}
    add("wrong_type.json", json.dumps(doc))
    doc = json.loads(good)
    doc["version"] = 99
    add("future.json", json.dumps(doc))
    doc = json.loads(good)
    doc["transitions"][0]["p"] = [0.5]
    add("bad_p.json", json.dumps(doc))
    add("nan.json", good.replace('"x": -200.0', '"x": NaN'))
    add("export.json", json.dumps({"format": "longrun-validated-matrix", "version": 1}))
    add("broken.csv", "from,a,b\na,1\nb,0,1,1\n")
    add("dup.csv", "from,a,a\na,1,0\n")
    add("quote.csv", 'from,a\n"a,1\n')
    add("huge.json", good + " " * 3000)
    return files


def test_malformed_files_give_a_dialog_and_leave_the_open_document_unchanged(window, dialogs, pump, monkeypatch):
    assert window.open_path(pump, ask=False)
    doc = window.document
    doc.set_transition("new", "worn", "0.02")  # unsaved work that must survive every failed open
    doc.set_selection(["worn"], ())
    before = (doc.chain, doc.path, doc.is_dirty, doc.undo_stack.count(), doc.undo_stack.index(),
              doc.selected_states, window.windowTitle())
    folder = pump.parent / "incoming"
    folder.mkdir()
    files = _malformed(folder)
    monkeypatch.setattr(cio, "MAX_FILE_BYTES", len(pump.read_bytes()) + 1000)  # huge.json is over it
    for f in files:  # precondition: the core reader refuses each of them
        with pytest.raises(ChainFileError):
            window.load_file(f)
    files += [folder / "missing.json", folder]  # a file that is not there, and a folder
    for k, f in enumerate(files):
        assert not window.open_path(f), f.name
        assert len(dialogs.problems) == k + 1, f.name
        title, summary, problems = dialogs.problems[-1]
        assert title == "Cannot open the file" and "could not be opened" in summary, (f.name, summary)
        assert "The current chain was left as it was." in summary and problems
        assert all(isinstance(p, str) and p for p in problems)
        now = (doc.chain, doc.path, doc.is_dirty, doc.undo_stack.count(), doc.undo_stack.index(),
               doc.selected_states, window.windowTitle())
        assert now == before, f.name
    assert dialogs.save_questions == []  # nothing was read, so the user was never asked to drop work
    assert pump.read_bytes() == (SAMPLES / "pump_wear.json").read_bytes()
