"""A long editing session: 1,000 random edits with undo and redo, and a simulation every 50.

The session drives the open window's document (canvas, matrix grid and checks all
listening) through its undoable edit methods, with undo and redo interleaved, drags
that merge into one undo step, deletions (macros) and pastes.  Beside it, a model of
the undo history built only from core ``Chain`` edit methods predicts the chain after
every step, so a divergence is caught at the step where it happens.  Every 50 edits
the simulation panel is restarted on the current chain: a valid chain must give the
core engine's counts for the same seed (the app and the engine agree), an invalid one a
refusal naming its problems.  At the end, undoing everything gives the opened chain
back, redoing everything gives the final chain, and that equals an independent replay
of the surviving edits on the core ``Chain``.  Memory is measured (Python's allocated
blocks, the C heap through glibc's ``mallinfo2``, the resident set size): its growth is
bounded during the session, and clearing the undo history gives it back.

The expected behaviour of an undo stack is that of Qt's ``QUndoStack`` (Qt 6
documentation, "QUndoStack Class": a push after undo drops the redo tail; commands
with equal ids merge unless the top command is at the clean index; a merged command
that became obsolete is removed; value from memory).  The rest is common practice.
"""
from __future__ import annotations

import ctypes
import ctypes.util
import functools
import gc
import random
import shutil
import sys
import threading
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from core.model import State

REPO = Path(__file__).resolve().parents[2]
SAMPLES = REPO / "sample_models"
EDITS = 1000
SIMULATE_EVERY = 50
MiB = 1024 * 1024


