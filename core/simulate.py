"""Replicate simulation: many copies of a chain at once, fast, reproducible, streaming.

:class:`ReplicateSimulation` runs ``R`` independent copies ("replicates") of a
chain from a start state, a start law or the uniform law.  It advances in
chunks, yields a :class:`SimulationSnapshot` every ``k`` steps from
:meth:`ReplicateSimulation.snapshots` (cancellable between chunks), and keeps
only what the statistics need: the ensemble (where each replicate is now), the
pooled occupancy counts of the kept draws, per-replicate occupancy counts in a
few equal batches for a bounded number of "tracked" replicates (for R-hat, ESS
and Monte Carlo standard errors, see :mod:`core.diagnostics`), and a few sample
paths of bounded length.  Memory is ``O(R + n^2)`` plus ``O(tracked * n)``;
nothing of size ``R x T`` is ever stored.  :func:`compare` sets the result
beside the exact values of the core engine (``pi0 P^t``, the long-run law,
``d_start(t)``).

The run convention (the same as the exact plan check, :mod:`core.plan`)
-----------------------------------------------------------------------
A run is a burn-in of ``B`` steps followed by ``T`` further steps, ``B + T``
steps in all (``steps`` is ``T`` and never includes the burn-in;
``total_steps == B + T``).  Step 0 is the start.

* The ensemble (final-step estimator) is where the replicates are at step
  ``B + T``; its exact law is ``pi0 P^(B+T)``.
* The time average keeps the states at steps ``B, B + s, ..., B + (m-1) s``
  with ``m = floor(T / s)`` (with ``B = 0`` and ``s = 1``: ``X_0 ... X_(T-1)``);
  the exact mean of that average is ``(1/m) sum_(j<m) pi0 P^(B+js)``
  (:func:`core.plan.estimate_law` for ``Plan(start, T, burn_in=B, stride=s,
  estimator="average")``).
* Snapshots count ``step`` from 0 to ``B + T``.

The sampler: cell tables
------------------------
Every row of ``P`` is quantised exactly to integer masses summing to
``L * U`` (``L = 2**b`` equally likely cells per row, each worth ``U`` units;
the rounding of the row sum is absorbed by the row's largest entry, so each
row sums to 1 exactly).  The alias construction (Walker 1977; Vose 1991, in
exact integers, vectorised over rows) splits the row into its ``L`` cells,
each owned by one state ("pure") or shared by two ("mixed": a threshold sends
part of the cell to one state and the rest to the other).  At most ``k - 1``
cells of a row with ``k`` successors are mixed.  Three layouts
(:class:`CellTable`):

* ``split`` (sparse rows, small chains; ``U = 2**64``, ``L`` about ``32 k``):
  a step takes 16 random bits per replicate (four per 64-bit word; the cell is
  their top ``b`` bits), adds the replicate's row offset, gathers the cell
  from a flat ``int32`` table holding the *next row offset* of pure cells, and
  resolves the few replicates that landed in a mixed cell with one 64-bit word
  each.  Probabilities are reproduced to ``2**-(b + 64)``.
* ``wide`` (rows with so many successors that most cells would be mixed;
  ``U = 2**(64 - b)``, ``L >= k``): one 64-bit word per replicate, whose top
  ``b`` bits pick the cell and whose value is compared with the cell's
  threshold; next offset ``= miss + (word < cut) * delta``, no branch.
  Probabilities are reproduced to ``2**-64``.
* ``direct`` (rows reaching nearly every state, up to 4096 states; Walker's
  own layout): ``L = 2**b >= n`` cells per row and cell ``c`` belongs to state
  ``c`` below a threshold (``64 - b`` bits) and to one alias state above
  it.  A step takes 16 random bits per replicate, as a split table does: the
  top ``b`` pick the cell, the other ``g = 16 - b`` are compared with the top
  ``g`` bits of its threshold, held beside the alias in a two-byte record (a
  dense chain of 1000 states samples from 2 MiB instead of the 16 of a wide
  table).  The few replicates that tie there (one in ``2**g``) take 48 more
  bits from a coin and are settled with the full threshold.  Probabilities
  are reproduced to ``2**-64``: the masses of a wide table with as many
  cells.

Each way a step is a handful of in-place passes over ``R`` numbers and one
table gather; a probability of ``1e-12`` is kept, not rounded away.  Up to
:data:`SCALAR_REPLICATES` replicates, a scalar kernel (a Python loop over the
steps) replaces the vectorised one, whose per-call cost dominates there.

Random streams
--------------
``numpy.random.SeedSequence(seed).spawn(3)`` gives three independent PCG64
streams: start states, cell bits, coins (mixed cells, ties).  Step ``t`` always
consumes the same number of words of the cell stream (``ceil(R/4)``, or ``R``
for a wide table), and the
coin stream is read in (step, replicate) order, so for a given chain the
results are bit-identical whatever the chunk size, the snapshot interval or
the kernel (vector or scalar) used.

References
----------
A.J. Walker, "An efficient method for generating discrete random variables with
general distributions", *ACM Trans. Math. Software* 3(3):253-256 (1977)
[memory].  M.D. Vose, "A linear algorithm for generating random numbers with a
given distribution", *IEEE Trans. Software Eng.* 17(9):972-975 (1991) [memory].
"""
from __future__ import annotations

import math
import os
import threading
import time
from dataclasses import dataclass, field
from typing import Generator, Iterator

import numpy as np

from .errors import LimitError, OptionError
from .units import TV_ROUNDING, format_tv

__all__ = [
    "MAX_REPLICATES",
    "MAX_STEPS",
    "DEFAULT_TRACKED",
    "DEFAULT_MEMORY_LIMIT",
    "MEMORY_ENV",
    "CellTable",
    "cell_table",
    "start_law",
    "estimate_memory",
    "build_bytes",
    "memory_limit_from_env",
    "parse_bytes",
    "SimulationSnapshot",
    "SimulationResult",
    "ReplicateSimulation",
    "run",
    "iter_simulate",
    "SimulationReport",
    "compare",
    "curve_grid",
]

#: Largest number of replicates.
MAX_REPLICATES = 10**6
#: Largest number of steps (the exact engine handles t < 2**63; 1e12 is beyond any run).
MAX_STEPS = 10**12
#: Default number of replicates whose own occupancy counts are kept (R-hat, ESS, MCSE).
DEFAULT_TRACKED = 1000
#: Default memory guard (bytes) for one run.
DEFAULT_MEMORY_LIMIT = 2 * 1024**3
#: Environment variable overriding the memory guard (e.g. ``8GiB``).
MEMORY_ENV = "LONGRUN_SIMULATE_MEMORY"
#: Default number of retained sample paths and their length (most recent steps).
DEFAULT_PATHS = 8
DEFAULT_PATH_LENGTH = 1000
#: Row-sum tolerance of the matrices accepted (the chain validator's).
ROW_SUM_TOLERANCE = 1e-9
#: Up to this many replicates a scalar kernel (a loop over time) beats numpy's per-call cost
#: of ~15 us a step; both kernels read the random streams identically (tested bit for bit).
SCALAR_REPLICATES = 16
#: Replicate-steps per internal block (bounds the work buffers).
_BLOCK_ELEMENTS = 1 << 18
#: Bytes a cell table may take before fewer cells per row are used.
_TABLE_BUDGET = 1 << 20
#: Share of mixed cells up to which a split table is used before any other, and at all.
_SPLIT_CHEAP, _SPLIT_MIXED = 0.04, 0.15
#: Bytes a direct table may take even when the alternative is smaller.
_DIRECT_BUDGET = 16 << 20


# ---------------------------------------------------------------------------
# the cell table (exact alias construction)


#: Mixed cell of a split table: a 64-bit word below ``cut`` goes to ``hit``, else to ``miss``.
RECORD = np.dtype([("cut", np.uint64), ("hit", np.int32), ("miss", np.int32)])
#: Cell of a wide table: a word below ``cut`` goes to ``miss + delta``, else to ``miss``
#: (so the next offset is ``miss + (word < cut) * delta``, without a branch).
WIDE_RECORD = np.dtype([("cut", np.uint64), ("miss", np.int32), ("delta", np.int32)])
#: Largest cells-per-row exponent of a direct table (its records keep ``16 - bits >= 4`` threshold bits).
DIRECT_MAX_BITS = 12


@dataclass(frozen=True, eq=False)
class CellTable:
    """Sampling tables of a transition matrix (see module notes).

    Three layouts, chosen by :func:`cell_table`:

    ``"split"`` (few mixed cells; the default for sparse rows and small chains)
        16 random bits pick the cell; ``cells`` holds the next row offset
        ``j * L`` for a pure cell and a negative marker ``x`` for a mixed cell
        whose record is ``mixed[x]`` (negative index); a mixed cell costs one
        64-bit word, compared with the record's ``cut`` (units ``2**-64`` of
        the cell).
    ``"wide"`` (rows with so many successors that most cells would be mixed)
        one 64-bit word per replicate and step: its top ``bits`` bits pick the
        cell and the whole word is compared with the cell's absolute ``cut``;
        every cell is a record (pure cells have ``delta == 0``).
    ``"direct"`` (dense rows; Walker's own layout, ``L >= n``)
        16 random bits: the top ``bits`` pick the cell ``c``, which belongs
        to state ``c`` when its ``64 - bits``-bit fraction is below
        ``exact[i * L + c]`` and to its alias otherwise; ``cells`` holds
        ``uint16`` records ``alias << g | coarse`` (``g = 16 - bits``, coarse
        = the threshold's top ``g`` bits, saturated), compared with the other
        ``g`` random bits; on a tie the fraction's last 48 bits are the top
        48 of a coin.

    Attributes
    ----------
    n : int
    bits : int
        ``L = 2**bits`` equally likely cells per row.
    kind : {"split", "wide"}
    cells : (n * L,) ndarray
        ``int32`` (split), :data:`WIDE_RECORD` (wide) or ``uint16`` (direct);
        entry ``i * L + c`` is cell ``c`` of row ``i``.
    mixed : (M,) ndarray of RECORD
        Mixed cells of a split table, in reverse order of creation (so that the
        marker ``~m`` indexes record ``m`` as a negative index); empty otherwise.
    exact : (n * L,) ndarray of uint64
        Thresholds of a direct table, ``0 .. 2**(64 - bits)`` (all of the
        cell belongs to its own state at the top); empty otherwise.
    """

    n: int
    bits: int
    kind: str
    cells: np.ndarray
    mixed: np.ndarray
    exact: np.ndarray = field(default_factory=lambda: _frozen(np.zeros(0, dtype=np.uint64)))

    @property
    def L(self) -> int:
        return 1 << self.bits

    @property
    def unit_bits(self) -> int:
        """log2 of the units per cell (64 for split tables, ``64 - bits`` for wide ones)."""
        return 64 if self.kind == "split" else 64 - self.bits

    @property
    def coarse_bits(self) -> int:
        """Threshold bits in a direct table's records (0 for other layouts)."""
        return 16 - self.bits if self.kind == "direct" else 0

    @property
    def mixed_fraction(self) -> float:
        """Share of the cells that are shared by two states."""
        if self.kind == "split":
            return float(self.mixed.size) / float(self.cells.size)
        if self.kind == "direct":
            shared = (self.exact > 0) & (self.exact < np.uint64(1 << self.unit_bits))
            return float(np.count_nonzero(shared)) / float(self.cells.size)
        return float(np.count_nonzero(self.cells["delta"])) / float(self.cells.size)

    @property
    def nbytes(self) -> int:
        return int(self.cells.nbytes + self.mixed.nbytes + self.exact.nbytes)

    def masses(self) -> list[dict[int, int]]:
        """Exact integer mass of every transition.

        Row ``i`` maps a next state ``j`` to its mass in units of
        ``2**-(bits + unit_bits)``; the masses of a row sum to
        ``2**(bits + unit_bits)``.  For tests and audits.
        """
        L, b = self.L, self.bits
        U = 1 << self.unit_bits
        out = []
        for i in range(self.n):
            row: dict[int, int] = {}
            block = self.cells[i * L:(i + 1) * L]
            if self.kind == "direct":
                g = self.coarse_bits
                for c, (rec, q) in enumerate(zip(block.tolist(), self.exact[i * L:(i + 1) * L].tolist())):
                    row[c] = row.get(c, 0) + q
                    row[rec >> g] = row.get(rec >> g, 0) + U - q
                out.append({j: w for j, w in row.items() if w})
                continue
            if self.kind == "split":
                recs = [(U, int(c), int(c)) if c >= 0 else tuple(int(v) for v in self.mixed[c].tolist())
                        for c in block.tolist()]
                recs = [(cut, hit, miss) for cut, hit, miss in recs]
            else:
                recs = []
                for c, rec in enumerate(block.tolist()):
                    cut, miss, delta = (int(v) for v in rec)
                    hit = miss + delta
                    if delta == 0:
                        recs.append((U, hit, miss))
                    else:
                        recs.append((cut - (c << self.unit_bits), hit, miss))
            for cut, hit, miss in recs:
                row[hit >> b] = row.get(hit >> b, 0) + cut
                if cut < U:
                    row[miss >> b] = row.get(miss >> b, 0) + U - cut
            out.append({j: w for j, w in row.items() if w})
        return out

    def realised_matrix(self) -> np.ndarray:
        """The transition matrix the sampler realises, rounded to float64."""
        P = np.zeros((self.n, self.n))
        scale = 2.0 ** -(self.bits + self.unit_bits)
        for i, row in enumerate(self.masses()):
            for j, w in row.items():
                P[i, j] = w * scale  # exact int times a power of two: one rounding
        return P


