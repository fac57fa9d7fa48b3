"""Window assembly per asset: tumbling or hopping windows on sample timestamps.

Windows start at multiples of `hop_s` (epoch aligned), so every gateway and every
replay cuts the same windows. A window [start, start + length_s) closes when

* the newest sample of the asset is at least `lateness_s` past its end, or
* data has stopped: the newest sample time, advanced by the wall-clock time since
  the last arrival, is `timeout_s` past its end.

A closed window is *complete* when every channel has at least `min_coverage` of the
samples its rate promises; incomplete windows are returned (for counting) but not
scored. Samples older than the earliest open window are late: dropped and counted.
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
        self._next_start: float | None = None
        self._max_ts = -math.inf
        self._last_arrival = -math.inf
        self._expected = tuple(r * window.length_s for r in rates_hz)

    @property
    def next_start(self) -> float | None:
        return self._next_start

    @property
    def watermark(self) -> float:
        """The newest sample time seen."""
        return self._max_ts

    def add(self, channel: int, ts: np.ndarray, values: np.ndarray, arrival: float) -> int:
        """Append samples of one channel (any order); returns how many were late."""
        if ts.size == 0:
            return 0
        late = 0
        if self._next_start is not None:
            keep = ts >= self._next_start
            late = int(ts.size - np.count_nonzero(keep))
            if late:
                ts, values = ts[keep], values[keep]
                if ts.size == 0:
                    return late
        else:
            hop = self.cfg.hop_s
            # The first window starts at the first boundary at or after the first
            # sample, so a daemon started mid-window does not score a partial window.
            self._next_start = math.ceil(float(ts.min()) / hop - 1e-9) * hop
            keep = ts >= self._next_start
            ts, values = ts[keep], values[keep]
        if ts.size:
            old_t = self._ts[channel]
            if old_t.size == 0:
                self._ts[channel], self._vals[channel] = ts, values
            else:
                self._ts[channel] = np.concatenate((old_t, ts))
                self._vals[channel] = np.concatenate((self._vals[channel], values))
            self._max_ts = max(self._max_ts, float(ts.max()))
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
        if self._next_start is None:
            return out
        length, hop = self.cfg.length_s, self.cfg.hop_s
        sorted_once = False
        while True:
            start = self._next_start
            end = start + length
            if not self._ready(end, now):
                break
            if not sorted_once:
                self._sort()
                sorted_once = True
            first = self._earliest_pending()
            if first is None or first >= end:
                # Nothing in this window: skip straight to the window holding the next
                # sample (or as far as the data clock allows) without materialising
                # every empty window of a long gap.
                target = start + hop
                if first is None and self._last_arrival != -math.inf:
                    # No data at all: jump to just after the last window that is due now
                    # (a clock step or a long outage must not loop window by window).
                    vwm = self._max_ts + max(0.0, now - self._last_arrival)
                    last_due = math.floor((vwm - length - self.cfg.timeout_s) / hop + 1e-9) * hop
                    target = max(target, last_due + hop)
                if first is not None:
                    # The first window holding `first`: smallest k*hop with k*hop+length > first.
                    target = max(target, (math.floor((first - length) / hop + 1e-9) + 1) * hop)
                out.empty_skipped += max(1, round((target - start) / hop))
                self._advance(target)
                continue
            vals, tss, cov = [], [], []
            for c in range(len(self._ts)):
                t = self._ts[c]
                lo, hi = np.searchsorted(t, [start, end], side="left")
                tss.append(t[lo:hi])
                vals.append(self._vals[c][lo:hi])
                cov.append((hi - lo) / self._expected[c] if self._expected[c] else 1.0)
            complete = all(c >= self.cfg.min_coverage for c in cov)
            out.windows.append(ClosedWindow(start, end, tuple(vals), tuple(tss), tuple(cov),
                                            complete))
            self._advance(start + hop)
        return out

    def _earliest_pending(self) -> float | None:
        firsts = [float(t[0]) for t in self._ts if t.size]
        return min(firsts) if firsts else None

    def _sort(self) -> None:
        for c, t in enumerate(self._ts):
            if t.size > 1 and np.any(t[1:] < t[:-1]):
                order = np.argsort(t, kind="stable")
                self._ts[c] = t[order]
                self._vals[c] = self._vals[c][order]

    def _advance(self, new_start: float) -> None:
        self._next_start = new_start
        for c, t in enumerate(self._ts):
            if t.size:
                cut = int(np.searchsorted(t, new_start, side="left"))
                if cut:
                    self._ts[c] = t[cut:]
                    self._vals[c] = self._vals[c][cut:]