def rss_bytes() -> int:
    """Resident set size of this process (Linux ``/proc``; else the peak from ``getrusage``)."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) * 1024
    except OSError:  # pragma: no cover - not Linux
        pass
    import resource  # pragma: no cover

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # pragma: no cover


class _MallInfo2(ctypes.Structure):
    _fields_ = [(f, ctypes.c_size_t) for f in ("arena", "ordblks", "smblks", "hblks", "hblkhd", "usmblks",
                                                 "fsmblks", "uordblks", "fordblks", "keepcost")]


@functools.lru_cache(maxsize=1)
def _mallinfo2():
    try:
        fn = ctypes.CDLL(ctypes.util.find_library("c")).mallinfo2
    except (OSError, AttributeError, TypeError):  # pragma: no cover - not glibc >= 2.33
        return None
    fn.restype = _MallInfo2
    return fn


def c_heap_bytes() -> int | None:
    """Bytes in use in the C heap (glibc ``mallinfo2``: Qt's and numpy's allocations), or None."""
    fn = _mallinfo2()
    if fn is None:  # pragma: no cover
        return None
    m = fn()
    return int(m.uordblks + m.hblkhd)


def memory_now() -> dict:
    """Cheap measures of memory in use (tracing every allocation would slow the session 2.6x)."""
    gc.collect()
    return {"python_blocks": sys.getallocatedblocks(), "c_heap": c_heap_bytes(), "rss": rss_bytes()}


# ---------------------------------------------------------------------------
# edits as data: applied to the document by its methods, to the model by core methods

#: Off-diagonal entries are small and every state keeps 'rest' on its self-loop, so most
#: chains of the session are valid (and get simulated); sums above 1, a missing self-loop
#: or a second 'rest' still happen now and then, and those chains must be refused.
PROBABILITIES = ["0.05", "1/8", "2.5e-4", "5%", "1e-15", "0.02", "0.3", None]


def random_edit(rng: random.Random, chain, serial: int, pending: dict) -> tuple:
    """One edit of ``chain`` as a tuple (ids chosen among its states).

    ``pending`` carries what a gesture still has to do: the moves left in a drag, the
    self-loop of a state just added.
    """
    ids = list(chain.ids)
    queued = pending.get("queued")
    if queued and queued[1] in chain.index:
        pending["queued"] = None
        return queued
    if pending.get("left", 0) > 0 and pending["sid"] in chain.index:  # a drag goes on
        pending["left"] -= 1
        return ("move", pending["sid"], rng.uniform(-500, 500), rng.uniform(-500, 500), pending["key"])
    pending["left"] = 0
    r = rng.random()
    if r < 0.10 or len(ids) < 3:
        sid = f"n{serial}"
        pending["queued"] = ("p", sid, sid, "rest")  # a new state gets its self-loop next
        return ("add", sid, rng.uniform(-500, 500), rng.uniform(-500, 500))
    if r < 0.12:
        return ("p", rng.choice(ids), rng.choice(ids), rng.choice(["rest", "0.5"]))  # now and then: invalid
    bad = sorted({p.state for p in chain.problems if p.state in chain.index})
    if r < 0.22 and bad:  # the user mends a row: small entries, 'rest' on the self-loop (one paste)
        sid = rng.choice(bad)
        row = [(t.source, t.target, "0.01") for t in chain.outgoing(sid) if t.target != sid]
        return ("paste", tuple(row) + ((sid, sid, "rest"),))
    if r < 0.42:
        a, b = rng.choice(ids), rng.choice(ids)
        return ("p", a, b, "rest" if a == b else rng.choice(PROBABILITIES))
    if r < 0.52:
        pending.update(sid=rng.choice(ids), key=("drag", serial), left=rng.randint(1, 4))
        return ("move", pending["sid"], rng.uniform(-500, 500), rng.uniform(-500, 500), pending["key"])
    if r < 0.59:
        return ("move", rng.choice(ids), rng.uniform(-500, 500), rng.uniform(-500, 500), None)
    if r < 0.66:
        return ("label", rng.choice(ids), rng.choice(["Spare", "", "  Standby  ", "Ünïcode ✓", None]))
    if r < 0.73:
        old = rng.choice(ids)
        return ("rename", old, f"r{serial}")
    if r < 0.80 and len(ids) > 4:
        return ("delete", rng.choice(ids))
    off = [t for t in chain.transitions if t.source != t.target]
    if r < 0.86 and off:
        t = rng.choice(off)
        return ("unlink", t.source, t.target)
    if r < 0.95:
        keys = {(rng.choice(ids), rng.choice(ids)) for _ in range(rng.randint(1, 5))}
        return ("paste", tuple((a, b, "rest" if a == b else rng.choice(PROBABILITIES)) for a, b in sorted(keys)))
    return ("meta", f"Session model {serial}")


def apply_to_document(doc, op) -> None:
    kind = op[0]
    if kind == "add":
        doc.add_state(op[2], op[3], sid=op[1])
    elif kind == "p":
        doc.set_transition(op[1], op[2], op[3])
    elif kind == "move":
        doc.move_states({op[1]: (op[2], op[3])}, merge=op[4])
    elif kind == "label":
        doc.set_label(op[1], op[2])
    elif kind == "rename":
        doc.rename_state(op[1], op[2])
    elif kind == "delete":
        doc.delete(states=[op[1]])
    elif kind == "unlink":
        doc.delete(transitions=[(op[1], op[2])])
    elif kind == "paste":
        doc.set_transitions(op[1], "Paste")
    elif kind == "meta":
        doc.set_meta(name=op[1])
    else:  # pragma: no cover
        raise AssertionError(op)


def apply_to_chain(chain, op):
    """The same edit with core.model.Chain's own edit methods (no app code)."""
    kind = op[0]
    if kind == "add":
        return chain.with_state(State(op[1], None, float(op[2]), float(op[3])))
    if kind == "p":
        return chain.with_transition(op[1], op[2], op[3])
    if kind == "move":
        return chain.with_positions({op[1]: (round(op[2], 2), round(op[3], 2))})
    if kind == "label":
        label = (op[2] or "").strip() or None
        return chain.with_state(replace(chain.state(op[1]), label=label))
    if kind == "rename":
        return chain.with_state_renamed(op[1], op[2])
    if kind == "delete":
        return chain.without_state(op[1])
    if kind == "unlink":
        return chain.with_transition(op[1], op[2], None)
    if kind == "paste":
        return chain.with_transitions(op[1])
    if kind == "meta":
        return chain.with_meta(name=op[1])
    raise AssertionError(op)  # pragma: no cover


