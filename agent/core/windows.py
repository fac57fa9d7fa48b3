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
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from agent.config import WindowConfig

_EMPTY = np.empty(0, dtype=np.float64)


@dataclass(frozen=True)
class ClosedWindow:
    """One closed window of one asset: per channel the samples inside it."""

    start: float
    end: float
    values: tuple[np.ndarray, ...]
    timestamps: tuple[np.ndarray, ...]
    coverage: tuple[float, ...]
    complete: bool


@dataclass
class AssembleResult:
    windows: list[ClosedWindow] = field(default_factory=list)
    empty_skipped: int = 0
    late_samples: int = 0


class WindowAssembler:
    """Cuts one asset's samples into windows; one instance per asset."""

    def __init__(self, window: WindowConfig, rates_hz: tuple[float, ...]) -> None:
        self.cfg = window
        self.rates_hz = rates_hz
        self._ts: list[np.ndarray] = [_EMPTY] * len(rates_hz)
        self._vals: list[np.ndarray] = [_EMPTY] * len(rates_hz)
        self._next_k: int | None = None  # index of the earliest open window
        self._first_start = math.inf  # start of the first window
        self._max_ts = -math.inf
        self._last_arrival = -math.inf
        self._expected = tuple(r * window.length_s for r in rates_hz)
        # Channels whose buffer may be out of time order (checked and sorted at close).
        self._unsorted = [False] * len(rates_hz)
        span = window.length_s / window.hop_s
        # When a window spans a whole number of hops its end is computed as the start of
        # a later window, so a sample on a boundary falls in exactly one tumbling window.
        self._span_k = round(span) if abs(span - round(span)) < 1e-9 else None

    @property
    def next_start(self) -> float | None:
        """Start of the earliest open window (None until windows are first closed)."""
        return None if self._next_k is None else self._next_k * self.cfg.hop_s

    @property
    def watermark(self) -> float:
        """The newest sample time seen."""
        return self._max_ts

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
                    return late
        old_t = self._ts[channel]
        if not presorted or (old_t.size and ts[0] < old_t[-1]):
            self._unsorted[channel] = True
        if old_t.size == 0:
            self._ts[channel], self._vals[channel] = ts, values
        else:
            self._ts[channel] = np.concatenate((old_t, ts))
            self._vals[channel] = np.concatenate((self._vals[channel], values))
        self._max_ts = max(self._max_ts, float(ts[-1] if presorted else ts.max()))
        self._last_arrival = max(self._last_arrival, arrival)
        return late

    def _ready(self, end: float, now: float) -> bool:
        if self._max_ts >= end + self.cfg.lateness_s:
            return True
        if self._last_arrival == -math.inf:
            return False
        idle_s = max(0.0, now - self._last_arrival)
        return self._max_ts + idle_s >= end + self.cfg.timeout_s

    def close_due(self, now: float) -> AssembleResult:
        """Close every window that is due at wall-clock time `now`."""
        out = AssembleResult()
        length, hop = self.cfg.length_s, self.cfg.hop_s
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
        while True:
            assert self._next_k is not None
            k = self._next_k
            start, end = self._bounds(k)
            if not self._ready(end, now):
                break
            if not sorted_once:
                self._sort()
                sorted_once = True
            first = self._earliest_pending()
            if first is None or first >= end:
                # Nothing in this window: skip straight to the window holding the next
                # sample without materialising every empty window of a long gap (a clock
                # step or an outage must not loop window by window), but no further than
                # the last window due now: one not yet due may still get late samples.
                limit = self._max_ts - self.cfg.lateness_s
                if self._last_arrival != -math.inf:
                    limit = max(limit, self._max_ts + max(0.0, now - self._last_arrival)
                                - self.cfg.timeout_s)
                target = max(k + 1, math.floor((limit - length) / hop + 1e-9) + 1)
                if first is not None:
                    # The first window holding `first`: smallest j with j*hop+length > first.
                    target = max(k + 1, min(target,
                                            math.floor((first - length) / hop + 1e-9) + 1))
                out.empty_skipped += target - k
                self._advance(target)
                continue
            vals, tss, cov, ends = [], [], [], []
            for c in range(len(self._ts)):
                t = self._ts[c]
                # Every buffered sample is at or after `start`: `_advance` and `add`
                # drop the older ones, so the window is a prefix of the buffer.
                hi = int(t.searchsorted(end))
                tss.append(t[:hi])
                vals.append(self._vals[c][:hi])
                cov.append(hi / self._expected[c] if self._expected[c] else 1.0)
                ends.append(hi)
            complete = all(c >= self.cfg.min_coverage for c in cov)
            out.windows.append(ClosedWindow(start, end, tuple(vals), tuple(tss), tuple(cov),
                                            complete))
            # Tumbling: the next window starts where this one ended, so the cut points
            # are already known.
            self._advance(k + 1, ends if self._span_k == 1 else None)
        return out

    def _bounds(self, k: int) -> tuple[float, float]:
        hop = self.cfg.hop_s
        if self._span_k is not None:
            return k * hop, (k + self._span_k) * hop
        return k * hop, k * hop + self.cfg.length_s

    def _earliest_pending(self) -> float | None:
        firsts = [float(t[0]) for t in self._ts if t.size]
        return min(firsts) if firsts else None

    def _sort(self) -> None:
        for c, t in enumerate(self._ts):
            if not self._unsorted[c]:
                continue
            self._unsorted[c] = False
            if t.size > 1 and np.any(t[1:] < t[:-1]):
                order = np.argsort(t, kind="stable")
                self._ts[c] = t[order]
                self._vals[c] = self._vals[c][order]

    def _advance(self, new_k: int, cuts: list[int] | None = None) -> None:
        """Make window `new_k` the earliest open one; drop samples before its start
        (`cuts`: the per-channel index of the first sample at or after it, if known)."""
        self._next_k = new_k
        new_start = new_k * self.cfg.hop_s
        for c, t in enumerate(self._ts):
            if t.size:
                cut = cuts[c] if cuts is not None else \
                    int(np.searchsorted(t, new_start, side="left"))
                if cut:
                    self._ts[c] = t[cut:]
                    self._vals[c] = self._vals[c][cut:]
