"""Detector: raise after k of the last n above, clear after m consecutive below, deadband."""

from __future__ import annotations

from collections import deque

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.core.detector import Detector, DetectorParams, State, Transition, run_detector

THR, CLEAR = 1.0, 0.8
HI, MID, LO = 2.0, 0.9, 0.1  # above the threshold, in the deadband, below the clear level
R, C = Transition.RAISED, Transition.CLEARED


def transitions(scores: list[float], k: int = 2, n: int = 3, m: int = 3
                ) -> list[tuple[int, Transition]]:
    return run_detector(np.asarray(scores), THR, CLEAR, DetectorParams(k, n, m))


@pytest.mark.parametrize(("scores", "k", "n", "m", "expected"), [
    ([LO] * 10, 2, 3, 3, []),
    ([HI], 1, 1, 1, [(0, R)]),
    ([HI, HI], 2, 3, 3, [(1, R)]),
    ([HI, LO, HI], 2, 3, 3, [(2, R)]),
    ([HI, LO, LO, HI], 2, 3, 3, []),  # the first HI has left the last 3
    ([HI, LO, LO, HI, HI], 2, 3, 3, [(4, R)]),
    ([HI, LO, HI, LO, HI, LO, HI], 3, 5, 3, [(4, R)]),
    ([HI, LO] * 5, 3, 3, 3, []),  # chattering one-in-two never reaches 3 of 3
    ([HI, HI, LO, LO, LO], 2, 3, 3, [(1, R), (4, C)]),
    ([HI, HI, LO, LO], 2, 3, 3, [(1, R)]),  # two below is not three
    ([HI, HI, LO, LO, HI, LO, LO, LO], 2, 3, 3, [(1, R), (7, C)]),  # reset by a HI
    ([HI, HI, LO, LO, MID, LO, LO, LO], 2, 3, 3, [(1, R), (7, C)]),  # reset by the deadband
    ([HI, HI, MID, MID, MID, MID, MID], 2, 3, 3, [(1, R)]),  # deadband holds the alarm
    ([HI, HI, LO], 2, 3, 1, [(1, R), (2, C)]),
    # After a clear, history starts afresh: the old HIs do not count again.
    ([HI, HI, LO, LO, LO, HI, LO], 2, 3, 3, [(1, R), (4, C)]),
    ([HI, HI, LO, LO, LO, HI, HI], 2, 3, 3, [(1, R), (4, C), (6, R)]),
    # Exactly at a level is neither above the threshold nor below the clear level.
    ([THR] * 6, 1, 1, 1, []),
    ([HI, CLEAR, CLEAR, CLEAR], 1, 1, 1, [(0, R)]),
])
def test_raise_and_clear_table(scores: list[float], k: int, n: int, m: int,
                               expected: list[tuple[int, Transition]]) -> None:
    """k of the last n above raises; m consecutive below the clear level clears."""
    assert transitions(scores, k, n, m) == expected


def test_state_and_peak_score_follow_the_transitions() -> None:
    """state is ANOMALOUS between raise and clear; peak_score is the highest score seen."""
    det = Detector(DetectorParams(1, 1, 2))
    assert det.state is State.NORMAL
    assert det.step(3.0, THR, CLEAR) is R and det.state is State.ANOMALOUS
    assert det.step(7.0, THR, CLEAR) is None and det.peak_score == 7.0
    assert det.step(LO, THR, CLEAR) is None
    assert det.step(LO, THR, CLEAR) is C and det.state is State.NORMAL
    assert det.peak_score == 7.0  # kept for the cleared event


def test_reset_forgets_history() -> None:
    """reset() after a model change: state NORMAL, no windows remembered."""
    det = Detector(DetectorParams(2, 3, 3))
    det.step(HI, THR, CLEAR)
    det.reset()
    assert det.step(HI, THR, CLEAR) is None  # one HI since the reset, not two
    det.step(HI, THR, CLEAR)
    assert det.state is State.ANOMALOUS
    det.reset()
    assert det.state is State.NORMAL and det.peak_score == 0.0


@pytest.mark.parametrize(("k", "n", "m"), [(0, 3, 3), (4, 3, 3), (2, 3, 0), (-1, -1, 1)])
def test_impossible_parameters_are_refused(k: int, n: int, m: int) -> None:
    """1 <= k <= n and m >= 1, or ValueError."""
    with pytest.raises(ValueError):
        DetectorParams(k, n, m)


def test_run_detector_is_the_daemon_rule() -> None:
    """run_detector gives the same transitions as stepping a Detector by hand."""
    rng = np.random.default_rng(5)
    scores = rng.choice([HI, MID, LO], size=400)
    det = Detector(DetectorParams(2, 4, 3))
    by_hand = [(i, t) for i, s in enumerate(scores)
               if (t := det.step(float(s), THR, CLEAR)) is not None]
    assert run_detector(scores, THR, CLEAR, DetectorParams(2, 4, 3)) == by_hand


params = st.integers(1, 6).flatmap(
    lambda n: st.tuples(st.integers(1, n), st.just(n), st.integers(1, 6)))
score_series = st.lists(st.sampled_from([HI, THR, MID, CLEAR, LO]), max_size=120)


@settings(max_examples=300, deadline=None)
@given(params, score_series)
def test_never_raises_or_clears_without_cause(knm: tuple[int, int, int],
                                              scores: list[float]) -> None:
    """Safety of the rule: a raise has k of the last n above (all since the last clear);
    a clear has the last m below the clear level; raises and clears alternate."""
    k, n, m = knm
    trs = transitions(scores, k, n, m)
    last_clear = -1
    expect = R
    for i, t in trs:
        assert t is expect
        expect = C if t is R else R
        if t is R:
            recent = scores[max(last_clear + 1, i - n + 1):i + 1]
            assert sum(s > THR for s in recent) >= k
        else:
            assert i - m + 1 >= 0
            assert all(s < CLEAR for s in scores[i - m + 1:i + 1])
            last_clear = i


@settings(max_examples=300, deadline=None)
@given(params, score_series)
def test_always_raises_and_clears_when_it_should(knm: tuple[int, int, int],
                                                 scores: list[float]) -> None:
    """Liveness of the rule: matches a direct reading of it, window by window."""
    k, n, m = knm
    state, recent, below, expected = State.NORMAL, deque(maxlen=n), 0, []
    for i, s in enumerate(scores):
        if state is State.NORMAL:
            recent.append(s > THR)
            if sum(recent) >= k:
                state, below = State.ANOMALOUS, 0
                expected.append((i, R))
        else:
            below = below + 1 if s < CLEAR else 0
            if below >= m:
                state = State.NORMAL
                recent.clear()
                expected.append((i, C))
    assert transitions(scores, k, n, m) == expected
