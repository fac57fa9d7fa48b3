"""The joint cut: every due window of many assemblers at once (`close_many`).

The usual case of a tick (exactly the next tumbling window of an asset due, its rows
in step) is cut for all such assets together: one copy per segment length over the
stacked rows of every asset, instead of a handful of numpy calls per asset; the
blocks of the cut are rows of one matrix (`Block.base`), which the feature pass takes
whole. Everything else goes through `WindowAssembler.close_due`. Pure.
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
    _Group,
)
from agent.core.windows.closed import _no_times

# One item of the joint cut: (position in `close_many`'s list, the assembler, the
# window's start and end, per rate group (the group, its first pending index, how many
# samples each of its rows holds)).
_Item = tuple[int, WindowAssembler, float, float, list[tuple[_Group, int, int]]]


def _plan(a: WindowAssembler, now: float) -> list[tuple[_Group, int, int]] | bool:
    """Whether `a` has nothing due at `now` (False), exactly its next tumbling window
    with every rate group's rows in step (per group: the group, its first pending index
    and how many are pending), or anything else (True: `close_due`). Reads only what
    the assembler keeps for it (`_set_next`: when its next window and the one after are
    due), as `_due(end, _reach(now))` would compute them."""
    if a._next_k is None or a._span_k != 1 or a._any_unsorted:
        return True
    max_ts = a._max_ts
    idle = now - a._last_arrival
    reach = (max_ts + idle if idle != math.inf else -math.inf) if idle > 0.0 else max_ts
    if not (max_ts >= a._due_ts or reach >= a._due_reach):
        return False
    if max_ts >= a._due2_ts or reach >= a._due2_reach:
        return True
    spans = []
    for g in a._groups:
        lo, hi = g.lo, g.hi
        lo0, hi0 = lo[0], hi[0]
        n = len(lo)
        if lo.count(lo0) != n or hi.count(hi0) != n or hi0 - lo0 > g.bound:
            return True
        spans.append((g, lo0, hi0 - lo0))
    return spans


def close_many(assemblers: Sequence[WindowAssembler], now: float) -> list[AssembleResult]:
    """`close_due(now)` of every assembler, the same windows in the same state after.

    The usual case of a tick (exactly the next tumbling window of an asset due, its
    rows in step) is cut for all such assets together: one copy per segment length
    over the stacked rows of every asset, instead of a handful of numpy calls per
    asset. Everything else goes through `close_due`.

    An assembler that raises fails alone: its result is an empty one carrying the
    exception (`AssembleResult.error`); the others' windows are cut as usual.
    """
    results: list[AssembleResult | None] = [None] * len(assemblers)
    fast: list[_Item] = []
    # The simplest items by segment length: one rate group, every pending sample in
    # the window, no timestamps kept (`_close_simple`).
    simple: dict[int, list[_Simple]] = {}
    for i, a in enumerate(assemblers):
        try:
            plan = _plan(a, now)
            if plan is True:
                results[i] = a.close_due(now)
            elif plan is False:
                results[i] = AssembleResult()
            else:
                k = a._next_k
                assert k is not None
                hop = a.cfg.hop_s
                end = (k + 1) * hop
                if len(plan) == 1:
                    g, lo0, m = plan[0]
                    if m and not g.keep_times and a._max_ts < end:
                        got = simple.get(m)
                        if got is None:
                            got = simple[m] = []
                        got.append((i, a, g, lo0, k * hop, end))
                        continue
                fast.append((i, a, k * hop, end, plan))
        except Exception as exc:
            results[i] = AssembleResult(exc)
    try:
        if simple:
            _close_simple(simple, results)
        _close_fast(fast, results, now)
    except Exception:
        # The joint cut failed before it changed any assembler: each alone, contained.
        left = [(it[0], it[1]) for it in fast]
        left += [(it[0], it[1]) for items in simple.values() for it in items]
        for i, a in left:
            if results[i] is None:
                try:
                    results[i] = a.close_due(now)
                except Exception as exc:
                    results[i] = AssembleResult(exc)
    return [r if r is not None else AssembleResult() for r in results]


# An item of `_close_simple`: (position in `close_many`'s list, the assembler, its one
# rate group, the group's first pending index, the window's start and end).
_Simple = tuple[int, WindowAssembler, _Group, int, float, float]


def _close_simple(simple: dict[int, list[_Simple]],
                  results: list[AssembleResult | None]) -> None:
    """The joint cut of the simplest items (`close_many`): one rate group whose rows
    are in step, every pending sample (m per row) before the window's end, no
    timestamps kept. Per segment length one copy; each item is finished as its block
    is made (what `_cut_blocks` + `_finish_one` do for such an item, with less on the
    way)."""
    for m, members in simple.items():
        v = np.concatenate([mb[2].vals[:, mb[3]:mb[3] + m] for mb in members])
        off = 0
        for i, a, g, lo0, start, end in members:
            chans = g.chans
            n = len(chans)
            blk = Block.rows_of(v, off, chans, _full(n, m))
            off += n
            exp = g.expected
            cov = m / exp if exp else 1.0
            w = ClosedWindow.of_blocks(start, end, not (exp and cov < a.cfg.min_coverage),
                                       (blk,), a._expected, cov)
            a._set_next(a._next_k + 1)  # type: ignore[operator]
            g.lo = [lo0 + m] * n  # rows in step stay in step
            results[i] = AssembleResult(None, [w])


_FULL: dict[tuple[int, int], tuple[int, ...]] = {}


def _full(n: int, m: int) -> tuple[int, ...]:
    """The counts of a block of n rows each holding m samples (shared: read-only)."""
    got = _FULL.get((n, m))
    if got is None:
        if len(_FULL) > 64:
            _FULL.clear()
        got = _FULL[(n, m)] = (m,) * n
    return got


def _close_fast(fast: list[_Item], results: list[AssembleResult | None], now: float) -> None:
    """`close_many`'s joint cut of the items in `fast`, results into `results`. An
    item is finished (its result set, its assembler moved past the window) as soon as
    its blocks are cut; should a later copy fail, only the unfinished ones are left."""
    blocks = _cut_blocks(fast, results)
    _finish(fast, blocks, results, now)


def _cut_blocks(fast: list[_Item], results: list[AssembleResult | None]
                ) -> list[list[Block | None]]:
    """The blocks of every (item, group) with samples, cut per segment length at once.
    An item of one rate group cut whole is finished here (`_finish_one`)."""
    # Every (item, group) with samples, by how many each of its rows holds: (item,
    # group index, the group, its first pending index, the window's end, whether all its
    # pending samples are before the end, whether its timestamps are wanted, whether
    # it is the item's only group).
    by_width: dict[int, list[tuple[int, int, _Group, int, float, bool, bool, bool]]] = {}
    blocks: list[list[Block | None]] = []
    for fi, (_, a, _, end, spans) in enumerate(fast):
        blocks.append([None] * len(spans))
        # The newest sample of any channel before the end: every pending one is in.
        full = a._max_ts < end
        alone = len(spans) == 1
        for gi, (g, lo0, m) in enumerate(spans):
            if m:
                got = by_width.get(m)
                if got is None:
                    got = by_width[m] = []
                got.append((fi, gi, g, lo0, end, full, g.keep_times or not full, alone))
    for m, members in by_width.items():
        v = np.concatenate([mb[2].vals[:, mb[3]:mb[3] + m] for mb in members])
        kept = [mb for mb in members if mb[6]]
        t = np.concatenate([mb[2].ts[:, mb[3]:mb[3] + m] for mb in kept]) if kept else None
        # The blocks' times as rows of one matrix, row for row with `v`: only when every
        # member kept its times.
        tb = t if len(kept) == len(members) else None
        off = t_off = 0
        no_times = None
        for fi, gi, g, lo0, end, full, keep, alone in members:
            n = len(g.chans)
            if keep and t is not None:
                ts = t[t_off:t_off + n]
                t_off += n
            else:
                ts = no_times if no_times is not None and n == no_times.shape[0] \
                    else (no_times := _no_times(n, m))
            if full:
                blk = Block(g.chans, ts, v[off:off + n], [m] * n, True, v, off, tb)
                if alone:
                    _finish_one(fast[fi], blk, lo0, m, results)
                else:
                    blocks[fi][gi] = blk
            else:
                counts = (ts < end).sum(axis=1).tolist()
                mc = max(counts)
                blocks[fi][gi] = Block(g.chans, ts[:, :mc], v[off:off + n, :mc], counts)
            off += n
    return blocks


def _finish_one(item: _Item, blk: Block, lo0: int, m: int,
                results: list[AssembleResult | None]) -> None:
    """`_finish` of an item of one rate group whose block is cut whole (`blk`, every row
    holding its m pending samples from `lo0`)."""
    i, a, start, end, spans = item
    g = spans[0][0]
    cov = m / g.expected if g.expected else 1.0
    complete = not (g.expected and cov < a.cfg.min_coverage)
    w = ClosedWindow.of_blocks(start, end, complete, (blk,), a._expected, cov)
    assert a._next_k is not None
    a._set_next(a._next_k + 1)
    g.lo = [lo0 + m] * len(g.chans)  # rows in step stay in step
    results[i] = AssembleResult(None, [w])


def _finish(fast: list[_Item], blocks: list[list[Block | None]],
            results: list[AssembleResult | None], now: float) -> None:
    """Each item's window from its blocks, and its assembler moved past it."""
    for (i, a, start, end, spans), bl in zip(fast, blocks, strict=True):
        if results[i] is not None:  # finished by `_cut_blocks`
            continue
        complete = True
        total = 0
        cov = 1.0
        min_cov = a.cfg.min_coverage
        for gi, (g, _, m) in enumerate(spans):
            blk = bl[gi]
            if blk is None:
                empty = np.empty((len(g.chans), 0))
                blk = bl[gi] = Block(g.chans, empty, empty, [0] * len(g.chans))
            if blk.base is not None:  # cut whole: every row holds its m pending samples
                low = m
                total += m
            else:
                low = min(blk.counts)
                total += sum(blk.counts)
            c = low / g.expected if g.expected else 1.0
            cov = min(cov, c) if gi else c
            if g.expected and c < min_cov:
                complete = False
        if total == 0:  # an empty window: the gap logic of close_due decides
            try:
                results[i] = a.close_due(now)
            except Exception as exc:
                results[i] = AssembleResult(exc)
            continue
        w = ClosedWindow.of_blocks(start, end, complete, tuple(bl), a._expected,  # type: ignore[arg-type]
                                   cov)
        assert a._next_k is not None
        a._set_next(a._next_k + 1)
        for (g, lo0, m), blk in zip(spans, bl, strict=True):
            assert blk is not None
            if blk.base is not None:  # rows in step stay in step
                g.lo = [lo0 + m] * len(g.chans)
            elif blk.uniform:
                g.lo = [lo0 + blk.values.shape[1]] * len(g.chans)
            else:
                g.drop(blk.counts)
        results[i] = AssembleResult(None, [w])
