"""Static limits beside the model, and ISO 10816-3 vibration-severity zones. Pure.

A `LevelMonitor` watches one value against ascending thresholds (levels 1..n above
"normal" 0). As alarm-management practice recommends against chattering (ISA-18.2 /
IEC 62682; numbers from memory), it

* rises to a level only after the value has been beyond that level's threshold for
  `on_delay` consecutive windows (on-delay), and
* falls back below a level only once the value is at or below its threshold minus
  `deadband` (deadband).

Only a rise is reported (as a `limit.exceeded` event by the pipeline); falls are
visible in state and metrics. Low limits are watched as the negated value.

ISO 10816-3:2009 Annex A, Tables A.1 (group 1: above 300 kW up to 50 MW) and A.2
(group 2: above 15 kW up to 300 kW), velocity r.m.s. over 10 Hz - 1 kHz, boundaries
A/B, B/C, C/D in mm/s. Zone A: newly commissioned; B: unrestricted long-term
operation; C: limited period only; D: severe enough to cause damage. A value exactly
on a boundary is in the lower zone. Operational limits (clauses 5.3/5.4 of the same
standard): ALARM = min(baseline + 0.25 x B/C, 1.25 x B/C); TRIP at most 1.25 x C/D
(we use that upper value). Without a baseline, ALARM is its cap 1.25 x B/C (our
choice). ISO 20816-3:2022 revised the standard, as far as we know with the same
velocity boundaries (from memory). Rotodynamic pumps are covered by ISO 10816-7
(from memory): for a pump these zones are guidance, not its own standard.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from agent.config.schema import IsoConfig, LimitConfig, Support

# (group, support) -> (A/B, B/C, C/D) in mm/s, ISO 10816-3:2009 Tables A.1 and A.2.
ISO10816_3_BOUNDARIES_MM_S: dict[tuple[int, Support], tuple[float, float, float]] = {
    (1, Support.RIGID): (2.3, 4.5, 7.1),
    (1, Support.FLEXIBLE): (3.5, 7.1, 11.0),
    (2, Support.RIGID): (1.4, 2.8, 4.5),
    (2, Support.FLEXIBLE): (2.3, 4.5, 7.1),
}
ZONES = ("A", "B", "C", "D")


def zone_of(velocity_mm_s: float, boundaries: tuple[float, float, float]) -> str:
    """The zone of a velocity RMS; a value on a boundary is in the lower zone."""
    for zone, edge in zip(ZONES, boundaries, strict=False):
        if velocity_mm_s <= edge:
            return zone
    return "D"


def operational_limits(group: int, support: Support, baseline_mm_s: float | None
                       ) -> tuple[float, float]:
    """(ALARM, TRIP) in mm/s from the asset's baseline, per ISO 10816-3 5.3/5.4."""
    _, bc, cd = ISO10816_3_BOUNDARIES_MM_S[(group, support)]
    cap = 1.25 * bc
    alarm = cap if baseline_mm_s is None else min(baseline_mm_s + 0.25 * bc, cap)
    return alarm, 1.25 * cd


class LevelMonitor:
    """One value against ascending thresholds, with on-delay and deadband."""

    def __init__(self, thresholds: Sequence[float], deadband: float, on_delay: int) -> None:
        self.thresholds = tuple(thresholds)
        self.deadband = deadband
        self.on_delay = on_delay
        self.level = 0
        self._beyond = [0] * len(self.thresholds)  # consecutive windows beyond each
        # At rest (level 0, no threshold passed in the last window) and a value at or
        # below the lowest threshold: a step changes nothing (the usual window).
        self._rest = True
        self._lowest = min(self.thresholds, default=math.inf)

    @property
    def at_rest(self) -> bool:
        """A value at or below `lowest` steps to no change."""
        return self._rest

    @property
    def lowest(self) -> float:
        return self._lowest

    def step(self, value: float) -> int | None:
        """Feed one window's value; return the new level when it rises, else None."""
        if self._rest and value <= self._lowest:
            return None
        for i, t in enumerate(self.thresholds):
            self._beyond[i] = self._beyond[i] + 1 if value > t else 0
        # Fall: only below a level's threshold by the deadband.
        while self.level > 0 and value <= self.thresholds[self.level - 1] - self.deadband:
            self.level -= 1
        held = sum(1 for n in self._beyond if n >= self.on_delay)
        rose = held > self.level
        if rose:
            self.level = held
        self._rest = self.level == 0 and not any(self._beyond)
        return held if rose else None


