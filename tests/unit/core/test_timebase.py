"""The per-channel time-base guard (agent/core/timebase.py), pure."""

from __future__ import annotations

import pytest

from agent.core.timebase import CONFIRM_MESSAGES
from agent.core.timebase import TimeBase as _TimeBase

T0 = 1_796_119_200.0


def TimeBase() -> _TimeBase:
    """A guard with a 2 s tolerance (the default is 10 s), so the cases stay small."""
    return _TimeBase(2.0)


def stream(g: _TimeBase, start: float, n: int, offset: float = 0.0, step: float = 1.0
           ) -> list[bool]:
    """n live messages one `step` apart, stamped `offset` from their arrival."""
    return [g.check(start + i * step + offset, start + i * step) for i in range(n)]


@pytest.mark.parametrize(("newest", "arrival", "accepted"), [
    (T0, T0, True),               # on the gateway clock
    (T0 - 250.0, T0, True),       # behind: never refused (it may be late)
    (T0 + 1.9, T0, True),         # within the 2 s tolerance
    (T0 + 2.1, T0, False),        # ahead of the gateway clock, no history
    (T0 + 280.0, T0, False),
])
def test_first_message_is_judged_against_the_gateway_clock(newest: float, arrival: float,
                                                            accepted: bool) -> None:
    """No history yet: a first message more than the tolerance ahead of arrival is refused."""
    assert TimeBase().check(newest, arrival) is accepted


def test_continuity_allows_the_wall_time_that_passed() -> None:
    """Times may advance by the wall time since the last accepted message plus 2 s: a
    burst of recorded data, a sensor silent for an hour; a jump ahead is refused."""
    g = TimeBase()
    assert all(stream(g, T0, 5))
    assert g.check(T0 + 4 + 1.5, T0 + 4.01)             # 1.5 s ahead: tolerated
    assert g.check(T0 + 3600, T0 + 3600)                # an hour later, on time
    assert not g.check(T0 + 3600 + 280, T0 + 3601)      # +280 s: refused
    assert g.check(T0 + 3602, T0 + 3602)                # the stream goes on
    fast = TimeBase()  # a recording published faster than real time
    assert all(fast.check(T0 + 0.1 * i, T0 + 0.001 * i) for i in range(500))


@pytest.mark.parametrize("outliers", [[280.0], [280.0, 150.0, 280.0, 150.0], [280.0, 280.5]])
def test_outliers_in_a_live_stream_never_move_the_time_base(outliers: list[float]) -> None:
    """Outliers between live messages, or ahead messages that do not continue each other,
    never make a run of CONFIRM_MESSAGES."""
    g = TimeBase()
    for i in range(40):
        assert g.check(T0 + i, T0 + i)
        for k, ahead in enumerate(outliers):
            assert not g.check(T0 + i + ahead, T0 + i + 0.01 * (k + 1))
    assert g.step is None and g.newest == T0 + 39


def test_a_jump_that_persists_is_accepted() -> None:
    """A clock that steps forward and stays there (or data resuming after a gap): the first
    CONFIRM_MESSAGES - 1 messages refused, then the new time base taken and reported."""
    g = TimeBase()
    stream(g, T0, 10)
    got = stream(g, T0 + 10, 6, offset=100.0)
    assert got == [False] * (CONFIRM_MESSAGES - 1) + [True] * (7 - CONFIRM_MESSAGES)
    assert g.step is not None and 99.0 <= g.step.jump_s <= 101.0
    fast = TimeBase()  # a fast-forwarded feed that skips 20 s of data
    assert all(fast.check(T0 + 0.1 * i, T0 + 0.001 * i) for i in range(50))
    got = [fast.check(T0 + 25 + 0.1 * i, T0 + 0.06 + 0.001 * i) for i in range(10)]
    assert got == [False] * (CONFIRM_MESSAGES - 1) + [True] * (11 - CONFIRM_MESSAGES)
