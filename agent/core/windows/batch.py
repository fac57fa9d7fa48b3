"""The joint cut: every due window of many assemblers at once (`close_many`).

The usual case of a tick (exactly the next tumbling window of an asset due, its rows
in step) is cut for all such assets together: one copy per segment length over the
stacked rows of every asset, instead of a handful of numpy calls per asset; the
blocks of the cut are rows of one matrix (`Block.base`), which the feature pass takes
whole. Everything else goes through `WindowAssembler.close_due`. Pure.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from agent.core.windows.assembler import (
    AssembleResult,
    Block,
    ClosedWindow,
    WindowAssembler,
    _Group,
)

_NOT_DUE = 0
_ONE = 1
_OTHER = 2


def _plan(asm: WindowAssembler, now: float
          ) -> tuple[int, float, float, list[tuple[int, int]]]:
    """Whether `asm` has nothing due at `now` (_NOT_DUE), exactly its next tumbling
    window with every rate group's rows in step (_ONE: start, end and per group the
    first pending index and how many are pending), or anything else (_OTHER)."""
    k = asm._next_k
    if k is None or asm._span_k != 1 or asm._any_unsorted:
        return _OTHER, 0.0, 0.0, []
    hop = asm.cfg.hop_s
    end = (k + 1) * hop
    reach = asm._reach(now)
    if not asm._due(end, reach):
        return _NOT_DUE, 0.0, 0.0, []
    if asm._due((k + 2) * hop, reach):
        return _OTHER, 0.0, 0.0, []
    spans = []
    for g in asm._groups:
        lo, hi = g.lo, g.hi
        lo0, hi0 = lo[0], hi[0]
        if lo.count(lo0) != len(lo) or hi.count(hi0) != len(hi) or hi0 - lo0 > g.bound:
            return _OTHER, 0.0, 0.0, []
        spans.append((lo0, hi0 - lo0))
    return _ONE, k * hop, end, spans


def close_many(assemblers: Sequence[WindowAssembler], now: float) -> list[AssembleResult]:
    """`close_due(now)` of every assembler, the same windows in the same state after.

    The usual case of a tick (exactly the next tumbling window of an asset due, its
    rows in step) is cut for all such assets together: one comparison and one copy
    per segment length over the stacked rows of every asset, instead of a handful of
    numpy calls per asset. Everything else goes through `close_due`.

    An assembler that raises fails alone: its result is an empty one carrying the
    exception (`AssembleResult.error`); the others' windows are cut as usual.
    """
    results: list[AssembleResult | None] = [None] * len(assemblers)
    fast: list[tuple[int, float, float, list[tuple[int, int]]]] = []
    for i, a in enumerate(assemblers):
        try:
            kind, start, end, spans = _plan(a, now)
            if kind == _ONE:
                fast.append((i, start, end, spans))
            elif kind == _NOT_DUE:
                results[i] = AssembleResult()
            else:
                results[i] = a.close_due(now)
        except Exception as exc:
            results[i] = AssembleResult(exc)
    try:
        _close_fast(assemblers, fast, results, now)
    except Exception:
        # The joint cut failed before it changed any assembler: each alone, contained.
        for i, *_ in fast:
            if results[i] is None:
                try:
                    results[i] = assemblers[i].close_due(now)
                except Exception as exc:
                    results[i] = AssembleResult(exc)
    return [r if r is not None else AssembleResult() for r in results]


_NO_TIMES: dict[tuple[int, int], np.ndarray] = {}


def _no_times(n: int, m: int) -> np.ndarray:
    """The timestamps of a block whose assembler does not keep them: NaN (read-only)."""
    got = _NO_TIMES.get((n, m))
    if got is None:
        if len(_NO_TIMES) > 64:
            _NO_TIMES.clear()
        got = _NO_TIMES[(n, m)] = np.broadcast_to(np.nan, (n, m))
    return got


def _close_fast(assemblers: Sequence[WindowAssembler],
                fast: list[tuple[int, float, float, list[tuple[int, int]]]],
                results: list[AssembleResult | None], now: float) -> None:
    """`close_many`'s joint cut of the assemblers in `fast`, results into `results`."""
    blocks = _cut_blocks(assemblers, fast)
    _finish(assemblers, fast, blocks, results, now)