def check_matrix(P) -> np.ndarray:
    """A float64 C-contiguous copy of ``P`` after checking it is row-stochastic."""
    P = np.array(P, dtype=np.float64, order="C")
    if P.ndim != 2 or P.shape[0] != P.shape[1] or P.shape[0] == 0:
        raise ValueError(f"P must be a non-empty square matrix, not shape {P.shape}")
    if not np.all(np.isfinite(P)):
        raise ValueError("P has entries that are not finite numbers")
    if np.any(P < 0):
        i, j = np.argwhere(P < 0)[0]
        raise ValueError(f"P[{i}, {j}] = {P[i, j]!r} is negative")
    dev = np.abs(P.sum(axis=1) - 1.0)
    if np.any(dev > ROW_SUM_TOLERANCE):
        i = int(np.argmax(dev))
        raise ValueError(f"row {i} of P sums to {P[i].sum()!r} (must be 1)")
    return P


def _min_bits(kmax: int) -> int:
    return max(1, (kmax - 1).bit_length())


def _split_bits(n: int, kmax: int) -> int:
    """Cells per row for a split table: about ``32 kmax``, fewer when the table outgrows ~1 MiB."""
    bmin = _min_bits(kmax)
    b = min(16, bmin + 5)
    while b > bmin + 1 and n * (1 << b) * 4 > _TABLE_BUDGET:
        b -= 1
    return b


def _plan_table(P: np.ndarray) -> tuple[str, int]:
    """(kind, bits) for P.

    A split table when at most ~4% of its cells would be mixed (the cheapest
    step); otherwise a direct table when there is one (``n <= 4096``) and it
    takes at most 16 MiB or no more than the alternative, which is a split
    table up to ~15% mixed cells and a wide one beyond.  (Measured in
    tests/benchmarks/simulate.py: split steps are fastest with few mixed
    cells, direct steps are nearly as fast whatever the rows.)
    """
    n = P.shape[0]
    k = (P > 0).sum(axis=1)
    kmax = int(k.max())
    alt: tuple[str, int] = ("wide", _min_bits(kmax))
    if kmax <= 1 << 16:
        b = _split_bits(n, kmax)
        mixed_bound = float((k - 1).sum()) / float(n << b)
        if mixed_bound <= _SPLIT_CHEAP:
            return "split", b
        if mixed_bound <= _SPLIT_MIXED:
            alt = ("split", b)
    bd = _min_bits(n)
    if bd <= DIRECT_MAX_BITS:
        direct = _table_bytes("direct", n, bd, 0)
        if direct <= max(_DIRECT_BUDGET, _table_bytes(alt[0], n, alt[1], int(k.sum()))):
            return "direct", bd
    return alt


def _table_bytes(kind: str, n: int, bits: int, nnz: int) -> int:
    if kind == "split":
        return n * (4 << bits) + 16 * nnz
    if kind == "direct":
        return n * (10 << bits)
    return n * (16 << bits)


def table_bytes(P) -> int:
    """Bytes of the cell table :func:`cell_table` would build for ``P`` (an upper bound)."""
    P = np.asarray(P)
    kind, b = _plan_table(P)
    return _table_bytes(kind, P.shape[0], b, int((P > 0).sum()))


