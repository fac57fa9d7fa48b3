"""Sensor health per channel, apart from machine health. Pure: values and times in.

Checks, each off unless configured (non-finite is always on):

* `stale`          no sample has arrived for `stale_s` seconds (checked every tick);
* `flatline`       no variation at all (max == min) in each of `flatline_windows`
                   consecutive windows with at least two samples: a stuck sensor or a
                   frozen transmitter repeats its last value exactly;
* `out_of_range`   a sample below `min` or above `max` (the sensor's physical range);
* `non_finite`     a NaN or infinite sample (the decoders already reject these on the
                   wire; this catches any other path);
* `rate_of_change` |dx/dt| between consecutive samples above `max_rate_per_s`
  (including the last sample of the previous window and the first of this one, so a
  step on a window boundary is seen);
* `node_death`,    a Sparkplug B death certificate (NDEATH of the edge node, DDEATH of
  `device_death`   the device) for a channel with `liveness`: faulty at once, until a
                   birth certificate and then clean windows.

A channel becomes faulty on the first window (or tick) with a reason, and recovers
after `RECOVER_WINDOWS` consecutive clean windows while fresh samples arrive, so a
sensor that flickers between good and bad does not chatter (a deadband in time:
common practice, no source).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from enum import StrEnum
from typing import NamedTuple

import numpy as np

RECOVER_WINDOWS = 2


class Reason(StrEnum):
    STALE = "stale"
    FLATLINE = "flatline"
    OUT_OF_RANGE = "out_of_range"
    NON_FINITE = "non_finite"
    RATE_OF_CHANGE = "rate_of_change"
    NODE_DEATH = "node_death"
    DEVICE_DEATH = "device_death"


@dataclass(frozen=True)
class HealthLimits:
    """One channel's configured checks (None = off)."""

    min_value: float | None = None
    max_value: float | None = None
    stale_s: float | None = None
    flatline_windows: int | None = None
    max_rate_per_s: float | None = None
    # The source announces its own death and birth (Sparkplug B): `set_liveness`.
    liveness: bool = False

    @property
    def passive(self) -> bool:
        """No check is configured: only the non-finite one would run, and samples that
        come through the decoders are finite already."""
        return (self.min_value is None and self.max_value is None and self.stale_s is None
                and self.flatline_windows is None and self.max_rate_per_s is None
                and not self.liveness)


class Change(StrEnum):
    FAULT = "fault"
    RECOVERED = "recovered"


@dataclass(frozen=True)
class HealthChange:
    """A transition of one channel; `reasons` are the ones active when it faulted."""

    change: Change
    reasons: tuple[Reason, ...]
    detail: dict[str, float] = field(default_factory=dict)


def window_reasons(limits: HealthLimits, values: np.ndarray, ts: np.ndarray
                   ) -> tuple[list[Reason], dict[str, float]]:
    """The per-window reasons (all but stale and flatline) and numbers that explain them."""
    reasons: list[Reason] = []
    detail: dict[str, float] = {}
    if values.size == 0:
        return reasons, detail
    finite = np.isfinite(values)
    if limits.min_value is None and limits.max_value is None and limits.max_rate_per_s is None:
        # Only the non-finite check is on: two numpy calls instead of a copy and four.
        if not finite.all():
            reasons.append(Reason.NON_FINITE)
            detail["non_finite_samples"] = float(values.size - int(finite.sum()))
        return reasons, detail
    if not finite.all():
        reasons.append(Reason.NON_FINITE)
        detail["non_finite_samples"] = float(values.size - int(finite.sum()))
    v = values[finite]
    if v.size:
        lo, hi = float(v.min()), float(v.max())
        if (limits.min_value is not None and lo < limits.min_value) or (
                limits.max_value is not None and hi > limits.max_value):
            reasons.append(Reason.OUT_OF_RANGE)
            detail["min"], detail["max"] = lo, hi
    if limits.max_rate_per_s is not None and v.size > 1:
        t = ts[finite]
        dt = np.diff(t)
        ok = dt > 0
        if ok.any():
            rate = float(np.max(np.abs(np.diff(v)[ok] / dt[ok])))
            if rate > limits.max_rate_per_s:
                reasons.append(Reason.RATE_OF_CHANGE)
                detail["max_rate_per_s"] = rate
    return reasons, detail


class WindowStats(NamedTuple):
    """What `ChannelHealth.check_stats` needs of one channel's window of n >= 1 finite
    samples: lowest and highest value, the largest |dx/dt| between consecutive samples
    with time moving forward (None when not asked for or there is no such pair), the
    first and last sample."""

    n: int
    lo: float
    hi: float
    rate: float | None
    first_v: float
    first_t: float
    last_v: float
    last_t: float


