"""Per-channel time-base guard: keeps one outlier timestamp from moving an asset's
window cursor, and follows a sensor clock that really stepped.

Why: an asset's windows close on its newest sample time (`windows.py`). One sample
stamped far ahead (a reading at +280 s, inside `max_clock_skew_s`; or one legal-size
block whose span runs far ahead) used to move that cursor forward for good: every
later sample was `late`, the asset closed only empty windows, and nothing was said.

The rule: a channel's clock cannot run ahead of the wall clock. A message's newest
sample time `t` (after the channel's correction, below) is *continuous* when

    t <= newest + max(0, arrival - last_arrival) + tolerance_s

where `newest` and `last_arrival` are those of the channel's last accepted message:
the channel's time may advance by the wall-clock time that passed since, plus the
tolerance. Before the channel's first accepted message the reference is the gateway
clock (`t <= arrival + tolerance_s`). This lets through every stream that moves
forward at most as fast as the wall clock (a live sensor, one silent for hours that
resumes, a burst of queued old data, a test publishing a recording quickly after a
first sample at "now"), and refuses a jump ahead. A refused message is counted as
`ahead` (`watchkeep_messages_rejected_total{reason="ahead"}`) and never reaches the
windows. What a continuous message can still move the cursor by is `tolerance_s`.

A stream that really moved ahead (a sensor whose clock stepped forward and stays
there, or data that resumes after a gap) sends only "ahead" messages, each continuous
with the one before it. After `CONFIRM_MESSAGES` such messages in a row (each within
the tolerance of the previous one advanced by the wall time between them), the jump is
accepted as the channel's new time base: the guard reports a `Step`, the daemon logs
`channel time base jumped ahead; accepted` and counts
`watchkeep_clock_steps_total{asset,channel}`, and the samples go to the windows, whose
cursor moves on (the empty windows of the jump are skipped as `no_data`, as for any
gap). The run's messages before the confirming one are lost (counted as `ahead`). A
single outlier, or outliers that do not continue each other (+280 s, +150 s, ...),
never make such a run: any message continuous with the old time base breaks it. An
asset whose sensors have separate clocks and only one steps has its other channels'
samples late after the jump (as before; a per-channel shift would need the asset's
channels judged together, left for later).

Constants: `DEFAULT_TOLERANCE_S` 10 s covers NTP-synced clocks (milliseconds), broker
latency and scheduling hiccups with room, also on a time-compressed clock (the demo and
replays run at up to x15, where 0.2 s of wall time is 3 s); the asset's
`window.lateness_s` is used when larger. What a message inside it can still do is move
the cursor up to 10 s ahead once, costing the other channels at most that much data.
3 messages: one outlier, or two that happen to
agree, never re-base a channel, and a feed that resumes after a gap loses only two
messages (a wait of some seconds as well would also refuse a recorded feed replayed
faster than real time, which the tests and replays send). Common practice, no source.
Pure: times are parameters.
"""

from __future__ import annotations

import math

DEFAULT_TOLERANCE_S = 10.0
CONFIRM_MESSAGES = 3


class Step:
    """A confirmed jump of a channel's time base, `jump_s` seconds ahead."""

    __slots__ = ("jump_s",)

    def __init__(self, jump_s: float) -> None:
        self.jump_s = jump_s

    def __repr__(self) -> str:
        return f"Step(jump_s={self.jump_s!r})"


class TimeBase:
    """One channel's guard. `check(newest, arrival)` before a message's samples go into
    the windows: False rejects the message (ahead). A confirmed jump is left in `step`
    for the caller to report (and clear)."""

    __slots__ = ("_n", "_run_arrival", "_run_newest", "arrival", "newest", "step",
                 "tolerance_s")

    def __init__(self, tolerance_s: float = DEFAULT_TOLERANCE_S) -> None:
        self.tolerance_s = tolerance_s
        self.newest = -math.inf  # newest accepted sample time
        self.arrival = -math.inf  # arrival of the last accepted message
        self.step: Step | None = None
        self._n = 0  # ahead messages in the current run
        self._run_newest = 0.0  # the run's last message: newest sample, arrival
        self._run_arrival = 0.0

    def check(self, newest: float, arrival: float) -> bool:
        """Whether a message whose newest sample time is `newest` may go to the windows."""
        ref = self.newest
        if ref == -math.inf:
            expected = arrival  # no history: the gateway clock
        else:
            elapsed = arrival - self.arrival
            expected = ref + elapsed if elapsed > 0.0 else ref
        tol = self.tolerance_s
        if newest <= expected + tol:
            self._n = 0
            if newest > ref:
                self.newest = newest
            if arrival > self.arrival:
                self.arrival = arrival
            return True
        # Ahead. Continuous with the run's previous message?
        if self._n:
            gap = arrival - self._run_arrival
            run_expected = self._run_newest + (gap if gap > 0.0 else 0.0)
            if abs(newest - run_expected) <= tol:
                self._n += 1
            else:
                self._n = 1
        else:
            self._n = 1
        self._run_newest, self._run_arrival = newest, arrival
        if self._n < CONFIRM_MESSAGES:
            return False
        self.step = Step(newest - expected)
        self._n = 0
        self.newest = newest
        self.arrival = max(self.arrival, arrival)
        return True
