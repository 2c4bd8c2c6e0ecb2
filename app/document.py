"""The document: one open chain, its file, its undo stack and its selection.

The canvas, the grid and every later panel are views of a :class:`Document`:
they read :attr:`Document.chain` and listen to :attr:`Document.chainChanged`.
Edits never change the chain in place; each builds a new immutable
:class:`core.model.Chain` and pushes a :class:`ChainEdit` (a ``QUndoCommand``
holding the chain before and after) on :attr:`Document.undo_stack`.
"""
from __future__ import annotations

import contextlib
import os
import re
from dataclasses import replace
from fractions import Fraction
from pathlib import Path
from typing import Any, Iterable, Iterator, Mapping

from PySide6.QtCore import QObject, Signal
from PySide6.QtGui import QUndoCommand, QUndoStack

from core.errors import ChainFileError, OptionError
from core.io import state_limit
from core.model import REST, Chain, State, Transition, parse_probability

from .layout import fill_missing_positions, layout_positions

__all__ = ["Document", "ChainEdit", "probability_text", "transition_changes", "MOVE_MERGE_ID"]

#: ``QUndoCommand.id()`` of merging moves (a drag is one undo step).
MOVE_MERGE_ID = 4101
#: ``QUndoCommand.id()`` of merging text edits of one cell typed in bursts.
_NO_MERGE = -1


def probability_text(text: str) -> str | None:
    """Check a probability typed by the user and return what to store.

    Returns ``None`` for an empty entry or zero (no transition), else the text
    as typed (trimmed; ``rest`` in lower case).

    Raises
    ------
    ValueError
        With :func:`core.model.parse_probability`'s message, or when the value
        is outside [0, 1].
    """
    t = text.strip()
    if not t:
        return None
    v = parse_probability(t)
    if not isinstance(v, Fraction):
        return REST
    if v < 0:
        raise ValueError(f"{t!r} is negative; a probability is between 0 and 1")
    if v > 1:
        raise ValueError(f"{t!r} is greater than 1; a probability is between 0 and 1")
    if v == 0:
        return None
    return t


class ChainEdit(QUndoCommand):
    """An edit: redo sets the chain *after*, undo sets the chain *before*.

    Parameters
    ----------
    doc : Document
    before, after : Chain
    text : str
        What the Edit menu shows ("Undo Move state 'pump'").
    merge : hashable, optional
        Consecutive edits with equal ``merge`` keys merge into one undo step
        (a drag is many moves but one edit).
    """

    def __init__(self, doc: "Document", before: Chain, after: Chain, text: str, *,
                 merge: Any = None, parent: QUndoCommand | None = None):
        super().__init__(text, parent)
        self._doc = doc
        self.before = before
        self.after = after
        self.merge = merge

    def redo(self) -> None:
        self._doc._set_chain(self.after)

    def undo(self) -> None:
        self._doc._set_chain(self.before)

    def id(self) -> int:  # noqa: A003 - Qt's name
        return MOVE_MERGE_ID if self.merge is not None else _NO_MERGE

    def mergeWith(self, other: QUndoCommand) -> bool:  # noqa: N802 - Qt's name
        if not isinstance(other, ChainEdit) or other.merge is None or other.merge != self.merge:
            return False
        self.after = other.after
        self.setText(other.text())
        # Qt deletes ``other`` (and an obsolete ``self``) on the C++ side, but PySide keeps
        # their Python wrappers until the stack is cleared: let them hold no chains.
        other.before = other.after = None
        if self.after is self.before or self.after == self.before:
            self.setObsolete(True)
            self.before = self.after = None
        return True


class _Macro(QUndoCommand):
    """Several edits undone and redone as one, with one change notification.

    The steps are kept as (before, after) chains on the Python side (no child
    commands), so ownership stays simple.
    """

    def __init__(self, doc: "Document", text: str):
        super().__init__(text)
        self._doc = doc
        self.steps: list[tuple[Chain, Chain, str]] = []

    def redo(self) -> None:
        with self._doc._batch():
            for _before, after, _text in self.steps:
                self._doc._set_chain(after)

    def undo(self) -> None:
        with self._doc._batch():
            for before, _after, _text in reversed(self.steps):
                self._doc._set_chain(before)


