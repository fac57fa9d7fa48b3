"""Sensor health of many channel windows at once, as arrays. Pure.

The tick cuts the windows of many assets as rows of one matrix per segment length;
`judge_rows` says which rows are *quiet* (the channel's state machine would find no
reason in them and change nothing but the channel's last sample), so that the state
machines (`agent/core/health.py`) run only for the others.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import NamedTuple

import numpy as np

from agent.core.health import HealthLimits, WindowStats

_SHORT_ROW = 64  # samples: `judge_rows` reduces rows up to this long samples-major


class RowLimits(NamedTuple):
    """The health limits of many rows (each one channel's window), as arrays for
    `judge_rows`: the lowest and highest value a quiet row may hold (never beyond the
    largest finite float, so that a non-finite row is never quiet), whether a flat row
    can be quiet (no flatline check), and the rows with a rate-of-change limit with
    their limits."""

    lo: np.ndarray
    hi: np.ndarray
    flat_ok: np.ndarray  # bool
    rate_rows: np.ndarray  # int64 positions of the rows with `max_rate_per_s`
    rate_lim: np.ndarray  # their limits

    @classmethod
    def of(cls, limits: Sequence[HealthLimits]) -> RowLimits:
        big = float(np.finfo(np.float64).max)
        rate = [i for i, lim in enumerate(limits) if lim.max_rate_per_s is not None]
        return cls(
            np.array([max(-big, -math.inf if lim.min_value is None else lim.min_value)
                      for lim in limits], dtype=np.float64),
            np.array([min(big, math.inf if lim.max_value is None else lim.max_value)
                      for lim in limits], dtype=np.float64),
            np.array([lim.flatline_windows is None for lim in limits], dtype=bool),
            np.array(rate, dtype=np.int64),
            np.array([limits[i].max_rate_per_s for i in rate], dtype=np.float64))


class RowVerdicts:
    """What `judge_rows` found of many rows: which are quiet, and each row's numbers."""

    __slots__ = ("_rate", "_rate_has", "hi", "lo", "quiet", "row_reduced", "ts", "values")

    def __init__(self, values: np.ndarray, ts: np.ndarray, quiet: np.ndarray,
                 lo: np.ndarray, hi: np.ndarray, rate: np.ndarray, rate_has: np.ndarray,
                 row_reduced: bool = False) -> None:
        self.values, self.ts = values, ts
        self.quiet = quiet
        self.lo, self.hi = lo, hi
        # Whether lo and hi are `values.min(axis=1)` and `.max(axis=1)` exactly (long
        # rows; short ones are reduced samples-major, which can differ in a zero's sign).
        self.row_reduced = row_reduced
        self._rate, self._rate_has = rate, rate_has

    def stats(self, i: int, rate_at: int) -> WindowStats | None:
        """Row `i`'s `WindowStats` (None when it holds a non-finite sample), `rate_at`
        its position among the rate rows (-1: none), as `window_stats` gives them."""
        if not (math.isfinite(self.lo[i]) and math.isfinite(self.hi[i])):
            return None
        v, t = self.values[i], self.ts[i]
        lo, hi = float(v.min()), float(v.max())
        rate = float(self._rate[rate_at]) if rate_at >= 0 and self._rate_has[rate_at] \
            else None
        return WindowStats(v.shape[0], lo, hi, rate, float(v[0]), float(t[0]),
                           float(v[-1]), float(t[-1]))


def judge_rows(lim: RowLimits, values: np.ndarray, ts: np.ndarray, calm: np.ndarray | bool,
               last_v: np.ndarray, last_t: np.ndarray) -> RowVerdicts:
    """Which rows of `values` / `ts` [rows, n >= 1] (every row full, each one window of
    one channel) are *quiet*: `ChannelHealth.check_stats` of the row would find no
    reason and change nothing but `_last`, given the channel is `calm` and its `_last`
    is (`last_v`, `last_t`) for the rate rows (NaN for None). A row holding a
    non-finite sample is never quiet.

    Short rows are reduced samples-major (one elementwise pass per sample across all
    rows instead of a reduction call per row). The order of a min or max does not
    change the comparisons made here; `RowVerdicts.stats` reads lowest and highest
    value of its row again, as `window_stats` does, and the rates are the same
    elementwise quotients either way (their maximum is exact)."""
    n = values.shape[1]
    short = n <= _SHORT_ROW
    x = np.ascontiguousarray(values.T) if short else values
    axis = 0 if short else 1
    lo, hi = x.min(axis=axis), x.max(axis=axis)
    # In range and finite (NaN compares false), and not flat where that counts.
    quiet: np.ndarray = (lo >= lim.lo) & (hi <= lim.hi)
    quiet &= (hi > lo) | lim.flat_ok
    quiet &= calm
    sel = lim.rate_rows
    rate = np.zeros(sel.size)
    has = np.zeros(sel.size, dtype=bool)
    if sel.size:
        if short:
            vs, tsel = x[:, sel], np.ascontiguousarray(ts[sel].T)
            fv, ft = vs[0], tsel[0]
        else:
            vs, tsel = values[sel], ts[sel]
            fv, ft = vs[:, 0], tsel[:, 0]
        if n > 1:
            with np.errstate(invalid="ignore", over="ignore"):  # inf - inf in a loud row
                rate, has = _rates(vs, tsel, axis)
        loud = has & (rate > lim.rate_lim)
        fwd = ft > last_t  # False where there is no last sample (NaN)
        gap = np.where(fwd, ft - last_t, 1.0)
        loud |= fwd & (np.abs(fv - last_v) / gap > lim.rate_lim)
        quiet[sel] &= ~loud
    return RowVerdicts(values, ts, quiet, lo, hi, rate, has, not short)


def _rates(v: np.ndarray, t: np.ndarray, axis: int) -> tuple[np.ndarray, np.ndarray]:
    """The largest |dv/dt| along `axis` over the pairs with time moving forward (0
    without any), and whether there is such a pair: `window_stats`'s quotients."""
    dv, dt = np.diff(v, axis=axis), np.diff(t, axis=axis)
    ok = dt > 0
    if ok.all():  # the usual case: no pair to leave out
        q = np.divide(dv, dt, out=dv)
        return np.abs(q, out=q).max(axis=axis), np.ones(q.shape[1 - axis], dtype=bool)
    q = np.abs(np.divide(dv, dt, out=np.zeros_like(dv), where=ok))
    return q.max(axis=axis), np.asarray(ok.any(axis=axis))