@dataclass(frozen=True)
class LimitRise:
    """A rise of one limit: what kind, which level name, at what threshold."""

    feature: str
    kind: str  # "limit" (configured), "zone" (ISO zone), "operational" (ALARM/TRIP)
    level: str
    threshold: float
    value: float


class FeatureLimits:
    """Configured alert/alarm limits of one feature (high and low)."""

    def __init__(self, cfg: LimitConfig) -> None:
        self.cfg = cfg
        highs = [(n, v) for n, v in (("alert", cfg.alert), ("alarm", cfg.alarm))
                 if v is not None]
        lows = [(n, v) for n, v in (("alert_low", cfg.alert_low), ("alarm_low", cfg.alarm_low))
                if v is not None]
        self._high = (LevelMonitor([v for _, v in highs], cfg.deadband, cfg.on_delay), highs)
        self._low = (LevelMonitor([-v for _, v in lows], cfg.deadband, cfg.on_delay), lows)
        self.rest_band = self._rest_band()

    def _rest_band(self) -> tuple[float, float]:
        """The values [lo, hi] a step takes without a change (empty when not at rest)."""
        (high, highs), (low, lows) = self._high, self._low
        if (highs and not high.at_rest) or (lows and not low.at_rest):
            return math.inf, -math.inf
        return (-low.lowest if lows else -math.inf), (high.lowest if highs else math.inf)

    @property
    def level(self) -> str:
        for mon, names in (self._high, self._low):
            if mon.level:
                return names[mon.level - 1][0]
        return "normal"

    def step(self, value: float) -> list[LimitRise]:
        out = []
        for (mon, names), sign in ((self._high, 1.0), (self._low, -1.0)):
            if not names:
                continue
            lv = mon.step(sign * value)
            if lv is not None:
                name, thr = names[lv - 1]
                out.append(LimitRise(self.cfg.feature, "limit", name, thr, value))
        self.rest_band = self._rest_band()
        return out


class ZoneLimits:
    """ISO 10816-3 zone and operational ALARM/TRIP of one velocity RMS feature (mm/s)."""

    def __init__(self, feature: str, cfg: IsoConfig) -> None:
        self.feature = feature
        self.cfg = cfg
        self.boundaries = ISO10816_3_BOUNDARIES_MM_S[(cfg.group, cfg.support)]
        self.alarm, self.trip = operational_limits(cfg.group, cfg.support, cfg.baseline_mm_s)
        self._zone = LevelMonitor(self.boundaries, cfg.deadband_mm_s, cfg.on_delay)
        self._ops = LevelMonitor((self.alarm, self.trip), cfg.deadband_mm_s, cfg.on_delay)
        self.rest_band = self._rest_band()

    def _rest_band(self) -> tuple[float, float]:
        """The values [lo, hi] a step takes without a change (empty when not at rest)."""
        if not (self._zone.at_rest and self._ops.at_rest):
            return math.inf, -math.inf
        return -math.inf, min(self._zone.lowest, self._ops.lowest)

    @property
    def zone(self) -> str:
        """The zone as held by the monitor (on-delay and deadband applied)."""
        return ZONES[self._zone.level]

    @property
    def operational(self) -> str:
        return ("normal", "alarm", "trip")[self._ops.level]

    def step(self, value: float) -> list[LimitRise]:
        out = []
        lv = self._zone.step(value)
        if lv is not None:
            out.append(LimitRise(self.feature, "zone", ZONES[lv], self.boundaries[lv - 1],
                                 value))
        lv = self._ops.step(value)
        if lv is not None:
            out.append(LimitRise(self.feature, "operational", ("alarm", "trip")[lv - 1],
                                 (self.alarm, self.trip)[lv - 1], value))
        self.rest_band = self._rest_band()
        return out
