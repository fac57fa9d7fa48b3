"""The assembler's 2-D sample store against a brute-force cut of the same samples.

Channels of equal rate share one store (rows in step take plain slices, rows out of
step a gather, rows holding more than a gather looks at a per-row search); the store
compacts and grows as rows fill. Whatever path a window takes, it must hold exactly
the samples of its channel in [start, end), in time order.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from agent.config.load import WindowConfig
from agent.core.windows.assembler import WindowAssembler
from agent.core.windows.closed import ClosedWindow

T0 = 1_796_119_200.0
RATES = (10.0, 10.0, 4.0)  # two channels share a store, the third has its own


@st.composite
def streams(draw):
    n = draw(st.integers(1, 400))
    steps = draw(st.lists(st.sampled_from([0.0, 0.001, 0.02, 0.1, 0.25, 1.5, 30.0]),
                          min_size=n, max_size=n))
    chans = draw(st.lists(st.integers(0, 2), min_size=n, max_size=n))
    cuts = sorted(set(draw(st.lists(st.integers(1, max(1, n - 1)), max_size=25))))
    one_by_one = draw(st.booleans())
    hop = draw(st.sampled_from([0.5, 1.0]))
    span = draw(st.sampled_from([1, 3]))
    return T0 + 0.31 + np.cumsum(steps), np.asarray(chans), cuts, one_by_one, hop, span


@settings(max_examples=200, deadline=None)
@given(streams())
def test_every_window_holds_exactly_its_samples(stream) -> None:
    ts, chans, cuts, one_by_one, hop, span = stream
    length = hop * span
    asm = WindowAssembler(WindowConfig(length, hop, 0.0, 1.0, 0.5), RATES)
    ids = np.arange(ts.size, dtype=np.float64)
    windows: list[ClosedWindow] = []
    for lo, hi in zip([0, *cuts], [*cuts, ts.size], strict=True):
        for c in range(len(RATES)):
            sel = np.flatnonzero(chans[lo:hi] == c) + lo
            if one_by_one:
                for i in sel:
                    asm.add_one(c, float(ts[i]), float(ids[i]), float(ts[hi - 1]))
            elif sel.size:
                asm.add(c, ts[sel], ids[sel], float(ts[hi - 1]), presorted=True)
        windows += asm.close_due(float(ts[hi - 1])).windows
    windows += asm.close_due(float(ts[-1]) + length + 5.0).windows
    assert asm.pending_samples() == 0
    for w in windows:
        for c in range(len(RATES)):
            inside = np.flatnonzero((chans == c) & (ts >= w.start) & (ts < w.end))
            np.testing.assert_array_equal(w.values[c], ids[inside])
            np.testing.assert_array_equal(w.timestamps[c], ts[inside])
            assert w.coverage[c] == inside.size / (RATES[c] * length)
        blocks = {c for b in w.blocks for c in b.chans}
        assert blocks == set(range(len(RATES)))
        for b in w.blocks:  # a uniform block is a full matrix of its channels' samples
            if b.uniform:
                assert all(k == b.values.shape[1] for k in b.counts)


def test_a_sensor_far_faster_than_its_rate_loses_nothing() -> None:
    """50x the configured rate: more than one gather looks at, and the store grows."""
    asm = WindowAssembler(WindowConfig(1.0, 1.0, 0.0, 1.0, 0.5), (10.0, 10.0))
    t = T0 + np.arange(5000) / 500.0  # 10 s at 500 Hz on channel 0
    slow = T0 + np.arange(100) / 10.0
    asm.add(0, t, np.arange(t.size, dtype=float), float(t[-1]), presorted=True)
    asm.add(1, slow, np.arange(slow.size, dtype=float), float(t[-1]), presorted=True)
    ws = asm.close_due(float(t[-1]) + 3.0).windows
    assert [w.timestamps[0].size for w in ws] == [500] * 10
    assert [w.timestamps[1].size for w in ws] == [10] * 10
    np.testing.assert_array_equal(np.concatenate([w.values[0] for w in ws]),
                                  np.arange(t.size, dtype=float))


@st.composite
def fleets(draw):
    """Several assets' streams: in step (every channel the same blocks), out of step,
    with gaps, hopping or tumbling; ticks at arbitrary times."""
    n_assets = draw(st.integers(1, 5))
    hop = draw(st.sampled_from([0.5, 1.0]))
    span = draw(st.sampled_from([1, 1, 2]))
    assets = []
    for _ in range(n_assets):
        in_step = draw(st.booleans())
        n = draw(st.integers(1, 200))
        steps = draw(st.lists(st.sampled_from([0.05, 0.1, 0.1, 0.1, 0.25, 3.0]),
                              min_size=n, max_size=n))
        ts = T0 + 0.5 + np.cumsum(steps)
        if in_step:
            chans = None
        else:
            chans = np.asarray(draw(st.lists(st.integers(0, 2), min_size=n, max_size=n)))
        assets.append((ts, chans))
    ticks = sorted(draw(st.lists(st.floats(0.0, 60.0), min_size=1, max_size=30)))
    # Rates of two stores, or of one (every channel in one rate group); timestamps kept
    # in jointly cut windows, or not (the pipeline keeps them only for rate checks).
    rates = draw(st.sampled_from([RATES, (10.0, 10.0, 10.0)]))
    keep = draw(st.booleans())
    return hop, span, assets, ticks, rates, keep


@settings(max_examples=150, deadline=None)
@given(fleets())
def test_close_many_cuts_what_close_due_cuts(fleet) -> None:
    from agent.core.windows.batch import close_many

    hop, span, assets, ticks, rates, keep = fleet
    cfg = WindowConfig(hop * span, hop, 0.0, 1.0, 0.5)

    def make() -> list[WindowAssembler]:
        return [WindowAssembler(cfg, rates) for _ in assets]

    one, many = make(), make()
    if not keep:
        for a in many:
            a.keep_times_of([False] * len(rates))
    fed = [0] * len(assets)
    for tick in ticks:
        now = T0 + tick
        for ai, (ts, chans) in enumerate(assets):
            hi = int(np.searchsorted(ts, now))
            lo, fed[ai] = fed[ai], hi
            if hi <= lo:
                continue
            for c in range(len(rates)):
                sel = np.arange(lo, hi) if chans is None else \
                    np.flatnonzero(chans[lo:hi] == c) + lo
                if sel.size:
                    for a in (one[ai], many[ai]):
                        a.add(c, ts[sel], sel.astype(float), now, presorted=True)
        want = [a.close_due(now) for a in one]
        got = close_many(many, now)
        for w_res, g_res in zip(want, got, strict=True):
            assert g_res.empty_skipped == w_res.empty_skipped
            assert len(g_res.windows) == len(w_res.windows)
            for w, g in zip(w_res.windows, g_res.windows, strict=True):
                assert (g.start, g.end, g.complete, g.coverage) == \
                    (w.start, w.end, w.complete, w.coverage)
                for c in range(len(rates)):
                    np.testing.assert_array_equal(g.values[c], w.values[c])
                    # Not kept: NaN where the window was cut jointly, else the times.
                    gt = g.timestamps[c]
                    if keep or not np.isnan(gt).all():
                        np.testing.assert_array_equal(gt, w.timestamps[c])
                    else:
                        assert gt.shape == w.timestamps[c].shape
        for a, b in zip(one, many, strict=True):
            assert (a.next_start, a.pending_samples()) == (b.next_start, b.pending_samples())


def _twins(n: int = 2) -> tuple[list[WindowAssembler], list[WindowAssembler]]:
    cfg = WindowConfig(1.0, 1.0, 0.0, 1.0, 0.5)
    return ([WindowAssembler(cfg, RATES) for _ in range(n)],
            [WindowAssembler(cfg, RATES) for _ in range(n)])


def _same(want, got) -> None:  # type: ignore[no-untyped-def]
    assert [(r.empty_skipped, [(w.start, w.complete, w.coverage) for w in r.windows])
            for r in want] == \
        [(r.empty_skipped, [(w.start, w.complete, w.coverage) for w in r.windows])
         for r in got]


def test_close_many_with_a_silent_rate_group_and_an_empty_window() -> None:
    """A group with no samples in the window (its channel silent) comes out empty and
    the window incomplete; a due window with no samples at all is left to close_due's
    gap logic. Both as close_due cuts them."""
    from agent.core.windows.batch import close_many

    one, many = _twins()
    for t0 in (0.0, 1.0, 2.0):
        ts = T0 + t0 + np.arange(10) / 10.0
        for a in (*one, *many):
            for c in (0, 1):
                a.add(c, ts, ts - T0, float(ts[-1]), presorted=True)
    arrival = T0 + 2.9
    for now in (arrival, arrival + 1.2, arrival + 2.5, arrival + 9.0):
        want = [a.close_due(now) for a in one]
        got = close_many(many, now)
        _same(want, got)
    assert one[0].next_start == many[0].next_start


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 3), st.booleans()), min_size=1, max_size=6),
       st.sampled_from([0.5, 1.5, 2.0, 3.5]))
def test_close_many_windows_closed_by_the_timeout(assets, late) -> None:
    """The bench's and a quiet sensor's case: a window's samples all in, closed by the
    timeout (nothing after its end), one rate group, times not kept (`_close_simple`);
    beside assets out of step or keeping times. As close_due cuts them."""
    from agent.core.windows.batch import close_many

    cfg = WindowConfig(1.0, 1.0, 0.0, 1.0, 0.5)
    rates = (10.0, 10.0)
    one = [WindowAssembler(cfg, rates) for _ in assets]
    many = [WindowAssembler(cfg, rates) for _ in assets]
    for a, (_, keep) in zip(many, assets, strict=True):
        a.keep_times_of([keep, False])
    for k in range(4):
        ts = T0 + k + np.arange(10) / 10.0
        for ai, (skew, _) in enumerate(assets):
            for c in (0, 1):
                part = ts[: 10 - skew] if c else ts  # skew > 0: rows out of step
                for a in (one[ai], many[ai]):
                    a.add(c, part, part - T0, float(ts[-1]), presorted=True)
        now = T0 + k + late + 0.9
        want = [a.close_due(now) for a in one]
        got = close_many(many, now)
        _same(want, got)
        for w_res, g_res in zip(want, got, strict=True):
            for w, g in zip(w_res.windows, g_res.windows, strict=True):
                for c in (0, 1):
                    np.testing.assert_array_equal(g.values[c], w.values[c])
    assert [a.next_start for a in one] == [a.next_start for a in many]
    assert [a.pending_samples() for a in one] == [a.pending_samples() for a in many]


@pytest.mark.parametrize("broken", ["vals", "lo", "hi", "groups"])
@pytest.mark.parametrize("late", [1.5, 0.2])
def test_close_many_when_the_joint_cut_raises_fails_that_assembler_alone(late, broken) -> None:
    """One assembler broken: its store (the joint cut raises, every assembler is cut
    alone by `close_due`), or its bookkeeping (reading it to plan the cut raises), and
    only the broken one's result carries the error; the others' windows are cut as
    close_due cuts them. `late` 1.5: windows closed by the timeout, all their samples in
    (the steady pass, `steady.plan_steady`); 0.2: closed as the next window's samples arrive
    (counted first)."""
    from agent.core.windows.batch import close_many

    cfg = WindowConfig(1.0, 1.0, 0.0, 1.0, 0.5)
    one = [WindowAssembler(cfg, (10.0, 10.0)) for _ in range(3)]
    many = [WindowAssembler(cfg, (10.0, 10.0)) for _ in range(3)]
    for k in range(3):
        ts = T0 + k + late % 1.0 + np.arange(10) / 10.0
        for a in (*one, *many):
            for c in (0, 1):
                a.add(c, ts, ts - T0, float(ts[-1]), presorted=True)
        now = float(ts[-1]) + (late if late > 1 else 0.0)
        if k == 2:
            if broken == "groups":
                many[1]._groups = None  # type: ignore[assignment]
            else:
                setattr(many[1]._groups[0], broken, None)
            got = close_many(many, now)
            want = [a.close_due(now) for a in one]
            assert isinstance(got[1].error, TypeError) and not got[1].windows
            _same([want[0], want[2]], [got[0], got[2]])
            assert got[0].windows and got[0].error is None is got[2].error
        else:
            _same([a.close_due(now) for a in one], close_many(many, now))


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 3), st.booleans(), st.sampled_from([0.0, 0.25, 0.5])),
                min_size=1, max_size=5),
       st.sampled_from([2, 3]), st.sampled_from([0.0, 0.3, 1.5]))
def test_close_many_cuts_hopping_windows_as_close_due(assets, span, late) -> None:
    """Hopping windows (`span` hops long) cut together: each window holds its samples,
    the rows drop only those before the next window's start, whatever the assets'
    phases, rows out of step (skew) or times kept. As close_due cuts them."""
    from agent.core.windows.batch import close_many

    cfg = WindowConfig(float(span), 1.0, 0.0, 1.0, 0.5)
    rates = (10.0, 10.0)
    one = [WindowAssembler(cfg, rates) for _ in assets]
    many = [WindowAssembler(cfg, rates) for _ in assets]
    for a, (_, keep, _) in zip(many, assets, strict=True):
        a.keep_times_of([keep, False])
    for k in range(7):
        for ai, (skew, _, phase) in enumerate(assets):
            ts = T0 + k + phase + np.arange(10) / 10.0
            for c in (0, 1):
                part = ts[: 10 - skew] if c else ts
                for a in (one[ai], many[ai]):
                    a.add(c, part, part - T0, T0 + k + 1.0, presorted=True)
        now = T0 + k + 1.0 + late
        want = [a.close_due(now) for a in one]
        got = close_many(many, now)
        _same(want, got)
        for w_res, g_res in zip(want, got, strict=True):
            for w, g in zip(w_res.windows, g_res.windows, strict=True):
                assert (g.start, g.end) == (w.start, w.end)
                for c in (0, 1):
                    np.testing.assert_array_equal(g.values[c], w.values[c])
        assert [a.pending_samples() for a in one] == [a.pending_samples() for a in many]
        assert [a.next_start for a in one] == [a.next_start for a in many]


@settings(max_examples=80, deadline=None)
@given(block=st.sampled_from([0.25, 0.5, 1.0, 1.5]),
       pace=st.sampled_from([1.0, 1.0, 1.09, 0.8, 1.6]),
       lost=st.lists(st.integers(0, 40), max_size=3), phase=st.floats(0.0, 0.99))
def test_close_many_with_blocks_of_part_of_a_window(block, pace, lost, phase) -> None:
    """Sensors sending blocks of a quarter to one and a half windows, closed as each
    block arrives (lateness 0: the next window's samples are pending), at their rate or
    off it, some blocks lost: close_many cuts what close_due cuts. Steady sensors'
    windows are cut jointly (rows of one copy), counted in a band around the end,
    window after window when a block makes two due at once; close_due places each
    asset's first."""
    from agent.core.windows.batch import close_many

    rates = (20.0, 20.0, 20.0)
    cfg = WindowConfig(1.0, 1.0, 0.0, 1.0, 0.5)
    one = [WindowAssembler(cfg, rates) for _ in range(3)]
    many = [WindowAssembler(cfg, rates) for _ in range(3)]
    per = round(20 * block * pace)  # samples per block, at `pace` times the rate
    joint = total = 0
    for b in range(40):
        now = T0 + phase + (b + 1) * block
        if b in lost:
            continue
        ts = T0 + phase + b * block + np.arange(per) / (20.0 * pace)
        for a1, a2 in zip(one, many, strict=True):
            for c in range(3):
                for a in (a1, a2):
                    a.add(c, ts, ts - T0, now, presorted=True)
        want = [a.close_due(now) for a in one]
        got = close_many(many, now)
        _same(want, got)
        for w_res, g_res in zip(want, got, strict=True):
            for w, g in zip(w_res.windows, g_res.windows, strict=True):
                total += 1
                joint += g.blocks[0].base is not None
                for c in range(3):
                    np.testing.assert_array_equal(g.values[c], w.values[c])
        assert [(a.next_start, a.pending_samples()) for a in one] == \
            [(a.next_start, a.pending_samples()) for a in many]
    if pace == 1.0 and not lost and total:  # all but each asset's first (close_due's)
        assert joint >= total - 3


@settings(max_examples=60, deadline=None)
@given(phases=st.lists(st.floats(0.0, 0.099), min_size=3, max_size=3),
       lost=st.lists(st.integers(0, 300), max_size=4), keep=st.booleans())
def test_close_many_with_one_reading_per_message(phases, lost, keep) -> None:
    """Sensors sending one reading per message, each channel at its own phase, a tick
    after every message (lateness 0): a window closes when the first channel's next
    reading arrives, the other rows holding fewer samples. close_many cuts what
    close_due cuts; every window but the first (close_due places it) is cut jointly
    unless a lost reading leaves its rows holding different numbers before the end."""
    from agent.core.windows.batch import close_many

    rates = (10.0, 10.0, 10.0)
    cfg = WindowConfig(1.0, 1.0, 0.0, 1.0, 0.5)
    one, many = WindowAssembler(cfg, rates), WindowAssembler(cfg, rates)
    if not keep:
        many.keep_times_of([False] * 3)
    msgs = sorted((T0 + j / 10.0 + phases[c], c) for j in range(100) for c in range(3))
    joint = total = 0
    for n, (t, c) in enumerate(msgs):
        if n in lost:
            continue
        for a in (one, many):
            a.add(c, np.array([t]), np.array([t - T0]), t, presorted=True)
        want, got = one.close_due(t), close_many([many], t)[0]
        _same([want], [got])
        for w, g in zip(want.windows, got.windows, strict=True):
            total += 1
            joint += g.blocks[0].base is not None
            for ch in range(3):
                np.testing.assert_array_equal(g.values[ch], w.values[ch])
        assert (one.next_start, one.pending_samples()) == \
            (many.next_start, many.pending_samples())
    assert total >= 8
    if not lost:
        assert joint >= total - 1


def test_close_many_keeps_the_assemblers_order_in_the_cut_matrix() -> None:
    """Assets whose window holds all their samples and assets whose next window's
    samples are already pending, cut in one tick: their blocks are rows of one matrix
    in the assemblers' order (what the feature pass's aligned path reads)."""
    from agent.core.windows.batch import close_many

    rates = (20.0, 20.0)
    # Even assets: their windows close by the timeout (0.5 s) with all samples in.
    cfg = WindowConfig(1.0, 1.0, 0.0, 0.5, 0.5)
    many = [WindowAssembler(cfg, rates) for _ in range(6)]
    ts = T0 + np.arange(20) / 20.0
    for k in range(3):
        for ai, a in enumerate(many):
            ahead = ai % 2  # odd assets: the next window's first sample already in
            for c in range(2):
                part = ts[1:] if ahead and k else ts
                a.add(c, part + k, part + k, T0 + k + 1.0, presorted=True)
                if ahead:
                    a.add(c, ts[:1] + k + 1, ts[:1], T0 + k + 1.0, presorted=True)
        got = close_many(many, T0 + k + 1.6)
    blocks = [r.windows[0].blocks[0] for r in got]
    assert len({id(b.base) for b in blocks}) == 1
    assert [b.row0 for b in blocks] == [2 * ai for ai in range(6)]


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.sampled_from([10.0, 20.0, 0.0]), st.integers(1, 3), st.booleans(),
                          st.booleans()), min_size=1, max_size=6),
       st.sampled_from([0.0, 0.3]))
