"""`cut_lockstep` cuts what `close_due` closes, and leaves every assembler as it would.

Twin fleets of assemblers get the same samples; at every tick one fleet closes its
windows with `close_due`, the other offers every assembler to `cut_lockstep` and
closes the ones it leaves with `close_due`. The windows (bounds, completeness,
samples) and the assemblers' states afterwards must be the same. The streams mix
assets in step with laggards, gaps, samples past the window's end (lateness),
hopping windows, two rates, thin windows and out-of-order samples, so both the cut
and every way of declining it are taken.
"""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.config.load import WindowConfig
from agent.core.lockstep import cut_lockstep
from agent.core.windows.assembler import WindowAssembler

T0 = 1_796_119_200.0


@st.composite
def fleets(draw):
    n_assets = draw(st.integers(1, 6))
    hop = draw(st.sampled_from([0.5, 1.0]))
    span = draw(st.sampled_from([1, 1, 1, 2]))
    lateness = draw(st.sampled_from([0.0, 0.0, 0.3]))
    coverage = draw(st.sampled_from([0.5, 0.9, 1.0]))
    assets = []
    for _ in range(n_assets):
        rates = draw(st.sampled_from([(10.0, 10.0), (10.0, 10.0, 10.0), (10.0,), (10.0, 4.0)]))
        style = draw(st.sampled_from(["step", "step", "step", "lag", "thin", "shuffled"]))
        n = draw(st.integers(1, 150))
        gaps = draw(st.lists(st.sampled_from([0.1] * 12 + [0.2, 2.0]), min_size=n,
                             max_size=n))
        ts = T0 + 0.5 + np.cumsum(gaps)
        assets.append((rates, style, ts))
    # Ticks mostly closer than a window, as the daemon's are, now and then far apart.
    steps = draw(st.lists(st.sampled_from([0.05, 0.2, 0.3, 0.45, 1.0, 3.0]), min_size=1,
                          max_size=80))
    ticks = np.cumsum(steps).tolist()
    return WindowConfig(hop * span, hop, lateness, timeout_s=0.5, min_coverage=coverage), \
        assets, ticks


def _feed(a: WindowAssembler, rates: tuple[float, ...], style: str, ts: np.ndarray,
          now: float) -> None:
    vals = (ts - T0) * 7.0
    for c in range(len(rates)):
        sel_ts, sel_v = ts, vals + c
        if style == "lag" and c == 0:
            sel_ts, sel_v = ts[:-1], sel_v[:-1]  # channel 0 a sample behind
        if style == "thin":
            sel_ts, sel_v = ts[::3], sel_v[::3]  # a third of the rate: incomplete
        if not sel_ts.size:
            continue
        if style == "shuffled" and sel_ts.size > 1:
            for t, v in zip(sel_ts[::-1], sel_v[::-1], strict=True):  # newest first
                a.add_one(c, float(t), float(v), now)
        else:
            a.add(c, sel_ts, sel_v, now, presorted=True)


@settings(max_examples=200, deadline=None)
@given(fleets())
def test_cut_lockstep_closes_what_close_due_closes(fleet) -> None:
    cfg, assets, ticks = fleet
    one = [WindowAssembler(cfg, rates) for rates, _, _ in assets]
    two = [WindowAssembler(cfg, rates) for rates, _, _ in assets]
    fed = [0] * len(assets)
    for tick in [*ticks, ticks[-1] + 10.0]:
        now = T0 + tick
        for ai, (rates, style, ts) in enumerate(assets):
            hi = int(np.searchsorted(ts, now))
            lo, fed[ai] = fed[ai], hi
            if hi > lo:
                for a in (one[ai], two[ai]):
                    _feed(a, rates, style, ts[lo:hi], now)
        want = [a.close_due(now) for a in one]
        cuts, rest = cut_lockstep(two, range(len(two)), now)
        got: dict[int, list[tuple[float, float, bool, list[np.ndarray]]]] = {
            i: [(a_w.start, a_w.end, a_w.complete, list(a_w.values))
                for a_w in two[i].close_due(now).windows] for i in rest}
        for c in cuts:
            for j, (i, start, end) in enumerate(c.items):
                assert i not in got
                rows = c.values[j * c.n_ch:(j + 1) * c.n_ch]
                assert rows.shape == (len(assets[i][0]), c.width)
                got[i] = [(start, end, True, list(rows))]
        assert sorted(got) == list(range(len(assets)))
        for i, res in enumerate(want):
            assert [(w.start, w.end, w.complete) for w in res.windows] == \
                [g[:3] for g in got[i]], i
            for w, g in zip(res.windows, got[i], strict=True):
                for c_want, c_got in zip(w.values, g[3], strict=True):
                    np.testing.assert_array_equal(c_got, c_want)
        for a, b in zip(one, two, strict=True):
            assert (a.next_start, a.pending_samples(), a.due(now), a.due(now + 0.7)) == \
                (b.next_start, b.pending_samples(), b.due(now), b.due(now + 0.7))


