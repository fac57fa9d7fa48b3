"""Sensor health and mode values of all the tick's windows, judged together.

Most windows change nothing: every checked channel is calm (`ChannelHealth.calm`) and
its window gives no reason, and the mode channel's mean stays in the current mode's
band. `prejudge` finds those with array operations, one pass per matrix the joint cut
made (`Block.base` / `Block.tbase`; in the usual tick, alike assets' windows as rows of
those matrices in order, the rows are gathered for all windows at once:
`_gather_aligned`), and leaves to the channels' state machines only
the rest (`judge_rows` says which rows are quiet; a quiet row changes nothing but the
channel's `_last`, which is written here).

A window is *eligible* when its asset has no other window in the tick, is not failing,
and every checked channel of it is a full row of such a matrix: for it, a channel
absent from its `stats` is quiet (judged already). Otherwise every checked channel is
judged by `Judge.window` in order, from its `stats` where they are here.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field
from itertools import repeat
from operator import attrgetter, eq, ge, is_, itemgetter
from typing import cast

import numpy as np

from agent.core.health import ChannelHealth, HealthTable, WindowStats
from agent.core.health_rows import RowLimits, judge_rows
from agent.core.windows.closed import ClosedWindow, no_times, whole_cut
from agent.pipeline.featurize import Extremes
from agent.pipeline.runtime import AssetRuntime

_CACHE_MAX = 64  # matrix layouts kept (`_Layouts`)


@dataclass(frozen=True, slots=True)
class _Rows:
    """The checked channels of one of an asset's blocks."""

    chans: tuple[int, ...]  # the block's channels, as the cut lays them out
    offs: tuple[int, ...]  # rows of the checked ones in the block
    checked: tuple[int, ...]  # their channels
    health: tuple[ChannelHealth, ...]
    slots: tuple[int, ...]  # theirs in the batch's `HealthTable`
    timed: bool  # one of them has a rate-of-change check: it reads the samples' times


@dataclass(frozen=True, slots=True)
class AssetPlan:
    """What `prejudge` reads of one asset's windows, fixed by its layout."""

    rt: AssetRuntime
    # (block index, rows, the block's channels, row of the mode channel if it is
    # mean-decided and there, else -1) of the blocks with checked channels or the mode
    # channel
    blocks: tuple[tuple[int, _Rows, tuple[int, ...], int], ...]
    n_blocks: int  # how many blocks a window has at least
    # What plans alike in it lay out alike (`_gather_aligned`): n_blocks, and per block
    # its index, channels, mode row and whether it has checked channels (plans of one
    # shape share this object).
    shape: tuple[object, ...]

    @classmethod
    def of(cls, rt: AssetRuntime, table: HealthTable) -> AssetPlan:
        """The plan of `rt`, its checked channels moved into `table`."""
        lay = rt.layout
        by_block: dict[int, dict[int, int]] = {}
        for c, (b, r) in enumerate(lay.chan_at):
            by_block.setdefault(b, {})[r] = c
        mode_at = (-1, -1)
        if rt.modes is not None and lay.mode_channel is not None and not rt.modes.cfg.by_code:
            mode_at = lay.chan_at[lay.mode_channel]
        blocks = []
        for b, rows in sorted(by_block.items()):
            chans = tuple(rows[r] for r in sorted(rows))
            offs = tuple(r for r, c in enumerate(chans) if lay.is_checked[c])
            mode_r = mode_at[1] if mode_at[0] == b else -1
            if offs or mode_r >= 0:
                health = tuple(rt.health[chans[r]] for r in offs)
                slots = tuple(h.table[1] if h.table[0] is table else h.move_to(table)
                              for h in health)
                timed = any(h.limits.max_rate_per_s is not None for h in health)
                blocks.append((b, _Rows(chans, offs, tuple(chans[r] for r in offs), health,
                                        slots, timed), chans, mode_r))
        n_blocks = max((b for b, *_ in blocks), default=-1) + 1
        shape = (n_blocks, tuple((b, chans, mode_r, bool(rows.offs))
                                 for b, rows, chans, mode_r in blocks))
        return cls(rt, tuple(blocks), n_blocks, _SHAPES.setdefault(shape, shape))


# Every plan shape made, so that plans of one shape share one object (`AssetPlan.shape`).
_SHAPES: dict[tuple[object, ...], tuple[object, ...]] = {}