@example([(0.0, 1, False, False), (10.0, 2, True, False), (20.0, 1, False, False)], 0.0)
def test_close_many_steady_assets_of_several_sizes(assets, late) -> None:
    """The usual shape (one rate group, the window holding every pending sample, rows
    in step; `steady.plan_steady`) at two rates, with and without kept times, beside assets
    whose next window's first sample is in and assets of two rate groups (rate 0.0
    here: n channels at 10 Hz, n at 20 Hz): close_many cuts what close_due cuts, and
    the blocks of windows holding all their samples are, size by size, rows of one
    matrix in the assemblers' order."""
    from agent.core.windows.batch import close_many

    cfg = WindowConfig(1.0, 1.0, late, 0.5, 0.5)

    def rates(rate: float, n: int) -> tuple[float, ...]:
        return (rate,) * n if rate else (10.0,) * n + (20.0,) * n

    def make() -> list[WindowAssembler]:
        out = [WindowAssembler(cfg, rates(rate, n)) for rate, n, _, _ in assets]
        for a, (rate, n, keep, _) in zip(out, assets, strict=True):
            a.keep_times_of([keep] * len(rates(rate, n)))
        return out

    one, many = make(), make()
    for k in range(4):
        arrival = T0 + k + 1.0
        now = arrival + 0.6 + late  # past the timeout: the windows holding all are due
        for ai, (rate, n, _, ahead) in enumerate(assets):
            for c, r in enumerate(rates(rate, n)):
                ts = T0 + k + np.arange(int(r)) / r
                extra = ts[:1] + 1.0 if ahead else ts[:0]
                for a in (one[ai], many[ai]):
                    part = ts[1:] if ahead and k else ts
                    a.add(c, part, part - T0, arrival, presorted=True)
                    if extra.size:
                        a.add(c, extra, extra - T0, arrival, presorted=True)
        want = [a.close_due(now) for a in one]
        got = close_many(many, now)
        for w_res, g_res in zip(want, got, strict=True):
            assert [(w.start, w.end, w.complete, w.coverage) for w in g_res.windows] == \
                [(w.start, w.end, w.complete, w.coverage) for w in w_res.windows]
            for w, g in zip(w_res.windows, g_res.windows, strict=True):
                for c in range(len(w.values)):
                    np.testing.assert_array_equal(g.values[c], w.values[c])
        if k:  # past each asset's first window: cut jointly, in order
            for size in (10, 20):
                blocks = [b for ai, r in enumerate(got) if r.windows and not assets[ai][3]
                          for b in r.windows[0].blocks if b.counts[0] == size]
                if len(blocks) > 1:
                    assert len({id(b.base) for b in blocks}) == 1
                    rows = [b.row0 for b in blocks]
                    assert rows == sorted(rows)


