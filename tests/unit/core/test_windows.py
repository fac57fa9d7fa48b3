"""Window assembly: tumbling and hopping windows, lateness, timeout, coverage, gaps."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.config.load import WindowConfig
from agent.core.windows.assembler import WindowAssembler
from agent.core.windows.closed import ClosedWindow

T0 = 1_796_119_200.0  # 2026-12-01T10:00:00Z, a whole second
RATE_HZ = 10.0


def assembler(length_s: float = 1.0, hop_s: float | None = None, lateness_s: float = 0.2,
              timeout_s: float = 2.0, min_coverage: float = 0.8,
              rates: tuple[float, ...] = (RATE_HZ,)) -> WindowAssembler:
    cfg = WindowConfig(length_s, length_s if hop_s is None else hop_s, lateness_s, timeout_s,
                       min_coverage)
    return WindowAssembler(cfg, rates)


def grid(start: float, stop: float, rate: float = RATE_HZ) -> np.ndarray:
    """Sample times T0 + start, T0 + start + 1/rate, ... below T0 + stop (offsets in s)."""
    n = round((stop - start) * rate)
    return T0 + start + np.arange(n) / rate


def feed(asm: WindowAssembler, ts: np.ndarray, channel: int = 0,
         arrival: float | None = None) -> int:
    return asm.add(channel, ts, ts - T0, ts.max() if arrival is None else arrival)


def starts(ws: list[ClosedWindow]) -> list[float]:
    return [w.start - T0 for w in ws]


def test_tumbling_windows_are_epoch_aligned_and_start_at_the_first_boundary() -> None:
    """Samples from T0+0.37 give windows [T0+1, T0+2), [T0+2, T0+3), ...: no partial first."""
    asm = assembler()
    feed(asm, grid(0.4, 4.3))
    ws = asm.close_due(T0 + 4.3).windows
    assert starts(ws) == [1.0, 2.0, 3.0]
    for w in ws:
        assert w.end - w.start == 1.0
        assert w.complete and w.coverage == (1.0,)
        np.testing.assert_allclose(w.timestamps[0], grid(w.start - T0, w.end - T0), atol=1e-6)
        np.testing.assert_array_equal(w.values[0], w.timestamps[0] - T0)


@pytest.mark.parametrize(("length_s", "hop_s"), [(10.0, 10.0), (10.0, 2.5), (0.5, 0.1)])
def test_window_starts_are_multiples_of_hop(length_s: float, hop_s: float) -> None:
    """Every window start is an integer multiple of hop_s, whatever the first sample."""
    asm = assembler(length_s, hop_s, lateness_s=0.0, timeout_s=1.0)
    feed(asm, grid(0.123, 60.0))
    ws = asm.close_due(T0 + 60.0).windows
    assert ws
    for w in ws:
        k = round(w.start / hop_s)
        assert w.start == k * hop_s
        assert w.end == pytest.approx(w.start + length_s, abs=1e-6)


def test_two_replays_started_apart_cut_identical_windows() -> None:
    """Epoch alignment over a long run: no drift from adding 0.1 s hops up one by one."""
    hop = 0.1
    n = 4000
    ts = T0 + np.arange(n * 2) * hop + hop / 2  # one sample per window

    def cut(first: int) -> dict[float, float]:
        asm = assembler(hop, hop, lateness_s=0.0, timeout_s=1.0, min_coverage=1.0,
                        rates=(1 / hop,))
        got: dict[float, float] = {}
        for i in range(first, n * 2, 500):
            part = ts[i:i + 500]
            asm.add(0, part, part, float(part.max()))
            for w in asm.close_due(float(part.max())).windows:
                got[w.start] = float(w.values[0][0])
        return got

    early, late = cut(0), cut(n)
    overlap = sorted(set(late))
    assert len(overlap) >= n - 2
    assert all(early[s] == late[s] for s in overlap)
    assert all(s == round(s / hop) * hop for s in overlap)


def test_hopping_windows_overlap_and_share_samples() -> None:
    """length 2 s, hop 1 s: windows [1,3), [2,4), ...; each inner sample is in two."""
    asm = assembler(2.0, 1.0)
    feed(asm, grid(0.5, 6.5))
    ws = asm.close_due(T0 + 6.5).windows
    assert starts(ws) == [1.0, 2.0, 3.0, 4.0]
    for w in ws:
        assert w.end - w.start == 2.0
        assert w.timestamps[0].size == 20 and w.complete
    seen = np.concatenate([w.timestamps[0] for w in ws])
    inner = grid(2.0, 5.0)
    for t in inner:
        assert np.count_nonzero(np.isclose(seen, t, rtol=0, atol=1e-6)) == 2


def test_window_waits_for_lateness_then_closes() -> None:
    """[1,2) stays open until the newest sample is lateness_s past its end."""
    asm = assembler(lateness_s=0.2)
    feed(asm, grid(1.0, 2.2))  # newest sample T0+2.1
    assert asm.close_due(T0 + 2.1).windows == []
    feed(asm, np.array([T0 + 2.2]))
    assert starts(asm.close_due(T0 + 2.2).windows) == [1.0]


def test_out_of_order_within_lateness_is_kept_and_sorted() -> None:
    """A sample for [1,2) arriving after samples of [2,3), within lateness, is used."""
    asm = assembler(lateness_s=0.5)
    ts = grid(1.0, 2.3)
    held_back = ts[9]  # T0 + 1.9
    feed(asm, np.delete(ts, 9))
    assert feed(asm, np.array([held_back])) == 0
    feed(asm, np.array([T0 + 2.5]))
    (w,) = asm.close_due(T0 + 2.5).windows
    assert w.timestamps[0].size == 10
    assert np.all(np.diff(w.timestamps[0]) > 0)
    np.testing.assert_array_equal(w.values[0], w.timestamps[0] - T0)


def test_late_samples_are_dropped_and_counted() -> None:
    """A sample for a window already closed is late: not added, counted by add()."""
    asm = assembler(lateness_s=0.2)
    feed(asm, grid(1.0, 2.3))
    assert starts(asm.close_due(T0 + 2.3).windows) == [1.0]
    assert feed(asm, np.array([T0 + 1.5, T0 + 1.95, T0 + 2.05])) == 2
    feed(asm, grid(2.3, 3.3))
    (w,) = asm.close_due(T0 + 3.3).windows
    assert w.start == T0 + 2.0
    assert np.count_nonzero(np.isclose(w.timestamps[0], T0 + 2.05, rtol=0, atol=1e-6)) == 1


def test_samples_before_the_first_window_are_not_late() -> None:
    """The first window starts after the earliest sample of any channel, whichever channel
    is added first; the rest of the partial window it started in is not counted late."""
    asm = assembler(rates=(RATE_HZ, RATE_HZ))
    assert feed(asm, grid(0.7, 3.3), channel=0) == 0
    assert feed(asm, grid(0.6, 3.3), channel=1) == 0
    ws = asm.close_due(T0 + 3.3).windows
    assert starts(ws) == [1.0, 2.0]
    assert all(w.complete for w in ws)
    assert feed(asm, grid(0.2, 0.6), channel=1) == 0  # before the first window
    assert feed(asm, grid(1.5, 1.7), channel=1) == 2  # in a closed window: late


def test_window_closes_on_wall_clock_timeout_when_data_stops() -> None:
    """Data stops mid-window: it closes once timeout_s has passed on the data clock
    (newest sample + wall time since the last arrival), as incomplete."""
    asm = assembler(lateness_s=0.2, timeout_s=2.0)
    last_arrival = T0 + 3.5
    feed(asm, grid(1.0, 3.55), arrival=last_arrival)  # newest sample T0+3.5
    assert starts(asm.close_due(last_arrival).windows) == [1.0, 2.0]
    # [3,4) is due when 3.5 + idle >= 4 + 2, i.e. idle >= 2.5 s.
    assert asm.close_due(last_arrival + 2.4).windows == []
    (w,) = asm.close_due(last_arrival + 2.5).windows
    assert w.start == T0 + 3.0
    assert not w.complete and w.coverage == (pytest.approx(0.6),)


def test_timeout_uses_wall_time_since_arrival_not_the_sample_clock() -> None:
    """A sensor clock running behind the gateway does not close windows early."""
    asm = assembler(lateness_s=0.2, timeout_s=2.0)
    behind_s = 120.0  # sample times 2 minutes behind arrival times
    feed(asm, grid(1.0, 1.55), arrival=T0 + 1.5 + behind_s)
    assert asm.close_due(T0 + 1.5 + behind_s + 2.4).windows == []
    assert len(asm.close_due(T0 + 1.5 + behind_s + 2.5).windows) == 1


@pytest.mark.parametrize("ahead_s", [3.0, 5.6, 9.0])
def test_one_sample_ahead_of_the_gateway_clock_does_not_blind_the_asset(ahead_s: float
                                                                      ) -> None:
    """One sample stamped `ahead_s` (more than timeout_s, less than the time-base
    guard's 10 s) ahead of a live stream: the stream's samples until it catches up are
    late, then its windows fill again. Found by the ingest-tick fuzz target (a Sparkplug
    metric stamped 5.6 s ahead): the late samples did not count as arrivals, so the
    timeout kept closing windows at wall-clock pace ahead_s ahead of the data, and every
    later sample was late, for good."""
    asm = assembler(lateness_s=0.2, timeout_s=2.0)
    delay = 0.05  # arrival - sample time of the live stream
    feed(asm, grid(0.0, 3.0), arrival=T0 + 3.0 + delay)
    asm.close_due(T0 + 3.0 + delay)
    asm.add_one(0, T0 + 3.0 + ahead_s, 1.0, T0 + 3.0 + delay)  # the one outlier
    full = []
    for k in range(3, 20):  # the live stream goes on, 10 samples a second
        for t in grid(k, k + 1):
            asm.add_one(0, float(t), 0.0, float(t) + delay)
            full += [w.start - T0 for w in asm.close_due(float(t) + delay).windows
                     if w.complete]
    assert full and full[-1] >= 17.0, full  # complete windows again at the end
    assert full[0] <= 3.0 + ahead_s + 1.0, full  # from where the outlier was


def test_coverage_per_channel_decides_completeness() -> None:
    """Complete needs every channel at min_coverage of the samples its rate promises."""
    asm = assembler(min_coverage=0.8, rates=(RATE_HZ, 100.0, RATE_HZ))
    ts10 = grid(1.0, 3.5)
    feed(asm, ts10, channel=0)
    fast = grid(1.0, 3.5, rate=100.0)
    feed(asm, np.delete(fast, np.arange(179, 200)), channel=1)  # 2nd window: 79 of 100
    feed(asm, np.delete(ts10, [10, 11]), channel=2)  # 2nd window: 8 of 10
    w1, w2 = asm.close_due(T0 + 3.5).windows
    assert w1.complete and w1.coverage == (1.0, 1.0, 1.0)
    assert w2.coverage == pytest.approx((1.0, 0.79, 0.8))
    assert not w2.complete
    assert [t.size for t in w2.timestamps] == [10, 79, 8]


def test_a_silent_channel_makes_the_window_incomplete() -> None:
    """One channel without any sample: coverage 0, incomplete."""
    asm = assembler(rates=(RATE_HZ, RATE_HZ))
    feed(asm, grid(1.0, 2.3), channel=0)
    (w,) = asm.close_due(T0 + 2.3).windows
    assert w.coverage == (1.0, 0.0) and not w.complete
    assert w.timestamps[1].size == 0 and w.values[1].size == 0


def test_long_gap_in_the_data_is_skipped_in_one_step() -> None:
    """A month-long gap in sample time: no empty window is materialised, all are counted."""
    asm = assembler(lateness_s=0.2)
    feed(asm, grid(1.0, 3.0))
    gap_s = 30 * 86400
    feed(asm, grid(gap_s, gap_s + 1.5))
    res = asm.close_due(T0 + gap_s + 1.5)
    assert starts(res.windows) == [1.0, 2.0, float(gap_s)]
    assert res.empty_skipped == gap_s - 3
    assert res.late_samples == 0


def test_outage_with_no_data_is_skipped_in_one_step() -> None:
    """Data stops, then the wall clock jumps a year (an NTP step on a gateway without a
    real-time clock): the empty windows are counted, not looped over."""
    asm = assembler(lateness_s=0.2, timeout_s=2.0)
    feed(asm, grid(1.0, 2.55), arrival=T0 + 2.5)
    year_s = 365 * 86400
    res = asm.close_due(T0 + 2.5 + year_s)
    assert starts(res.windows) == [1.0, 2.0]
    # Windows due: every [k, k+1) with k + 1 + 2 <= 2.5 + year_s.
    assert res.empty_skipped == year_s - 3
    assert asm.next_start == T0 + year_s
    feed(asm, grid(year_s + 0.5, year_s + 2.3))
    assert starts(asm.close_due(T0 + year_s + 2.3).windows) == [year_s + 0.0, year_s + 1.0]


def test_gap_skip_stops_at_windows_not_yet_due() -> None:
    """A skip never jumps over a window that could still receive samples within
    lateness: such a sample arrives and is used, not counted late."""
    asm = assembler(lateness_s=0.5, timeout_s=5.0, rates=(RATE_HZ, RATE_HZ))
    feed(asm, grid(1.0, 2.0), channel=0)
    feed(asm, grid(1.0, 2.0), channel=1)
    feed(asm, np.array([T0 + 4.2]), channel=0)  # channel 0 runs ahead
    res = asm.close_due(T0 + 4.2)
    assert starts(res.windows) == [1.0] and res.empty_skipped == 1  # [2,3) skipped
    assert asm.next_start == T0 + 3.0  # [3,4) is not due before 4.5
    assert feed(asm, np.array([T0 + 3.9]), channel=1) == 0


def test_nothing_closes_before_any_data() -> None:
    """No samples: no windows and no start yet."""
    asm = assembler()
    assert asm.close_due(T0 + 1e6).windows == []
    assert asm.next_start is None
    assert asm.add(0, np.empty(0), np.empty(0), T0) == 0


def test_sample_on_a_boundary_belongs_to_the_later_window() -> None:
    """Windows are half-open [start, end)."""
    asm = assembler(lateness_s=0.0)
    feed(asm, np.array([T0 + 1.0, T0 + 1.5, T0 + 2.0, T0 + 3.0]))
    w1, w2 = asm.close_due(T0 + 3.0).windows
    assert (w1.timestamps[0] - T0).tolist() == [1.0, 1.5]
    assert (w2.timestamps[0] - T0).tolist() == [2.0]


# --- properties -------------------------------------------------------------------------

@st.composite
def in_order_streams(draw):
    """Two channels of increasing sample times (with gaps), merged in time order and cut
    into arbitrary chunks; plus a window config."""
    hop = draw(st.sampled_from([0.5, 1.0, 2.0]))
    span = draw(st.sampled_from([1, 2, 4]))
    lateness = draw(st.sampled_from([0.0, 0.1, 1.0]))
    n = draw(st.integers(1, 300))
    steps = draw(st.lists(st.sampled_from([0.0, 0.01, 0.05, 0.1, 0.3, 2.5, 40.0]),
                          min_size=n, max_size=n))
    chans = draw(st.lists(st.integers(0, 1), min_size=n, max_size=n))
    ts = T0 + 0.37 + np.cumsum(steps)
    cuts = sorted(set(draw(st.lists(st.integers(1, max(1, n - 1)), max_size=20))))
    return hop, span * hop, lateness, ts, np.asarray(chans), cuts


@settings(max_examples=150, deadline=None)
@given(in_order_streams())
def test_in_order_samples_are_never_lost_or_duplicated(stream) -> None:
    """Any chunking of in-order samples: each window holds exactly the input samples in
    [start, end), windows are consecutive, nothing is late, and in tumbling mode every
    sample from the first window on is in exactly one window."""
    hop, length, lateness, ts, chans, cuts = stream
    asm = WindowAssembler(WindowConfig(length, hop, lateness, lateness + 1.0, 0.5),
                          (RATE_HZ, RATE_HZ))
    ids = np.arange(ts.size, dtype=np.float64)  # each sample's value is its identity
    windows: list[ClosedWindow] = []
    late = 0
    for lo, hi in zip([0, *cuts], [*cuts, ts.size], strict=True):
        for c in (0, 1):
            sel = np.flatnonzero(chans[lo:hi] == c) + lo
            if sel.size:
                late += asm.add(c, ts[sel], ids[sel], float(ts[hi - 1]))
        windows += asm.close_due(float(ts[hi - 1])).windows
    windows += asm.close_due(float(ts[-1]) + length + lateness + 2.0).windows
    assert late == 0
    # The first window starts at the first multiple of hop at or after the first sample;
    # empty windows are skipped, so the first *closed* window may start later.
    first_start = math.ceil(ts[0] / hop - 1e-9) * hop
    assert all(w.start >= first_start for w in windows)
    ks = [round(w.start / hop) for w in windows]
    assert ks == sorted(set(ks))
    for w in windows:
        for c in (0, 1):
            expect = np.flatnonzero((chans == c) & (ts >= w.start) & (ts < w.end))
            assert w.values[c].tolist() == ids[expect].tolist()
            np.testing.assert_array_equal(w.timestamps[c], ts[expect])
    if length == hop:
        got = np.sort(np.concatenate([np.empty(0)] + [v for w in windows for v in w.values]))
        expect = ids[ts >= first_start]
        assert got.tolist() == expect.tolist()


@settings(max_examples=60, deadline=None)
@given(st.permutations(list(range(30))), st.integers(1, 30))
def test_shuffled_samples_within_lateness_all_arrive(order: list[int], chunk: int) -> None:
    """Out of order by less than the lateness: every sample lands in its window, sorted."""
    ts = T0 + 1.0 + np.arange(30) * 0.1  # windows [1,2), [2,3), [3,4)
    shuffled = ts[order]
    asm = assembler(lateness_s=5.0, timeout_s=5.0)
    asm.add(0, np.array([T0 + 1.0]), np.array([-1.0]), T0 + 1.0)  # opens [1,2) first
    got: list[ClosedWindow] = []
    for i in range(0, 30, chunk):
        part = shuffled[i:i + chunk]
        assert asm.add(0, part, part - T0, T0 + 4.0) == 0
        got += asm.close_due(T0 + 4.0).windows
    got += asm.close_due(T0 + 20.0).windows
    assert starts(got) == [1.0, 2.0, 3.0]
    all_ts = np.concatenate([w.timestamps[0] for w in got])
    assert np.all(np.diff(all_ts) >= 0)
    assert all_ts.size == 31