class HistoryModel:
    """The undo history predicted from core edits: chains, the edit that made each, the index."""

    def __init__(self, chain):
        self.chains = [chain]
        self.ops: list[tuple | None] = [None]
        self.pos = 0

    @property
    def chain(self):
        return self.chains[self.pos]

    def edit(self, op) -> None:
        after = apply_to_chain(self.chain, op)
        if after == self.chain:
            return  # the document records nothing for an edit that changes nothing
        key = op[4] if op[0] == "move" else None
        top = self.ops[self.pos]
        del self.chains[self.pos + 1:], self.ops[self.pos + 1:]  # a new edit drops the redo tail
        if key is not None and self.pos > 0 and top is not None and top[0] == "move" and top[4] == key:
            # merged into the drag's undo step; removed when back where the drag began
            self.chains[self.pos] = after
            self.ops[self.pos] = op
            if after == self.chains[self.pos - 1]:
                del self.chains[self.pos], self.ops[self.pos]
                self.pos -= 1
            return
        self.chains.append(after)
        self.ops.append(op)
        self.pos += 1

    def undo(self) -> None:
        self.pos = max(0, self.pos - 1)

    def redo(self) -> None:
        self.pos = min(len(self.chains) - 1, self.pos + 1)


def commands_holding_chains() -> list:
    from app.document import ChainEdit

    gc.collect()
    return [o for o in gc.get_objects() if isinstance(o, ChainEdit) and (o.before is not None or o.after is not None)]


@pytest.fixture
def pump(tmp_path):
    p = tmp_path / "pump.json"
    shutil.copy(SAMPLES / "pump_wear.json", p)
    return p


@pytest.fixture
def simulation(window):
    """The window's simulation panel (made over the window's workspace if not docked)."""
    from app.simulation_panel import SimulationPanel, live_simulation_threads

    panel = window.panels.get("simulation")
    own = panel is None
    if own:
        panel = SimulationPanel(window.workspace)
        panel.resize(600, 500)
        panel.show()
    yield panel
    if own:
        panel.shutdown()
        panel.deleteLater()
    assert live_simulation_threads() == [], "a simulation thread was left running"


def _run_simulation(qtbot, panel, doc, seed, folder=None):
    """Restart the panel on the current chain; False when it is refused (an invalid chain).

    A run must count exactly what the core engine counts with the same seed, and what
    ``longrun simulate --json`` counts for the chain saved to a file.
    """
    import contextlib
    import io
    import json

    from core.cli import main
    from core.io import save_chain
    from core.simulate import ReplicateSimulation

    ws = panel.workspace
    chain = doc.chain
    ws.run_plan.update(start=("state", None), replicates=200, steps=150, burn_in=3, stride=2, seed=seed,
                       estimator="final", speed=None)
    if not chain.is_valid or chain.n == 0:
        assert not panel.run()
        assert panel.state == "failed" or chain.n == 0
        assert "problem" in panel.status.text() or chain.n == 0
        return False
    assert panel.run(), panel.status.text()
    qtbot.waitUntil(lambda: panel.state in ("finished", "failed"), timeout=30000)
    assert panel.state == "finished", panel.status.text()
    direct = ReplicateSimulation(chain.matrix(), replicates=200, steps=150, start=0, burn_in=3, stride=2,
                                 seed=seed).run()
    res = panel.report.result
    np.testing.assert_array_equal(res.ensemble, direct.ensemble)
    np.testing.assert_array_equal(res.occupancy, direct.occupancy)
    if folder is not None:
        f = folder / f"session-{seed}.json"
        save_chain(chain, f)
        out = io.StringIO()
        with contextlib.redirect_stdout(out):
            code = main(["simulate", str(f), "-R", "200", "-T", "150", "--burn-in", "3", "--stride", "2", "--seed",
                         str(seed), "--start", chain.ids[0], "--json"])
        assert code == 0
        cli = json.loads(out.getvalue())
        assert [cli["ensemble"][sid] for sid in chain.ids] == res.ensemble.tolist()
        kept = res.kept * 200
        assert [cli["time_average"][sid] for sid in chain.ids] == (res.occupancy / kept).tolist()
    return True


