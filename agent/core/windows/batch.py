"""The joint cut: every due window of many assemblers at once (`close_many`).

The usual case of a tick (exactly the next window of an asset due, its rows starting
in step) is cut for all such assets together: one copy per sample count over the
stacked rows of every asset, instead of a handful of numpy calls per asset; the
blocks of the cut are rows of one matrix (`Block.base`), which the feature pass takes
whole. When samples past the window's end are pending (a block straddling it, one
channel's next reading in, a hopping window), the rows are first counted for all
such assets at once, in a band around where a sensor at its rate puts the end
(`_row_counts`). Rows starting apart are compacted first; an asset with several
windows due has them cut one pass after another. The first window, gaps and what the
counting cannot tell go through `WindowAssembler.close_due`. Pure.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from agent.core.windows.assembler import (
    AssembleResult,
    Block,
    ClosedWindow,
    WindowAssembler,
    _arange,
    _Group,
)

# One item of the joint cut: (position in `close_many`'s list, the assembler, the
# window's start and end, per rate group (the group, its first pending index, how many
# samples each of its rows holds)).
_Item = tuple[int, WindowAssembler, float, float, list[tuple[_Group, int, int]]]


# What `_plan` found for an assembler (`_MORE`: placed, and a window after it is due).
_NOTHING, _PLACED, _ALONE, _MORE = 0, 1, 2, 3


def _plan(a: WindowAssembler, now: float, i: int, full: list[_Item],
          rest: list[_Item]) -> int:
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
    todo: Sequence[int] = range(len(assemblers))
    while todo:
        more = _close_next(assemblers, todo, now, results)
        todo = [i for i in more if results[i].error is None]  # type: ignore[union-attr]
    return [r if r is not None else AssembleResult() for r in results]


def _close_next(assemblers: Sequence[WindowAssembler], todo: Sequence[int], now: float,
                results: list[AssembleResult | None]) -> list[int]:
    """The next due window of each assembler at the positions `todo` (the joint cut
    where it can, else `close_due`), added to `results`; the positions with a window
    after it due too."""
    got: list[AssembleResult | None] = [None] * len(assemblers)
    # The joint cut's items: those with every pending sample before the window's end
    # (`full`), the others (counted first, `_split`).
    full: list[_Item] = []
    others: list[_Item] = []
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
            try:
                got[i] = a.close_due(now)
            except Exception as exc:
                got[i] = AssembleResult(exc)
        if full and whole:  # in the assemblers' order: the feature pass's aligned path
            _close_whole(sorted(full + whole, key=_position), got, drops)
        elif full or whole:
            _close_whole(full or whole, got, drops)
        if rest:
            _finish(rest, _cut_blocks(rest, counts), got, now)
    except Exception:
        # The joint cut failed before it changed any assembler, or after finishing some
        # of them: the others each alone, contained.
        for i, a, *_ in (*full, *others):
            if got[i] is None:
                try:
                    got[i] = a.close_due(now)
                except Exception as exc:
                    got[i] = AssembleResult(exc)
    for i in todo:
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


def _position(item: _Item) -> int:
    return item[0]


# Per hopping item (by position): per group, how many samples its rows drop once the
# window is out (those before the next window's start).
_Drops = dict[int, list[int]]


def _split(items: list[_Item]) -> tuple[
        list[_Item], list[_Item], list[tuple[int, WindowAssembler]],
        dict[int, list[list[int]]], _Drops]:
    """`close_many`'s items that are not full as those cut together by
    `_close_whole`: those whose every group's rows all hold the same number c > 0 of
    samples before the end (the next window's samples are
    pending, or the window hops: counted first, `_row_counts`), as if c were all they
    held (a hopping window's rows also dropping alike, `drops`); the rest of the
    tumbling ones (a group without samples in the window, rows holding different
    counts), for `_cut_blocks` + `_finish`, with the counts; those `_row_counts` could
    not count and the rest of the hopping ones, for `close_due`."""
    got = _row_counts(items)
    if got.unsure:  # counted again from the first sample on (samples lost, say)
        again = _row_counts([it for it in items if it[0] in got.unsure], wide=True)
        got.merge(again)
    whole: list[_Item] = []
    rest: list[_Item] = []
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


# One group of an item to count (`_row_counts`): the item's position, the group's
# index, the group, its first pending index, where its band starts in the pending
# samples, the window's end, the next window's start (the end when tumbling), whether
# the band ends with the most pending in a row.
_Member = tuple[int, int, _Group, int, int, float, float, bool]


@dataclass(slots=True)
class _Counted:
    """What `_row_counts` found, per item by position: per group, how many samples
    each row holds before the window's end (`rows`; `_NONE` for a group without pending
    samples), the item's spans with that number when every row holds it, else 0
    (`cut`); per hopping item, per group, how many each row drops (those before the
    next window's start) when alike, else -1 (`drops`); the items with a 0 or -1 there
    (`uneven`), and those the band could not count (`unsure`: their counts are not to
    be used)."""

    rows: dict[int, list[list[int]]] = field(default_factory=dict)
    cut: dict[int, list[tuple[_Group, int, int]]] = field(default_factory=dict)
    drops: _Drops = field(default_factory=dict)
    uneven: set[int] = field(default_factory=set)
    unsure: set[int] = field(default_factory=set)

    def note(self, members: list[_Member], w: int, below: list[int], before: list[int],
             known: list[bool]) -> None:
        """The counts of `_row_counts`' members of band width w, row by row: `below`
        (before the end), `before` (before the next window's start), whether `known`."""
        rows_of, cut, drops, uneven, unsure = (self.rows, self.cut, self.drops,
                                               self.uneven, self.unsure)
        off = 0
        for i, gi, g, lo0, s0, _, _, to_end in members:
            n = len(g.chans)
            row = rows_of[i][gi] = below[off:off + n]
            if (not to_end and s0 + w in row) or (s0 and False in known[off:off + n]):
                unsure.add(i)
            c = row[0]
            if c and row.count(c) == n:
                cut[i][gi] = (g, lo0, c)
            else:
                uneven.add(i)
            if i in drops:
                d = before[off:off + n]
                if d.count(d[0]) == n:
                    drops[i][gi] = d[0]
                else:
                    uneven.add(i)
            off += n

    def merge(self, again: _Counted) -> None:
        """`again`, a count of this one's unsure items, in place of theirs."""
        self.uneven -= self.unsure
        self.uneven |= again.uneven
        self.unsure = again.unsure
        self.rows.update(again.rows)
        self.cut.update(again.cut)
        self.drops.update(again.drops)


def _band(g: _Group, m: int, wide: bool) -> tuple[int, int]:
    """Where `_row_counts` looks in a group's m pending samples per row: [s0, top).
    A tumbling window of a sensor at its rate ends near `expected` samples in, so a
    band around that holds the end (`_Group.near`); a hopping one also needs the next
    window's start, and a window whose end the band missed is counted again (`wide`):
    from the first sample, at most `bound` samples (a whole window with room for a
    faster sensor)."""
    if wide:
        return 0, min(m, g.bound)
    s0, top = g.near
    if m >= top:
        return s0, top
    e = int(g.expected)  # fewer pending than the band's top
    return max(0, min(m, e) - 8 - e // 16), m


# A group's counts while it has no pending samples (`_row_counts`; shared: read only).
_NONE: list[int] = []


def _row_counts(items: list[_Item], wide: bool = False) -> _Counted:
    """How many samples each row of each item holds before the window's end, and for
    a hopping window before the next window's start (`_Counted`). Counted for all
    groups of one band width in one step, within a band of each row (`_band`; `wide`:
    from the first sample); an item whose count the band cannot tell (a row's end
    outside it: samples missing, a sensor far off its rate) is `unsure`."""
    by_w: dict[int, list[_Member]] = {}  # by band width
    got = _Counted()
    rows_of, cut, drops, uneven = got.rows, got.cut, got.drops, got.uneven
    hopping = False
    for i, a, _, end, spans in items:
        rows_of[i] = [_NONE] * len(spans)
        cut[i] = list(spans)
        after = end
        if a._span_k != 1:
            hopping = True
            drops[i] = [-1] * len(spans)
            after = (a._next_k + 1) * a.cfg.hop_s  # type: ignore[operator]
        for gi, (g, lo0, m) in enumerate(spans):
            if m:
                s0, top = _band(g, m, wide or i in drops)
                by_w.setdefault(top - s0, []).append(
                    (i, gi, g, lo0, s0, end, after, top == m))
            else:
                uneven.add(i)
    for w, members in by_w.items():
        tm = np.concatenate([mb[2].ts[:, mb[3] + mb[4]:mb[3] + mb[4] + w] for mb in members])
        rows = [len(mb[2].chans) for mb in members]
        s0s = np.repeat([mb[4] for mb in members], rows)
        # Rows holding fewer samples than their group's most: their band ends early.
        held = _held(members, rows, w)
        lt = tm < np.repeat([mb[5] for mb in members], rows)[:, None]
        b = (lt if held is None else lt & held).sum(axis=1)
        # A row's count is known when its band holds its end: some of the band before
        # the end unless the band starts with the pending samples, some at or after it
        # unless the band ends with them.
        known = ((b > 0) | (s0s == 0)).tolist()
        below = (b + s0s).tolist()
        before = below
        if hopping:
            lt = tm < np.repeat([mb[6] for mb in members], rows)[:, None]
            before = (lt if held is None else lt & held).sum(axis=1).tolist()
        got.note(members, w, below, before, known)
    return got


def _held(members: list[_Member], rows: list[int], w: int) -> np.ndarray | None:
    """Which places of `_row_counts`' bands (w wide, one row per group row) hold a
    pending sample, when a group's rows hold different numbers; else None (all do)."""
    if all(g.hi.count(g.hi[0]) == len(g.hi) for _, _, g, *_ in members):
        return None
    ends = np.array([h for mb in members for h in mb[2].hi], dtype=np.int64)
    ends -= np.repeat([mb[3] + mb[4] for mb in members], rows)  # from each band's start
    return _arange(w)[None, :] < ends[:, None]


def _close_whole(whole: list[_Item], results: list[AssembleResult | None],
                 drops: _Drops) -> None:
    """The joint cut of items whose every rate group's rows are in step with m > 0
    samples before the window's end (all it cuts: the spans' m): one copy per segment
    length, every block rows of that copy. An item of one rate group is finished as
    its block is made, the others once all copies are made. Each group's rows then
    drop those m samples, or for a hopping window what `drops` says."""
    # Per segment length: (the item's blocks, None for an item of one group; the group's
    # index; the item; the group; its first pending index).
    by_width: dict[int, list[tuple[list[Block | None] | None, int, _Item, _Group, int]]] = {}
    several: list[tuple[_Item, list[Block | None]]] = []
    for item in whole:
        spans = item[4]
        if len(spans) == 1:
            g, lo0, m = spans[0]
            got = by_width.get(m)
            if got is None:
                got = by_width[m] = []
            got.append((None, 0, item, g, lo0))
            continue
        blocks: list[Block | None] = [None] * len(spans)
        several.append((item, blocks))
        for gi, (g, lo0, m) in enumerate(spans):
            got = by_width.get(m)
            if got is None:
                got = by_width[m] = []
            got.append((blocks, gi, item, g, lo0))
    for m, members in by_width.items():
        v = np.concatenate([mb[3].vals[:, mb[4]:mb[4] + m] for mb in members])
        kept = [mb for mb in members if mb[3].keep_times]
        t = np.concatenate([mb[3].ts[:, mb[4]:mb[4] + m] for mb in kept]) if kept else None
        # The blocks' times as rows of one matrix, row for row with `v`: only when every
        # member kept its times.
        tb = t if len(kept) == len(members) else None
        off = t_off = n_last = 0
        full: tuple[int, ...] = ()
        for bl, gi, item, g, _ in members:
            n = len(g.chans)
            if n != n_last:
                full, n_last = _full(n, m), n
            if t is not None and g.keep_times:
                blk = Block(g.chans, t[t_off:t_off + n], v[off:off + n], full, True, v, off,
                            tb)
                t_off += n
            else:
                blk = Block.rows_of(v, off, g.chans, full)
            off += n
            if bl is None:  # an item of one group: finished now
                _done(item, (blk,), results, drops.get(item[0]) if drops else None)
            else:
                bl[gi] = blk
    for item, bl in several:
        _done(item, tuple(bl), results, drops.get(item[0]))  # type: ignore[arg-type]


def _done(item: _Item, blocks: tuple[Block, ...], results: list[AssembleResult | None],
          drop: list[int] | None) -> None:
    """`_close_whole`'s window of `item` from its blocks (group g's coverage m /
    expected), and its assembler moved past it (each group's rows dropping m samples,
    or `drop[g]` for a hopping window)."""
    i, a, start, end, spans = item
    min_cov = a.cfg.min_coverage
    complete = True
    cov = 1.0
    for gi, (g, lo0, m) in enumerate(spans):
        exp = g.expected
        c = m / exp if exp else 1.0
        cov = min(cov, c) if gi else c
        if exp and c < min_cov:
            complete = False
        g.lo = [lo0 + (m if drop is None else drop[gi])] * len(g.chans)  # still in step
    a._step_next()
    results[i] = AssembleResult(None, [ClosedWindow.of_blocks(start, end, complete, blocks,
                                                              a._expected, cov)])


_FULL: dict[tuple[int, int], tuple[int, ...]] = {}


def _full(n: int, m: int) -> tuple[int, ...]:
    """The counts of a block of n rows each holding m samples (shared: read-only)."""
    got = _FULL.get((n, m))
    if got is None:
        if len(_FULL) > 64:
            _FULL.clear()
        got = _FULL[(n, m)] = (m,) * n
    return got


def _cut_blocks(fast: list[_Item], counts: dict[int, list[list[int]]]
                ) -> list[list[Block | None]]:
    """The blocks of every (item, group) with samples, `counts` the rows' counts before
    the window's end (`_row_counts`). A group whose rows all hold the same number c of
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
        tb = t if len(kept) == len(cut) else None  # as in `_close_whole`
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


def _finish(fast: list[_Item], blocks: list[list[Block | None]],
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
            try:
                results[i] = a.close_due(now)
            except Exception as exc:
                results[i] = AssembleResult(exc)
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