@dataclass(frozen=True, slots=True)
class _Layout:
    """One matrix's rows as a sequence of asset blocks lays them out (cached)."""

    parts: tuple[_Rows, ...]  # kept, so that their ids (the cache key) stay theirs
    offs: np.ndarray  # row within its block, per row
    counts: np.ndarray  # rows per block
    seg: list[int]  # the block (position in the sequence) of each row
    chans: list[int]
    slots: np.ndarray  # in the `HealthTable`
    limits: RowLimits
    rate_at: list[int]  # position among the rate rows, -1 when none
    rate_slots: np.ndarray
    # Where the blocks started when they were every row of their matrix in order.
    whole_at: list[int] = field(default_factory=list)

    @classmethod
    def of(cls, parts: Sequence[_Rows]) -> _Layout:
        offs = [o for p in parts for o in p.offs]
        lim = RowLimits.of([h.limits for p in parts for h in p.health])
        slots = np.array([s for p in parts for s in p.slots], dtype=np.int64)
        rate_at = [-1] * len(slots)
        for k, i in enumerate(lim.rate_rows.tolist()):
            rate_at[i] = k
        return cls(tuple(parts), np.array(offs, dtype=np.int64),
                   np.array([len(p.offs) for p in parts], dtype=np.int64),
                   [k for k, p in enumerate(parts) for _ in p.offs],
                   [c for p in parts for c in p.checked], slots, lim, rate_at,
                   slots[lim.rate_rows])


@dataclass(slots=True)
class _Matrix:
    """What the tick's windows hold of one cut matrix."""

    base: np.ndarray
    tbase: np.ndarray | None
    # Per block with checked channels: its rows, where it starts, its window.
    parts: list[_Rows] = field(default_factory=list)
    row0: list[int] = field(default_factory=list)
    wi: list[int] = field(default_factory=list)
    modes: list[tuple[int, int]] = field(default_factory=list)  # (mode channel row, window)
    layout: _Layout | None = None  # the layout of `parts`, when known already


@dataclass(slots=True)
class Prejudged:
    """Per window of the tick: whether it is eligible (module docstring), the stats of
    the channels left to judge (None: `check_window`), the mode channel's mean (None:
    not computed here)."""

    eligible: list[bool]
    stats: list[dict[int, WindowStats | None] | None]
    mode_value: list[float | None]
    # Per cut matrix judged whole (by id): the matrix and its rows' lowest and highest
    # values, `min(axis=1)` / `max(axis=1)` exactly (the feature pass reads them).
    extremes: Extremes = field(default_factory=dict)


def _judgeable(mats: dict[int, _Matrix], eligible: list[bool]) -> dict[int, _Matrix]:
    """`mats` without those with nothing to judge or no times where a rate-of-change
    check reads them (their windows not eligible)."""
    for key, m in list(mats.items()):
        if m.base.shape[1] == 0 or (m.tbase is None and any(map(_TIMED, m.parts))):
            for wi in m.wi:
                eligible[wi] = False
            del mats[key]
    return mats


_RT, _SHAPE = attrgetter("rt"), attrgetter("shape")  # of an AssetPlan
_FIRST, _SECOND = itemgetter(0), itemgetter(1)  # of a (runtime, window) pair
_WCHANS = attrgetter("block_chans")  # of a ClosedWindow of a RowsCut
_BASE, _ROW0 = attrgetter("base"), attrgetter("row0")  # of a Block
_UNIFORM, _CHANS = attrgetter("uniform"), attrgetter("chans")
_TIMED = attrgetter("timed")  # of a _Rows


