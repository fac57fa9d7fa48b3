"""What a tick judges about each asset before and beside its model: sensor health,
staleness and liveness, the operating mode and its settling, static limits and zones.

Each check runs only for the assets and channels that have it (`AssetRuntime.checked`,
`stale_channels`, `modes`, `limits`, `velocity_at`); an asset with none of them costs
one attribute test per window here. A window's verdict is a `Pending`: the mode it was
in, the channels faulty at it, and why it is not scored (`reason`, None when it is).
Skip reasons, first match wins: `sensor_fault`, `incomplete`, `unknown_mode`,
`not_scored` (a mode marked `scored: false`), `settling`.

Most windows change nothing, and are judged so in arrays: `prejudge` finds the quiet
channels of all the tick's windows and the mode channel's means at once
(`health_batch.py`), `window` runs the state machines of the rest; `limits` steps only
the monitors whose value leaves their rest band.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from prometheus_client import Gauge

from agent.core.health import Reason as HealthReason
from agent.core.health import WindowStats
from agent.core.limits import ZONES, FeatureLimits, ZoneLimits, zone_of
from agent.core.modes import UNKNOWN_MODE
from agent.core.windows.closed import ClosedWindow
from agent.ingest.buffers import Buffers
from agent.ops.logs import kv
from agent.ops.metrics import Metrics, PlainFamily
from agent.pipeline.emit import Emitter, reset_detector
from agent.pipeline.health_batch import HealthBatch, Prejudged
from agent.pipeline.runtime import AssetRuntime

_LEVEL_VALUE = {"normal": 0, "alert": 1, "alarm": 2, "alert_low": 1, "alarm_low": 2}


@dataclass(eq=False, slots=True)
class Pending:
    """One closed window on its way through the tick, with what was judged about it."""

    rt: AssetRuntime
    w: ClosedWindow
    mode: str
    faulty: tuple[int, ...]  # channels with a sensor fault at this window
    reason: str | None  # why it is not scored, if it is not
    row: np.ndarray | None = None  # its full feature row, once computed
    ai: int = -1  # its asset's position in the pipeline's runtimes (set by the tick)


class Judge:
    """Sensor health, modes and limits of the tick's windows; events through `emit`."""

    def __init__(self, metrics: Metrics, logger: logging.Logger, buffers: Buffers,
                 emit: Emitter, startup_grace_s: float) -> None:
        self.metrics = metrics
        self.log = logger
        self.buffers = buffers
        self.emit = emit
        self.grace_s = startup_grace_s
        # Gauge children of limits and zones, with the value last set.
        self._gauges: dict[tuple[int, tuple[str, ...]], Shown] = {}
        self._limit_plans: dict[int, _LimitPlan] = {}
        self._batch = HealthBatch()

    def stale(self, rt: AssetRuntime, ai: int, now: float) -> float:
        """Staleness of the asset's channels with `stale_s`, judged at `now`. Returns
        the earliest time one of them can turn stale unless a sample arrives (inf
        while each is stale already or never can be): until then, judging them again
        changes nothing, as arrivals only move forward (tick.py visits the asset again
        then, or sooner when a window of it closes)."""
        wake = math.inf
        for ci in rt.layout.stale_channels:
            h = rt.health[ci]
            stale_s = h.limits.stale_s
            buf = self.buffers.by_asset[ai][ci]
            if not buf.last_arrival:
                # Never published since start: *waiting*, not stale, for the startup
                # grace (or the channel's own stale_s, if longer); then stale.
                start = rt.started_s if rt.started_s is not None else now
                bound = max(self.grace_s, stale_s or 0.0)
                if now - start <= bound:
                    wake = min(wake, start + bound)
                    continue
                last = start
            else:
                last = buf.last_arrival
            change = h.check_stale(now - last)
            if change is not None:
                self.emit.sensor_event(rt, ci, change, now, f"stale|{last:.3f}", None)
            if stale_s is not None and not h.stale:
                wake = min(wake, last + stale_s)
        return wake

    def liveness(self, rt: AssetRuntime, notes: list[tuple[int, str | None, float]],
                 now: float) -> None:
        """Death certificates fault their channels at once (`sensor.fault`, reason
        node_death or device_death); a birth after one lets them recover."""
        for ci, death, t in notes:
            change = rt.health[ci].set_liveness(
                HealthReason(death) if death is not None else None, max(0.0, now - t))
            if change is not None:
                self.emit.sensor_event(rt, ci, change, t, f"{death}|{t:.3f}", None)

    def prejudge(self, wins: Sequence[tuple[AssetRuntime, ClosedWindow]],
                 failed: set[str]) -> Prejudged:
        """The quiet channels of every window judged together (`health_batch.py`);
        `window` judges the rest."""
        return self._batch.prejudge(wins, failed)

    def window(self, rt: AssetRuntime, w: ClosedWindow, pre: Prejudged | None = None,
               wi: int = 0) -> Pending:
        """Sensor health of the window's checked channels, then its mode. With `pre`
        (`prejudge` of the tick's windows, this one at `wi`), the channels it judged
        quiet are skipped and the others judged from its stats where it has them."""
        lay, modes = rt.layout, rt.modes
        if not lay.checked and modes is None:  # nothing to judge but completeness
            return Pending(rt, w, rt.mode, (), None if w.complete else "incomplete")
        value = None
        if pre is None:
            faulty = self._health(rt, w, None, False)
        else:
            stats = pre.stats[wi]
            if stats is None and pre.eligible[wi]:
                faulty = ()  # every checked channel quiet, so calm
            else:
                faulty = self._health(rt, w, stats, pre.eligible[wi])
            value = pre.mode_value[wi]
        settling = False
        scored = True
        if modes is not None and lay.mode_channel is not None:
            if value is not None:
                d = modes.step_value(value, w.start)
            else:
                ch = lay.mode_channel
                d = modes.step(w.channel(ch, lay.chan_at[ch]), w.start)
            if d.mode != rt.mode:
                self.set_mode(rt, d.mode)
            settling, scored = d.settling, d.scored
        rt.settling = settling
        reason = None
        if faulty:
            reason = "sensor_fault"
        elif not w.complete:
            reason = "incomplete"
        elif rt.mode == UNKNOWN_MODE:
            reason = "unknown_mode"
        elif not scored:
            reason = "not_scored"
        elif settling:
            reason = "settling"
        return Pending(rt, w, rt.mode, faulty, reason)

    def _health(self, rt: AssetRuntime, w: ClosedWindow,
                stats: dict[int, WindowStats | None] | None, eligible: bool
                ) -> tuple[int, ...]:
        """Judge the window's checked channels that `prejudge` did not (passive
        channels: nothing to judge, as decoders let no non-finite sample through, and
        they can never be faulty); the faulty ones after."""
        health = rt.health
        for ci in rt.layout.checked:
            if stats is not None and ci in stats:
                st = stats[ci]
            elif eligible:
                continue  # quiet: judged by prejudge
            else:
                st = None
            if st is not None:
                change = health[ci].check_stats(st)
            else:
                change = health[ci].check_window(w.values[ci], w.timestamps[ci])
            if change is not None:
                self.emit.sensor_event(rt, ci, change, w.end, f"{w.start:.3f}", w)
        return tuple(i for i in rt.layout.checked if health[i].faulty)

    def set_mode(self, rt: AssetRuntime, mode: str) -> None:
        gauge = self.metrics.mode
        gauge.labels(rt.cfg.name, rt.mode).set(0)
        gauge.labels(rt.cfg.name, mode).set(1)
        self.log.info(kv("mode changed", asset=rt.cfg.name, mode=mode, was=rt.mode))
        rt.mode = mode
        reset_detector(rt)

    def limits(self, p: Pending, row: np.ndarray) -> None:
        """Velocity RMS gauges, static limits and ISO 10816-3 zones of one window, on
        channels without a sensor fault (a faulty sensor's value says nothing about the
        machine). Gauges are set when their value changes (children looked up once); a
        monitor whose value is in its rest band (`rest_band`, as of its last step: no
        band before the first) is not stepped, as that would change nothing."""
        rt = p.rt
        plan = self._limit_plans.get(id(rt))
        if plan is None or plan.rt is not rt:
            plan = self._limit_plans[id(rt)] = _LimitPlan.of(rt, self)
        faulty = p.faulty
        for ci, at, cname, rec in plan.velocity:
            v = row.item(at)
            if math.isfinite(v) and ci not in faulty:
                rt.last_velocity_mm_s[cname] = v
                # Prometheus wants base units: m/s (PITFALLS.md, promtool).
                rec.set(v / 1000.0)
        for e in plan.limits:
            if e.ci in faulty:
                continue
            value = row.item(e.at)
            if e.lo <= value <= e.hi:
                continue  # at rest and stays there: nothing changes
            if math.isfinite(value):
                self._step_limit(p, e, value)

    def _step_limit(self, p: Pending, e: _Watch, value: float) -> None:
        rt, ci, mon = p.rt, e.ci, e.mon
        rises = mon.step(value)
        # Only here do the monitor and its gauges change: after a step at rest, the
        # gauges show the rest levels too.
        e.lo, e.hi = mon.rest_band
        if isinstance(mon, ZoneLimits):
            self._zone_gauges(rt, ci, mon)
        else:
            self._gauge(self.metrics.limit_level,
                        (rt.cfg.name, f"{rt.cfg.channels[ci].name}.{mon.cfg.feature}",
                         "limit"), _LEVEL_VALUE[mon.level])
        for rise in rises:
            zone = zone_of(value, mon.boundaries) if isinstance(mon, ZoneLimits) else None
            self.emit.limit_event(rt, rt.cfg.channels[ci].name, rise, zone, mon, p.w)

    def _zone_gauges(self, rt: AssetRuntime, ci: int, mon: ZoneLimits) -> None:
        name = rt.cfg.name
        self._gauge(self.metrics.vibration_zone, (name, rt.cfg.channels[ci].name),
                    ZONES.index(mon.zone) + 1)
        self._gauge(self.metrics.limit_level, (name, mon.feature, "operational"),
                    ("normal", "alarm", "trip").index(mon.operational))

    def _gauge(self, family: Gauge, labels: tuple[str, ...], value: float) -> None:
        """Set a gauge child to `value` unless it holds it already."""
        self.shown(family, labels).set(value)

    def shown(self, family: Gauge | PlainFamily, labels: tuple[str, ...]) -> Shown:
        """The one `Shown` of a gauge child."""
        got = self._gauges.get((id(family), labels))
        if got is None:
            got = self._gauges[(id(family), labels)] = Shown(family, labels)
        return got


