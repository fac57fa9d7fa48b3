"""Static limits: on-delay, deadband, high and low, and the ISO zone monitor."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.config.load import IsoConfig, LimitConfig, Support
from agent.core.limits import FeatureLimits, LevelMonitor, ZoneLimits


def _levels(mon: LevelMonitor, values: list[float]) -> list[int | None]:
    return [mon.step(v) for v in values]


@pytest.mark.parametrize(("values", "rises"), [
    ([1, 3, 1, 3, 1, 3], [None] * 6),                 # never 2 in a row: no raise
    ([1, 3, 3, 3], [None, None, 1, None]),            # raised once after 2 windows
    ([3, 6, 6], [None, 1, 2]),                        # alert first, then alarm
    ([6, 6, 6], [None, 2, None]),                     # straight to alarm
])
def test_on_delay(values: list[float], rises: list[int | None]) -> None:
    """A level is reached only after on_delay consecutive windows beyond it."""
    assert _levels(LevelMonitor((2.0, 5.0), deadband=0.5, on_delay=2), values) == rises


def test_deadband_stops_chattering() -> None:
    """Hovering around the limit raises once; it clears only deadband below it."""
    mon = LevelMonitor((2.0,), deadband=0.5, on_delay=2)
    vals = [2.1, 2.2, 1.9, 2.1, 1.8, 2.2, 2.05, 1.6, 2.3]
    assert [r for r in _levels(mon, vals) if r] == [1]
    assert mon.level == 1
    mon.step(1.5)  # at the limit minus the deadband: clears
    assert mon.level == 0


def test_feature_limits_high_and_low() -> None:
    """Low limits watch a falling value; rises name the level and its threshold."""
    fl = FeatureLimits(LimitConfig("mean", alert=10, alarm=20, alert_low=2, alarm_low=1,
                                   deadband=0.5, on_delay=1))
    assert [(r.level, r.threshold) for r in fl.step(15)] == [("alert", 10)]
    assert fl.level == "alert"
    assert [(r.level, r.threshold) for r in fl.step(25)] == [("alarm", 20)]
    fl.step(5)
    assert fl.level == "normal"
    assert [(r.level, r.threshold) for r in fl.step(0.5)] == [("alarm_low", 1)]


def test_zone_limits_rise_through_zones_and_alarm() -> None:
    """Group 2 rigid, baseline 1.0: zones B (>1.4), C (>2.8) and ALARM (>1.7) each rise once."""
    z = ZoneLimits("vib.velocity_rms_mm_s",
                   IsoConfig(2, Support.RIGID, 1.0, ("vib",), 0.1, 1))
    seen = [(r.kind, r.level) for v in (1.0, 1.5, 1.8, 2.9, 2.9) for r in z.step(v)]
    assert seen == [("zone", "B"), ("operational", "alarm"), ("zone", "C")]
    assert z.zone == "C" and z.operational == "alarm"


def _state(m: FeatureLimits | ZoneLimits) -> list[tuple[object, ...]]:
    mons = [m._high[0], m._low[0]] if isinstance(m, FeatureLimits) else [m._zone, m._ops]
    return [(x.level, tuple(x._beyond), x.at_rest) for x in mons]


@settings(max_examples=150, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), zone=st.booleans())
def test_a_value_in_the_rest_band_steps_to_no_change(seed: int, zone: bool) -> None:
    """`rest_band`, as left by the last step: a value inside it makes `step` return
    nothing and change nothing (the tick skips such steps); limits high, low or both,
    and ISO zones, with on-delay and deadband."""
    rng = np.random.default_rng(seed)
    if zone:
        mon: FeatureLimits | ZoneLimits = ZoneLimits(
            "vib.velocity_rms_mm_s", IsoConfig(2, Support.RIGID, 1.0, ("vib",), 0.1,
                                               int(rng.integers(1, 3))))
    else:
        highs = rng.choice([(None, None), (10.0, 20.0), (10.0, None)])
        lows = rng.choice([(None, None), (2.0, 1.0), (None, 1.0)])
        mon = FeatureLimits(LimitConfig("mean", alert=highs[0], alarm=highs[1],
                                        alert_low=lows[0], alarm_low=lows[1],
                                        deadband=0.5, on_delay=int(rng.integers(1, 3))))
    for _ in range(30):
        value = float(rng.choice([rng.uniform(-5, 25), rng.uniform(0, 8), 10.0, 1.0]))
        lo, hi = mon.rest_band
        if lo <= value <= hi:
            before = _state(mon)
            assert mon.step(value) == []
            assert _state(mon) == before
        else:
            mon.step(value)
