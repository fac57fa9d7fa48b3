"""Escalation while raised: a higher severity band or other leading channels, held for
one independent window, is reported once; noise within the reference is not."""

from __future__ import annotations

import numpy as np
import pytest

from agent.core.escalation import EscalationTracker, Reason, leading_channels
from agent.core.events import Severity

MINOR, MAJOR, CRIT = Severity.MINOR, Severity.MAJOR, Severity.CRITICAL
VIB, TEMP = frozenset({"vib"}), frozenset({"temp"})


@pytest.mark.parametrize(("sq", "want"), [
    ([9.0, 0.5, 0.5], {"vib"}),                 # one channel carries it
    ([3.0, 3.0, 3.5], {"vib"}),                 # vib's two features: 6.0 of 9.5
    ([1.0, 1.0, 7.0], {"temp"}),
    ([0.0, 0.0, 0.0], set()),
])
def test_leading_channels(sq: list[float], want: set[str]) -> None:
    """The fewest channels whose error share reaches half (features summed per channel)."""
    names = ("vib.rms", "vib.kurtosis", "temp.mean")
    assert leading_channels(names, np.array(sq)) == frozenset(want)


@pytest.mark.parametrize(("steps", "persist", "want"), [
    ([(MAJOR, VIB)], 1, [(0, Reason.SEVERITY)]),
    ([(MAJOR, VIB), (MAJOR, VIB)], 2, [(1, Reason.SEVERITY)]),
    ([(MAJOR, VIB), (MINOR, VIB), (MAJOR, VIB)], 2, []),          # not held
    ([(MINOR, TEMP), (MINOR, TEMP)], 2, [(1, Reason.EXPLANATION)]),
    ([(MINOR, VIB | TEMP)] * 3, 1, []),                            # overlaps the reference
    ([(MAJOR, VIB), (CRIT, VIB), (CRIT, VIB)], 1,
     [(0, Reason.SEVERITY), (1, Reason.SEVERITY)]),                # each band once
    ([(MINOR, TEMP), (MINOR, VIB), (MINOR, TEMP)], 1, [(0, Reason.EXPLANATION)]),
])
def test_escalation_table(steps: list[tuple[Severity, frozenset[str]]], persist: int,
                          want: list[tuple[int, Reason]]) -> None:
    """Raised at minor on vib; which later windows escalate, and why."""
    t = EscalationTracker(persist=persist)
    t.start(MINOR, VIB)
    got = []
    for i, (sev, ch) in enumerate(steps):
        e = t.step(sev, ch)
        if e is not None:
            got.append((i, e.reason))
    assert got == want


def test_nothing_before_a_raise_or_after_a_clear() -> None:
    """A tracker that is not started (or was stopped) never escalates."""
    t = EscalationTracker()
    assert t.step(CRIT, TEMP) is None
    t.start(MINOR, VIB)
    t.stop()
    assert t.step(CRIT, TEMP) is None