def _build_work(n: int, kmax: int, bits: int, kind: str) -> int:
    """Working memory of building a cell table (bytes, an upper bound).

    Rows are built in blocks of ``nb`` rows with ``nb * kmax`` about 2**20: per
    block, the support mask and its sort order over the full row width (10
    bytes per entry), some twenty arrays of 8 bytes per (row, successor) plus the
    lists of cells, and the block's cells while they are laid out (up to 32 bytes
    per cell of a wide table, 12 of a split one); and the checked copy of the
    matrix with two masks of it (10 bytes per entry).  Measured peaks stay below
    this (tests/core/test_resource_guards.py).
    """
    if kind == "direct":
        # per block of nb rows with nb * L about 2**20: the padded rows and their masses, the two
        # stacks, the thresholds and aliases (some 13 arrays of 8 bytes per cell), and the records
        L = 1 << bits
        nb = min(n, max(1, (1 << 20) // L))
        return 10 * n * n + nb * L * 120
    nb = min(n, max(1, (1 << 20) // max(1, kmax)))
    per_cell = 32 if kind == "wide" else 12
    return 10 * n * n + nb * (10 * n + 320 * kmax + per_cell * (1 << bits))


def build_bytes(P) -> int:
    """Working memory :func:`cell_table` needs for ``P`` beyond the table itself (an upper bound)."""
    P = np.asarray(P)
    kind, b = _plan_table(P)
    return _build_work(P.shape[0], int((P > 0).sum(axis=1).max()), b, kind)


def cell_table(P, *, bits: int | None = None, kind: str | None = None) -> CellTable:
    """Build the exact cell (alias) table of a row-stochastic matrix.

    Parameters
    ----------
    P : (n, n) array_like
        Row-stochastic matrix (rows summing to 1 within 1e-9).
    bits : int, optional
        Cells per row ``2**bits``; chosen from the matrix by default.
    kind : {"split", "wide"}, optional
        Table layout (see :class:`CellTable`); chosen by default.

    Returns
    -------
    CellTable

    Raises
    ------
    ValueError
        When ``P`` is not row-stochastic, or ``bits`` gives fewer cells than
        some state has successors, or the table would not fit int32 offsets.

    Notes
    -----
    Each row's probabilities become integers summing exactly to
    ``2**(bits + unit_bits)`` (round to nearest; the largest entry absorbs the
    row's rounding).  Vose's (1991) alias construction then runs in exact
    integers: a mass below one cell ("small") is topped up by a donor of at
    least one cell ("large"), making one mixed cell; whole cells of a donor
    become pure cells.  At most ``k - 1`` cells of a row with ``k`` successors
    are mixed.

    Examples
    --------
    >>> t = cell_table([[0.5, 0.5], [0.25, 0.75]])
    >>> t.realised_matrix()
    array([[0.5 , 0.5 ],
           [0.25, 0.75]])
    """
    P = check_matrix(P)
    n = P.shape[0]
    support = P > 0
    kmax = int(support.sum(axis=1).max())
    auto_kind, auto_bits = _plan_table(P)
    kind = auto_kind if kind is None else kind
    if kind not in ("split", "wide", "direct"):
        raise ValueError(f"kind must be 'split', 'wide' or 'direct', not {kind!r}")
    if bits is None:
        bits = auto_bits if kind == auto_kind else {"split": _split_bits(n, kmax), "wide": _min_bits(kmax),
                                                    "direct": _min_bits(n)}[kind]
    bits = int(bits)
    hi = {"split": 16, "wide": 30, "direct": DIRECT_MAX_BITS}[kind]
    if not 1 <= bits <= hi:
        raise ValueError(f"bits must be between 1 and {hi} for a {kind} table, not {bits}")
    if bits < _min_bits(kmax):
        raise ValueError(f"bits={bits} gives {1 << bits} cells per row, fewer than the {kmax} successors of some state")
    L = 1 << bits
    if kind == "direct" and L < n:
        raise ValueError(f"bits={bits} gives {L} cells per row; a direct table needs one per state ({n})")
    if n * L >= 2**31:
        raise ValueError(f"a table of {n} x {L} cells does not fit 32-bit offsets")
    if kind == "direct":
        return _direct_table(P, bits)
    ub = 64 if kind == "split" else 64 - bits
    cells = np.empty(n * L, dtype=np.int32 if kind == "split" else WIDE_RECORD)
    records = []
    m0 = 0
    step = max(1, (1 << 20) // kmax)  # rows per block: bounded work arrays
    for lo in range(0, n, step):
        hi_ = min(n, lo + step)
        mixed, lab, count = _alias_block(P[lo:hi_], bits, ub)
        block = cells[lo * L:hi_ * L]
        if kind == "split":
            # pure cells hold the next offset; mixed cell m (global index) holds the marker ~m
            M = mixed["row"].size
            labels = np.where(lab >= 0, lab, ~(m0 + ~lab))
            block[:] = np.repeat(labels.astype(np.int32), count)
            recs = np.empty(M, dtype=RECORD)
            recs["cut"] = mixed["q"]
            recs["hit"] = mixed["hit"] << bits
            recs["miss"] = mixed["miss"] << bits
            records.append(recs)
            m0 += M
        else:
            is_mixed = lab < 0
            mi = np.where(is_mixed, ~lab, 0)
            miss = np.where(is_mixed, mixed["miss"][mi] << bits if mixed["row"].size else 0, lab)
            delta = np.where(is_mixed, (mixed["hit"][mi] - mixed["miss"][mi]) << bits if mixed["row"].size else 0, 0)
            q = np.where(is_mixed, mixed["q"][mi] if mixed["row"].size else 0, 0).astype(np.uint64)
            block["miss"] = np.repeat(miss.astype(np.int32), count)
            block["delta"] = np.repeat(delta.astype(np.int32), count)
            pos = (np.arange(block.size, dtype=np.uint64) & np.uint64(L - 1)) << np.uint64(ub)
            block["cut"] = np.where(block["delta"] != 0, pos + np.repeat(q, count), np.uint64(0))
    if kind == "split" and m0:
        mrec = np.concatenate(records)[::-1].copy()  # reversed: marker ~m indexes record m from the end
    else:
        mrec = np.zeros(0, dtype=RECORD)
    return CellTable(n=n, bits=bits, kind=kind, cells=_frozen(cells), mixed=_frozen(mrec))


_MIXED = np.dtype([("row", np.int64), ("q", np.uint64), ("hit", np.int64), ("miss", np.int64)])


def _quantise(p: np.ndarray, bits: int, ub: int) -> tuple[np.ndarray, np.ndarray]:
    """Exact integer masses of the rows of ``p``: ``a * U + r`` with ``U = 2**ub``.

    ``a`` (int64) counts whole cells and ``r < U`` (uint64) the rest; each
    entry is ``round(p * 2**(bits + ub))`` and the largest entry of each row
    (the first, on ties) absorbs the rounding of the row sum, so that every
    row sums to ``2**bits * U`` exactly.
    """
    nb = p.shape[0]
    L = 1 << bits
    U = 1 << ub
    scaled = p * L
    a = np.floor(scaled).astype(np.int64)
    r = np.rint(np.ldexp(scaled - a, ub)).astype(np.uint64)
    # exact row sums, then the largest entry of each row absorbs the difference
    lo32 = np.uint64(0xFFFFFFFF)
    sum_a = a.sum(axis=1).tolist()
    sum_hi = (r >> np.uint64(32)).sum(axis=1).tolist()
    sum_lo = (r & lo32).sum(axis=1).tolist()
    big = np.argmax(p, axis=1)
    rows = np.arange(nb)
    a_big = a[rows, big].tolist()
    r_big = r[rows, big].tolist()
    for i in range(nb):
        diff = L * U - (sum_a[i] * U + (sum_hi[i] << 32) + sum_lo[i])
        w = a_big[i] * U + r_big[i] + diff
        if w <= 0:  # pragma: no cover - impossible for rows summing to 1 +- 1e-9
            raise ValueError(f"a row of P cannot be normalised (row sum {p[i].sum()!r})")
        a_big[i], r_big[i] = divmod(w, U)
    a[rows, big] = a_big
    r[rows, big] = np.array(r_big, dtype=np.uint64)
    return a, r


def _donate(a, r, rows, pos, small, ub: int, ss, ns, nl) -> None:
    """Donor items ``(rows, pos)`` top up a small item's cell each: mass ``-= U - small``, exactly.

    Masses are ``a * U + r`` (``U = 2**ub``, ``ub <= 64``); a donor left below
    one cell leaves its row's large stack (``nl``) for the small one (``ss``,
    ``ns``).  Shared by both alias constructions.
    """
    rl = r[rows, pos]
    tot = rl + small  # wraps modulo 2**64 when U == 2**64
    if ub == 64:
        carry = tot < rl
    else:
        U = np.uint64(1 << ub)
        carry = tot >= U
        tot = np.where(carry, tot - U, tot)
    anew = a[rows, pos] - 1 + carry
    a[rows, pos] = anew
    r[rows, pos] = tot
    became = anew == 0
    br = rows[became]
    nl[br] -= 1
    ss[br, ns[br]] = pos[became]
    ns[br] += 1


def _walker_block(Pb: np.ndarray, bits: int) -> tuple[np.ndarray, np.ndarray]:
    """Walker's own layout for a block of rows, exactly, vectorised over the rows.

    Returns ``(Q, alias)``, both ``(nb, L)``: cell ``c`` of a row goes to
    state ``c`` for the ``Q[c]`` lowest of its ``U = 2**(64 - bits)`` units
    and to ``alias[c]`` for the rest.  Vose's (1991) pairing: each round,
    every unfinished row pops one item below one cell ("small"; the padding
    states ``n .. L-1`` and states that cannot be reached have mass 0), gives
    it its own cell topped up by the row's top item of at least one cell
    ("large"), and moves that donor to the small stack once it is below one
    cell.  When no small item is left, the masses being exact, every large
    item left has exactly one cell, all its own.
    """
    nb, n = Pb.shape
    L = 1 << bits
    ub = 64 - bits
    U = 1 << ub
    p = np.zeros((nb, L))
    p[:, :n] = Pb
    a, r = _quantise(p, bits, ub)
    del p
    Q = np.zeros((nb, L), dtype=np.uint64)
    alias = np.broadcast_to(np.arange(L, dtype=np.int64), (nb, L)).copy()
    is_small = a == 0
    ss = np.argsort(~is_small, axis=1, kind="stable").astype(np.int64)
    ls = np.argsort(is_small, axis=1, kind="stable").astype(np.int64)
    ns = is_small.sum(axis=1).astype(np.int64)
    nl = L - ns
    del is_small
    Uu = np.uint64(U)
    while True:
        act = np.flatnonzero((ns > 0) & (nl > 0))
        if act.size == 0:
            break
        ns[act] -= 1
        sp = ss[act, ns[act]]
        lp = ls[act, nl[act] - 1]
        rs = r[act, sp]
        Q[act, sp] = rs
        alias[act, sp] = lp
        _donate(a, r, act, lp, rs, ub, ss, ns, nl)
    if ns.any():  # pragma: no cover - the masses are exact, so no small item is left unpaired
        raise AssertionError("alias construction left a cell unfilled")
    # what is left of the large stacks: exactly one whole cell each, their own
    left = np.arange(L)[None, :] < nl[:, None]
    rows = np.nonzero(left)[0]
    items = ls[left]
    if np.any(a[rows, items] != 1) or np.any(r[rows, items] != 0):  # pragma: no cover - exact masses
        raise AssertionError("alias construction left mass over")
    Q[rows, items] = Uu
    return Q, alias


def _alias_block(Pb: np.ndarray, bits: int, ub: int):
    """Exact alias construction for a block of rows, vectorised over the rows.

    Returns ``(mixed, labels, counts)``: the mixed cells (structured array,
    grouped by row), and the row-major run-length layout of the block's
    cells, row by row: ``labels[e] >= 0`` is a pure cell's next-state offset
    repeated ``counts[e]`` times, ``labels[e] = ~i`` is mixed cell ``i`` of
    ``mixed`` (count 1).  Mixed cells come first in each row.

    Masses are ``a * U + r`` (``a`` whole cells as int64, ``r < U = 2**ub`` as
    uint64, exact); each row sums to ``L * U`` after its largest entry absorbs
    the rounding.  Every round, each unfinished row does one step of Vose's
    algorithm: pair its top small item with its top large one (one mixed
    cell), or, when no small item is left, turn the top large item's whole
    cells into pure cells.
    """
    nb, n = Pb.shape
    L = 1 << bits
    sup = Pb > 0
    k = sup.sum(axis=1)
    K = int(k.max())
    order = np.argsort(~sup, axis=1, kind="stable")[:, :K]
    valid = np.arange(K)[None, :] < k[:, None]
    items = np.where(valid, order, -1)
    p = np.where(valid, np.take_along_axis(Pb, order, axis=1), 0.0)
    a, r = _quantise(p, bits, ub)
    # stacks of small (< 1 cell) and large (>= 1 cell) items, as column positions
    is_small = valid & (a == 0) & (r > 0)
    is_large = valid & (a >= 1)
    ss = np.argsort(~is_small, axis=1, kind="stable").astype(np.int64)
    ls = np.argsort(~is_large, axis=1, kind="stable").astype(np.int64)
    ns = is_small.sum(axis=1).astype(np.int64)
    nl = is_large.sum(axis=1).astype(np.int64)
    m_rows, m_q, m_hit, m_miss = [], [], [], []
    p_rows, p_lab, p_cnt = [], [], []
    while True:
        act = np.flatnonzero(nl > 0)
        if act.size == 0:
            break
        has = ns[act] > 0
        pr = act[has]
        if pr.size:
            ns[pr] -= 1
            spos = ss[pr, ns[pr]]
            lpos = ls[pr, nl[pr] - 1]
            rs = r[pr, spos]
            m_rows.append(pr)
            m_q.append(rs)
            m_hit.append(items[pr, spos])
            m_miss.append(items[pr, lpos])
            _donate(a, r, pr, lpos, rs, ub, ss, ns, nl)
        qr = act[~has]
        if qr.size:
            nl[qr] -= 1
            lpos = ls[qr, nl[qr]]
            p_rows.append(qr)
            p_lab.append(items[qr, lpos] << bits)
            p_cnt.append(a[qr, lpos])
            a[qr, lpos] = 0
            rem = r[qr, lpos] > 0
            br = qr[rem]
            ss[br, ns[br]] = lpos[rem]
            ns[br] += 1
    if ns.any():  # pragma: no cover - the masses are exact, so nothing is left over
        raise AssertionError("alias construction left mass over")

    def cat(parts, dtype):
        return np.concatenate(parts).astype(dtype) if parts else np.zeros(0, dtype=dtype)

    mrow = cat(m_rows, np.int64)
    o = np.argsort(mrow, kind="stable")
    mixed = np.empty(mrow.size, dtype=_MIXED)
    mixed["row"] = mrow[o]
    mixed["q"] = cat(m_q, np.uint64)[o]
    mixed["hit"] = cat(m_hit, np.int64)[o]
    mixed["miss"] = cat(m_miss, np.int64)[o]
    prow = cat(p_rows, np.int64)
    erow = np.concatenate([mixed["row"], prow])
    kind_key = np.concatenate([np.zeros(mrow.size, np.int64), np.ones(prow.size, np.int64)])
    lab = np.concatenate([~np.arange(mrow.size, dtype=np.int64), cat(p_lab, np.int64)])
    cnt = np.concatenate([np.ones(mrow.size, np.int64), cat(p_cnt, np.int64)])
    e = np.argsort(erow * 2 + kind_key, kind="stable")
    lab, cnt = lab[e], cnt[e]
    if int(cnt.sum()) != nb * L:  # pragma: no cover - every row has exactly L cells
        raise AssertionError("alias construction produced the wrong number of cells")
    return mixed, lab, cnt


def _direct_table(P: np.ndarray, bits: int) -> CellTable:
    n = P.shape[0]
    L = 1 << bits
    g = 16 - bits
    cells = np.empty(n * L, dtype=np.uint16)
    exact = np.empty(n * L, dtype=np.uint64)
    step = max(1, (1 << 20) // L)  # rows per block: bounded work arrays
    for lo in range(0, n, step):
        hi = min(n, lo + step)
        Q, alias = _walker_block(P[lo:hi], bits)
        coarse = np.minimum(Q >> np.uint64(64 - bits - g), np.uint64((1 << g) - 1))
        cells[lo * L:hi * L] = ((alias.astype(np.uint16) << np.uint16(g)) | coarse.astype(np.uint16)).ravel()
        exact[lo * L:hi * L] = Q.ravel()
    return CellTable(n=n, bits=bits, kind="direct", cells=_frozen(cells), mixed=_frozen(np.zeros(0, dtype=RECORD)),
                     exact=_frozen(exact))


def _frozen(a: np.ndarray) -> np.ndarray:
    a.setflags(write=False)
    return a


# ---------------------------------------------------------------------------
# options and guards


def start_law(n: int, start) -> np.ndarray:
    """The start law of a run as an ``(n,)`` probability vector.

    Parameters
    ----------
    n : int
        Number of states.
    start : None, "uniform", int or (n,) array_like
        ``None`` or ``"uniform"``: every state equally likely; an int: that
        state; a vector: a start law (non-negative, summing to 1 within 1e-9).
    """
    if start is None or (isinstance(start, str) and start == "uniform"):
        return np.full(n, 1.0 / n)
    if isinstance(start, (bool, np.bool_)):
        raise OptionError(f"start must be a state index, a start law or 'uniform', not {start!r}")
    if isinstance(start, (int, np.integer)):
        if not 0 <= int(start) < n:
            raise OptionError(f"start state {int(start)} is out of range (the chain has states 0..{n - 1})")
        v = np.zeros(n)
        v[int(start)] = 1.0
        return v
    if isinstance(start, str):
        raise OptionError(f"start {start!r}: give a state index, a start law or 'uniform'")
    v = np.array(start, dtype=np.float64)
    if v.shape != (n,):
        raise OptionError(f"the start law must have {n} entries, not shape {v.shape}")
    if not np.all(np.isfinite(v)) or np.any(v < 0):
        raise OptionError("the start law must have finite, non-negative entries")
    if abs(v.sum() - 1.0) > ROW_SUM_TOLERANCE:
        raise OptionError(f"the start law sums to {v.sum()!r} (must be 1)")
    return v / v.sum()


_UNITS = {"": 1, "b": 1, "k": 1000, "kb": 1000, "m": 1000**2, "mb": 1000**2, "g": 1000**3, "gb": 1000**3,
          "t": 1000**4, "tb": 1000**4, "kib": 1024, "mib": 1024**2, "gib": 1024**3, "tib": 1024**4}


def parse_bytes(text: str) -> int:
    """Parse a memory size such as ``2GiB``, ``500MB`` or ``1e9`` into bytes."""
    s = str(text).strip().lower().replace("_", "")
    num = s.rstrip("abcdefghijklmnopqrstuvwxyz ")
    unit = s[len(num):].strip()
    try:
        value = float(num)
    except ValueError:
        raise OptionError(f"{text!r} is not a memory size (write e.g. 2GiB, 500MB or 1e9)") from None
    if unit not in _UNITS or not math.isfinite(value) or value <= 0:
        raise OptionError(f"{text!r} is not a memory size (write e.g. 2GiB, 500MB or 1e9)")
    return int(value * _UNITS[unit])


def memory_limit_from_env(default: int = DEFAULT_MEMORY_LIMIT) -> int:
    """The memory guard: ``$LONGRUN_SIMULATE_MEMORY`` when set, else ``default``."""
    raw = os.environ.get(MEMORY_ENV)
    if not raw:
        return default
    try:
        return parse_bytes(raw)
    except OptionError as exc:
        raise OptionError(f"environment variable {MEMORY_ENV}: {exc}") from None


def _format_bytes(b: float) -> str:
    for unit, size in (("GiB", 1024**3), ("MiB", 1024**2), ("KiB", 1024)):
        if b >= size:
            return f"{b / size:.3g} {unit}"
    return f"{int(b)} bytes"


def _batches(kept: int, tracked: int) -> tuple[int, int]:
    """(equal batches per tracked replicate, batch length) for ``kept`` planned draws.

    8 batches per replicate (so that split halves and live R-hat use whole
    batches), more when there are fewer than 4 tracked replicates (batch means
    then need batches within replicates): 32 for one replicate, 16 for two or
    three.  Never more batches than draws; (0, 0) below 2 draws.
    """
    target = {1: 32, 2: 16, 3: 16}.get(tracked, 8)
    nb = min(target, kept - (kept % 2))
    if nb < 2:
        return 0, 0
    return nb, kept // nb


def estimate_memory(n: int, replicates: int, *, tracked: int, kept: int, paths: int = DEFAULT_PATHS,
                    path_length: int = DEFAULT_PATH_LENGTH, table_bytes: int | None = None,
                    build_bytes: int | None = None) -> dict[str, int]:
    """Bytes a run needs, by part (``"total"`` is the sum).

    Parts: ``matrix`` (a copy of ``P``), ``table`` (cell table), ``build``
    (working memory while the table is built; 0 for a table given ready),
    ``replicates`` (per-replicate work arrays and buffers), ``tracked``
    (per-replicate batch counts of the tracked replicates), ``paths``.
    """
    if table_bytes is None:
        table_bytes = n * (16 << _min_bits(n))  # dense worst case (a wide table)
    if build_bytes is None:
        build_bytes = _build_work(n, n, _min_bits(n), "wide")  # dense worst case
    nb, _ = _batches(kept, tracked)
    count_bytes = 4 if kept < 2**31 else 8
    R = replicates
    block = max(1, _BLOCK_ELEMENTS // R)
    parts = {
        "matrix": 8 * n * n,
        "table": int(table_bytes),
        "build": int(build_bytes),
        # offsets int32, index int64, flags, records (wide), start draw (float64 + int64),
        # and per block: kept rows int64, random words (up to 8 bytes per replicate-step)
        "replicates": R * (4 + 8 + 1 + 16 + 16) + block * R * (8 + 8),
        # the counters and the copy a result holds
        "tracked": 2 * tracked * (nb + 1) * n * count_bytes if nb else 0,
        "paths": min(paths, R) * path_length * 4,
    }
    parts["total"] = sum(parts.values())
    return parts


# ---------------------------------------------------------------------------
# results


@dataclass(frozen=True, eq=False)
class SimulationSnapshot:
    """The state of a run after ``step`` steps (all arrays read-only copies).

    Attributes
    ----------
    step : int
        Steps done so far, burn-in included (0 is the start; the run ends at
        ``total_steps = burn_in + steps``).
    steps : int
        ``T``, the steps planned after the burn-in.
    replicates : int
    ensemble : (n,) ndarray of int64
        How many replicates are in each state now.
    occupancy : (n,) ndarray of int64
        Kept draws in each state so far, pooled over replicates.
    kept : int
        Kept draws per replicate so far (``occupancy.sum() == kept * replicates``).
    paths : (p, m) ndarray of int32
        The last ``m`` states of the first ``p`` replicates (steps
        ``path_start .. step``).
    path_start : int
    elapsed : float
        Seconds spent stepping so far.
    done, cancelled : bool
    burn_in : int
        ``B``, the steps run before the first kept draw (the draw at step ``B``).
    """

    step: int
    steps: int
    replicates: int
    ensemble: np.ndarray
    occupancy: np.ndarray
    kept: int
    paths: np.ndarray
    path_start: int
    elapsed: float
    done: bool
    cancelled: bool
    burn_in: int = 0

    @property
    def total_steps(self) -> int:
        """``B + T``: the step at which the run ends."""
        return self.burn_in + self.steps

    @property
    def progress(self) -> float:
        """Fraction of the ``B + T`` steps done."""
        total = self.total_steps
        return self.step / total if total else 1.0

    @property
    def ensemble_share(self) -> np.ndarray:
        """Fraction of replicates in each state now."""
        return self.ensemble / self.replicates

    @property
    def time_average(self) -> np.ndarray | None:
        """Pooled time-average occupancy of the kept draws so far (None before the first)."""
        total = self.kept * self.replicates
        return self.occupancy / total if total else None

    def to_json(self) -> dict:
        return {
            "step": self.step, "steps": self.steps, "burn_in": self.burn_in, "total_steps": self.total_steps,
            "replicates": self.replicates,
            "ensemble": self.ensemble, "occupancy": self.occupancy, "kept": self.kept,
            "path_start": self.path_start, "paths": self.paths, "elapsed": self.elapsed,
            "done": self.done, "cancelled": self.cancelled,
        }


@dataclass(frozen=True, eq=False)
class SimulationResult:
    """Everything a finished (or cancelled) run measured; see :func:`compare`.

    Attributes
    ----------
    n, replicates, steps, burn_in, stride : int
        The run's parameters: ``steps`` is ``T``, the steps planned after the
        burn-in ``B``; the run is ``B + T`` steps (:attr:`total_steps`).
    seed : int
        The seed (the entropy of the root ``SeedSequence``): rerunning with it
        reproduces the run bit for bit.
    start : (n,) ndarray
        The start law.
    step : int
        Steps actually done, burn-in included (``B + T``, less only when
        cancelled).
    cancelled : bool
    ensemble : (n,) ndarray of int64
        Replicates in each state at ``step``.
    occupancy : (n,) ndarray of int64
        Kept draws per state pooled over all replicates.
    kept : int
        Kept draws per replicate so far: the states at steps ``B, B + s, ...,
        B + (kept - 1) s`` (``kept_planned = floor(T / s)`` when finished).
    tracked : int
        Replicates whose own counts were kept (the first ``tracked`` ones).
    batches : int
        Equal batches per tracked replicate over the planned kept draws
        (0 when too few draws are planned).
    batch_length : int
        Kept draws per batch.
    batch_counts : (tracked, batches + 1, n) ndarray of int32 (int64 beyond 2**31 draws)
        Per tracked replicate, per batch, per state: kept draws counted;
        slot ``batches`` holds the ``kept_planned - batches * batch_length``
        draws left over at the end.
    kept_planned : int
        ``m = floor(T / s)``, the draws a finished run keeps per replicate.
    paths : (p, m) ndarray of int32
    path_start : int
    elapsed : float
        Seconds spent stepping.
    table_kind : str
        ``"split"`` or ``"wide"`` (see :class:`CellTable`).
    table_bits : int
    mixed_fraction : float
    memory : dict
        The memory estimate (bytes by part) that the guard checked.
    """

    n: int
    replicates: int
    steps: int
    burn_in: int
    stride: int
    seed: int
    start: np.ndarray
    step: int
    cancelled: bool
    ensemble: np.ndarray
    occupancy: np.ndarray
    kept: int
    tracked: int
    batches: int
    batch_length: int
    batch_counts: np.ndarray
    kept_planned: int
    paths: np.ndarray
    path_start: int
    elapsed: float
    table_kind: str
    table_bits: int
    mixed_fraction: float
    memory: dict = field(default_factory=dict)

    @property
    def total_steps(self) -> int:
        """``B + T``: the step at which the run ends."""
        return self.burn_in + self.steps

    @property
    def time_average(self) -> np.ndarray | None:
        total = self.kept * self.replicates
        return self.occupancy / total if total else None

    @property
    def complete_batches(self) -> int:
        """Batches completely filled so far (all of them when the run finished)."""
        if not self.batches:
            return 0
        return min(self.batches, self.kept // self.batch_length)

    def replicate_counts(self) -> np.ndarray:
        """(tracked, n) kept draws per state of each tracked replicate (all slots)."""
        return self.batch_counts.sum(axis=1)


# ---------------------------------------------------------------------------
# the engine


class _CoinStream:
    """Sequential reader of 64-bit words (the mixed-cell coins)."""

    def __init__(self, bitgen: np.random.BitGenerator, block: int = 1 << 14):
        self._bg = bitgen
        self._block = block
        self._buf = np.empty(0, dtype=np.uint64)
        self._pos = 0
        self._list: list[int] | None = None

    def take(self, k: int) -> np.ndarray:
        avail = self._buf.size - self._pos
        if k <= avail:
            out = self._buf[self._pos:self._pos + k]
            self._pos += k
            return out
        head = self._buf[self._pos:]
        fresh = self._bg.random_raw(max(self._block, k - avail))
        self._buf = fresh
        self._list = None
        need = k - avail
        self._pos = need
        return np.concatenate([head, fresh[:need]])

    def next(self) -> int:
        if self._pos >= self._buf.size:
            self._buf = self._bg.random_raw(self._block)
            self._pos = 0
            self._list = None
        if self._list is None:
            self._list = self._buf.tolist()
        x = self._list[self._pos]
        self._pos += 1
        return x


class ReplicateSimulation:
    """Run ``replicates`` independent copies of a chain, in chunks.

    Parameters
    ----------
    P : (n, n) array_like
        Row-stochastic transition matrix (``Chain.matrix()``).
    replicates : int
        ``R``, 1 to 10**6.
    steps : int
        ``T``, the steps run after the burn-in (at least 1, and at least
        ``stride``); the run is ``B + T`` steps in all.
    start : None, "uniform", int or (n,) array_like, optional
        Start state index, start law, or uniform (default).
    burn_in : int, optional
        ``B`` (default 0): the steps run before the first kept draw; the
        states at steps ``0..B-1`` are not kept.
    stride : int, optional
        ``s`` (default 1, at most ``T``): the kept draws are the states at
        steps ``B, B + s, ..., B + (m-1) s`` with ``m = floor(T / s)`` (with
        ``B = 0, s = 1``: steps ``0 .. T-1``).  The ensemble at the end is at
        step ``B + T``.  This is the convention of :mod:`core.plan`.
    seed : int or None, optional
        Root seed of ``numpy.random.SeedSequence``; fresh entropy when None
        (the seed used is in the result either way).
    tracked : int, optional
        Replicates whose own batch counts are kept for R-hat, ESS and MCSE
        (the first ``min(R, tracked)``; default 1000).
    paths, path_length : int, optional
        Sample paths retained (the first ``paths`` replicates, their last
        ``path_length`` states).
    memory_limit : int, optional
        Bytes the run may take (default: ``$LONGRUN_SIMULATE_MEMORY`` or
        2 GiB); a bigger estimate raises :class:`LimitError`.
    table : CellTable, optional
        A prebuilt table of ``P`` (when running the same chain many times).

    Raises
    ------
    OptionError
        For parameters out of range (the message names the parameter).
    LimitError
        When the estimated memory exceeds ``memory_limit``.

    Notes
    -----
    Drive it with :meth:`snapshots` (a generator; closing it or calling
    :meth:`cancel` from any thread stops the run at the next chunk boundary),
    or :meth:`advance`; :meth:`result` can be called at any time.  Steps
    (``t``, snapshots' ``step``) count from 0 to ``total_steps = B + T``.

    Examples
    --------
    >>> sim = ReplicateSimulation([[0.9, 0.1], [0.5, 0.5]], replicates=1000, steps=200, burn_in=50,
    ...                           stride=4, seed=1)
    >>> for snap in sim.snapshots(every=100):
    ...     pass
    >>> res = sim.result()
    >>> res.step, res.total_steps, res.kept, int(res.ensemble.sum())
    (250, 250, 50, 1000)
    """

    def __init__(self, P, *, replicates: int, steps: int, start=None, burn_in: int = 0, stride: int = 1,
                 seed: int | None = None, tracked: int = DEFAULT_TRACKED, paths: int = DEFAULT_PATHS,
                 path_length: int = DEFAULT_PATH_LENGTH, memory_limit: int | None = None,
                 table: CellTable | None = None, _kernel: str | None = None):
        R = _whole("replicates", replicates, 1, MAX_REPLICATES)
        T = _whole("steps", steps, 1, MAX_STEPS)
        B = _whole("burn_in", burn_in, 0, MAX_STEPS)
        s = _whole("stride", stride, 1, MAX_STEPS)
        if s > T:
            raise OptionError(
                f"stride ({s}) must be at most steps ({T}): the time average keeps floor(steps / stride) "
                "draws after the burn-in, and none would be kept")
        if B + T > MAX_STEPS:
            raise OptionError(f"burn_in + steps ({B:,} + {T:,}) must be at most {MAX_STEPS:.0e}")
        tracked = _whole("tracked", tracked, 1, MAX_REPLICATES)
        paths = _whole("paths", paths, 0, 1000)
        path_length = _whole("path_length", path_length, 1, 10**7)
        if seed is not None:
            seed = _whole("seed", seed, 0, 2**128 - 1)
        if memory_limit is None:
            memory_limit = memory_limit_from_env()
        P = check_matrix(P)
        n = P.shape[0]
        pi0 = start_law(n, start)
        self.n, self.replicates, self.steps, self.burn_in, self.stride = n, R, T, B, s
        self.total_steps = B + T
        self.kept_planned = T // s
        self.tracked = min(R, tracked)
        self.n_paths = min(paths, R)
        self.path_length = path_length
        if table is not None and table.n != n:
            raise ValueError(f"the table is for {table.n} states, P has {n}")
        tbytes = table_bytes(P) if table is None else table.nbytes
        bbytes = build_bytes(P) if table is None else 0
        self.memory = estimate_memory(n, R, tracked=self.tracked, kept=self.kept_planned, paths=self.n_paths,
                                      path_length=path_length, table_bytes=tbytes, build_bytes=bbytes)
        if self.memory["total"] > memory_limit:
            parts = ", ".join(f"{k} {_format_bytes(v)}" for k, v in self.memory.items() if k != "total" and v)
            raise LimitError(
                f"this run needs about {_format_bytes(self.memory['total'])} ({parts}), over the memory "
                f"limit of {_format_bytes(memory_limit)}; use fewer replicates or tracked replicates, "
                f"or raise the limit (--memory-limit, or the {MEMORY_ENV} environment variable)")
        self.table = cell_table(P) if table is None else table
        self.start = _frozen(pi0)
        # random streams
        ss = np.random.SeedSequence(seed)
        self.seed = int(ss.entropy)
        s_start, s_cells, s_coins = ss.spawn(3)
        rng0 = np.random.Generator(np.random.PCG64(s_start))
        self._cells_bg = np.random.PCG64(s_cells)
        self._coins = _CoinStream(np.random.PCG64(s_coins))
        b = self.table.bits
        support0 = np.flatnonzero(pi0 > 0)
        if support0.size == 1:
            x0 = np.full(R, support0[0], dtype=np.int32)
        else:
            x0 = rng0.choice(n, size=R, p=pi0).astype(np.int32)
        self._off = np.left_shift(x0, b).astype(np.int32)
        # work buffers
        self._f = np.empty(R, dtype=np.int64)
        self._neg = np.empty(R, dtype=bool)
        # cell-stream words per step: 16 bits per replicate (split) or 64 (wide)
        self._W = R if self.table.kind == "wide" else (R + 3) // 4
        self._rec = np.empty(R, dtype=WIDE_RECORD) if self.table.kind == "wide" else None
        # direct tables: records, cells, coarse fractions and thresholds, their difference (as int16),
        # aliases and the next states (all R-long)
        self._u16 = np.empty((7, R), dtype=np.uint16) if self.table.kind == "direct" else None
        self._wide_fields = None  # contiguous fields for the scalar wide kernel
        self._block = max(1, _BLOCK_ELEMENTS // R)
        self._rows = np.empty((min(self._block, self.kept_planned), R), dtype=np.int64)
        # statistics
        self.t = 0
        self._kept = 0
        self._occupancy = np.zeros(n, dtype=np.int64)
        nb, m = _batches(self.kept_planned, self.tracked)
        self.batches, self.batch_length = nb, m
        cdt = np.int32 if self.kept_planned < 2**31 else np.int64
        self._counts = np.zeros((self.tracked, nb + 1, n) if nb else (self.tracked, 1, n), dtype=cdt)
        self._rbase = (np.arange(self.tracked, dtype=np.int64) * (self._counts.shape[1] * n))
        self._path_buf = np.empty((self.n_paths, path_length), dtype=np.int32)
        self._path_count = 0  # states written so far (including step 0)
        self._record_paths(x0[: self.n_paths][:, None])
        if B == 0:  # the start itself is the first kept draw
            self._rows[0] = x0
            self._accumulate(1, 0)
        self._elapsed = 0.0
        self._cancel = threading.Event()
        self._kernel = _kernel or ("scalar" if R <= SCALAR_REPLICATES else "vector")
        if self._kernel not in ("scalar", "vector"):
            raise ValueError(f"unknown kernel {self._kernel!r}")

    # -- public API ---------------------------------------------------------
    @property
    def done(self) -> bool:
        return self.t >= self.total_steps

    @property
    def cancelled(self) -> bool:
        return self._cancel.is_set()

    def cancel(self) -> None:
        """Ask the run to stop at the next chunk boundary (thread-safe)."""
        self._cancel.set()

    def default_chunk(self) -> int:
        """Steps per chunk: a few milliseconds of work (2**20 replicate-steps, 2**16 for the scalar kernel)."""
        work = (1 << 16) if self._kernel == "scalar" else (1 << 20)
        return max(1, work // self.replicates)

    def advance(self, k: int) -> SimulationSnapshot:
        """Advance ``k`` steps (fewer at the end of the run, step ``B + T``) and return a snapshot."""
        self._advance(_whole("k", k, 0, MAX_STEPS))
        return self.snapshot()

    def _advance(self, k: int) -> None:
        k = min(k, self.total_steps - self.t)
        t0 = time.perf_counter()
        done = 0
        while done < k:
            mb = min(k - done, self._block)
            self._advance_block(mb)
            done += mb
        self._elapsed += time.perf_counter() - t0

    def snapshots(self, every: int | None = None, *, chunk: int | None = None) -> Iterator[SimulationSnapshot]:
        """Run to the end (step ``B + T``), yielding a snapshot every ``every`` steps and at the end.

        Parameters
        ----------
        every : int, optional
            Snapshot interval in steps, counted from step 0 (burn-in
            included; default: about 100 snapshots per run).
        chunk : int, optional
            Steps between cancellation checks (default :meth:`default_chunk`).

        Yields
        ------
        SimulationSnapshot
            The last one has ``done`` or ``cancelled`` set.  After
            :meth:`cancel`, at most one more chunk is run.
        """
        total = self.total_steps
        every = max(1, total // 100) if every is None else _whole("every", every, 1, MAX_STEPS)
        chunk = self.default_chunk() if chunk is None else _whole("chunk", chunk, 1, MAX_STEPS)
        while not self.done:
            if self._cancel.is_set():
                yield self.snapshot()
                return
            next_snap = min(total, (self.t // every + 1) * every)
            target = min(next_snap, self.t + chunk)
            self._advance(target - self.t)
            if self.t == next_snap or self.done:
                yield self.snapshot()
        # an already finished run yields nothing more

    def run(self) -> "SimulationResult":
        """Run to the end (or until cancelled) and return :meth:`result`."""
        for _ in self.snapshots(every=self.total_steps):
            pass
        return self.result()

    def snapshot(self) -> SimulationSnapshot:
        return SimulationSnapshot(
            step=self.t, steps=self.steps, replicates=self.replicates,
            ensemble=_frozen(self.ensemble()), occupancy=_frozen(self._occupancy.copy()), kept=self._kept,
            paths=_frozen(self._paths()), path_start=self._path_start(), elapsed=self._elapsed,
            done=self.done, cancelled=self._cancel.is_set() and not self.done, burn_in=self.burn_in,
        )

    def running_rhat(self) -> np.ndarray | None:
        """Rank-normalised split R-hat of each state's indicator so far, or None.

        Computed from the whole batches done so far (split into equal halves),
        so it is available once two batches of the tracked replicates are
        complete; cheap enough to call at every snapshot for a live plot.
        ``nan``/``inf`` as in :func:`core.diagnostics.indicator_rank_rhat`.
        """
        g = min(self.batches, self._kept // self.batch_length) if self.batches else 0
        return _rhat_from_batches(self._counts, g, self.batch_length)[0]

    def ensemble(self) -> np.ndarray:
        """(n,) replicates in each state now."""
        return np.bincount(self._off >> self.table.bits, minlength=self.n).astype(np.int64)

    def states(self) -> np.ndarray:
        """(R,) the current state of every replicate (a copy)."""
        return (self._off >> self.table.bits).astype(np.int64)

    def result(self) -> SimulationResult:
        return SimulationResult(
            n=self.n, replicates=self.replicates, steps=self.steps, burn_in=self.burn_in, stride=self.stride,
            seed=self.seed, start=self.start, step=self.t, cancelled=self._cancel.is_set() and not self.done,
            ensemble=_frozen(self.ensemble()), occupancy=_frozen(self._occupancy.copy()), kept=self._kept,
            tracked=self.tracked, batches=self.batches, batch_length=self.batch_length,
            batch_counts=_frozen(self._counts.copy()), kept_planned=self.kept_planned,
            paths=_frozen(self._paths()), path_start=self._path_start(), elapsed=self._elapsed,
            table_kind=self.table.kind, table_bits=self.table.bits, mixed_fraction=self.table.mixed_fraction,
            memory=dict(self.memory),
        )

    # -- internals ------------------------------------------------------------
    def _kept_rows(self, t1: int, t2: int) -> tuple[list[int], int]:
        """Offsets (0-based within steps t1..t2) of kept steps, and the kept index of the first.

        The kept steps are ``B + j s`` for ``j = 0 .. m-1`` (``m = kept_planned``).
        """
        B, s = self.burn_in, self.stride
        last = B + (self.kept_planned - 1) * s
        lo = max(t1, B)
        first = B + -(-(lo - B) // s) * s
        hi = min(t2, last)
        if first > hi:
            return [], 0
        return list(range(first - t1, hi - t1 + 1, s)), (first - B) // s

    def _advance_block(self, mb: int) -> None:
        t1 = self.t + 1
        t2 = self.t + mb
        rows, k0 = self._kept_rows(t1, t2)
        words = self._cells_bg.random_raw(mb * self._W).reshape(mb, self._W)
        if self._kernel == "vector":
            path_rows = self._vector_block(words, rows)
        else:
            path_rows = self._scalar_block(words, rows)
        self.t = t2
        if rows:
            self._accumulate(len(rows), k0)
        if self.n_paths:
            self._record_paths(path_rows)

    def _vector_block(self, words: np.ndarray, rows: list[int]) -> np.ndarray:
        R = self.replicates
        tab = self.table
        b = tab.bits
        if tab.kind == "direct":
            return self._direct_block(words, rows)
        wide = tab.kind == "wide"
        cells, mixed = tab.cells, tab.mixed
        off, f, neg, rec = self._off, self._f, self._neg, self._rec
        kept = set(rows)
        out_rows = self._rows
        P_ = self.n_paths
        paths = np.empty((P_, words.shape[0]), dtype=np.int32)
        coins = self._coins
        if wide:
            sh64 = np.uint64(64 - b)
            fu = f.view(np.uint64)
            miss, delta, cut = rec["miss"], rec["delta"], rec["cut"]
        else:
            sh16 = np.uint16(16 - b)
        j = 0
        for i in range(words.shape[0]):
            if wide:
                u = words[i]
                np.right_shift(u, sh64, out=fu)
                np.add(f, off, out=f)
                np.take(cells, f, out=rec, mode="wrap")
                np.less(u, cut, out=neg)
                np.multiply(delta, neg, out=off)
                np.add(off, miss, out=off)
            else:
                v = words[i].view(np.uint16)[:R]
                if sh16:
                    np.right_shift(v, sh16, out=v)
                np.add(off, v, out=f)
                np.take(cells, f, out=off, mode="wrap")
                np.less(off, 0, out=neg)
                idx = np.flatnonzero(neg)
                if idx.size:
                    r = np.take(mixed, off[idx], mode="wrap")  # negative markers index from the end
                    off[idx] = np.where(coins.take(idx.size) < r["cut"], r["hit"], r["miss"])
            if i in kept:
                np.right_shift(off, b, out=out_rows[j])
                j += 1
            if P_:
                np.right_shift(off[:P_], b, out=paths[:, i])
        return paths

    def _direct_block(self, words: np.ndarray, rows: list[int]) -> np.ndarray:
        """The vector kernel on a direct table (see :class:`CellTable`), step by step.

        Per step and replicate, 16 random bits: their top ``b`` bits pick the
        cell ``c`` (a uint16 record), the other ``g`` are the coarse fraction
        ``fq``, compared with the record's coarse threshold ``rq``.  Below it
        the cell's own state wins, above it the alias (``m = (fq - rq) >> 15``
        is all ones where ``c`` wins: ``next = alias ^ ((alias ^ c) & m)``, no
        branch).  On a tie, the fraction's remaining 48 bits come from a coin
        and the exact threshold decides.
        """
        R = self.replicates
        tab = self.table
        b = tab.bits
        g = tab.coarse_bits
        cells, exact = tab.cells, tab.exact
        off = self._off
        f = self._f.view(np.int32)[:R]  # cell indices fit int32 (n * L < 2**31)
        rec, c16, fq, rq, dq, al, nxt = self._u16
        dqs = dq.view(np.int16)
        eq = self._neg
        coins = self._coins
        g16, gm = np.uint16(g), np.uint16((1 << g) - 1)
        s15, s16, s48, b32 = np.int16(15), np.uint64(16), np.uint64(48), np.int32(b)
        kept = set(rows)
        out_rows = self._rows
        P_ = self.n_paths
        paths = np.empty((P_, words.shape[0]), dtype=np.int32)
        j = 0
        for i in range(words.shape[0]):
            v = words[i].view(np.uint16)[:R]  # c << g | fq
            np.right_shift(v, g16, out=c16)
            np.add(off, c16, out=f)
            np.take(cells, f, out=rec, mode="wrap")
            np.bitwise_and(v, gm, out=fq)
            np.bitwise_and(rec, gm, out=rq)
            np.subtract(fq, rq, out=dq)
            np.equal(dqs, 0, out=eq)
            np.right_shift(dqs, s15, out=dqs)
            np.right_shift(rec, g16, out=al)
            np.bitwise_xor(al, c16, out=nxt)
            np.bitwise_and(nxt, dq, out=nxt)
            np.bitwise_xor(nxt, al, out=nxt)
            tie = np.flatnonzero(eq)
            if tie.size:
                frac = (fq.take(tie).astype(np.uint64) << s48) | (coins.take(tie.size) >> s16)
                own = tie[frac < exact.take(f.take(tie))]
                nxt[own] = c16[own]
            np.copyto(off, nxt)
            np.left_shift(off, b32, out=off)  # in int32: state << b overflows 16 bits
            if i in kept:
                np.copyto(out_rows[j], nxt)
                j += 1
            if P_:
                paths[:, i] = nxt[:P_]
        return paths

    def _scalar_block(self, words: np.ndarray, rows: list[int]) -> np.ndarray:
        R = self.replicates
        tab = self.table
        b = tab.bits
        mb = words.shape[0]
        off = self._off.tolist()
        hist: list[list[int]] = []
        if tab.kind == "direct":
            cells = memoryview(tab.cells)
            exact = memoryview(tab.exact)
            g = tab.coarse_bits
            gm = (1 << g) - 1
            coin = self._coins.next
            for vt in words.view(np.uint16)[:, :R].tolist():
                for r in range(R):
                    v = vt[r]
                    c = v >> g
                    x = off[r] + c
                    rec = cells[x]
                    fq, rq = v & gm, rec & gm
                    if fq < rq or (fq == rq and ((fq << 48) | (coin() >> 16)) < exact[x]):
                        off[r] = c << b
                    else:
                        off[r] = (rec >> g) << b
                hist.append(off[:])
        elif tab.kind == "split":
            v = words.view(np.uint16)[:, :R]
            if b < 16:
                v = v >> np.uint16(16 - b)
            cells = memoryview(tab.cells)
            m_cut = tab.mixed["cut"].tolist()
            m_hit = tab.mixed["hit"].tolist()
            m_miss = tab.mixed["miss"].tolist()
            coin = self._coins.next
            for vt in v.tolist():
                for r in range(R):
                    x = cells[off[r] + vt[r]]
                    if x < 0:
                        x = m_hit[x] if coin() < m_cut[x] else m_miss[x]
                    off[r] = x
                hist.append(off[:])  # small R: every step's states
        else:
            if self._wide_fields is None:
                self._wide_fields = tuple(memoryview(np.ascontiguousarray(tab.cells[k]))
                                          for k in ("cut", "miss", "delta"))
            wcut, miss, delta = self._wide_fields
            sh = 64 - b
            for ut in words.tolist():
                for r in range(R):
                    u = ut[r]
                    c = off[r] + (u >> sh)
                    off[r] = miss[c] + delta[c] if u < wcut[c] else miss[c]
                hist.append(off[:])
        self._off[:] = off
        H = np.array(hist, dtype=np.int64).reshape(mb, R) >> b
        if rows:
            self._rows[: len(rows)] = H[rows]
        return H[:, : self.n_paths].T.astype(np.int32)

    def _accumulate(self, k: int, k0: int) -> None:
        """Add kept rows ``self._rows[:k]`` (kept indices k0..k0+k-1) to the counters."""
        X = self._rows[:k]
        n = self.n
        self._occupancy += np.bincount(X.ravel(), minlength=n)
        nb, m = self.batches, self.batch_length
        if nb:
            ks = np.arange(k0, k0 + k)
            g = np.minimum(ks // m, nb)
            flat = X[:, : self.tracked] + self._rbase[None, :]
            flat += (g * n)[:, None]
            np.add.at(self._counts.reshape(-1), flat.ravel(), self._counts.dtype.type(1))
        self._kept += k

    def _record_paths(self, cols: np.ndarray) -> None:
        """Append columns (p, k) of states to the ring buffer of paths."""
        if not self.n_paths:
            self._path_count += cols.shape[1] if cols.ndim == 2 else 0
            return
        Lp = self.path_length
        k = cols.shape[1]
        if k >= Lp:
            cols = cols[:, -Lp:]
            start = self._path_count + k - Lp
            pos = start % Lp
            self._path_buf[:, pos:] = cols[:, : Lp - pos]
            self._path_buf[:, :pos] = cols[:, Lp - pos:]
        else:
            pos = self._path_count % Lp
            first = min(k, Lp - pos)
            self._path_buf[:, pos:pos + first] = cols[:, :first]
            if first < k:
                self._path_buf[:, : k - first] = cols[:, first:]
        self._path_count += k

    def _paths(self) -> np.ndarray:
        Lp = self.path_length
        c = self._path_count
        if c <= Lp:
            return self._path_buf[:, :c].copy()
        pos = c % Lp
        return np.concatenate([self._path_buf[:, pos:], self._path_buf[:, :pos]], axis=1)

    def _path_start(self) -> int:
        return max(0, self._path_count - self.path_length)


def _whole(name: str, value, lo: int, hi: int) -> int:
    if isinstance(value, (bool, np.bool_)):
        raise OptionError(f"{name} must be a whole number, not {value!r}")
    if isinstance(value, float) and value.is_integer():
        value = int(value)
    if not isinstance(value, (int, np.integer)):
        raise OptionError(f"{name} must be a whole number, not {value!r}")
    value = int(value)
    if not lo <= value <= hi:
        raise OptionError(f"{name} must be between {lo} and {hi:.0e}, not {value}" if hi >= 10**6
                          else f"{name} must be between {lo} and {hi}, not {value}")
    return value


def run(P, **options) -> SimulationResult:
    """Run a :class:`ReplicateSimulation` to the end and return its result."""
    return ReplicateSimulation(P, **options).run()


def iter_simulate(P, *, every: int | None = None, chunk: int | None = None,
                  **options) -> Generator[SimulationSnapshot, None, SimulationResult]:
    """A run as a generator of snapshots that returns the :class:`SimulationResult`.

    The result is the generator's return value (``StopIteration.value``;
    ``yield from`` gives it directly).  Closing the generator stops the run
    at the chunk boundary where it is suspended.  ``options`` are those of
    :class:`ReplicateSimulation`.
    """
    sim = ReplicateSimulation(P, **options)
    yield from sim.snapshots(every=every, chunk=chunk)
    return sim.result()


# ---------------------------------------------------------------------------
# simulated next to exact


#: Family-wise false-alarm rate of the per-state test "time average = long-run law".
FAMILY_ALPHA = 1e-3
#: R-hat above this says the replicates have not mixed (Vehtari et al. 2021 recommend 1.01).
RHAT_THRESHOLD = 1.01
#: p-value below which the ensemble is declared inconsistent with the exact law at its step.
ENGINE_ALPHA = 1e-6
#: Replicates needed before the MCSE uses independent replicates rather than batch means.
MIN_REPLICATES_FOR_MCSE = 16
#: Largest chain for which the exact mean of the kept draws is computed (O(n^3 log N)).
EXACT_WINDOW_STATES = 400
#: Default largest TV distance between the time average and the long-run law that counts as close.
DEFAULT_TOLERANCE = 0.05


@dataclass(frozen=True, eq=False)
class SimulationReport:
    """A run's statistics next to the exact values of the core engine.

    Attributes
    ----------
    result : SimulationResult
    step : int
        The step of the ensemble (``B + T``, or where a cancelled run stopped).
    exact_at_step : (n,) ndarray
        ``pi0 P^step`` (:func:`core.evolution.distribution_at`).
    long_run : (n,) ndarray
        The long-run (Cesaro) law from the start (:func:`core.passage.limit_law`).
    ensemble_share : (n,) ndarray
    tv_ensemble : float
        ``TV(ensemble share, pi0 P^step)``.
    tv_ensemble_noise : float
        The TV a perfect sampler would show on average at this many replicates
        (``~ sum_j sqrt(p_j (1 - p_j) / (2 pi R))``, normal approximation).
    gof : core.diagnostics.GOF
        Chi-square fit of the ensemble counts to ``pi0 P^step``.
    time_average : (n,) ndarray or None
    tv_time_average : float or None
        ``TV(time average, long-run law)``.
    window_mean : (n,) ndarray or None
        Exact expected time average of these kept draws,
        ``(1/m) sum_(j<m) pi0 P^(B+js)`` with ``m`` the kept draws (for
        chains up to 400 states); for a finished run it is the law the plan
        check (:func:`core.plan.estimate_law`, estimator ``"average"``) gives
        for the same ``B``, ``T`` and ``s``.
    tv_window : float or None
        ``TV(window_mean, long-run law)``: the start-up bias of the window itself.
    mcse : core.diagnostics.MCSE or None
        Standard errors and effective sample sizes of the time average.
    z : (n,) ndarray or None
        ``(time average - long-run law) / se`` with ``se`` the larger of the
        MCSE and the i.i.d. binomial error ``sqrt(pi_j (1 - pi_j) / (R N))`` at
        the long-run probability (a zero MCSE only says that every tracked
        replicate saw the same value, e.g. a state none of them visited).
    z_crit : float
        Bonferroni threshold for ``|z|`` at family-wise rate :data:`FAMILY_ALPHA`.
    disagree : tuple of int
        States whose ``|z|`` exceeds ``z_crit`` (or whose error is 0 while the
        average differs from the long-run law).
    rhat : (n,) ndarray or None
        Rank-normalised split R-hat (max of bulk and folded) of each state's
        indicator across the tracked replicates.
    rhat_split : (n,) ndarray or None
        Plain split R-hat.
    rhat_draws : int
        Kept draws per replicate used for R-hat (whole batches).
    rhat_notes : dict of int to str
        Why an R-hat is undefined (``nan``) or infinite.
    curve_steps, curve_tv : ndarray
        ``d_start(t) = TV(pi0 P^t, long-run law)`` on a log-spaced grid of
        ``t`` in ``0..B+T`` (:func:`core.evolution.tv_curve`).
    status : {"consistent", "biased", "uncertain", "misleading", "mismatch", "incomplete"}
        ``consistent``: no state's time average differs from the long-run law
        beyond its error, the error is below the tolerance, and R-hat <= 1.01
        (when one closed class is reached); ``biased``: a significant
        difference smaller than the tolerance (start-up bias); ``misleading``:
        a significant difference above it; ``uncertain``: no significant
        difference, but the error is too large or R-hat too high to trust it;
        ``mismatch``: the ensemble is not a sample of ``pi0 P^step`` (the
        simulation does not follow the model); ``incomplete``: no kept draw.
    verdict : str
        One line.
    findings : tuple of str
        Further plain sentences (methods, undefined values, structure).
    ids : tuple of str
    tolerance : float
    """

    result: SimulationResult
    step: int
    exact_at_step: np.ndarray
    long_run: np.ndarray
    ensemble_share: np.ndarray
    tv_ensemble: float
    tv_ensemble_noise: float
    gof: object
    time_average: np.ndarray | None
    tv_time_average: float | None
    window_mean: np.ndarray | None
    tv_window: float | None
    mcse: object
    z: np.ndarray | None
    z_crit: float
    disagree: tuple
    rhat: np.ndarray | None
    rhat_split: np.ndarray | None
    rhat_draws: int
    rhat_notes: dict
    curve_steps: np.ndarray
    curve_tv: np.ndarray
    status: str
    verdict: str
    findings: tuple
    ids: tuple = ()
    tolerance: float = DEFAULT_TOLERANCE

    @property
    def agrees(self) -> bool:
        """True when no state's time average disagrees with the long-run law."""
        return not self.disagree and self.time_average is not None

    def to_json(self, ids=None) -> dict:
        """The ``simulate --json`` document; ``ids`` name the states (default: the report's ids)."""
        r = self.result
        ids = list(self.ids or (str(i) for i in range(r.n))) if ids is None else [str(i) for i in ids]

        def per_state(v):
            return None if v is None else {i: _num(x) for i, x in zip(ids, np.asarray(v).tolist())}

        mc = self.mcse
        return {
            "steps": r.steps,
            "replicates": r.replicates,
            "burn_in": r.burn_in,
            "stride": r.stride,
            "total_steps": r.total_steps,
            "seed": r.seed,
            "start": {i: p for i, p in zip(ids, r.start.tolist()) if p > 0},
            "step": self.step,
            "cancelled": r.cancelled,
            "kept": r.kept,
            "ensemble": {i: int(c) for i, c in zip(ids, r.ensemble.tolist())},
            "ensemble_share": per_state(self.ensemble_share),
            "exact_at_T": per_state(self.exact_at_step),
            "long_run": per_state(self.long_run),
            "time_average": per_state(self.time_average),
            "window_mean": per_state(self.window_mean),
            "tv_ensemble": _num(self.tv_ensemble),
            "tv_ensemble_noise": _num(self.tv_ensemble_noise),
            "chi_square": {"statistic": _num(self.gof.statistic), "dof": self.gof.dof,
                           "pvalue": _num(self.gof.pvalue), "cells": self.gof.cells,
                           "pooled": self.gof.pooled, "impossible": self.gof.impossible},
            "tv_time_average": _num(self.tv_time_average),
            "tv_window": _num(self.tv_window),
            "mcse": per_state(mc.se) if mc is not None else None,
            "ess": per_state(mc.ess) if mc is not None else None,
            "mcse_method": mc.method if mc is not None else None,
            "z": per_state(self.z),
            "z_crit": self.z_crit,
            "tolerance": self.tolerance,
            "disagree": [ids[j] for j in self.disagree],
            "rhat": per_state(self.rhat),
            "rhat_split": per_state(self.rhat_split),
            "rhat_notes": {ids[j]: note for j, note in self.rhat_notes.items()},
            "rhat_draws": self.rhat_draws,
            "tracked": r.tracked,
            "curve": {"steps": self.curve_steps.tolist(), "tv": [_num(x) for x in self.curve_tv.tolist()]},
            "status": self.status,
            "verdict": self.verdict,
            "findings": list(self.findings),
            "engine": {"table": r.table_kind, "bits": r.table_bits, "mixed_fraction": r.mixed_fraction,
                       "elapsed_seconds": r.elapsed,
                       "replicate_steps_per_second": _num(r.step * r.replicates / r.elapsed) if r.elapsed else None},
            "memory_bytes": r.memory,
        }


def _num(x):
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def curve_grid(steps: int, points: int = 60) -> np.ndarray:
    """Sorted distinct steps ``0, 1, 2, ...`` up to ``steps``, log-spaced beyond the first few."""
    if steps <= points:
        return np.arange(steps + 1, dtype=np.int64)
    g = np.unique(np.round(np.geomspace(1, steps, points)).astype(np.int64))
    return np.concatenate([[0], g])


def _mcse_of(result: SimulationResult, mean: np.ndarray):
    from .diagnostics import batch_means_mcse, replicate_mcse

    K = result.tracked
    if result.kept < 1:
        return None
    counts = result.batch_counts
    if K >= MIN_REPLICATES_FOR_MCSE and result.kept >= 2:
        return replicate_mcse(counts.sum(axis=1), result.kept, replicates=result.replicates, mean=mean)
    g = result.complete_batches
    if g >= 1 and K * g >= 2 and result.batch_length >= 2:
        blocks = counts[:, :g, :].reshape(K * g, result.n)
        mc = batch_means_mcse(blocks, result.batch_length)
        # the batches cover the tracked replicates only; scale to the pooled estimate
        scale = math.sqrt(K / result.replicates)
        from .diagnostics import MCSE, _ess_from_se

        se = mc.se * scale
        return MCSE(mean=mean, se=se, ess=_ess_from_se(mean, se), method=mc.method, groups=mc.groups)
    if K >= 2 and result.kept >= 2:
        return replicate_mcse(counts.sum(axis=1), result.kept, replicates=result.replicates, mean=mean)
    return None


def _rhat_of(result: SimulationResult):
    """(rank R-hat, split R-hat, draws per replicate used, notes) over whole batches."""
    return _rhat_from_batches(result.batch_counts, result.complete_batches, result.batch_length)


def _rhat_from_batches(c: np.ndarray, g: int, m: int):
    from .diagnostics import indicator_rank_rhat, indicator_rhat, rhat_note

    half = g // 2
    h = half * m
    if half < 1 or h < 2:
        return None, None, 0, {}
    chains = np.concatenate([c[:, :half, :].sum(axis=1), c[:, half:2 * half, :].sum(axis=1)], axis=0)
    rr = indicator_rank_rhat(chains, h)
    rs = indicator_rhat(chains, h)
    total = chains.sum(axis=0)
    notes = {}
    for j in range(c.shape[2]):
        const = 0.0 if total[j] == 0 else (1.0 if total[j] == chains.shape[0] * h else None)
        note = rhat_note(float(rr.rhat[j]), constant_value=const)
        if note:
            notes[j] = note
    return rr.rhat, rs, 2 * h, notes


def compare(result: SimulationResult, P, *, ids=None, structure=None, tolerance: float = DEFAULT_TOLERANCE,
            curve_points: int = 60) -> SimulationReport:
    """Set a run's statistics beside the exact values.

    Parameters
    ----------
    result : SimulationResult
    P : (n, n) array_like
        The matrix simulated.
    ids : sequence of str, optional
        State ids for the report's sentences and JSON (default ``"0"``, ``"1"``...).
    structure : core.structure.Structure, optional
    tolerance : float, optional
        Largest total variation distance between the time average and the
        long-run law that is close enough in practice (default 0.05, as for
        ``check-plan``): a significant difference above it is "misleading",
        below it "biased".
    curve_points : int, optional
        Points of the ``d_start(t)`` grid.

    Returns
    -------
    SimulationReport

    Notes
    -----
    The run convention is that of :mod:`core.plan`: the ensemble is compared
    with ``pi0 P^(B+T)`` (``pi0 P^step`` for a cancelled run) and the kept
    draws' exact mean is ``(1/m) sum_(j<m) pi0 P^(B+js)``.

    The per-state test is ``|time average - long-run law| > z_crit * MCSE``
    with a Bonferroni threshold over the states at family-wise rate
    :data:`FAMILY_ALPHA`; the ensemble test is the chi-square fit to
    ``pi0 P^step`` at :data:`ENGINE_ALPHA` (replicates are independent draws
    from that law, so this checks the sampler itself).
    """
    from scipy.special import ndtri

    from .diagnostics import chisquare_gof
    from .evolution import PowerLadder, distribution_at, tv_curve, tv_distance
    from .passage import limit_law
    from .structure import classify

    P = check_matrix(P)
    ladder = PowerLadder(P)  # squares of P shared by every exact value below
    n = P.shape[0]
    if result.n != n:
        raise ValueError(f"the result is for {result.n} states, P has {n}")
    if structure is None:
        structure = classify(P)
    pi0 = np.asarray(result.start, dtype=np.float64)
    step = result.step
    exact = distribution_at(ladder, pi0, step)
    long_run = limit_law(P, pi0, structure)
    R = result.replicates
    share = result.ensemble / R
    tv_ens = tv_distance(share, exact)
    noise = float(np.sqrt(exact * (1 - exact) / (2 * np.pi * R)).sum())
    gof = chisquare_gof(result.ensemble, exact)
    grid = curve_grid(result.total_steps, curve_points)
    curve = tv_curve(ladder, pi0, grid.tolist(), target=long_run)
    tavg = result.time_average
    tv_avg = tv_distance(tavg, long_run) if tavg is not None else None
    window = None
    if tavg is not None and n <= EXACT_WINDOW_STATES:
        from .plan import average_of_powers

        # kept draws at steps B, B + s, ..., B + (kept - 1) s
        first = distribution_at(ladder, pi0, result.burn_in)
        window = first @ average_of_powers(P, result.kept, stride=result.stride)
        window = np.clip(window, 0, None)
        window /= window.sum()
    tv_win = tv_distance(window, long_run) if window is not None else None
    mc = _mcse_of(result, tavg) if tavg is not None else None
    z_crit = float(ndtri(1 - FAMILY_ALPHA / (2 * n)))
    z = None
    disagree: tuple = ()
    if mc is not None:
        diff = tavg - long_run
        # a zero MCSE only says the tracked replicates agreed: never test against less than the i.i.d.
        # error at the long-run probability itself
        se = np.maximum(mc.se, np.sqrt(np.clip(long_run * (1 - long_run), 0, None) / (R * result.kept)))
        with np.errstate(divide="ignore", invalid="ignore"):
            z = np.where(se > 0, diff / se, np.where(np.abs(diff) > 1e-12, np.sign(diff) * np.inf, 0.0))
        disagree = tuple(int(j) for j in np.flatnonzero(np.abs(z) > z_crit))
    rh, rs, rdraws, notes = _rhat_of(result)

    ids = tuple(str(i) for i in range(n)) if ids is None else tuple(str(i) for i in ids)
    if len(ids) != n:
        raise ValueError(f"{len(ids)} ids for {n} states")
    status, verdict, findings = _verdict(result, structure, ids, tolerance, exact, long_run, gof, tv_ens, tavg,
                                         tv_avg, window, tv_win, mc, z, z_crit, disagree, rh, notes, curve)
    return SimulationReport(
        result=result, step=step, exact_at_step=_frozen(exact), long_run=_frozen(long_run),
        ensemble_share=_frozen(share), tv_ensemble=tv_ens, tv_ensemble_noise=noise, gof=gof,
        time_average=tavg, tv_time_average=tv_avg, window_mean=window, tv_window=tv_win, mcse=mc, z=z,
        z_crit=z_crit, disagree=disagree, rhat=rh, rhat_split=rs, rhat_draws=rdraws, rhat_notes=notes,
        curve_steps=grid, curve_tv=curve, status=status, verdict=verdict, findings=tuple(findings), ids=ids,
        tolerance=tolerance,
    )


def _verdict(result, structure, ids, tolerance, exact, long_run, gof, tv_ens, tavg, tv_avg, window, tv_win, mc,
             z, z_crit, disagree, rh, notes, curve):
    findings: list[str] = []
    R, total = result.replicates, result.total_steps
    # structure hints
    reached = [k for k in structure.closed if long_run[list(structure.classes[k].states)].sum() > 0]
    several = len(reached) > 1
    if several:
        findings.append(
            f"{len(reached)} closed classes can be reached from the start: each replicate settles in one of them, "
            "so replicates legitimately disagree (R-hat stays large however long the run) and the pooled "
            "average estimates their mixture.")
    periodic = [structure.classes[k].period for k in reached if (structure.classes[k].period or 1) > 1]
    if periodic:
        findings.append(
            f"the chain is periodic (period {max(periodic)}): pi0 P^t keeps cycling and does not converge, so the "
            "ensemble is compared with pi0 P^(B+T); only the time average tends to the long-run law.")
    if result.cancelled:
        findings.append(f"the run was cancelled at step {result.step} of {total} (burn-in {result.burn_in} "
                        f"+ {result.steps}); statistics cover the steps done.")
    if mc is not None:
        findings.append(f"Monte Carlo standard errors by {mc.method}"
                        + (f" ({result.tracked} tracked replicates of {R})" if "replicates" in mc.method else "")
                        + "; ESS = p(1-p)/MCSE^2 per state.")
    if result.tracked < R:
        findings.append(f"R-hat, ESS and MCSE use the first {result.tracked} of the {R} replicates "
                        "(their own occupancy counts are kept; raise --tracked for more).")
    for j, note in sorted(notes.items()):
        findings.append(f"R-hat of state {ids[j]!r}: {note}.")
    if window is not None and tv_win is not None:
        if tv_win < TV_ROUNDING:  # round-off of an exact zero, or as good
            findings.append("exactly, the kept draws average to the long-run law (TV below 1e-12): this burn-in "
                            "and run length leave no start-up bias.")
        else:
            findings.append(f"exactly, the kept draws average to a law at TV {tv_win:.3g} from the long-run law "
                            "(the start-up bias of this burn-in and run length).")
    d_end = "is below 1e-12 (zero to rounding)" if curve[-1] < TV_ROUNDING else f"= {curve[-1]:.3g}"
    findings.append(f"d_start(B+T) = TV(pi0 P^{total}, long-run law) {d_end}.")
    # the verdict
    if gof.impossible or (np.isfinite(gof.pvalue) and gof.pvalue < ENGINE_ALPHA):
        why = ("replicates sit in states that pi0 P^t gives probability 0" if gof.impossible
               else f"chi-square p = {gof.pvalue:.2g}")
        return "mismatch", (f"MISMATCH: the ensemble at step {result.step} is not a sample of the exact law "
                            f"pi0 P^t ({why}); the simulation does not follow the model."), findings
    if tavg is None:
        return "incomplete", "INCOMPLETE: no draw was kept yet (the run stopped inside the burn-in).", findings
    worst_rhat = np.nanmax(rh) if rh is not None and not np.all(np.isnan(rh)) else None
    rhat_high = worst_rhat is not None and worst_rhat > RHAT_THRESHOLD and not several
    bias_hint = ""
    if tv_win is not None:
        bias_hint = f"; this burn-in and run length alone give TV {format_tv(tv_win)} (exact)"
    if disagree:
        k = len(disagree)
        beyond = f"{k} state{'s' if k != 1 else ''} beyond {z_crit:.2f} standard errors"
        if tv_avg > tolerance:
            msg = (f"MISLEADING: the time average is far from the long-run law: TV {tv_avg:.3g} > tolerance "
                   f"{tolerance:g}, {beyond}{bias_hint}; the run is too short or its burn-in too small")
            if worst_rhat is not None and worst_rhat > RHAT_THRESHOLD:
                msg += f"; R-hat up to {_fmt_rhat(worst_rhat)}"
            return "misleading", msg + ".", findings
        return "biased", (f"BIASED: the time average is close to the long-run law (TV {tv_avg:.3g} <= {tolerance:g}) "
                          f"but off beyond its Monte Carlo error, {beyond}{bias_hint}; a longer burn-in removes "
                          "start-up bias."), findings
    if mc is None:
        return "uncertain", (f"UNCERTAIN: the time average is at TV {tv_avg:.3g} from the long-run law, but there "
                             "are too few replicates or batches to estimate its error."), findings
    if tv_avg > tolerance:
        return "uncertain", (f"UNCERTAIN: the time average is within its Monte Carlo error of the long-run law, "
                             f"but that error is large (TV {tv_avg:.3g} > tolerance {tolerance:g}): run longer "
                             "or more replicates."), findings
    if rhat_high:
        return "uncertain", (f"UNCERTAIN: the time average is within its errors of the long-run law (TV "
                             f"{tv_avg:.3g}), but R-hat up to {_fmt_rhat(worst_rhat)} (above {RHAT_THRESHOLD}) "
                             "says the replicates have not mixed well yet."), findings
    tail = f" and R-hat <= {RHAT_THRESHOLD}" if worst_rhat is not None and not several else ""
    return "consistent", (f"CONSISTENT: the time average matches the long-run law within its Monte Carlo error "
                          f"(TV {tv_avg:.3g}){tail}."), findings


def _fmt_rhat(x: float) -> str:
    return "infinity" if np.isinf(x) else f"{x:.4g}"
