"""`WindowAssembler.due(now)`: the cheap per-tick test the pipeline asks of every asset.

Its contract: `due(now)` is True exactly when `close_due(now)` would do something (close
a window, skip empty ones, or place the first window); when it is False the pipeline
leaves the asset alone for the tick, so a False that hid work would delay windows.
"""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.config.load import WindowConfig
from agent.core.windows.assembler import WindowAssembler
from agent.core.windows.batch import close_many

T0 = 1_796_119_200.0
RATES = (10.0, 10.0, 4.0)


@st.composite
def runs(draw):
    """A stream of samples over three channels, fed in chunks and closed at tick times
    that may come before, between or long after the samples (timeouts, gaps)."""
    hop = draw(st.sampled_from([0.5, 1.0]))
    span = draw(st.sampled_from([1, 1, 2]))
    lateness = draw(st.sampled_from([0.0, 0.0, 0.3]))
    timeout = draw(st.sampled_from([0.5, 1.0, 2.5]))
    n = draw(st.integers(1, 150))
    steps = draw(st.lists(st.sampled_from([0.0, 0.05, 0.1, 0.1, 0.25, 3.0]),
                          min_size=n, max_size=n))
    chans = np.asarray(draw(st.lists(st.integers(0, 2), min_size=n, max_size=n)))
    # Per tick: how many more samples have arrived, and how long after the last one.
    ticks = draw(st.lists(st.tuples(st.integers(0, 20),
                                    st.sampled_from([0.0, 0.01, 0.4, 1.0, 3.0, 30.0])),
                          min_size=1, max_size=30))
    return hop, span, lateness, timeout, T0 + 0.37 + np.cumsum(steps), chans, ticks


def _state(a: WindowAssembler) -> tuple[float | None, int]:
    return a.next_start, a.pending_samples()


def _feed(assemblers: list[WindowAssembler], ts: np.ndarray, chans: np.ndarray, fed: int,
          more: int, arrival: float) -> tuple[int, float]:
    """Add the next `more` samples (split by channel) to each assembler; returns the new
    count fed and the arrival time of the last one."""
    hi = min(ts.size, fed + more)
    if hi > fed:
        arrival = float(ts[hi - 1])
        for a in assemblers:
            for c in range(len(RATES)):
                sel = np.flatnonzero(chans[fed:hi] == c) + fed
                if sel.size:
                    a.add(c, ts[sel], sel.astype(float), arrival, presorted=True)
    return max(fed, hi), arrival


@settings(max_examples=200, deadline=None)
@given(runs())
def test_due_is_true_exactly_when_close_due_has_work(run) -> None:
    hop, span, lateness, timeout, ts, chans, ticks = run
    asm = WindowAssembler(WindowConfig(hop * span, hop, lateness, timeout, 0.5), RATES)
    fed = 0
    arrival = ts[0]
    for more, after in ticks:
        fed, arrival = _feed([asm], ts, chans, fed, more, arrival)
        now = arrival + after
        due = asm.due(now)
        before = _state(asm)
        res = asm.close_due(now)
        worked = bool(res.windows) or res.empty_skipped > 0 or _state(asm) != before
        assert due == worked, (due, res.windows, res.empty_skipped, before, _state(asm))


def test_nothing_held_is_never_due_and_a_first_sample_is() -> None:
    asm = WindowAssembler(WindowConfig(1.0, 1.0, 0.0, 1.0, 0.5), RATES)
    assert not asm.due(T0)
    asm.add_one(0, T0 + 0.5, 1.0, T0 + 0.5)
    assert asm.due(T0 + 0.5)  # the first close places the first window
    asm.close_due(T0 + 0.5)
    assert not asm.due(T0 + 0.5)


@settings(max_examples=100, deadline=None)
@given(runs())
def test_close_many_keeps_due_in_step_with_close_due(run) -> None:
    """close_many advances an assembler by its own path; `due` must follow it there too."""
    hop, span, lateness, timeout, ts, chans, ticks = run
    cfg = WindowConfig(hop * span, hop, lateness, timeout, 0.5)
    one, many = WindowAssembler(cfg, RATES), WindowAssembler(cfg, RATES)
    fed = 0
    arrival = ts[0]
    for more, after in ticks:
        fed, arrival = _feed([one, many], ts, chans, fed, more, arrival)
        now = arrival + after
        assert one.due(now) == many.due(now)
        one.close_due(now)
        close_many([many], now)
        assert one.due(now) == many.due(now)
        assert _state(one) == _state(many)


@settings(max_examples=200, deadline=None)
@given(hop=st.sampled_from([0.1, 0.25, 1.0, 2.5, 0.3]), span=st.integers(1, 4),
       lateness=st.sampled_from([0.0, 0.05, 1.0, 7.3]),
       timeout=st.sampled_from([0.5, 3.0, 11.1]), k=st.integers(0, 2 ** 33))
def test_step_next_sets_what_set_next_sets(hop, span, lateness, timeout, k) -> None:
    """The joint cut's `_step_next` (the due times of window k + 1 taken from those
    kept for it as the window after k) leaves the same numbers, bit for bit, as
    `_set_next(k + 1)` computes (Unix-time window indices included)."""
    def fields(a: WindowAssembler) -> tuple[object, ...]:
        return (a._next_k, a._due_ts, a._due_reach, a._due2_ts, a._due2_reach)

    cfg = WindowConfig(hop * span, hop, lateness, timeout, 0.5)
    stepped, set_ = WindowAssembler(cfg, RATES), WindowAssembler(cfg, RATES)
    stepped._set_next(k)
    stepped._step_next()
    set_._set_next(k + 1)
    assert fields(stepped) == fields(set_)