@pytest.mark.timeout(300)
def test_thousand_edits_with_undo_redo_and_simulations(window, dialogs, pump, qtbot, simulation, settle):
    from app.layout import fill_missing_positions
    from core.io import load_chain

    assert window.open_path(pump, ask=False)
    doc = window.document
    start = doc.chain
    assert start == fill_missing_positions(load_chain(pump))
    model = HistoryModel(start)
    rng = random.Random(20240611)
    pending: dict = {}
    settle(window)
    _run_simulation(qtbot, simulation, doc, seed=1)  # the panel's first run builds its charts
    mem0 = memory_now()
    threads0 = threading.active_count()
    edits = undos = redos = simulated = refused = 0
    step = 0
    if True:
        while edits < EDITS:
            step += 1
            r = rng.random()
            busy = pending.get("left", 0) > 0 or pending.get("queued")  # mid-gesture: no undo
            if r < 0.17 and not busy:
                for _ in range(rng.choice([1, 1, 1, 2, 5])):
                    doc.undo_stack.undo()
                    model.undo()
                    undos += 1
            elif r < 0.26 and not busy:
                for _ in range(rng.choice([1, 1, 2, 4])):
                    doc.undo_stack.redo()
                    model.redo()
                    redos += 1
            else:
                op = random_edit(rng, model.chain, edits, pending)
                apply_to_document(doc, op)
                model.edit(op)
                edits += 1
                if edits % SIMULATE_EVERY == 0:
                    # the first few runs are also checked against `longrun simulate --json`
                    ok = _run_simulation(qtbot, simulation, doc, seed=1000 + edits,
                                         folder=pump.parent if simulated < 3 else None)
                    simulated += ok
                    refused += not ok
            assert doc.chain == model.chain, f"step {step}: the document and the predicted history differ"
            assert doc.undo_stack.index() == model.pos and doc.undo_stack.count() == len(model.chains) - 1, step
        qtbot.waitUntil(lambda: window.analysis.is_idle, timeout=30000)
    mem1 = memory_now()
    final = doc.chain
    history = doc.undo_stack.count()
    blocks = mem1["python_blocks"] - mem0["python_blocks"]
    heap = None if mem0["c_heap"] is None else mem1["c_heap"] - mem0["c_heap"]
    rss = mem1["rss"] - mem0["rss"]
    print(f"\nlong session: {edits} edits, {undos} undos, {redos} redos in {step} steps; {history} undo steps kept; "
          f"{simulated} simulations run, {refused} refused (invalid chain); final chain {final.n} states, "
          f"{len(final.transitions)} transitions.\nMemory growth: {blocks:+,} Python blocks "
          f"({blocks / max(history, 1):.0f} per undo step), C heap "
          f"{'n/a' if heap is None else f'{heap / MiB:+.1f} MiB'}, resident set {rss / MiB:+.1f} MiB")
    assert simulated >= 3 and simulated + refused == EDITS // SIMULATE_EVERY

    # undo everything: the chain as opened; redo everything: the final chain of the history
    while doc.undo_stack.canUndo():
        doc.undo_stack.undo()
    assert doc.chain == start and not doc.is_dirty
    while doc.undo_stack.canRedo():
        doc.undo_stack.redo()
    assert doc.chain == model.chains[-1]
    # an independent replay of the surviving edits on core chains rebuilds it
    replayed = start
    for op in model.ops[1:]:
        replayed = apply_to_chain(replayed, op)
    assert replayed == doc.chain
    # the session can still be saved and read back whole
    assert window.file_save()
    assert load_chain(pump) == doc.chain

    # Bounded memory.  The history legitimately keeps one chain per undo step (a few dozen
    # states and transitions, sharing their unchanged parts with the neighbouring chains: a
    # new tuple or two and the changed State/Transition objects, tens of Python blocks).
    # The bounds below are generous: 400 Python blocks per undo step, 32 MiB of C heap and
    # 128 MiB of resident memory over the whole session.  A leak of canvas items, plot
    # items, simulation results or analysis reports kept per edit or per run would exceed
    # them (one analysis report of this chain alone is hundreds of blocks).
    assert blocks < 400 * max(history, 1) + 20_000
    assert heap is None or heap < 32 * MiB
    assert rss < 128 * MiB
    assert len(commands_holding_chains()) <= history  # only the steps on the stack hold chains
    # and clearing the history (a new document) gives the memory back
    del model, final, replayed, op  # this test's own references to the session's chains
    doc.reset(start)
    qtbot.waitUntil(lambda: window.analysis.is_idle, timeout=30000)
    mem2 = memory_now()
    freed = mem2["python_blocks"] - mem0["python_blocks"]
    heap2 = None if heap is None else (mem2["c_heap"] - mem0["c_heap"]) / MiB
    print(f"after clearing the history: {freed:+,} Python blocks, C heap "
          f"{'n/a' if heap2 is None else f'{heap2:+.1f} MiB'}")
    assert freed < 20_000
    # no thread left behind by 20 simulations and 1,000 re-analyses
    assert threading.active_count() <= threads0 + 2


