"""Automatic layouts of a chain's states, from networkx.

Positions are in scene units (pixels at 100 % zoom).  The chain's classes,
when known, keep each class together (circular) or put the closed classes on
the inner ring and the transient states outside (shell).
"""
from __future__ import annotations

import math
from typing import Mapping, Sequence

import networkx as nx

from core.model import Chain

__all__ = ["LAYOUTS", "layout_positions", "fill_missing_positions", "spacing_for"]

#: Layout name -> menu text.
LAYOUTS = {
    "spring": "Spring (force-directed)",
    "circular": "Circle, grouped by class",
    "shell": "Rings: closed classes inside, transient outside",
}


def spacing_for(n: int) -> float:
    """Radius of a layout of ``n`` states, so neighbours sit ~110 px apart."""
    return max(160.0, 110.0 * n / (2 * math.pi)) if n > 1 else 0.0


def _graph(chain: Chain) -> nx.Graph:
    g = nx.Graph()
    g.add_nodes_from(chain.ids)
    known = set(chain.ids)
    for t in chain.transitions:
        if t.source != t.target and t.source in known and t.target in known:
            g.add_edge(t.source, t.target)
    return g


def _ordered_by_class(chain: Chain, classes: Sequence[Sequence[int]] | None) -> list[str]:
    if not classes:
        return list(chain.ids)
    ids = chain.ids
    out: list[str] = []
    for members in classes:
        out.extend(ids[i] for i in members)
    seen = set(out)
    out.extend(i for i in ids if i not in seen)
    return out


def layout_positions(
    chain: Chain,
    kind: str,
    *,
    classes: Sequence[Sequence[int]] | None = None,
    closed: Sequence[bool] | None = None,
    seed: int = 7,
) -> dict[str, tuple[float, float]]:
    """Positions ``{state id: (x, y)}`` for ``kind`` in :data:`LAYOUTS`.

    Parameters
    ----------
    chain : Chain
    kind : {"spring", "circular", "shell"}
    classes : sequence of sequences of int, optional
        Row indices of each communicating class (``Structure.classes[k].states``).
    closed : sequence of bool, optional
        Whether each class is closed (same order as ``classes``).
    seed : int
        Seed of the spring layout (the same chain gives the same picture).
    """
    n = chain.n
    if n == 0:
        return {}
    ids = list(dict.fromkeys(chain.ids))
    if len(ids) == 1:
        return {ids[0]: (0.0, 0.0)}
    radius = spacing_for(len(ids))
    if kind == "spring":
        g = _graph(chain)
        start = nx.circular_layout(_ordered_by_class(chain, classes))
        pos = nx.spring_layout(g, pos=start, seed=seed, iterations=120, k=1.6 / math.sqrt(len(ids)))
    elif kind == "circular":
        pos = nx.circular_layout(list(dict.fromkeys(_ordered_by_class(chain, classes))))
    elif kind == "shell":
        if classes and closed and any(closed) and not all(closed):
            inner = [chain.ids[i] for c, cl in zip(classes, closed) if cl for i in c]
            outer = [chain.ids[i] for c, cl in zip(classes, closed) if not cl for i in c]
            shells = [list(dict.fromkeys(inner)), list(dict.fromkeys(outer))]
        else:
            shells = [list(dict.fromkeys(_ordered_by_class(chain, classes)))]
        if len(shells) == 1 and len(shells[0]) > 1:
            shells = [[], shells[0]]  # nothing in the middle
        pos = nx.shell_layout(_graph(chain), nlist=shells)
    else:
        raise ValueError(f"unknown layout {kind!r} (known: {', '.join(LAYOUTS)})")
    # Normalise to the radius (networkx returns coordinates in [-1, 1]).
    xs = [p[0] for p in pos.values()]
    ys = [p[1] for p in pos.values()]
    cx, cy = (max(xs) + min(xs)) / 2, (max(ys) + min(ys)) / 2
    span = max(max(xs) - min(xs), max(ys) - min(ys)) / 2 or 1.0
    return {sid: (round((p[0] - cx) / span * radius, 2), round((p[1] - cy) / span * radius, 2))
            for sid, p in pos.items()}


def fill_missing_positions(chain: Chain) -> Chain:
    """Give every state without a position one; keep the positions that exist.

    When no state has a position, the chain gets a spring layout; otherwise the
    unplaced states go in a row under the placed ones.
    """
    missing = [s.id for s in chain.states if s.x is None or s.y is None]
    if not missing:
        return chain
    placed: Mapping[str, tuple[float, float]] = {
        s.id: (s.x, s.y) for s in chain.states if s.x is not None and s.y is not None
    }
    if not placed:
        kind = "spring" if chain.n <= 400 else "circular"
        return chain.with_positions(layout_positions(chain, kind))
    bottom = max(y for _, y in placed.values()) + 140.0
    left = min(x for x, _ in placed.values())
    pos = {sid: (left + 120.0 * k, bottom) for k, sid in enumerate(missing)}
    return chain.with_positions(pos)
