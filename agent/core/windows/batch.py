"""The joint cut: every due window of many assemblers at once (`close_many`).

The usual case of a tick (exactly the next window of an asset due, its rows starting
in step) is cut for all such assets together: one copy per sample count over the
stacked rows of every asset, instead of a handful of numpy calls per asset; the
blocks of the cut are rows of one matrix (`Block.base`), which the feature pass takes
whole. Its commonest shape (every rate group's rows in step, every pending sample in
the window) is planned in one loop over the assemblers and cut in one more
(`steady.py`). When samples
past the window's end are pending (a block straddling it, one channel's next reading
in, a hopping window), the rows are first counted for all such assets at once, in a
band around where a sensor at its rate puts the end (`row_counts`). Rows starting
apart are compacted first; an asset with several windows due has them cut one pass
after another. The first window, gaps and what the counting cannot tell go through
`WindowAssembler.close_due`. Pure.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from agent.core.windows.assembler import (
    AssembleResult,
    Block,
    ClosedWindow,
    WindowAssembler,
)
from agent.core.windows.counting import Drops, Item, row_counts
from agent.core.windows.steady import close_whole, plan_steady
from agent.core.windows.store import _Group

# What `_plan` found for an assembler (`_MORE`: placed, and a window after it is due).
_NOTHING, _PLACED, _ALONE, _MORE = 0, 1, 2, 3


def _plan(a: WindowAssembler, now: float, i: int, full: list[Item],
          rest: list[Item]) -> int:
    """Whether `a` (position i) has nothing due at `now` (`_NOTHING`), its next window
    (tumbling, or hopping a whole number of hops long; every rate group's rows are
    made to start in step) to cut (`_PLACED`, or `_MORE` when the window after it is
    due too: its item put in `full` when tumbling with every pending sample of every
    group before the end, some in each and as many in each row, else in `rest`, with
    each group's most pending in a row), or anything else (`_ALONE`: `close_due`).
    Reads only what the assembler keeps for it (`_set_next`: when its next window and
    the one after are due), as `_due(end, _reach(now))` would compute them."""
    k, span = a._next_k, a._span_k
    if k is None or span is None or a._any_unsorted:
        return _ALONE
    max_ts = a._max_ts
    idle = now - a._last_arrival
    reach = (max_ts + idle if idle != math.inf else -math.inf) if idle > 0.0 else max_ts
    if not (max_ts >= a._due_ts or reach >= a._due_reach):
        return _NOTHING
    more = max_ts >= a._due2_ts or reach >= a._due2_reach
    spans = []
    some = True  # every group has samples pending, as many in each of its rows
    for g in a._groups:
        lo, hi = g.lo, g.hi
        lo0 = lo[0]
        n = len(lo)
        if lo.count(lo0) != n:  # rows starting apart (each dropped its own count)
            g.room(0, 0)  # compacted: every row from 0, the same samples
            lo, hi, lo0 = g.lo, g.hi, 0
        hi0 = hi[0]
        m = hi0 - lo0
        if hi.count(hi0) != n:  # rows holding different numbers: m the most
            m = max(hi) - lo0
            some = False
        spans.append((g, lo0, m))
        if not m:
            some = False
    hop = a.cfg.hop_s
    end = (k + span) * hop  # as `_bounds`
    (full if span == 1 and some and max_ts < end else rest).append(
        (i, a, k * hop, end, spans))
    return _MORE if more else _PLACED


def close_many(assemblers: Sequence[WindowAssembler], now: float) -> list[AssembleResult]:
    """`close_due(now)` of every assembler, the same windows in the same state after.

    The usual case of a tick (the next window of an asset due, its rows starting in
    step) is cut for all such assets together (module docstring), window after window
    while an asset has more due; everything else goes through `close_due`.

    An assembler that raises fails alone: its result is an empty one carrying the
    exception (`AssembleResult.error`); the others' windows are cut as usual.
    """
    results: list[AssembleResult | None] = [None] * len(assemblers)
    todo, more, steady = plan_steady(assemblers, now, results)
    if not todo:
        try:
            close_whole(steady, results, {})
        except Exception:  # each unfinished alone, contained
            for i, a, *_ in steady:
                if results[i] is None:
                    results[i] = _alone(a, now)
    else:  # cut with the others' (one matrix in the assemblers' order)
        more = sorted((*more, *_close_next(assemblers, todo, now, results, steady)))
    todo = [i for i in more if results[i].error is None]  # type: ignore[union-attr]
    while todo:
        more = _close_next(assemblers, todo, now, results)
        todo = [i for i in more if results[i].error is None]  # type: ignore[union-attr]
    return [r if r is not None else AssembleResult() for r in results]


def _close_next(assemblers: Sequence[WindowAssembler], todo: Sequence[int], now: float,
                results: list[AssembleResult | None], seed: Sequence[Item] = ()
                ) -> list[int]:
    """The next due window of each assembler at the positions `todo` (the joint cut
    where it can, else `close_due`), and of the items `seed` (planned already, with
    every pending sample before the end), added to `results`; the positions with a
    window after it due too."""
    got: list[AssembleResult | None] = [None] * len(assemblers)
    # The joint cut's items: those with every pending sample before the window's end
    # (`full`), the others (counted first, `_split`).
    full: list[Item] = list(seed)
    others: list[Item] = []
    more: list[int] = []
    for i in todo:
        a = assemblers[i]
        try:
            plan = _plan(a, now, i, full, others)
            if plan == _ALONE:
                got[i] = a.close_due(now)
            elif plan == _NOTHING:
                got[i] = AssembleResult()
            elif plan == _MORE:
                more.append(i)
        except Exception as exc:
            got[i] = AssembleResult(exc)
    try:
        whole, rest, alone, counts, drops = _split(others)
        for i, a in alone:  # hopping windows that do not fit the joint cut
            got[i] = _alone(a, now)
        if full and (whole or seed):  # the assemblers' order: the feature pass's aligned path
            close_whole(sorted(full + whole, key=_position), got, drops)
        elif full or whole:
            close_whole(full or whole, got, drops)
        if rest:
            _finish(rest, _cut_blocks(rest, counts), got, now)
    except Exception:
        # The joint cut failed before it changed any assembler, or after finishing some
        # of them: the others each alone, contained.
        for i, a, *_ in (*full, *others):
            if got[i] is None:
                got[i] = _alone(a, now)
    for i in (*todo, *(it[0] for it in seed)) if seed else todo:
        r, had = got[i], results[i]
        if r is None:
            r = got[i] = AssembleResult()
        if had is None:
            results[i] = r
        else:  # an earlier window of this call
            had.windows.extend(r.windows)
            had.empty_skipped += r.empty_skipped
            had.late_samples += r.late_samples
            had.error = r.error
    return more


def _alone(a: WindowAssembler, now: float) -> AssembleResult:
    """`a.close_due(now)`, or the exception it raised as its result."""
    try:
        return a.close_due(now)
    except Exception as exc:
        return AssembleResult(exc)


def _position(item: Item) -> int:
    return item[0]


def _split(items: list[Item]) -> tuple[
        list[Item], list[Item], list[tuple[int, WindowAssembler]],
        dict[int, list[list[int]]], Drops]:
    """`close_many`'s items that are not full as those cut together by
    `close_whole`: those whose every group's rows all hold the same number c > 0 of
    samples before the end (the next window's samples are
    pending, or the window hops: counted first, `row_counts`), as if c were all they
    held (a hopping window's rows also dropping alike, `drops`); the rest of the
    tumbling ones (a group without samples in the window, rows holding different
    counts), for `_cut_blocks` + `_finish`, with the counts; those `row_counts` could
    not count and the rest of the hopping ones, for `close_due`."""
    got = row_counts(items)
    if got.unsure:  # counted again from the first sample on (samples lost, say)
        again = row_counts([it for it in items if it[0] in got.unsure], wide=True)
        got.merge(again)
    whole: list[Item] = []
    rest: list[Item] = []
    alone: list[tuple[int, WindowAssembler]] = []
    unsure, uneven, cut, drops = got.unsure, got.uneven, got.cut, got.drops
    for item in items:
        i = item[0]
        if (unsure and i in unsure) or (uneven and i in uneven and i in drops):
            alone.append((i, item[1]))
        elif uneven and i in uneven:
            rest.append(item)
        else:
            whole.append((*item[:4], cut[i]))
    return whole, rest, alone, got.rows, drops


_FULL: dict[tuple[int, int], tuple[int, ...]] = {}


def _full(n: int, m: int) -> tuple[int, ...]:
    """The counts of a block of n rows each holding m samples (shared: read-only)."""
    got = _FULL.get((n, m))
    if got is None:
        if len(_FULL) > 64:
            _FULL.clear()
        got = _FULL[(n, m)] = (m,) * n
    return got


def _cut_blocks(fast: list[Item], counts: dict[int, list[list[int]]]
                ) -> list[list[Block | None]]:
    """The blocks of every (item, group) with samples, `counts` the rows' counts before
    the window's end (`row_counts`). A group whose rows all hold the same number c of
    samples before the end is cut with every other such group of that c as rows of one
    copy, its block a row range of it (`Block.base`); one whose rows hold different
    counts gets a block of its own."""
    blocks: list[list[Block | None]] = [[None] * len(it[4]) for it in fast]
    # By c, in item order: (item, group index, the group, its first pending index).
    by_c: dict[int, list[tuple[int, int, _Group, int]]] = {}
    for fi, (i, _, _, _, spans) in enumerate(fast):
        for gi, (g, lo0, m) in enumerate(spans):
            if not m:
                continue
            cl = counts[i][gi]
            c = cl[0]
            if cl.count(c) != len(cl):  # rows out of step in time
                mc = max(cl)
                blocks[fi][gi] = Block(g.chans, g.ts[:, lo0:lo0 + mc].copy(),
                                       g.vals[:, lo0:lo0 + mc].copy(), cl)
                continue
            if c:
                by_c.setdefault(c, []).append((fi, gi, g, lo0))
    for c, cut in by_c.items():
        v = np.concatenate([mb[2].vals[:, mb[3]:mb[3] + c] for mb in cut])
        kept = [mb for mb in cut if mb[2].keep_times]
        t = np.concatenate([mb[2].ts[:, mb[3]:mb[3] + c] for mb in kept]) if kept else None
        tb = t if len(kept) == len(cut) else None  # as in `steady._times`
        off = t_off = 0
        for fi, gi, g, _ in cut:
            n = len(g.chans)
            if t is not None and g.keep_times:
                blocks[fi][gi] = Block(g.chans, t[t_off:t_off + n], v[off:off + n],
                                       _full(n, c), True, v, off, tb)
                t_off += n
            else:
                blocks[fi][gi] = Block.rows_of(v, off, g.chans, _full(n, c))
            off += n
    return blocks


def _finish(fast: list[Item], blocks: list[list[Block | None]],
            results: list[AssembleResult | None], now: float) -> None:
    """Each item's window from its blocks, and its assembler moved past it."""
    for (i, a, start, end, spans), bl in zip(fast, blocks, strict=True):
        complete = True
        total = 0
        cov = 1.0
        min_cov = a.cfg.min_coverage
        for gi, (g, _, _) in enumerate(spans):
            blk = bl[gi]
            if blk is None:
                empty = np.empty((len(g.chans), 0))
                blk = bl[gi] = Block(g.chans, empty, empty, [0] * len(g.chans))
            if blk.base is not None:  # a row range of one copy: every row holds c samples
                low = blk.counts[0]
                total += low
            else:
                low = min(blk.counts)
                total += sum(blk.counts)
            c = low / g.expected if g.expected else 1.0
            cov = min(cov, c) if gi else c
            if g.expected and c < min_cov:
                complete = False
        if total == 0:  # an empty window: the gap logic of close_due decides
            results[i] = _alone(a, now)
            continue
        w = ClosedWindow.of_blocks(start, end, complete, tuple(bl), a._expected,  # type: ignore[arg-type]
                                   cov)
        assert a._next_k is not None
        a._set_next(a._next_k + 1)
        for (g, lo0, _), blk in zip(spans, bl, strict=True):
            assert blk is not None
            if blk.base is not None:  # rows in step stay in step
                g.lo = [lo0 + blk.counts[0]] * len(g.chans)
            elif blk.uniform:
                g.lo = [lo0 + blk.values.shape[1]] * len(g.chans)
            else:
                g.drop(blk.counts)
        results[i] = AssembleResult(None, [w])
