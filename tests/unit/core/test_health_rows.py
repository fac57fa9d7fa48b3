"""Sensor health of many rows at once (`judge_rows`) against `check_window`, window by
window; channels keeping their state in a shared `HealthTable`."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.core.health import ChannelHealth, HealthLimits, HealthTable, window_stats
from agent.core.health_rows import RowLimits, judge_rows

# Every kind of check, and none but the range, per row (cycled over the rows).
LIMITS = [
    HealthLimits(min_value=-3.0, max_value=3.0, flatline_windows=2, max_rate_per_s=40.0),
    HealthLimits(min_value=-3.0, max_value=3.0),
    HealthLimits(max_value=3.0, flatline_windows=1, stale_s=5.0),
    HealthLimits(min_value=-3.0, max_rate_per_s=25.0),
]


def _state(h: ChannelHealth) -> tuple[object, ...]:
    return (h.faulty, h.reasons, h.stale, h.dead, h._flat_windows, h._clean, h._last,
            h.calm)


def _batch_window(hs: list[ChannelHealth], slots: np.ndarray, lim: RowLimits,
                  table: HealthTable, vals: np.ndarray, ts: np.ndarray) -> list[object]:
    """One window of every row the way the tick takes it: `judge_rows`, `_last` of the
    quiet rows written in the table, the state machine for the others."""
    rs = slots[lim.rate_rows]
    got = judge_rows(lim, vals, ts, table.calm[slots], table.last_v[rs], table.last_t[rs])
    rate_at = {int(i): k for k, i in enumerate(lim.rate_rows)}
    out: list[object] = []
    for r, h in enumerate(hs):
        if got.quiet[r]:
            out.append(None)
            continue
        st_ = got.stats(r, rate_at.get(r, -1))
        out.append(h.check_stats(st_) if st_ is not None else h.check_window(vals[r], ts[r]))
    q = got.quiet[lim.rate_rows]
    table.last_v[rs[q]] = vals[lim.rate_rows, -1][q]
    table.last_t[rs[q]] = ts[lim.rate_rows, -1][q]
    return out


@settings(max_examples=200, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.sampled_from([1, 2, 3, 10, 64, 65, 200]),
       rows=st.integers(1, 9), n_windows=st.integers(1, 8))
def test_quiet_rows_change_what_check_window_would(seed: int, n: int, rows: int,
                                                   n_windows: int) -> None:
    """The tick's array path against `check_window` alone: the same changes, reasons,
    details and state after every window, over flat, stepping, out-of-range,
    non-finite and time-reversed samples, stale channels and short and long rows."""
    rng = np.random.default_rng(seed)
    limits = [LIMITS[r % len(LIMITS)] for r in range(rows)]
    table = HealthTable()
    a = [ChannelHealth(lim) for lim in limits]
    b = [ChannelHealth(lim, table) for lim in limits]
    slots = np.array([h.table[1] for h in b], dtype=np.int64)
    lim = RowLimits.of(limits)
    t0 = 0.0
    for _ in range(n_windows):
        ts = t0 + np.sort(rng.uniform(0, 1, (rows, n)), axis=1)
        ts[rng.random((rows, n)) < 0.05] -= 0.5  # out of order now and then
        if rng.random() < 0.2:
            ts -= 2.0  # the whole window before the last sample
        vals = rng.normal(0, 0.5, (rows, n))
        vals[rng.random(rows) < 0.25] = 1.5  # flat rows
        vals[rng.random((rows, n)) < 0.02] = rng.choice([np.nan, np.inf, -np.inf])
        vals[rng.random((rows, n)) < 0.02] *= 10  # out of range
        vals[rng.random(rows) < 0.1, n // 2:] += 2.0  # a step inside the row
        for r in range(rows):
            if limits[r].stale_s is not None and rng.random() < 0.1:
                age = float(rng.choice([1.0, 9.0]))
                assert b[r].check_stale(age) == a[r].check_stale(age)
        got = _batch_window(b, slots, lim, table, vals, ts)
        for r in range(rows):
            assert got[r] == a[r].check_window(vals[r], ts[r])
            assert _state(b[r]) == _state(a[r])
        t0 += 1.0


@settings(max_examples=100, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.sampled_from([1, 2, 7, 64, 65, 300]),
       rows=st.integers(1, 8))
def test_row_stats_are_window_stats(seed: int, n: int, rows: int) -> None:
    """`RowVerdicts.stats` of a row: `window_stats`'s numbers, short rows (reduced
    samples-major) and long ones alike."""
    rng = np.random.default_rng(seed)
    limits = [LIMITS[r % len(LIMITS)] for r in range(rows)]
    ts = np.sort(rng.uniform(0, 1, (rows, n)), axis=1)
    ts[rng.random((rows, n)) < 0.1] -= 0.5
    vals = rng.normal(0, 1, (rows, n))
    vals[rng.random((rows, n)) < 0.05] = np.nan
    vals[rng.random(rows) < 0.2] = -0.0
    lim = RowLimits.of(limits)
    nan = np.full(lim.rate_rows.size, np.nan)
    got = judge_rows(lim, vals, ts, np.ones(rows, dtype=bool), nan, nan)
    want = window_stats(vals, ts, np.array([x.max_rate_per_s is not None for x in limits]))
    rate_at = {int(i): k for k, i in enumerate(lim.rate_rows)}
    for r in range(rows):
        assert got.stats(r, rate_at.get(r, -1)) == want[r]


def test_a_channel_keeps_its_state_when_moved_to_another_table() -> None:
    """`move_to` carries calm and the last sample over, and counts the move."""
    old = HealthTable()
    h = ChannelHealth(HealthLimits(max_rate_per_s=1.0, flatline_windows=1), old)
    h.check_window(np.full(3, 2.0), np.arange(3.0))  # flat: faulty, not calm
    before = _state(h)
    new = HealthTable()
    for _ in range(3):
        new.add()  # grows past its first size
    slot = h.move_to(new)
    assert (h.table, old.moved_out) == ((new, slot), 1)
    assert _state(h) == before and not h.calm and h._last == (2.0, 2.0)


def test_which_rows_are_quiet() -> None:
    """A clean row of a calm channel is quiet; out of range, non-finite, flat (with a
    flatline check), a steep step inside the row or from the last sample, or a channel
    that is not calm is not."""
    limits = [LIMITS[0]] * 8
    ts = np.tile(np.arange(4) / 10.0 + 1.0, (8, 1))
    vals = np.tile(np.array([0.0, 0.1, 0.2, 0.1]), (8, 1))
    vals[1, 2] = 9.0  # out of range
    vals[2, 0] = np.nan
    vals[3] = 1.0  # flat
    vals[4, 2:] = -2.9, 2.9  # a step of 5.8 in 0.1 s: 58 /s
    vals[5, 0] = 2.5  # far from the last sample (0.0 at t = 0.95): 50 /s
    calm = np.ones(8, dtype=bool)
    calm[6] = False
    lim = RowLimits.of(limits)
    last_v, last_t = np.zeros(8), np.full(8, 0.9)
    last_t[5] = 0.95
    last_v[7], last_t[7] = np.nan, np.nan  # no last sample
    got = judge_rows(lim, vals, ts, calm, last_v, last_t)
    assert got.quiet.tolist() == [True, False, False, False, False, False, False, True]


@settings(max_examples=100, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.sampled_from([1, 7, 64, 65, 300, 1024]),
       rows=st.integers(1, 8))
def test_row_reduced_extremes_are_numpys_row_min_and_max(seed: int, n: int,
                                                         rows: int) -> None:
    """Where `judge_rows` says its lo and hi are row reductions (`row_reduced`: long
    rows), they are `values.min(axis=1)` and `.max(axis=1)` bit for bit, signed zeros
    and NaN rows included: the feature pass takes them instead of reducing again."""
    from agent.core.features import ALL_FEATURES, block_features

    rng = np.random.default_rng(seed)
    vals = rng.normal(0, 1, (rows, n))
    vals[rng.random((rows, n)) < 0.02] = np.nan
    vals[rng.random(rows) < 0.3] = -0.0
    vals[rng.random((rows, n)) < 0.05] = 0.0
    ts = np.broadcast_to(np.arange(n, dtype=np.float64), (rows, n))
    lim = RowLimits.of([LIMITS[1]] * rows)
    nan = np.full(lim.rate_rows.size, np.nan)
    got = judge_rows(lim, vals, ts, np.ones(rows, dtype=bool), nan, nan)
    assert got.row_reduced == (n > 64)
    if got.row_reduced:
        for a, b in ((got.lo, vals.min(axis=1)), (got.hi, vals.max(axis=1))):
            assert a.tobytes() == b.tobytes()
        with np.errstate(invalid="ignore", divide="ignore"):
            want = block_features(vals, ALL_FEATURES)
            shared = block_features(vals, ALL_FEATURES, extremes=(got.lo, got.hi))
        assert shared.tobytes() == want.tobytes()