def window_stats(values: np.ndarray, ts: np.ndarray, rate_rows: np.ndarray
                 ) -> list[WindowStats | None]:
    """`WindowStats` of every row of `values` / `ts` [rows, n] (n >= 1, every row full),
    the rate only for rows where `rate_rows`; None for a row holding a non-finite
    sample (`check_window` judges those). The numbers are `check_window`'s own: the same
    operations, row by row."""
    rows, n = values.shape
    finite = np.isfinite(values).all(axis=1).tolist()
    lo = values.min(axis=1).tolist()
    hi = values.max(axis=1).tolist()
    fv, lv = values[:, 0].tolist(), values[:, -1].tolist()
    ft, lt = ts[:, 0].tolist(), ts[:, -1].tolist()
    rate: list[float | None] = [None] * rows
    sel = np.flatnonzero(rate_rows) if n > 1 else np.empty(0, np.int64)
    if sel.size:
        dv = np.diff(values[sel], axis=1)
        dt = np.diff(ts[sel], axis=1)
        ok = dt > 0
        r = np.abs(np.divide(dv, dt, out=np.zeros_like(dv), where=ok)).max(axis=1)
        any_ok: list[bool] = np.asarray(ok.any(axis=1)).tolist()
        for i, has, ri in zip(sel.tolist(), any_ok, r.tolist(), strict=True):
            if has:
                rate[i] = ri
    return [WindowStats(n, lo[i], hi[i], rate[i], fv[i], ft[i], lv[i], lt[i])
            if finite[i] else None for i in range(rows)]


class HealthTable:
    """Per slot (one channel each), what the tick reads of many channels at once as
    arrays: whether the channel is calm (`ChannelHealth.calm`) and its last finite
    sample (`ChannelHealth._last`; NaN time: none). A `ChannelHealth` keeps these here,
    in a table of its own until one gathering many channels adopts it (`move_to`)."""

    def __init__(self, size: int = 1) -> None:
        self.calm = np.ones(size, dtype=bool)
        self.last_v = np.full(size, np.nan)
        self.last_t = np.full(size, np.nan)
        self.used = 0
        self.moved_out = 0  # channels moved to another table since made

    def add(self) -> int:
        """A new slot (calm, no last sample)."""
        if self.used == self.calm.size:
            grow = max(self.used, 1)
            self.calm = np.concatenate([self.calm, np.ones(grow, dtype=bool)])
            self.last_v = np.concatenate([self.last_v, np.full(grow, np.nan)])
            self.last_t = np.concatenate([self.last_t, np.full(grow, np.nan)])
        self.used += 1
        return self.used - 1