def _cut_blocks(assemblers: Sequence[WindowAssembler],
                fast: list[tuple[int, float, float, list[tuple[int, int]]]]
                ) -> list[list[Block | None]]:
    """The blocks of every (item, group) with samples, cut per segment length at once."""
    # Every (item, group) with samples, by how many each of its rows holds: (item,
    # group index, the group, its first pending index, the window's end, whether all its
    # pending samples are before the end, whether its timestamps are wanted).
    by_width: dict[int, list[tuple[int, int, _Group, int, float, bool, bool]]] = {}
    blocks: list[list[Block | None]] = []
    for fi, (i, _, end, spans) in enumerate(fast):
        blocks.append([None] * len(spans))
        a = assemblers[i]
        groups = a._groups
        # The newest sample of any channel before the end: every pending one is in.
        full = a._max_ts < end
        keep = a.keep_times or not full
        for gi, (lo0, m) in enumerate(spans):
            if m:
                by_width.setdefault(m, []).append((fi, gi, groups[gi], lo0, end, full, keep))
    for m, members in by_width.items():
        v = np.concatenate([mb[2].vals[:, mb[3]:mb[3] + m] for mb in members])
        kept = [mb for mb in members if mb[6]]
        t = np.concatenate([mb[2].ts[:, mb[3]:mb[3] + m] for mb in kept]) if kept else None
        off = t_off = 0
        for fi, gi, g, _, end, full, keep in members:
            n = len(g.chans)
            ts = t[t_off:t_off + n] if keep and t is not None else _no_times(n, m)
            if full:
                blocks[fi][gi] = Block(g.chans, ts, v[off:off + n], [m] * n, True, v, off,
                                       t if keep else None)
            else:
                counts = (ts < end).sum(axis=1).tolist()
                mc = max(counts)
                blocks[fi][gi] = Block(g.chans, ts[:, :mc], v[off:off + n, :mc], counts)
            off += n
            if keep:
                t_off += n
    return blocks


def _finish(assemblers: Sequence[WindowAssembler],
            fast: list[tuple[int, float, float, list[tuple[int, int]]]],
            blocks: list[list[Block | None]], results: list[AssembleResult | None],
            now: float) -> None:
    """Each item's window from its blocks, and its assembler moved past it."""
    for (i, start, end, _), bl in zip(fast, blocks, strict=True):
        a = assemblers[i]
        complete = True
        total = 0
        cov = 1.0
        for gi, g in enumerate(a._groups):
            blk = bl[gi]
            if blk is None:
                empty = np.empty((len(g.chans), 0))
                blk = bl[gi] = Block(g.chans, empty, empty, [0] * len(g.chans))
            counts = blk.counts
            low = min(counts)
            total += low * len(counts) if blk.uniform else sum(counts)
            c = low / g.expected if g.expected else 1.0
            cov = min(cov, c) if gi else c
            if g.expected and c < a.cfg.min_coverage:
                complete = False
        if total == 0:  # an empty window: the gap logic of close_due decides
            try:
                results[i] = a.close_due(now)
            except Exception as exc:
                results[i] = AssembleResult(exc)
            continue
        res = AssembleResult()
        res.windows.append(ClosedWindow(start, end, None, None, None, complete,
                                        blocks=tuple(bl), expected=a._expected,  # type: ignore[arg-type]
                                        min_coverage=cov))
        assert a._next_k is not None
        a._set_next(a._next_k + 1)
        for g, blk in zip(a._groups, bl, strict=True):
            assert blk is not None
            if blk.uniform:  # rows in step stay in step
                g.lo = [g.lo[0] + blk.values.shape[1]] * len(g.lo)
            else:
                g.drop(blk.counts)
        results[i] = res
