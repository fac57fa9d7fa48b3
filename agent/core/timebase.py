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
windows. What a continuous message can still move the cursor by is `tolerance_s`, which
costs the other channels at most that much data once.

A sensor whose clock stepped forward and stays there sends only "ahead" messages,
each ahead of continuity by about the same amount. After `CONFIRM_MESSAGES`
consecutive such messages whose steps agree within the tolerance, spread over at least
`CONFIRM_S` seconds of arrival time, the step is accepted: from then on the channel's
sample times are shifted back by it (`shift_s`), onto the time base the asset's windows
and its other channels are on, and the guard reports a `Step` (the daemon logs it,
counts `watchkeep_clock_steps_total{asset,channel}` and shows the shift in
`watchkeep_channel_clock_shift_seconds`). The asset's windows need no reset: the
corrected samples continue where the channel left off. Any continuous message in
between breaks the run, so an outlier mixed into a live stream is never confirmed;
the run's messages before the confirming one are lost (counted as `ahead`).

When the clock steps back again (a shifted channel whose messages are now behind its
corrected time base by more than the tolerance, consistently, by the same rules), the
shift is lowered to fit, never below zero: a channel's times are only ever moved back,
and a sensor that is behind the gateway clock (or data replayed late) is left alone,
as before (its samples may be late; they are never moved into newer windows).

Constants: `DEFAULT_TOLERANCE_S` 2 s covers NTP-synced clocks (milliseconds) and
broker latency with room, and stays within a window's usual lateness; the asset's
`window.lateness_s` is used when larger. 8 messages over 5 s make a confirmed step
take a few seconds for a 1 Hz or faster sensor, and keep a short burst from an
outsider from re-basing a channel. Common practice, no source. Pure: times are
parameters.
"""

from __future__ import annotations

import math

DEFAULT_TOLERANCE_S = 2.0
CONFIRM_MESSAGES = 8
CONFIRM_S = 5.0


class Step:
    """A confirmed change of a channel's shift: `old_s` -> `new_s` (seconds subtracted
    from its sample times)."""

    __slots__ = ("new_s", "old_s")

    def __init__(self, old_s: float, new_s: float) -> None:
        self.old_s = old_s
        self.new_s = new_s

    def __repr__(self) -> str:
        return f"Step(old_s={self.old_s!r}, new_s={self.new_s!r})"


class TimeBase:
    """One channel's guard. `check(first, newest, arrival)` before a message's samples go
    into the windows: None rejects the message (ahead), else the shift (seconds) to
    subtract from its sample times. A confirmed step is left in `step` for the caller
    to report (and clear)."""

    __slots__ = ("_n", "_run_first", "_run_hi", "_run_lo", "_run_up", "arrival", "newest",
                 "shift_s", "step", "tolerance_s")

    def __init__(self, tolerance_s: float = DEFAULT_TOLERANCE_S) -> None:
        self.tolerance_s = tolerance_s
        self.shift_s = 0.0
        self.newest = -math.inf  # newest accepted sample time, corrected
        self.arrival = -math.inf  # arrival of the last accepted message
        self.step: Step | None = None
        self._n = 0  # messages in the current run (ahead or behind)
        self._run_up = True  # the run is of ahead (True) or behind (False) messages
        self._run_first = 0.0  # arrival of the run's first message
        self._run_lo = self._run_hi = 0.0  # the run's candidate shifts, lowest and highest

    def check(self, newest: float, arrival: float) -> float | None:
        """The shift to apply to a message whose newest (uncorrected) sample time is
        `newest`, or None when it is ahead and rejected."""
        ref = self.newest
        t = newest - self.shift_s
        if ref == -math.inf:
            expected = arrival  # no history: the gateway clock
        else:
            elapsed = arrival - self.arrival
            expected = ref + elapsed if elapsed > 0.0 else ref
        tol = self.tolerance_s
        if t <= expected + tol:
            if self.shift_s and t < expected - tol:
                return self._behind(newest, expected, arrival)
            self._n = 0
            self._accept(t, arrival)
            return self.shift_s
        return self._ahead(newest, expected, arrival)

    def _accept(self, t: float, arrival: float) -> None:
        if t > self.newest:
            self.newest = t
        if arrival > self.arrival:
            self.arrival = arrival

    def _run(self, up: bool, cand: float, arrival: float) -> bool:
        """Add a message with candidate shift `cand` to the run; True when confirmed."""
        tol = self.tolerance_s
        if self._n and self._run_up is up and cand - self._run_lo <= tol \
                and self._run_hi - cand <= tol:
            self._n += 1
            self._run_lo = min(self._run_lo, cand)
            self._run_hi = max(self._run_hi, cand)
        else:
            self._n, self._run_up, self._run_first = 1, up, arrival
            self._run_lo = self._run_hi = cand
        return self._n >= CONFIRM_MESSAGES and arrival - self._run_first >= CONFIRM_S

    def _confirm(self, newest: float, arrival: float) -> float:
        old = self.shift_s
        # The highest candidate: no message of the run is ahead once corrected.
        self.shift_s = max(0.0, self._run_hi)
        self.step = Step(old, self.shift_s)
        self._n = 0
        t = newest - self.shift_s
        self.newest = max(self.newest, t) if self.shift_s < old else t
        self.arrival = max(self.arrival, arrival)
        return self.shift_s

    def _ahead(self, newest: float, expected: float, arrival: float) -> float | None:
        # The shift that would make this message continuous.
        if self._run(True, newest - expected, arrival):
            return self._confirm(newest, arrival)
        return None

    def _behind(self, newest: float, expected: float, arrival: float) -> float:
        """A shifted channel's message well behind its time base: accepted with the
        current shift; a consistent run of them lowers the shift."""
        if self._run(False, newest - expected, arrival):
            return self._confirm(newest, arrival)
        # Not `_accept`ed: the reference stays the last continuous message, so the
        # expectation keeps advancing with the wall clock and the run's steps agree.
        return self.shift_s
