"""Sensor health per channel: each check, fault once, recovery after clean windows."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.core.health import (
    RECOVER_WINDOWS,
    Change,
    ChannelHealth,
    HealthLimits,
    Reason,
    window_stats,
)

TS = np.arange(10, dtype=np.float64)


@pytest.mark.parametrize(("limits", "values", "reason"), [
    (HealthLimits(min_value=0, max_value=100), np.r_[np.ones(9), 150.0], Reason.OUT_OF_RANGE),
    (HealthLimits(min_value=0), np.r_[np.ones(9), -1.0], Reason.OUT_OF_RANGE),
    (HealthLimits(), np.r_[np.ones(9), np.nan], Reason.NON_FINITE),
    (HealthLimits(max_rate_per_s=2), np.r_[np.ones(9), 10.0], Reason.RATE_OF_CHANGE),
    (HealthLimits(flatline_windows=1), np.full(10, 42.0), Reason.FLATLINE),
])
def test_each_check_faults(limits: HealthLimits, values: np.ndarray, reason: Reason) -> None:
    """One bad window raises a fault with its reason."""
    ch = ChannelHealth(limits)
    change = ch.check_window(values, TS)
    assert change is not None and change.change is Change.FAULT
    assert reason in change.reasons and ch.faulty


def test_flatline_needs_n_windows_and_recovers_after_clean_ones() -> None:
    """Stuck for 3 windows -> one fault; varying again -> recovered after 2 clean windows."""
    ch = ChannelHealth(HealthLimits(flatline_windows=3))
    stuck, live = np.full(10, 61.25), 61.0 + 0.1 * np.sin(TS)
    changes = [ch.check_window(v, TS) for v in [live, stuck, stuck, stuck, stuck, live, live]]
    kinds = [c.change if c else None for c in changes]
    assert kinds == [None, None, None, Change.FAULT, None, None, Change.RECOVERED]
    assert RECOVER_WINDOWS == 2


def test_stale_by_time_and_back() -> None:
    """No sample for stale_s -> fault; samples again and clean windows -> recovered."""
    ch = ChannelHealth(HealthLimits(stale_s=5))
    assert ch.check_stale(4.9) is None
    change = ch.check_stale(5.1)
    assert change is not None and change.reasons == (Reason.STALE,)
    assert ch.check_stale(9.0) is None  # still stale: no second event
    live = np.linspace(0, 1, 10)
    ch.check_stale(0.1)
    assert ch.check_window(live, TS) is None
    recovered = ch.check_window(live, TS)
    assert recovered is not None and recovered.change is Change.RECOVERED


def test_checks_are_off_unless_configured() -> None:
    """Without limits only non-finite samples are a fault."""
    ch = ChannelHealth(HealthLimits())
    assert ch.check_window(np.full(10, 1e9), TS) is None
    assert ch.check_stale(1e6) is None


@pytest.mark.parametrize(("second", "faulty"), [
    (np.full(10, 45.0), True),    # +25 across the boundary in 0.1 s: 250 per s
    (np.full(10, 20.4), False),   # +0.4 in 0.1 s: 4 per s, under the limit
])
def test_a_step_on_a_window_boundary_is_a_rate_of_change(second: np.ndarray,
                                                         faulty: bool) -> None:
    """The first sample of a window is compared with the last of the window before."""
    h = ChannelHealth(HealthLimits(max_rate_per_s=5.0))
    t = np.arange(10) / 10.0
    assert h.check_window(np.full(10, 20.0), t) is None
    change = h.check_window(second, t + 1.0)
    assert (change is not None and Reason.RATE_OF_CHANGE in change.reasons) is faulty


@settings(max_examples=150, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 12), rows=st.integers(1, 6),
       n_windows=st.integers(1, 6))
def test_batch_statistics_judge_as_check_window_does(seed: int, n: int, rows: int,
                                                     n_windows: int) -> None:
    """`window_stats` + `check_stats` (the tick's batch path) against `check_window`:
    the same changes, reasons, details and state, window after window, for channels
    with every check, over flat, stepping, out-of-range, non-finite and time-reversed
    samples."""
    rng = np.random.default_rng(seed)
    limits = HealthLimits(min_value=-3.0, max_value=3.0, flatline_windows=2,
                          max_rate_per_s=40.0)
    a = [ChannelHealth(limits) for _ in range(rows)]
    b = [ChannelHealth(limits) for _ in range(rows)]
    t0 = 0.0
    for _ in range(n_windows):
        ts = t0 + np.sort(rng.uniform(0, 1, (rows, n)), axis=1)
        ts[rng.random((rows, n)) < 0.1] -= 0.5  # out of order now and then
        vals = rng.normal(0, 1, (rows, n))
        vals[rng.random(rows) < 0.2] = 1.5  # flat rows
        vals[rng.random((rows, n)) < 0.05] = np.nan
        vals[rng.random((rows, n)) < 0.05] *= 10  # out of range
        stats = window_stats(vals, ts, np.ones(rows, dtype=bool))
        for r in range(rows):
            want = a[r].check_window(vals[r], ts[r])
            got = b[r].check_stats(stats[r]) if stats[r] is not None else \
                b[r].check_window(vals[r], ts[r])
            assert got == want
            assert (b[r].faulty, b[r].reasons, b[r]._flat_windows, b[r]._last) == \
                (a[r].faulty, a[r].reasons, a[r]._flat_windows, a[r]._last)
        t0 += 1.0