def test_the_common_case_is_cut() -> None:
    """Two assets in step whose next window's first sample is in (lateness 0): both
    are cut into one matrix, the new sample left pending."""
    cfg = WindowConfig(1.0, 1.0, 0.0, timeout_s=0.5, min_coverage=1.0)
    fleet = [WindowAssembler(cfg, (10.0, 10.0)) for _ in range(2)]
    ts = T0 + np.arange(0, 11) / 10.0  # [T0, T0 + 1] : a window and one sample more
    for a in fleet:
        for c in range(2):
            a.add(c, ts[:10], ts[:10] - T0 + c, T0 + 0.9, presorted=True)
        assert a.close_due(T0 + 0.9).windows == []  # places the first window at T0
        for c in range(2):
            a.add(c, ts[10:], ts[10:] - T0 + c, T0 + 1.0, presorted=True)
    cuts, rest = cut_lockstep(fleet, [0, 1], T0 + 1.0)
    assert rest == []
    (cut,) = cuts
    assert (cut.n_ch, cut.width, cut.values.shape) == (2, 10, (4, 10))
    np.testing.assert_array_equal(cut.values[3], ts[:10] - T0 + 1)
    assert [a.pending_samples() for a in fleet] == [2, 2]


def test_one_window_due_is_cut_with_the_next_windows_samples_left() -> None:
    """Lateness 0.3 s: the window closes once a sample 0.3 s past its end is in; the
    samples after the end stay for the next window."""
    cfg = WindowConfig(1.0, 1.0, 0.3, timeout_s=5.0, min_coverage=1.0)
    fleet = [WindowAssembler(cfg, (10.0, 10.0, 10.0)) for _ in range(3)]
    first = T0 + np.arange(0, 10) / 10.0
    nxt = T0 + 1.0 + np.arange(0, 4) / 10.0  # [T0+1, T0+1.3]: makes only [T0, T0+1) due
    for a in fleet:
        for c in range(3):
            a.add(c, first, first - T0, T0 + 1.0, presorted=True)
        assert a.close_due(T0 + 1.0).windows == []  # placed at T0, not due yet
        for c in range(3):
            a.add(c, nxt, nxt - T0 + c, T0 + 1.3, presorted=True)
    cuts, rest = cut_lockstep(fleet, [0, 1, 2], T0 + 1.3)
    assert rest == []
    (cut,) = cuts
    assert [(i, s, e) for i, s, e in cut.items] == [(i, T0, T0 + 1.0) for i in range(3)]
    np.testing.assert_array_equal(cut.values[0], first - T0)
    for a in fleet:
        assert a.next_start == T0 + 1.0 and a.pending_samples() == 3 * 4


def test_a_laggard_is_left_alone() -> None:
    """One channel short of a sample: not in lockstep, untouched, for close_due."""
    cfg = WindowConfig(1.0, 1.0, 0.0, timeout_s=0.5, min_coverage=0.5)
    a = WindowAssembler(cfg, (10.0, 10.0))
    ts = T0 + np.arange(0, 20) / 10.0
    a.add(0, ts, ts, T0 + 2.0, presorted=True)
    a.add(1, ts[:-1], ts[:-1], T0 + 2.0, presorted=True)
    a.close_due(T0 + 0.0)
    before = (a.next_start, a.pending_samples())
    cuts, rest = cut_lockstep([a], [0], T0 + 3.0)
    assert cuts == [] and rest == [0]
    assert (a.next_start, a.pending_samples()) == before