class HealthBatch:
    """`prejudge` with the asset plans and matrix layouts it keeps between ticks."""

    def __init__(self) -> None:
        # `calm` and `_last` of every checked channel the batch has seen, by slot.
        self.table = HealthTable(64)
        self._moved = 0  # `table.moved_out` when the plans were made
        self._plans: dict[int, AssetPlan] = {}
        self._layouts: dict[tuple[int, ...], _Layout] = {}
        # The last aligned tick's assets (`ids`), their plans, and per plan block the
        # checked rows of every asset and their layout: the same assets close windows
        # tick after tick (`_gather_aligned`). Dropped whenever a plan is made.
        self._alike: tuple[list[int], list[AssetPlan],
                           list[tuple[list[_Rows], _Layout] | None]] | None = None

    def plan(self, rt: AssetRuntime) -> AssetPlan:
        got = self._plans.get(id(rt))
        if got is None or got.rt is not rt:
            got = self._plans[id(rt)] = AssetPlan.of(rt, self.table)
            self._alike = None
        return got

    def prejudge(self, wins: Sequence[tuple[AssetRuntime, ClosedWindow]],
                 failed: set[str]) -> Prejudged:
        """Judge the quiet channels of `wins` (module docstring); skip the windows of
        assets in `failed`. Nothing changes unless this returns."""
        n = len(wins)
        out = Prejudged([False] * n, [None] * n, [None] * n)
        if self.table.moved_out != self._moved:  # a channel went to another batch's table
            self._plans.clear()
            self._layouts.clear()
            self._alike = None
            self._moved = self.table.moved_out
        mats = self._gather(wins, failed, out.eligible)
        writes: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
        value = out.mode_value
        for m in mats.values():
            if m.parts:
                self._judge_matrix(m, out, writes)
            if m.modes:
                rows, wis = zip(*m.modes, strict=True)
                means = m.base[np.array(rows, dtype=np.int64)].mean(axis=1).tolist()
                for wi, mean in zip(wis, means, strict=True):
                    if math.isfinite(mean):  # else a sample is not (or the sum overflowed)
                        value[wi] = mean
        table = self.table
        for slots, lv, lt in writes:  # the quiet rows' `_last`
            table.last_v[slots] = lv
            table.last_t[slots] = lt
        return out

    def _gather(self, wins: Sequence[tuple[AssetRuntime, ClosedWindow]], failed: set[str],
                eligible: list[bool]) -> dict[int, _Matrix]:
        """The rows of every cut matrix the windows' checked channels and mode channels
        are in; whether each window is eligible, into `eligible`."""
        ids = [id(rt) for rt, _ in wins]
        if not failed:
            got = self._gather_aligned(wins, ids, eligible)
            if got is not None:
                return got
        mats: dict[int, _Matrix] = {}
        many = None if len(set(ids)) == len(ids) else Counter(ids)  # assets with 2+ windows
        plans = self._plans
        for wi, (key, (rt, w)) in enumerate(zip(ids, wins, strict=True)):
            plan = plans.get(key)
            if plan is None or plan.rt is not rt:
                plan = self.plan(rt)
            if not plan.blocks or (failed and rt.cfg.name in failed):
                continue
            blocks = w.blocks
            ok = many is None or many[key] == 1
            if len(blocks) < plan.n_blocks:
                eligible[wi] = False
                continue
            for b, rows, chans, mode_r in plan.blocks:
                blk = blocks[b]
                base = blk.base
                if base is None or not blk.uniform or (
                        blk.chans is not chans and blk.chans != chans):
                    ok = False
                    continue
                m = mats.get(id(base))
                if m is None:
                    m = mats[id(base)] = _Matrix(base, blk.tbase)
                if rows.offs:
                    m.parts.append(rows)
                    m.row0.append(blk.row0)
                    m.wi.append(wi)
                if mode_r >= 0:
                    m.modes.append((blk.row0 + mode_r, wi))
            eligible[wi] = ok
        return _judgeable(mats, eligible)

    def _gather_aligned(self, wins: Sequence[tuple[AssetRuntime, ClosedWindow]],
                        ids: list[int], eligible: list[bool]) -> dict[int, _Matrix] | None:
        """`_gather` of the usual tick, every question put to all windows at once: one
        window per asset, every asset's plan made and of one shape, and block by block
        the windows' blocks full rows of one matrix in window order (the joint cut's).
        None when the tick is not such (`_gather` then goes window by window)."""
        n = len(wins)
        alike = self._alike
        if alike is None or alike[0] != ids:  # not the assets of the last aligned tick
            alike = self._alike_plans(ids)
            if alike is None:
                return None
        _, plans, rows_of = alike
        plan0 = plans[0]
        if not all(map(is_, map(_RT, plans), map(_FIRST, wins))):
            return None
        ws = list(map(_SECOND, wins))
        cut = whole_cut(ws)
        if cut is not None:  # the joint cut's windows, alike: are the channels too?
            chans0 = ws[0].block_chans
            if len(chans0) < plan0.n_blocks or not all(map(eq, map(_WCHANS, ws),
                                                           repeat(chans0))):
                return None
        else:
            blocks = [w.blocks for w in ws]
            if not all(map(ge, map(len, blocks), repeat(plan0.n_blocks))):
                return None
        mats: dict[int, _Matrix] = {}
        for k, (b, _, chans, mode_r) in enumerate(plan0.blocks):
            r = len(chans)
            if cut is not None:
                base, tbase = cut.bases[b], cut.tbases[b]
                if cut.rows[b] != r or id(base) in mats or chans0[b] != chans:
                    return None
            else:
                of_b = [bl[b] for bl in blocks]
                base, tbase = of_b[0].base, of_b[0].tbase
                if (base is None or base.shape[0] != n * r or id(base) in mats
                        or not all(map(is_, map(_BASE, of_b), repeat(base)))
                        or list(map(_ROW0, of_b)) != list(range(0, n * r, r))
                        or not all(map(_UNIFORM, of_b))
                        or not all(map(eq, map(_CHANS, of_b), repeat(chans)))):
                    return None
            m = mats[id(base)] = _Matrix(base, tbase)
            got_rows = rows_of[k]
            if got_rows is not None:
                m.parts, m.layout = got_rows
                m.row0 = list(range(0, n * r, r))
                m.wi = list(range(n))
            if mode_r >= 0:
                m.modes = list(zip(range(mode_r, n * r, r), range(n), strict=True))
        eligible[:] = [True] * n
        return _judgeable(mats, eligible)

    def _alike_plans(self, ids: list[int]) -> tuple[list[int], list[AssetPlan], list[
            tuple[list[_Rows], _Layout] | None]] | None:
        """`_alike` for the assets `ids` when each is there once, its plan is made, and
        the plans are of one shape with a block to judge; else None."""
        got = list(map(self._plans.get, ids))
        if len(set(ids)) != len(ids) or any(map(is_, got, repeat(None))):
            return None
        plans = cast(list[AssetPlan], got)
        shape = plans[0].shape
        if not plans[0].blocks or not all(map(is_, map(_SHAPE, plans), repeat(shape))):
            return None
        rows_of: list[tuple[list[_Rows], _Layout] | None] = []
        for k, (_, rows, _, _) in enumerate(plans[0].blocks):
            parts = [p.blocks[k][1] for p in plans] if rows.offs else None
            rows_of.append(None if parts is None else (parts, self._layout(parts)))
        self._alike = (ids, plans, rows_of)
        return self._alike

    def _layout(self, parts: Sequence[_Rows]) -> _Layout:
        key = tuple(map(id, parts))  # the _Rows live as long as their plans
        got = self._layouts.get(key)
        if got is None:
            if len(self._layouts) >= _CACHE_MAX:
                self._layouts.clear()
            got = self._layouts[key] = _Layout.of(parts)
        return got

    def _judge_matrix(self, m: _Matrix, out: Prejudged,
                      writes: list[tuple[np.ndarray, np.ndarray, np.ndarray]]) -> None:
        wis = m.wi
        lay = m.layout if m.layout is not None else self._layout(m.parts)
        # Without times (`_gather` let only matrices whose rows read none through), NaN.
        tbase = m.tbase if m.tbase is not None else no_times(*m.base.shape)
        if m.row0 == lay.whole_at and m.base.shape[0] == lay.offs.size:
            vals, times = m.base, tbase  # every row, in order, as last time: no gather
        else:
            rows = np.repeat(np.array(m.row0, dtype=np.int64), lay.counts) + lay.offs
            total = m.base.shape[0]
            if rows.size == total and bool((rows == np.arange(total)).all()):
                vals, times = m.base, tbase  # every row, in order: no gather
                lay.whole_at[:] = m.row0
            else:
                vals, times = m.base[rows], tbase[rows]
        table = self.table
        calm = table.calm[lay.slots]
        if False in out.eligible:  # else every window of this matrix is eligible too
            eligible = [out.eligible[wi] for wi in wis]
            if False in eligible:
                calm &= np.array(eligible, dtype=bool)[lay.seg]
        rs = lay.rate_slots
        verdict = judge_rows(lay.limits, vals, times, calm, table.last_v[rs], table.last_t[rs])
        if vals is m.base and verdict.row_reduced:
            out.extremes[id(vals)] = (vals, verdict.lo, verdict.hi)
        quiet = verdict.quiet
        sel = lay.limits.rate_rows
        if sel.size:
            q = quiet[sel]
            writes.append((rs[q], vals[sel, -1][q], times[sel, -1][q]))
        if quiet.all():
            return
        stats = out.stats
        for i in np.flatnonzero(~quiet).tolist():
            wi = wis[lay.seg[i]]
            d = stats[wi]
            if d is None:
                d = stats[wi] = {}
            d[lay.chans[i]] = verdict.stats(i, lay.rate_at[i])
