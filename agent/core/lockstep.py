"""The tick's common case cut as one matrix: assets whose channels move in lockstep.

On a gateway most ticks close, for most assets, exactly the next tumbling window, with
every channel of the asset at one rate and holding the same samples of it. For those
assets a window is a [channels, samples] slice of the asset's store, and the slices of
all of them stack into one matrix that the feature pass takes whole; what is left to
do per asset is to move two indices. `cut_lockstep` does that cut; every other
assembler is returned untouched, for `close_many`.

An assembler is cut here when all of these hold at `now`:

* its windows are placed already, tumbling (`length_s == hop_s`), and no channel
  holds samples out of time order;
* all its channels have one rate (one store);
* exactly its next window is due (not also the one after it);
* its rows are in step (each channel's pending samples sit at the same indices) and
  within the store's gather bound;
* every channel holds the same number c > 0 of samples before the window's end, and
  c meets `min_coverage` (the window is complete).

The window cut is the one `close_due(now)` would close, with the same samples, and
the assembler is left as `close_due` leaves it (tested against it). Pure.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence

import numpy as np

from agent.core.features import stack_rows
from agent.core.windows.assembler import WindowAssembler, _Group


class LockstepCut:
    """The windows of several assets with the same number of channels and samples:
    `items[j]` is (position of the assembler in the list given, window start, window
    end) and owns rows `j * n_ch` to `(j + 1) * n_ch` of `values` [items * n_ch, width]
    in channel order.

    `values` lives in a work array of this thread that the next cut reuses: read it
    before cutting again."""

    __slots__ = ("items", "n_ch", "values", "width")

    def __init__(self, items: list[tuple[int, float, float]], values: np.ndarray,
                 n_ch: int, width: int) -> None:
        self.items = items
        self.values = values
        self.n_ch = n_ch
        self.width = width


# What a qualifying assembler is carried as until its cut is made:
# (position, window start, window end, its store, the rows' first pending index).
_Item = tuple[int, float, float, _Group, int]


def _candidate(a: WindowAssembler, now: float) -> tuple[float, float, _Group, int, int] | None:
    """(start, end, store, first pending index, pending per row) when `a` meets every
    condition but the count below the end, else None."""
    k = a._next_k
    if k is None or a._span_k != 1 or a._any_unsorted or len(a._groups) != 1:
        return None
    # `close_due`'s readiness test (`_due` on `_reach(now)`), spelt out: the window's
    # own thresholds are kept by `_set_next` as `_due_ts` and `_due_reach`.
    max_ts = a._max_ts
    last = a._last_arrival
    reach = -math.inf if last == -math.inf else max_ts + max(0.0, now - last)
    if max_ts < a._due_ts and reach < a._due_reach:
        return None  # not due
    cfg = a.cfg
    hop = cfg.hop_s
    after = (k + 2) * hop
    if max_ts >= after + cfg.lateness_s or reach >= after + cfg.timeout_s:
        return None  # the next window is due too
    g = a._groups[0]
    lo, hi = g.lo, g.hi
    lo0, hi0 = lo[0], hi[0]
    m = hi0 - lo0
    if m <= 0 or m > g.bound or lo.count(lo0) != len(lo) or hi.count(hi0) != len(hi):
        return None
    return k * hop, (k + 1) * hop, g, lo0, m


def cut_lockstep(assemblers: Sequence[WindowAssembler], candidates: Iterable[int],
                 now: float) -> tuple[list[LockstepCut], list[int]]:
    """Close the due window of every assembler among `candidates` (positions in
    `assemblers`) that is in lockstep (module docstring); return the cuts, one per
    (channels, samples) shape, and the candidates left for `close_many`, untouched."""
    rest: list[int] = []
    ready: dict[tuple[int, int], list[_Item]] = {}
    # Rows holding samples past the window's end too (the next window's first samples
    # arrived): counted below, together, per pending width.
    unsure: dict[int, list[_Item]] = {}
    for i in candidates:
        a = assemblers[i]
        try:
            got = _candidate(a, now)
        except Exception:  # close_many meets it again, and fails that asset alone
            got = None
        if got is None:
            rest.append(i)
            continue
        start, end, g, lo0, m = got
        if a._max_ts < end:  # every pending sample is before the end: all m count
            if g.expected and m / g.expected < a.cfg.min_coverage:
                rest.append(i)  # incomplete: close_due closes and counts it
            else:
                ready.setdefault((len(g.chans), m), []).append((i, start, end, g, lo0))
        else:
            unsure.setdefault(m, []).append((i, start, end, g, lo0))
    for m, members in unsure.items():
        t = np.concatenate([g.ts[:, lo0:lo0 + m] for _, _, _, g, lo0 in members])
        sizes = [len(g.chans) for _, _, _, g, _ in members]
        ends = np.repeat(np.array([it[2] for it in members]), sizes)
        counts = (t < ends[:, None]).sum(axis=1)
        offs = np.zeros(len(sizes), dtype=np.int64)
        np.cumsum(sizes[:-1], out=offs[1:])
        lows = np.minimum.reduceat(counts, offs).tolist()
        highs = np.maximum.reduceat(counts, offs).tolist()
        for it, n, c, top in zip(members, sizes, lows, highs, strict=True):
            a = assemblers[it[0]]
            exp = it[3].expected
            if c != top or c == 0 or (exp and c / exp < a.cfg.min_coverage):
                rest.append(it[0])
            else:
                ready.setdefault((n, c), []).append(it)
    cuts = []
    for ci, ((n, c), members) in enumerate(ready.items()):
        # A work array of its own per cut: the pipeline's general path stacks its
        # windows in the tick too, before these are read.
        values = stack_rows([g.vals[:, lo0:lo0 + c] for _, _, _, g, lo0 in members],
                            buffer=f"lockstep{ci}")
        if len(members) == 1:
            values = values.copy()  # a view of the store, which the next samples overwrite
        for i, _, _, g, lo0 in members:
            a = assemblers[i]
            assert a._next_k is not None
            a._set_next(a._next_k + 1)
            g.lo = [lo0 + c] * n  # rows in step stay in step
        cuts.append(LockstepCut([(i, s, e) for i, s, e, _, _ in members], values, n, c))
    return cuts, rest