def test_long_drags_keep_no_merged_command_alive(qtbot):
    # Every mouse move of a drag is a move edit merged into one undo step.  A merged command
    # must not stay alive holding its chains (PySide keeps the Python wrapper of a command
    # that QUndoStack deleted in C++): 3 drags of 600 moves of a 300-state chain would pin
    # 1,800 chains.
    from app.document import Document
    from app.main import create_application
    from core.model import Chain

    create_application()
    ids = [f"s{i}" for i in range(300)]
    chain = Chain(states=tuple(State(s, None, float(i), 0.0) for i, s in enumerate(ids)))
    doc = Document(chain)
    rng = random.Random(3)
    doc.move_states({"s1": (1.0, 1.0)}, merge="warm-up")  # first-use costs (imports, caches) before measuring
    doc.move_states({"s1": (1.0, 0.0)}, merge="warm-up")
    doc.undo_stack.clear()
    # commands of documents left by earlier tests in this process are not this test's concern
    earlier = commands_holding_chains()  # kept alive so their ids cannot be reused
    before = {id(o) for o in earlier}
    mem0 = memory_now()
    for drag in range(3):
        sid = rng.choice(ids)
        for _ in range(600):
            doc.move_states({sid: (rng.uniform(-900, 900), rng.uniform(-900, 900))}, merge=("drag", drag))
    # a drag that ends where it began leaves no undo step
    doc.move_states({"s0": (5.0, 5.0)}, merge="back")
    doc.move_states({"s0": (0.0, 0.0)}, merge="back")
    assert doc.undo_stack.count() == 3
    holding = [o for o in commands_holding_chains() if id(o) not in before]
    mem1 = memory_now()
    blocks = mem1["python_blocks"] - mem0["python_blocks"]
    heap = None if mem0["c_heap"] is None else mem1["c_heap"] - mem0["c_heap"]
    print(f"\n1,802 merged moves of a 300-state chain: {len(holding)} commands hold chains, "
          f"{blocks:+,} Python blocks, C heap {'n/a' if heap is None else f'{heap / MiB:+.2f} MiB'}")
    assert len(holding) == 3
    # each pinned chain would keep its own 300-entry states tuple (2.4 KiB, from the C heap)
    # and a dozen small objects: 1,800 of them are over 4 MiB and 20,000 blocks
    assert blocks < 5_000
    assert heap is None or heap < 1 * MiB
    for _ in range(3):
        doc.undo_stack.undo()
    assert doc.chain == chain
