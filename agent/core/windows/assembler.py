"""Window assembly per asset: tumbling or hopping windows on sample timestamps.

Windows start at multiples of `hop_s` (epoch aligned), so every gateway and every
replay cuts the same windows: a window is named by its integer index k and starts at
exactly k * hop_s (adding hop_s up window after window drifts: 0.1 s hops on Unix
times lose ~80 ms a day to rounding). The first window is the first one starting at
or after the earliest sample the assembler has when it first closes windows, over
all channels; earlier samples are dropped. A window [start, start + length_s) closes
when

* the newest sample of the asset is at least `lateness_s` past its end, or
* data has stopped: the newest sample time, advanced by the wall-clock time since
  the last arrival, is `timeout_s` past its end.

A closed window is *complete* when every channel has at least `min_coverage` of the
samples its rate promises; incomplete windows are returned (for counting) but not
scored. Samples older than the earliest open window are late: dropped and counted
(those older than the first window are dropped without being counted).
Pure: arrival and current times are parameters.

Storage: the channels of one rate share a preallocated 2-D store (store.py).
"""

from __future__ import annotations

import math
import sys
from collections.abc import Sequence

import numpy as np

from agent.config.schema import WindowConfig
from agent.core.windows.closed import Block, ClosedWindow
from agent.core.windows.store import _Group

_SHAPES: dict[tuple[int, ...], tuple[int, ...]] = {}  # `WindowAssembler._shape`s


class AssembleResult:
    __slots__ = ("empty_skipped", "error", "late_samples", "windows")

    def __init__(self, error: Exception | None = None,
                 windows: list[ClosedWindow] | None = None) -> None:
        self.windows: list[ClosedWindow] = [] if windows is None else windows
        self.empty_skipped = 0
        self.late_samples = 0
        # `close_many`: the exception this assembler raised (its asset fails alone).
        self.error = error


