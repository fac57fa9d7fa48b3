"""The joint cut (`batch.close_many`) of windows whose rate groups' rows are in step,
each holding the same number of samples before the window's end (`close_whole`: one
copy per segment length, every block rows of it; when every asset's groups are alike,
the windows are those of one `RowsCut`, their blocks made only if read), and its
commonest shape planned in one loop (`plan_steady`): an asset whose next tumbling
window is due with every pending sample of every rate group before its end. Pure.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from itertools import repeat
from operator import attrgetter, eq, is_, itemgetter

import numpy as np

from agent.core.windows.assembler import (
    AssembleResult,
    Block,
    ClosedWindow,
    WindowAssembler,
)
from agent.core.windows.closed import RowsCut
from agent.core.windows.counting import Drops, Item
from agent.core.windows.store import _Group

# What `plan_steady` keeps of an assembler whose window it cuts: its position, the
# assembler, the window's start and end, and per rate group (the group, its first
# pending index, the samples each of its rows holds in the window): an `Item`.
_Steady = Item
_ByM = dict[int, list[tuple[_Group, int, _Steady]]]


def plan_steady(assemblers: Sequence[WindowAssembler], now: float,
                 results: list[AssembleResult | None]
                 ) -> tuple[list[int], list[int], list[_Steady]]:
    """The first pass of `close_many` over the usual shape, in one loop: an assembler
    whose next tumbling window is due with every pending sample before its end, in
    every rate group the same number m > 0 in every row and the rows starting in step
    (`_plan`'s `full` item), kept in order for `close_whole`; one with nothing due gets
    an empty result. Returns the positions of every other shape (for
    `_close_next`), those with a window after the kept one due too, and the kept."""
    others: list[int] = []
    more: list[int] = []
    steady: list[_Steady] = []
    for i, a in enumerate(assemblers):
        try:
            k = a._next_k
            if k is None or a._span_k != 1 or a._any_unsorted:
                others.append(i)
                continue
            max_ts = a._max_ts
            idle = now - a._last_arrival
            reach = (max_ts + idle if idle != math.inf else -math.inf) if idle > 0.0 \
                else max_ts
            if not (max_ts >= a._due_ts or reach >= a._due_reach):
                results[i] = AssembleResult()
                continue
            hop = a.cfg.hop_s
            end = (k + 1) * hop  # as `_bounds`
            if max_ts >= end:
                others.append(i)
                continue
            # Per rate group (the group, its first pending index, m) while every
            # group's rows start in step and hold the same number m > 0 of samples.
            spans: list[tuple[_Group, int, int]] = []
            for g in a._groups:
                lo, hi = g.lo, g.hi
                lo0, n = lo[0], len(lo)
                m = hi[0] - lo0
                if m <= 0 or (n > 1 and (lo.count(lo0) != n or hi.count(lo0 + m) != n)):
                    break
                spans.append((g, lo0, m))
            if len(spans) != len(a._groups):  # a group out of step or empty
                others.append(i)
                continue
            steady.append((i, a, k * hop, end, spans))
            if max_ts >= a._due2_ts or reach >= a._due2_reach:
                more.append(i)
        except Exception:  # `_close_next` plans it again, contained (its error its result)
            others.append(i)
    return others, more, steady


def _times(gs: list[tuple[_Group, int, _Steady]],
           views: list[tuple[np.ndarray, np.ndarray]]
           ) -> tuple[np.ndarray | None, np.ndarray | None]:
    """The times of the groups `gs` keeping them (`views`: each group's (values,
    times) of the window), stacked (None when none keeps them); and the same when every
    group keeps them (row for row with the values' copy), else None."""
    keeps = list(map(_KEEPS, map(_GROUP, gs)))
    if True not in keeps:
        return None, None
    if False not in keeps:
        t = np.concatenate(list(map(_TIMES, views)))
        return t, t
    return np.concatenate([t for (_, t), keep in zip(views, keeps, strict=True) if keep]), None


_GROUP, _KEEPS = itemgetter(0), attrgetter("keep_times")
_VALUES, _TIMES = itemgetter(0), itemgetter(1)  # of a group's (values, times) views
_POS = attrgetter("pos")  # of a _Group
_ASM, _SHAPE = itemgetter(1), attrgetter("_shape")  # of an item, of its assembler


class _Cut:
    """`close_whole`'s copy of every member's rows of one segment length: the values,
    the times of the members keeping them, the times as rows of one matrix beside the
    values (only when every member kept them), where the next member's rows start."""

    __slots__ = ("off", "t", "t_off", "tb", "v")

    def __init__(self, v: np.ndarray, t: np.ndarray | None, tb: np.ndarray | None) -> None:
        self.v, self.t, self.tb = v, t, tb
        self.off = self.t_off = 0


def close_whole(items: list[Item], results: list[AssembleResult | None], drops: Drops
                ) -> None:
    """The joint cut of items whose every rate group's rows are in step with m > 0
    samples before the window's end (all it cuts: the spans' m): one copy per segment
    length (the items' groups by m, in item order), every block rows of that copy
    (alike items' windows: one `RowsCut`, `_rows_cut`). Each group's rows then drop
    those m samples, or for a hopping window what `drops` says."""
    by_m: _ByM = {}
    for item in items:
        for g, lo0, m in item[4]:
            got = by_m.get(m)
            if got is None:
                got = by_m[m] = []
            got.append((g, lo0, item))
    cuts: dict[int, _Cut] = {}
    for m, gs in by_m.items():
        # Each group's rows as views kept from its last window cut there (`_Group.span`).
        views = [g.views.get((lo0, m)) or g.span(lo0, m) for g, lo0, _ in gs]
        cuts[m] = _Cut(np.concatenate(list(map(_VALUES, views))), *_times(gs, views))
    rc = None if drops else _rows_cut(items, by_m, cuts)
    if rc is not None:
        _close_alike(items, results, rc)
        return
    for i, a, start, end, spans in items:
        drop = drops.get(i) if drops else None
        min_cov = a.cfg.min_coverage
        complete = True
        cov = 1.0
        blocks = []
        for gi, (g, lo0, m) in enumerate(spans):
            cut = cuts[m]
            v, t, off = cut.v, cut.t, cut.off
            chans = g.chans
            n = len(chans)
            full = (m,) * n  # the counts (cheaper made than looked up)
            if cut.tb is not None:  # every member's times, row for row with `v`
                blocks.append(Block.rows_of(v, off, chans, full, cut.tb))
            elif t is not None and g.keep_times:
                t_off = cut.t_off
                blocks.append(Block(chans, t[t_off:t_off + n], v[off:off + n], full, True, v,
                                    off, None))
                cut.t_off = t_off + n
            else:
                blocks.append(Block.rows_of(v, off, chans, full))
            cut.off = off + n
            exp = g.expected
            c = m / exp if exp else 1.0
            cov = min(cov, c) if gi else c
            if exp and c < min_cov:
                complete = False
            g.lo = [lo0 + (m if drop is None else drop[gi])] * n  # still in step
        a._step_next()
        results[i] = AssembleResult(None, [ClosedWindow.of_blocks(
            start, end, complete, tuple(blocks), a._expected, cov)])


def _rows_cut(items: list[Item], by_m: _ByM, cuts: dict[int, _Cut]) -> RowsCut | None:
    """The cut as a `RowsCut` when its windows are alike: every item's assembler has
    groups of the same rows, and group for group the same m as the first item's (one
    group per m), and every group of one m keeps its times or none does; else None."""
    spans0 = items[0][4]
    n, shape = len(items), items[0][1]._shape
    if len(by_m) != len(spans0) or len(shape) != len(spans0) \
            or not all(map(is_, map(_SHAPE, map(_ASM, items)), repeat(shape))):
        return None
    bases: list[np.ndarray] = []
    tbases: list[np.ndarray | None] = []
    for b, (_, _, m) in enumerate(spans0):
        gs, cut = by_m[m], cuts[m]
        # n groups of this m, each one its item's group b (an item has one), in item
        # order: item j's rows of the cut start at j * shape[b].
        if (len(gs) != n or (cut.t is not None and cut.tb is None)
                or not all(map(eq, map(_POS, map(_GROUP, gs)), repeat(b)))):
            return None
        bases.append(cut.v)
        tbases.append(cut.tb)
    return RowsCut(tuple(bases), tuple(tbases), shape, n)


def _close_alike(items: list[Item], results: list[AssembleResult | None], rc: RowsCut
                 ) -> None:
    """`close_whole` of items `_rows_cut` found alike: item j's window is window j of
    `rc`, each group's rows drop the m samples cut."""
    ms = tuple(m for _, _, m in items[0][4])
    for j, (i, a, start, end, spans) in enumerate(items):
        for g, lo0, m in spans:
            g.lo = [lo0 + m] * len(g.chans)  # still in step
        got = a._covs.get(ms)
        if got is None:
            got = _coverage(a, ms)
        a._step_next()
        results[i] = AssembleResult(None, [ClosedWindow.of_cut(
            start, end, got[0], rc, j, a._chans, a._expected, got[1])])


def _coverage(a: WindowAssembler, ms: tuple[int, ...]) -> tuple[bool, float]:
    """Whether a window of `a` whose groups hold `ms` samples per row is complete, and
    its lowest coverage (as `close_whole` finds them group by group); kept in `a._covs`."""
    min_cov = a.cfg.min_coverage
    complete = True
    cov = 1.0
    for gi, (g, m) in enumerate(zip(a._groups, ms, strict=True)):
        exp = g.expected
        c = m / exp if exp else 1.0
        cov = min(cov, c) if gi else c
        if exp and c < min_cov:
            complete = False
    if len(a._covs) > 16:
        a._covs.clear()
    got = a._covs[ms] = (complete, cov)
    return got
