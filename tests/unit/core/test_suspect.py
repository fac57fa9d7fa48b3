"""The drifting-sensor signature: one channel alone, in its level, grown gradually, the
rest normal. Each condition broken on its own gives a machine anomaly (None)."""

from __future__ import annotations

import numpy as np
import pytest

from agent.core.suspect import dominant_channel, drifting_channel

NAMES = ("temp.mean", "temp.std", "vib.rms", "vib.kurtosis", "flow.mean")


@pytest.mark.parametrize(("sq", "earlier", "want"), [
    ([9.0, 0.1, 0.1, 0.1, 0.1], [4.0, 0.1, 0.1, 0.1, 0.1], "temp"),   # creep: a sensor
    ([9.0, 0.1, 0.1, 0.1, 0.1], [0.2, 0.1, 0.1, 0.1, 0.1], None),     # a step: the machine
    ([9.0, 0.1, 0.1, 0.1, 0.1], None, None),                          # no history yet
    ([5.0, 0.1, 3.0, 0.1, 0.1], [4.0, 0.1, 3.0, 0.1, 0.1], None),     # not alone
    ([1.0, 8.0, 0.1, 0.1, 0.1], [1.0, 8.0, 0.1, 0.1, 0.1], None),     # its spread, not level
    ([0.1, 0.1, 9.0, 0.5, 0.1], [0.1, 0.1, 8.0, 0.5, 0.1], None),     # a waveform's rms
])
def test_drifting_channel(sq: list[float], earlier: list[float] | None,
                          want: str | None) -> None:
    """Which windows look like a drifting sensor (clear threshold 0.3)."""
    got = drifting_channel(NAMES, np.array(sq), 0.3,
                           None if earlier is None else np.array(earlier),
                           frozenset({"temp", "flow"}))
    assert got == want


def test_the_rest_must_be_normal() -> None:
    """Alone by share but the others' error above the clear threshold: the machine."""
    sq = np.array([90.0, 1.0, 2.0, 2.0, 2.0])
    assert drifting_channel(NAMES, sq, 1.0, sq * 0.9) is None
    assert drifting_channel(NAMES, sq, 2.0, sq * 0.9) == "temp"


def test_dominant_channel() -> None:
    """Features are summed per channel."""
    assert dominant_channel(NAMES, np.array([1.0, 1.0, 1.5, 1.0, 0.5])) == ("vib", 0.5)
