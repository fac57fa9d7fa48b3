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


@pytest.mark.parametrize(("k", "n", "steps", "want"), [
    (1, 1, [(MAJOR, VIB)], [(0, Reason.SEVERITY)]),
    (2, 3, [(MAJOR, VIB), (MAJOR, VIB)], [(1, Reason.SEVERITY)]),
    (2, 3, [(MAJOR, VIB), (MINOR, VIB), (MINOR, VIB), (MAJOR, VIB)], []),  # not 2 of 3
    (2, 3, [(MINOR, TEMP), (MINOR, TEMP)], [(1, Reason.EXPLANATION)]),
    (1, 1, [(MINOR, VIB | TEMP)] * 3, []),                           # overlaps the reference
    (1, 1, [(MAJOR, VIB), (CRIT, VIB), (CRIT, VIB)],
     [(0, Reason.SEVERITY), (1, Reason.SEVERITY)]),                  # each band once
    (1, 1, [(MINOR, TEMP), (MINOR, VIB), (MINOR, TEMP)], [(0, Reason.EXPLANATION)]),
])
def test_escalation_table(k: int, n: int, steps: list[tuple[Severity, frozenset[str]]],
                          want: list[tuple[int, Reason]]) -> None:
    """Raised at minor on vib (after two minor windows); which later windows escalate."""
    t = EscalationTracker(k, n)
    for _ in range(2):
        t.observe(MINOR, VIB)
    assert t.start(VIB) is MINOR
    got = []
    for i, (sev, ch) in enumerate(steps):
        t.observe(sev, ch)
        e = t.step()
        if e is not None:
            got.append((i, e.reason))
    assert got == want


def test_reference_is_the_band_the_raise_rule_held() -> None:
    """2 of 3: windows minor, critical, major -> the raise held major, not critical."""
    t = EscalationTracker(2, 3)
    for sev in (MINOR, CRIT, MAJOR):
        t.observe(sev, VIB)
    assert t.start(VIB) is MAJOR


def test_nothing_before_a_raise_or_after_a_clear() -> None:
    """A tracker that is not started (or was stopped) never escalates."""
    t = EscalationTracker()
    t.observe(CRIT, TEMP)
    assert t.step() is None
    t.start(VIB)
    t.stop()
    t.observe(CRIT, TEMP)
    assert t.step() is None