class WindowAssembler:
    """Cuts one asset's samples into windows; one instance per asset."""

    # Every tick reads a few of these of every asset (`due`, `steady.plan_steady`):
    # slots keep them in the object itself, a few cache lines per asset.
    __slots__ = ("_any_unsorted", "_chans", "_covs", "_due2_reach", "_due2_ts", "_due_reach",
                 "_due_ts", "_expected", "_first_start", "_groups", "_last_arrival", "_max_ts",
                 "_next_k", "_shape", "_span_k", "_unsorted", "_where", "cfg", "rates_hz")

    def __init__(self, window: WindowConfig, rates_hz: tuple[float, ...]) -> None:
        self.cfg = window
        self.rates_hz = rates_hz
        self._next_k: int | None = None  # index of the earliest open window (`_set_next`)
        # What `due` compares with: the newest sample time that makes the earliest open
        # window due, and the `_reach` that does (its end plus lateness / timeout). Before
        # the first close any sample makes the assembler due (the first window is placed),
        # and no sample (-inf) does not.
        self._due_ts = -sys.float_info.max
        self._due_reach = math.inf
        self._due2_ts = self._due2_reach = math.inf
        self._first_start = math.inf  # start of the first window
        self._max_ts = -math.inf
        self._last_arrival = -math.inf
        self._expected = tuple(r * window.length_s for r in rates_hz)
        by_rate: dict[float, list[int]] = {}
        for c, r in enumerate(rates_hz):
            by_rate.setdefault(r, []).append(c)
        self._groups = [_Group(tuple(cs), r * window.length_s, gi)
                        for gi, (r, cs) in enumerate(by_rate.items())]
        self._chans = tuple(g.chans for g in self._groups)  # a window's blocks' channels
        # The rows of each group: one object for every assembler of that shape.
        rows = tuple(len(g.chans) for g in self._groups)
        self._shape = _SHAPES.setdefault(rows, rows)
        # (complete, lowest coverage) of a window whose groups hold m samples per row, by
        # the groups' m (`steady.close_whole`)
        self._covs: dict[tuple[int, ...], tuple[bool, float]] = {}
        self._where: list[tuple[_Group, int]] = [(self._groups[0], 0)] * len(rates_hz)
        for g in self._groups:
            for r, c in enumerate(g.chans):
                self._where[c] = (g, r)
        # Channels whose pending samples may be out of time order (sorted at close).
        self._unsorted = [False] * len(rates_hz)
        self._any_unsorted = False
        span = window.length_s / window.hop_s
        # When a window spans a whole number of hops its end is computed as the start of
        # a later window, so a sample on a boundary falls in exactly one tumbling window.
        self._span_k = round(span) if abs(span - round(span)) < 1e-9 else None

    def keep_times_of(self, wanted: Sequence[bool]) -> None:
        """Keep the samples' timestamps in windows cut together with others
        (`close_many`) only for the rate groups holding a channel whose `wanted` is
        true; the others' windows show NaN times (the pipeline: only a rate-of-change
        check reads them)."""
        for g in self._groups:
            g.keep_times = any(wanted[c] for c in g.chans)

    def channel_rows(self) -> tuple[tuple[int, int], ...]:
        """Per channel: (its block's index in a closed window's `blocks`, its row there)."""
        where: dict[int, tuple[int, int]] = {}
        for gi, g in enumerate(self._groups):
            for r, c in enumerate(g.chans):
                where[c] = (gi, r)
        return tuple(where[c] for c in range(len(where)))

    def reset(self) -> None:
        """Forget every pending sample and the window placement, as a fresh assembler
        (after an error left this one in a state it cannot close windows from)."""
        self.__init__(self.cfg, self.rates_hz)  # type: ignore[misc]

    def _set_next(self, k: int) -> None:
        """Make window `k` the earliest open one (its samples are not touched)."""
        self._next_k = k
        cfg = self.cfg
        span, hop = self._span_k, cfg.hop_s
        # The ends of windows k and k + 1, as `_bounds` computes them.
        if span is not None:
            end, after = (k + span) * hop, (k + 1 + span) * hop
        else:
            end, after = k * hop + cfg.length_s, (k + 1) * hop + cfg.length_s
        self._due_ts = end + cfg.lateness_s
        self._due_reach = end + cfg.timeout_s
        # The same for the window after it (`close_many` asks whether only k is due).
        self._due2_ts = after + cfg.lateness_s
        self._due2_reach = after + cfg.timeout_s

    def _step_next(self) -> None:
        """`_set_next(next_k + 1)` for a window of a whole number of hops (the joint
        cut's): window k + 1's due times are those kept for it as the window after k,
        the same numbers `_set_next` computes."""
        k = self._next_k + 1  # type: ignore[operator]
        self._next_k = k
        self._due_ts, self._due_reach = self._due2_ts, self._due2_reach
        cfg = self.cfg
        after = (k + 1 + self._span_k) * cfg.hop_s  # type: ignore[operator]
        self._due2_ts = after + cfg.lateness_s
        self._due2_reach = after + cfg.timeout_s

    def due(self, now: float) -> bool:
        """Whether `close_due(now)` has anything to do: a window due, or samples held
        before the first close. Looks at no store (two float comparisons), so it is
        cheap enough to ask of every asset on every tick; False means `close_due(now)`
        would return an empty result and change nothing."""
        max_ts = self._max_ts
        if max_ts >= self._due_ts:
            return True
        idle = now - self._last_arrival
        if idle > 0.0:
            if idle == math.inf:  # no sample ever (max_ts -inf too)
                return False
            max_ts += idle
        return max_ts >= self._due_reach

    @property
    def next_start(self) -> float | None:
        """Start of the earliest open window (None until windows are first closed)."""
        return None if self._next_k is None else self._next_k * self.cfg.hop_s

    @property
    def watermark(self) -> float:
        """The newest sample time seen."""
        return self._max_ts

    def pending_samples(self) -> int:
        """Samples held for windows not closed yet."""
        return sum(g.pending() for g in self._groups)

    def add(self, channel: int, ts: np.ndarray, values: np.ndarray, arrival: float, *,
            presorted: bool = False) -> int:
        """Append samples of one channel (any order); returns how many were late.

        A sample is late when the window it belongs to has already been closed.
        `presorted` promises `ts` is in time order, which spares the checks for it.
        """
        if ts.size == 0:
            return 0
        late = 0
        if self._next_k is not None and not (presorted
                                             and ts[0] >= self._next_k * self.cfg.hop_s):
            keep = ts >= self._next_k * self.cfg.hop_s
            dropped = int(ts.size - np.count_nonzero(keep))
            if dropped:
                # Samples from before the first window (the rest of the partial window
                # the assembler started in) are dropped without being called late.
                late = int(np.count_nonzero(ts[~keep] >= self._first_start))
                ts, values = ts[keep], values[keep]
                if ts.size == 0:
                    self._arrived(arrival)
                    return late
        g, r = self._where[channel]
        n = ts.size
        h = g.hi[r]
        if h + n > g.ts.shape[1]:
            h = g.room(r, n)
        if not presorted or (h > g.lo[r] and ts[0] < g.ts[r, h - 1]):
            self._unsorted[channel] = True
            self._any_unsorted = True
        g.ts[r, h:h + n] = ts
        g.vals[r, h:h + n] = values
        g.hi[r] = h + n
        newest = float(ts[-1] if presorted else ts.max())
        if newest > self._max_ts:
            self._max_ts = newest
        if arrival > self._last_arrival:
            self._last_arrival = arrival
        return late

    def add_one(self, channel: int, t: float, value: float, arrival: float) -> int:
        """Append one sample of one channel; returns 1 if it was late, else 0."""
        if self._next_k is not None and t < self._next_k * self.cfg.hop_s:
            self._arrived(arrival)
            return 1 if t >= self._first_start else 0
        g, r = self._where[channel]
        h = g.hi[r]
        if h >= g.ts.shape[1]:
            h = g.room(r, 1)
        if h > g.lo[r] and t < g.ts[r, h - 1]:
            self._unsorted[channel] = True
            self._any_unsorted = True
        g.ts[r, h] = t
        g.vals[r, h] = value
        g.hi[r] = h + 1
        if t > self._max_ts:
            self._max_ts = t
        if arrival > self._last_arrival:
            self._last_arrival = arrival
        return 0

    def _arrived(self, arrival: float) -> None:
        """A late sample arriving while the newest sample time is still ahead of the
        gateway clock says that newest sample ran ahead of the data, not that data has
        stopped: the timeout then waits for the data. Without this, one sample stamped
        more than `timeout_s` ahead (inside the time-base guard's tolerance) kept the
        timeout closing windows at wall-clock pace ahead of the data for good, every
        later sample late (found by the ingest-tick fuzz target). Samples stamped at
        or before their arrival, the usual case, leave the timeout as it was."""
        if self._max_ts > arrival > self._last_arrival:
            self._last_arrival = arrival

    def _reach(self, now: float) -> float:
        """The newest sample time advanced by the wall-clock time since the last arrival
        (-inf before any arrival): what the timeout compares with."""
        if self._last_arrival == -math.inf:
            return -math.inf
        return self._max_ts + max(0.0, now - self._last_arrival)

    def _due(self, end: float, reach: float) -> bool:
        """Whether the window ending at `end` is due, given `_reach(now)`."""
        return self._max_ts >= end + self.cfg.lateness_s or reach >= end + self.cfg.timeout_s

    def _ready(self, end: float, now: float) -> bool:
        return self._due(end, self._reach(now))

    def close_due(self, now: float) -> AssembleResult:
        """Close every window that is due at wall-clock time `now`."""
        out = AssembleResult()
        hop = self.cfg.hop_s
        if self._next_k is None:
            self._sort()
            first = self._earliest_pending()
            if first is None:
                return out
            # The first boundary at or after the earliest sample of any channel, so a
            # daemon started mid-window does not score a partial window.
            k0 = math.ceil(first / hop - 1e-9)
            self._advance(k0)
            self._first_start = k0 * hop
        sorted_once = False
        tumbling = self._span_k == 1
        while True:
            assert self._next_k is not None
            k = self._next_k
            start, end = self._bounds(k)
            if not self._ready(end, now):
                break
            if not sorted_once:
                self._sort()
                sorted_once = True
            next_start = None if tumbling else (k + 1) * hop
            blocks = []
            cuts = []
            total = 0
            complete = True
            for g in self._groups:
                t, v, counts, nxt = g.cut(end, next_start)
                blocks.append(Block(g.chans, t, v, counts))
                cuts.append(nxt)
                total += sum(counts)
                if g.expected and min(counts) / g.expected < self.cfg.min_coverage:
                    complete = False
            if total == 0:
                target = self._past_gap(k, now)
                out.empty_skipped += target - k
                self._advance(target)
                continue
            out.windows.append(ClosedWindow(start, end, None, None, None, complete,
                                            blocks=tuple(blocks), expected=self._expected))
            self._set_next(k + 1)
            for g, c in zip(self._groups, cuts, strict=True):
                g.drop(c)
        return out

    def _past_gap(self, k: int, now: float) -> int:
        """Window k is empty: the window to skip straight to, the one holding the next
        sample, without materialising every empty window of a long gap (a clock step
        or an outage must not loop window by window), but no further than the last
        window due now: one not yet due may still get late samples."""
        length, hop = self.cfg.length_s, self.cfg.hop_s
        first = self._earliest_pending()
        limit = self._max_ts - self.cfg.lateness_s
        if self._last_arrival != -math.inf:
            limit = max(limit, self._max_ts + max(0.0, now - self._last_arrival)
                        - self.cfg.timeout_s)
        target = max(k + 1, math.floor((limit - length) / hop + 1e-9) + 1)
        if first is not None:
            # The first window holding `first`: smallest j with j*hop+length > first.
            target = max(k + 1, min(target, math.floor((first - length) / hop + 1e-9) + 1))
        return target

    def _bounds(self, k: int) -> tuple[float, float]:
        hop = self.cfg.hop_s
        if self._span_k is not None:
            return k * hop, (k + self._span_k) * hop
        return k * hop, k * hop + self.cfg.length_s

    def _earliest_pending(self) -> float | None:
        firsts = [f for f in (g.first() for g in self._groups) if f is not None]
        return min(firsts) if firsts else None

    def _sort(self) -> None:
        if not self._any_unsorted:
            return
        self._any_unsorted = False
        for c, flagged in enumerate(self._unsorted):
            if flagged:
                self._unsorted[c] = False
                g, r = self._where[c]
                g.sort_row(r)

    def _advance(self, new_k: int) -> None:
        """Make window `new_k` the earliest open one; drop samples before its start."""
        self._set_next(new_k)
        new_start = new_k * self.cfg.hop_s
        for g in self._groups:
            g.drop(g.count_below(new_start))