@pytest.mark.parametrize("rates_of", [
    [(10.0, 100.0), (10.0, 100.0), (10.0, 100.0)],  # alike: one RowsCut
    [(10.0, 100.0), (100.0, 10.0), (10.0, 100.0)],  # a group order swapped
    [(10.0, 100.0), (10.0, 10.0, 100.0), (10.0, 100.0)],  # a group of more rows
    [(10.0, 100.0), (10.0, 100.0, 20.0), (10.0, 100.0)],  # one more group
])
def test_alike_windows_share_one_rows_cut_and_unlike_ones_keep_their_blocks(rates_of) -> None:
    """Steady windows cut together are window j of one `RowsCut` only when every asset's
    groups are alike, group for group (rows, samples, order); their blocks, made when
    first read, are the rows of the cut's matrices, and every window holds what
    `close_due` cuts of its twin."""
    from agent.core.windows.batch import close_many
    from agent.core.windows.closed import whole_cut

    cfg = WindowConfig(1.0, 1.0, 0.0, 1.0, 0.5)
    one = [WindowAssembler(cfg, r) for r in rates_of]
    many = [WindowAssembler(cfg, r) for r in rates_of]
    rng = np.random.default_rng(3)
    for k in range(4):
        for a1, a2 in zip(one, many, strict=True):
            for c, r in enumerate(a1.rates_hz):
                ts = T0 + k + np.arange(int(r)) / r
                vals = rng.normal(size=ts.size)
                for a in (a1, a2):
                    a.add(c, ts, vals, T0 + k + 1.0, presorted=True)
        now = T0 + k + 1.0
        want = [a.close_due(now) for a in one]
        got = close_many(many, now)
        wins = [w for res in got for w in res.windows]
        if k and wins:
            cut = whole_cut(wins)
            assert (cut is not None) == (len(set(rates_of)) == 1)
            if cut is not None:
                for j, w in enumerate(wins):
                    for b, blk in enumerate(w.blocks):
                        assert blk.base is cut.bases[b] and blk.row0 == j * cut.rows[b]
        for w_res, g_res in zip(want, got, strict=True):
            for w, g in zip(w_res.windows, g_res.windows, strict=True):
                assert (g.start, g.end, g.complete, g.coverage) == \
                    (w.start, w.end, w.complete, w.coverage)
                for c in range(len(w.values)):
                    np.testing.assert_array_equal(g.values[c], w.values[c])
                    np.testing.assert_array_equal(g.timestamps[c], w.timestamps[c])
