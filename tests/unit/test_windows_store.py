"""The assembler's 2-D sample store against a brute-force cut of the same samples.

Channels of equal rate share one store (rows in step take plain slices, rows out of
step a gather, rows holding more than a gather looks at a per-row search); the store
compacts and grows as rows fill. Whatever path a window takes, it must hold exactly
the samples of its channel in [start, end), in time order.
"""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.config import WindowConfig
from agent.core.windows import ClosedWindow, WindowAssembler

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