class Shown:
    """A gauge child and the value last set on it (None: never set); the child is made
    when first set (a child that exists is exported)."""

    __slots__ = ("child", "family", "labels", "value")

    def __init__(self, family: Gauge | PlainFamily, labels: tuple[str, ...]) -> None:
        self.family, self.labels = family, labels
        self.child: Any = None
        self.value: float | None = None

    def set(self, value: float) -> None:
        if self.value != value:
            if self.child is None:
                self.child = self.family.labels(*self.labels)
            self.child.set(value)
            self.value = value


class _Watch:
    """One limit or zone monitor of an asset, with the band of values that step it to
    no change (`rest_band` after its last step; none before the first)."""

    __slots__ = ("at", "ci", "hi", "lo", "mon")

    def __init__(self, ci: int, at: int, mon: FeatureLimits | ZoneLimits) -> None:
        self.ci, self.at, self.mon = ci, at, mon
        self.lo, self.hi = math.inf, -math.inf


@dataclass(frozen=True, slots=True)
class _LimitPlan:
    """Per asset, what `Judge.limits` reads: (channel, row position, channel name,
    gauge) of each velocity RMS, and each limit and zone monitor."""

    rt: AssetRuntime
    velocity: tuple[tuple[int, int, str, Shown], ...]
    limits: tuple[_Watch, ...]

    @classmethod
    def of(cls, rt: AssetRuntime, judge: Judge) -> _LimitPlan:
        m, name, chans = judge.metrics, rt.cfg.name, rt.cfg.channels
        velocity = tuple((ci, at, chans[ci].name,
                          judge.shown(m.velocity_rms, (name, chans[ci].name)))
                         for ci, at in rt.layout.velocity_at)
        return cls(rt, velocity, tuple(_Watch(ci, at, mon) for ci, at, mon in rt.limits))