def _plural(n: int, word: str) -> str:
    return f"{n} {word}{'' if n == 1 else 's'}"


def blank_chain(name: str = "") -> tuple[Chain, str | None]:
    """An empty chain under the state limit in force, and what is wrong with that limit, if anything.

    The limit is ``LONGRUN_MAX_STATES`` when set (as for chains read from files); a
    malformed value gives the default limit and the message naming the variable, for
    the caller to show.
    """
    try:
        return Chain(name=name, state_limit=state_limit()), None
    except OptionError as exc:
        return Chain(name=name), f"{exc}; the new chain uses the default limit of {Chain.state_limit:,} states"


class Document(QObject):
    """One open chain: the single source of truth every view observes.

    Signals
    -------
    chainChanged(old, new)
        After every edit, undo, redo and load, with the chains before and after.
    changed()
        Emitted right after ``chainChanged``, for views that simply re-read.
    fileChanged()
        The file path or the saved/unsaved state changed.
    selectionChanged()
        The shared selection (states and transitions) changed.
    """

    chainChanged = Signal(object, object)
    changed = Signal()
    fileChanged = Signal()
    selectionChanged = Signal()

    def __init__(self, chain: Chain | None = None, path: str | os.PathLike | None = None,
                 parent: QObject | None = None):
        super().__init__(parent)
        self._chain = chain if chain is not None else blank_chain()[0]
        self._path: Path | None = Path(path).resolve() if path else None
        self.undo_stack = QUndoStack(self)
        self.undo_stack.cleanChanged.connect(self._on_clean_changed)
        self._batch_depth = 0
        self._batch_start: Chain | None = None
        self._macro: _Macro | None = None
        self._sel_states: frozenset[str] = frozenset()
        self._sel_transitions: frozenset[tuple[str, str]] = frozenset()

    def _on_clean_changed(self, _clean: bool) -> None:
        self.fileChanged.emit()

    # -- state ----------------------------------------------------------------
    @property
    def chain(self) -> Chain:
        return self._chain

    @property
    def path(self) -> Path | None:
        return self._path

    @property
    def is_dirty(self) -> bool:
        return not self.undo_stack.isClean()

    @property
    def display_name(self) -> str:
        if self._path is not None:
            return self._path.name
        return self._chain.name or "Untitled"

    # -- the one place the chain changes ------------------------------------
    def _set_chain(self, chain: Chain) -> None:
        if chain is self._chain:
            return
        old = self._chain
        self._chain = chain
        if self._batch_depth:
            return
        self._after_change(old, chain)

    def _after_change(self, old: Chain, new: Chain) -> None:
        self._prune_selection()
        self.chainChanged.emit(old, new)
        self.changed.emit()

    @contextlib.contextmanager
    def _batch(self) -> Iterator[None]:
        if self._batch_depth == 0:
            self._batch_start = self._chain
        self._batch_depth += 1
        try:
            yield
        finally:
            self._batch_depth -= 1
            if self._batch_depth == 0:
                start, self._batch_start = self._batch_start, None
                if start is not None and start is not self._chain:
                    self._after_change(start, self._chain)

    def push(self, after: Chain, text: str, *, merge: Any = None) -> bool:
        """Make ``after`` the chain, as one undoable edit described by ``text``.

        Returns False (and records nothing) when ``after`` is the current chain.
        """
        before = self._chain
        if after is before or after == before:
            return False
        if self._macro is not None:
            self._macro.steps.append((before, after, text))
            self._chain = after  # silent; the macro's push notifies once
            return True
        if merge is not None and self._merge_in_place(after, text, merge):
            return True
        self.undo_stack.push(ChainEdit(self, before, after, text, merge=merge))
        return True

    def _merge_in_place(self, after: Chain, text: str, merge: Any) -> bool:
        """Extend the top undo step of a drag instead of pushing a command for Qt to merge.

        Qt deletes a merged command on the C++ side while PySide keeps its Python
        wrapper alive until the stack is cleared: one leaked command per mouse move.
        Merging here makes no command.  The cases Qt treats specially (a redo tail
        to drop, the top step at the saved state, a drag back to where it began,
        which removes the step) still go through ``QUndoStack.push``.
        """
        st = self.undo_stack
        i = st.index()
        if i == 0 or i != st.count() or i == st.cleanIndex():
            return False
        top = st.command(i - 1)
        if not isinstance(top, ChainEdit) or top.merge is None or top.merge != merge:
            return False
        if after is top.before or after == top.before:
            return False
        top.after = after
        top.setText(text)
        self._set_chain(after)
        return True

    @contextlib.contextmanager
    def macro(self, text: str) -> Iterator[None]:
        """Group the edits made inside the ``with`` block into one undo step."""
        if self._macro is not None:  # nested: part of the outer macro
            yield
            return
        start = self._chain
        macro = _Macro(self, text)
        self._macro = macro
        try:
            yield
        except BaseException:
            self._macro = None
            self._chain = start
            raise
        self._macro = None
        if not macro.steps:
            return
        self._chain = start
        self.undo_stack.push(macro)

    # -- file-level operations --------------------------------------------------
    def reset(self, chain: Chain, path: str | os.PathLike | None = None) -> None:
        """Replace the whole document (open, new, import): the undo history starts over."""
        chain = fill_missing_positions(chain)
        self.undo_stack.clear()
        self._path = Path(path).resolve() if path else None
        self._set_chain(chain)
        self.undo_stack.setClean()
        self.fileChanged.emit()

    def restore(self, base: Chain, recovered: Chain, path: str | os.PathLike | None) -> None:
        """Open ``base`` and then apply ``recovered`` as one edit (unsaved, undoable)."""
        self.reset(base, path)
        self.push(fill_missing_positions(recovered), "Recover unsaved work")

    def save(self, path: str | os.PathLike | None = None) -> Path:
        """Save atomically to ``path`` (default: the current file) and mark the document saved.

        Raises
        ------
        ChainFileError
            When the file cannot be written; the document stays unsaved.
        ValueError
            When there is no path to save to.
        """
        from core.io import save_chain

        target = Path(path) if path is not None else self._path
        if target is None:
            raise ValueError("the document has no file yet; choose a name with Save As")
        save_chain(self._chain, target)
        self._path = target.resolve()
        self.undo_stack.setClean()
        self.fileChanged.emit()
        return self._path

    def revert(self) -> None:
        """Reload the file from disk, as an undoable edit.

        Raises
        ------
        ChainFileError
            When the file cannot be read (the document is untouched).
        """
        from core.io import load_chain

        if self._path is None:
            raise ChainFileError("the document has never been saved, so there is nothing to revert to")
        disk = fill_missing_positions(load_chain(self._path))
        self.push(disk, "Revert to saved file")
        self.undo_stack.setClean()
        self.fileChanged.emit()

    # -- selection ----------------------------------------------------------------
    @property
    def selected_states(self) -> frozenset[str]:
        return self._sel_states

    @property
    def selected_transitions(self) -> frozenset[tuple[str, str]]:
        return self._sel_transitions

    def set_selection(self, states: Iterable[str] = (), transitions: Iterable[tuple[str, str]] = ()) -> None:
        s = frozenset(states)
        t = frozenset(tuple(x) for x in transitions)
        if s == self._sel_states and t == self._sel_transitions:
            return
        self._sel_states, self._sel_transitions = s, t
        self.selectionChanged.emit()

    def _prune_selection(self) -> None:
        if not self._sel_states and not self._sel_transitions:
            return
        ids = set(self._chain.ids)
        pairs = {(t.source, t.target) for t in self._chain.transitions}
        s = frozenset(x for x in self._sel_states if x in ids)
        t = frozenset(x for x in self._sel_transitions if x in pairs)
        if s != self._sel_states or t != self._sel_transitions:
            self._sel_states, self._sel_transitions = s, t
            self.selectionChanged.emit()

    # -- edits ----------------------------------------------------------------------
    def new_state_id(self, stem: str = "s") -> str:
        taken = set(self._chain.ids)
        k = self._chain.n + 1
        while f"{stem}{k}" in taken:
            k += 1
        return f"{stem}{k}"

    def add_state(self, x: float, y: float, *, sid: str | None = None, label: str | None = None) -> str:
        """Add a state at ``(x, y)``; returns its id."""
        sid = sid if sid is not None else self.new_state_id()
        sid = _check_id(sid, self._chain)
        self.push(self._chain.with_state(State(sid, label or None, float(x), float(y))),
                  f"Add state ‘{sid}’")
        return sid

    def delete(self, states: Iterable[str] = (), transitions: Iterable[tuple[str, str]] = ()) -> None:
        """Delete states (with every transition into or out of them) and transitions."""
        states = [s for s in dict.fromkeys(states) if s in self._chain.index]
        gone = set(states)
        transitions = [tuple(t) for t in dict.fromkeys(transitions)
                       if t[0] not in gone and t[1] not in gone and self._chain.transition(*t) is not None]
        if not states and not transitions:
            return
        parts = []
        if states:
            parts.append(_plural(len(states), "state") if len(states) > 1 else f"state ‘{states[0]}’")
        if transitions:
            parts.append(_plural(len(transitions), "transition") if len(transitions) > 1
                         else f"transition {transitions[0][0]} → {transitions[0][1]}")
        with self.macro("Delete " + " and ".join(parts)):
            for sid in states:
                self.push(self._chain.without_state(sid), f"Delete state ‘{sid}’")
            if transitions:
                self.push(_bulk_set(self._chain, [(a, b, None) for a, b in transitions]),
                          "Delete transitions")

    def rename_state(self, old: str, new: str) -> str:
        """Change a state's id (its transitions follow).  Returns the new id.

        Raises
        ------
        ValueError
            When ``new`` is empty or already taken.
        """
        new = _check_id(new, self._chain, allow=old)
        if new == old:
            return old
        sel = self._sel_states
        self.push(self._chain.with_state_renamed(old, new), f"Rename state ‘{old}’ to ‘{new}’")
        if old in sel:
            self.set_selection((new if s == old else s for s in sel), self._sel_transitions)
        return new

    def set_label(self, sid: str, label: str | None) -> None:
        label = (label or "").strip() or None
        st = self._chain.state(sid)
        if st.label == label:
            return
        self.push(self._chain.with_state(replace(st, label=label)), f"Rename state ‘{sid}’")

    def move_states(self, positions: Mapping[str, tuple[float, float]], *, merge: Any = None) -> None:
        """Move states; successive calls with the same ``merge`` key form one undo step."""
        positions = {k: (round(float(x), 2), round(float(y), 2)) for k, (x, y) in positions.items()}
        if not positions:
            return
        text = (f"Move state ‘{next(iter(positions))}’" if len(positions) == 1
                else f"Move {_plural(len(positions), 'state')}")
        self.push(self._chain.with_positions(positions), text, merge=merge)

    def set_transition(self, source: str, target: str, p: Any) -> None:
        """Set ``P(source -> target)`` as typed (``None`` removes the transition)."""
        for sid in (source, target):
            if sid not in self._chain.index:
                raise ValueError(f"there is no state {sid!r}")
        old = self._chain.transition(source, target)
        if p is None:
            if old is None:
                return
            text = f"Remove transition {source} → {target}"
        elif old is None:
            text = f"Add transition {source} → {target} ({p})"
        else:
            text = f"Set P({source} → {target}) = {p}"
        self.push(self._chain.with_transition(source, target, p), text)

    def set_transitions(self, items: Iterable[tuple[str, str, Any]], text: str) -> None:
        """Set many probabilities as one edit (a paste); ``None`` removes."""
        items = list(items)
        for a, b, _ in items:
            for sid in (a, b):
                if sid not in self._chain.index:
                    raise ValueError(f"there is no state {sid!r}")
        self.push(_bulk_set(self._chain, items), text)

    def default_probability(self, source: str) -> str:
        """What a new transition from ``source`` starts with: ``rest`` unless the row has one."""
        for t in self._chain.outgoing(source):
            if isinstance(t.p, str) and t.p.strip().lower() == REST:
                return "0"
        return REST

    def rest_on_diagonal(self, sid: str) -> str:
        """Put the rest of the row on the self-loop of ``sid``.

        Returns a sentence saying what was done (or why not).
        """
        others = [t for t in self._chain.outgoing(sid) if t.target != sid]
        for t in others:
            if isinstance(t.p, str) and t.p.strip().lower() == REST:
                return (f"state ‘{sid}’ already puts its rest on ‘{t.target}’; "
                        "change that entry first")
        self.push(self._chain.with_transition(sid, sid, REST), f"Put the rest of ‘{sid}’ on its self-loop")
        return f"P({sid} → {sid}) is now ‘rest’ (1 minus the other entries of the row)"

    def arrange(self, kind: str, *, classes=None, closed=None) -> None:
        """Apply an automatic layout (one undoable edit)."""
        from .layout import LAYOUTS

        pos = layout_positions(self._chain, kind, classes=classes, closed=closed)
        self.push(self._chain.with_positions(pos), f"Arrange: {LAYOUTS[kind].split(',')[0].lower()}")

    def set_meta(self, **changes: Any) -> None:
        self.push(self._chain.with_meta(**changes), "Change model details")