class ChannelHealth:
    """The health state machine of one channel."""

    def __init__(self, limits: HealthLimits, table: HealthTable | None = None) -> None:
        self._table = table if table is not None else HealthTable()
        self._slot = self._table.add()
        self.limits = limits
        self.faulty = False
        self.reasons: tuple[Reason, ...] = ()
        self.stale = False
        self.dead: Reason | None = None  # a death certificate's reason, until a birth
        self._flat_windows = 0
        self._clean = 0

    @property
    def table(self) -> tuple[HealthTable, int]:
        """The table and slot holding `calm` and `_last`."""
        return self._table, self._slot

    def move_to(self, table: HealthTable) -> int:
        """Keep `calm` and `_last` in `table` from now on; the new slot."""
        old, i = self._table, self._slot
        j = table.add()
        table.calm[j], table.last_v[j], table.last_t[j] = \
            old.calm[i], old.last_v[i], old.last_t[i]
        old.moved_out += 1
        self._table, self._slot = table, j
        return j

    @property
    def calm(self) -> bool:
        """Not faulty, stale or dead, and no flat run counting: a window with no reason
        changes nothing but `_last` (what `judge_rows` lets the tick skip)."""
        return bool(self._table.calm[self._slot])

    @property
    def _last(self) -> tuple[float, float] | None:
        """The last finite sample (value, time) of the previous window: a step that
        falls exactly on a window boundary has its two samples in different windows."""
        t = float(self._table.last_t[self._slot])
        return None if math.isnan(t) else (float(self._table.last_v[self._slot]), t)

    @_last.setter
    def _last(self, last: tuple[float, float] | None) -> None:
        v, t = last if last is not None else (math.nan, math.nan)
        self._table.last_v[self._slot] = v
        self._table.last_t[self._slot] = t

    def check_window(self, values: np.ndarray, ts: np.ndarray) -> HealthChange | None:
        """Judge one closed window's samples of this channel."""
        reasons, detail = window_reasons(self.limits, values, ts)
        limit = self.limits.max_rate_per_s
        if limit is not None and values.size:
            finite = np.isfinite(values)
            if finite.any():
                v, t = values[finite], ts[finite]
                last = self._last
                if last is not None and t[0] > last[1]:
                    rate = abs(float(v[0]) - last[0]) / (float(t[0]) - last[1])
                    if rate > limit and Reason.RATE_OF_CHANGE not in reasons:
                        reasons.append(Reason.RATE_OF_CHANGE)
                        detail["max_rate_per_s"] = rate
                self._last = (float(v[-1]), float(t[-1]))
        n_fl = self.limits.flatline_windows
        if n_fl is not None:
            v = values[np.isfinite(values)]
            if v.size >= 2:
                self._flat_windows = self._flat_windows + 1 if v.max() == v.min() else 0
            if self._flat_windows >= n_fl:
                reasons.append(Reason.FLATLINE)
                detail["flat_windows"] = float(self._flat_windows)
                if v.size:
                    detail["value"] = float(v[-1])
        if self.stale:
            reasons.append(Reason.STALE)
        if self.dead is not None:
            reasons.append(self.dead)
        return self._judge(reasons, detail, clean_window=values.size > 0 and not reasons)

    def check_stats(self, st: WindowStats) -> HealthChange | None:
        """`check_window` of a window of finite samples given as its `WindowStats`
        (computed for many windows at once by `window_stats`): the same verdict, the
        same state after."""
        lim = self.limits
        limit = lim.max_rate_per_s
        reasons: list[Reason] = []
        detail: dict[str, float] = {}
        if (lim.min_value is not None and st.lo < lim.min_value) or (
                lim.max_value is not None and st.hi > lim.max_value):
            reasons.append(Reason.OUT_OF_RANGE)
            detail["min"], detail["max"] = st.lo, st.hi
        if limit is not None:
            if st.rate is not None and st.rate > limit:
                reasons.append(Reason.RATE_OF_CHANGE)
                detail["max_rate_per_s"] = st.rate
            last = self._last
            if last is not None and st.first_t > last[1]:
                rate = abs(st.first_v - last[0]) / (st.first_t - last[1])
                if rate > limit and Reason.RATE_OF_CHANGE not in reasons:
                    reasons.append(Reason.RATE_OF_CHANGE)
                    detail["max_rate_per_s"] = rate
            self._last = (st.last_v, st.last_t)
        n_fl = lim.flatline_windows
        if n_fl is not None:
            if st.n >= 2:
                self._flat_windows = self._flat_windows + 1 if st.hi == st.lo else 0
            if self._flat_windows >= n_fl:
                reasons.append(Reason.FLATLINE)
                detail["flat_windows"] = float(self._flat_windows)
                detail["value"] = st.last_v
        if self.stale:
            reasons.append(Reason.STALE)
        if self.dead is not None:
            reasons.append(self.dead)
        return self._judge(reasons, detail, clean_window=not reasons)

    def set_liveness(self, death: Reason | None, age_s: float = 0.0) -> HealthChange | None:
        """A death certificate (`death`: NODE_DEATH or DEVICE_DEATH) makes the channel
        faulty now; a birth (None) lets it recover through clean windows."""
        self.dead = death
        if death is None:
            self._recalm()
            return None
        return self._judge([death], {"age_s": round(age_s, 3)}, clean_window=False)

    def check_stale(self, age_s: float) -> HealthChange | None:
        """Judge the time since the channel's last sample (every tick)."""
        if self.limits.stale_s is None:
            return None
        self.stale = age_s > self.limits.stale_s
        if self.stale and not self.faulty:
            return self._judge([Reason.STALE], {"age_s": round(age_s, 3)}, clean_window=False)
        self._recalm()
        return None

    def _recalm(self) -> None:
        self._table.calm[self._slot] = \
            not (self.faulty or self.stale or self._flat_windows) and self.dead is None

    def _judge(self, reasons: list[Reason], detail: dict[str, float], *, clean_window: bool
               ) -> HealthChange | None:
        change = self._transition(reasons, detail, clean_window)
        self._recalm()
        return change

    def _transition(self, reasons: list[Reason], detail: dict[str, float],
                    clean_window: bool) -> HealthChange | None:
        if reasons:
            self._clean = 0
            if not self.faulty:
                self.faulty = True
                self.reasons = tuple(dict.fromkeys(reasons))
                return HealthChange(Change.FAULT, self.reasons, detail)
            self.reasons = tuple(dict.fromkeys((*self.reasons, *reasons)))
            return None
        if self.faulty and clean_window:
            self._clean += 1
            if self._clean >= RECOVER_WINDOWS:
                was = self.reasons
                self.faulty = False
                self.reasons = ()
                self._clean = 0
                return HealthChange(Change.RECOVERED, was, {})
        return None
