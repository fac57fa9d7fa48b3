"""The per-channel time-base guard (agent/core/timebase.py), pure."""

from __future__ import annotations

import pytest

from agent.core.timebase import CONFIRM_MESSAGES, CONFIRM_S, TimeBase

T0 = 1_796_119_200.0


def stream(g: TimeBase, start: float, n: int, offset: float = 0.0, step: float = 1.0
           ) -> list[float | None]:
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
    assert (TimeBase().check(newest, arrival) is not None) is accepted


def test_continuity_allows_the_wall_time_that_passed() -> None:
    """Times may advance by the wall time since the last accepted message plus 2 s: a
    burst of recorded data, a sensor silent for an hour; a jump ahead is refused."""
    g = TimeBase()
    assert stream(g, T0, 5) == [0.0] * 5
    assert g.check(T0 + 4 + 1.5, T0 + 4.01) == 0.0          # 1.5 s ahead: tolerated
    assert g.check(T0 + 3600, T0 + 3600) == 0.0             # an hour later, on time
    assert g.check(T0 + 3600 + 280, T0 + 3601) is None      # +280 s: refused
    assert g.check(T0 + 3602, T0 + 3602) == 0.0             # the stream goes on
    fast = TimeBase()  # a recording published faster than real time
    assert all(fast.check(T0 + 0.1 * i, T0 + 0.001 * i) == 0.0 for i in range(500))


def test_an_outlier_in_a_live_stream_is_never_confirmed() -> None:
    """Outliers interleaved with live data never make a run of CONFIRM_MESSAGES."""
    g = TimeBase()
    for i in range(40):
        assert g.check(T0 + i, T0 + i) == 0.0
        assert g.check(T0 + i + 280, T0 + i + 0.5) is None
    assert g.shift_s == 0.0 and g.step is None


def test_a_clock_that_steps_forward_and_stays_is_followed() -> None:
    """After CONFIRM_MESSAGES ahead messages over CONFIRM_S s the step is taken: its
    times are shifted back by it, and a later step back lowers the shift again."""
    g = TimeBase()
    stream(g, T0, 10)
    got = stream(g, T0 + 10, 12, offset=100.0)
    first_ok = next(i for i, s in enumerate(got) if s is not None)
    assert first_ok == max(CONFIRM_MESSAGES, int(CONFIRM_S) + 1) - 1
    assert g.step is not None and g.step.old_s == 0.0 and 99.0 <= g.step.new_s <= 101.0
    assert all(s == got[first_ok] for s in got[first_ok:])
    g.step = None
    back = stream(g, T0 + 22, 12, offset=0.0)  # the clock is right again
    assert all(s is not None for s in back)  # behind: never refused
    assert g.step is not None and g.shift_s == 0.0


def test_an_inconsistent_run_is_not_confirmed() -> None:
    """Ahead messages whose steps disagree by more than the tolerance restart the run."""
    g = TimeBase()
    stream(g, T0, 3)
    for i in range(30):
        assert g.check(T0 + 3 + i + (100.0 if i % 2 else 200.0), T0 + 3 + i) is None
    assert g.shift_s == 0.0