def transition_changes(old: Chain, new: Chain) -> dict[tuple[str, str], Transition | None] | None:
    """The transitions that differ between two chains, for incremental views.

    Returns ``{(from, to): transition in new (first of that pair) or None if
    gone}``, or ``None`` when so much changed that a view should rebuild.
    Transitions are compared by identity: an edit builds a new tuple that
    shares every untouched :class:`Transition` object.
    """
    if old.transitions is new.transitions:
        return {}
    memo = _CHANGES_MEMO.get("last")
    if memo is not None and memo[0] is old and memo[1] is new:
        return memo[2]
    ot, nt = old.transitions, new.transitions
    # edits keep the untouched transitions in place: skip the common head and tail
    lo, n_old, n_new = 0, len(ot), len(nt)
    while lo < n_old and lo < n_new and ot[lo] is nt[lo]:
        lo += 1
    hi = 0
    while hi < n_old - lo and hi < n_new - lo and ot[n_old - 1 - hi] is nt[n_new - 1 - hi]:
        hi += 1
    ow, nw = ot[lo:n_old - hi], nt[lo:n_new - hi]
    old_ids = set(map(id, ow))
    new_ids = set(map(id, nw))
    keys = {(t.source, t.target) for t in ow if id(t) not in new_ids}
    keys.update((t.source, t.target) for t in nw if id(t) not in old_ids)
    if len(keys) > max(64, len(new.transitions) // 4):
        return None
    out: dict[tuple[str, str], Transition | None] = dict.fromkeys(keys)
    if keys:
        for t in nt:
            k = (t.source, t.target)
            if k in keys and out[k] is None:
                out[k] = t
    _CHANGES_MEMO["last"] = (old, new, out)
    return out


_CHANGES_MEMO: dict[str, tuple] = {}


_ID_RE = re.compile(r"\S")


def _check_id(sid: str, chain: Chain, *, allow: str | None = None) -> str:
    sid = str(sid).strip()
    if not _ID_RE.search(sid):
        raise ValueError("a state needs a name (it cannot be empty)")
    if sid != allow and sid in chain.index:
        raise ValueError(f"there is already a state called ‘{sid}’")
    return sid


def _bulk_set(chain: Chain, items: Iterable[tuple[str, str, Any]]) -> Chain:
    """Many :meth:`Chain.with_transition` edits in one pass (existing ones keep their place)."""
    updates: dict[tuple[str, str], Any] = {}
    for a, b, p in items:
        updates[(a, b)] = p
    if not updates:
        return chain
    out: list[Transition] = []
    done: set[tuple[str, str]] = set()
    changed = False
    for t in chain.transitions:
        key = (t.source, t.target)
        if key in updates and key not in done:
            done.add(key)
            p = updates[key]
            if p is None:
                changed = True
                continue
            if p != t.p:
                changed = True
                t = replace(t, p=p)
        out.append(t)
    for key, p in updates.items():
        if key not in done and p is not None:
            out.append(Transition(key[0], key[1], p))
            changed = True
    return replace(chain, transitions=tuple(out)) if changed else chain
