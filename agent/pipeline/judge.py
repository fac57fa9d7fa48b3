"""What a tick judges about each asset before and beside its model: sensor health,
staleness and liveness, the operating mode and its settling, static limits and zones.

Each check runs only for the assets and channels that have it (`AssetRuntime.checked`,
`stale_channels`, `modes`, `limits`, `velocity_at`); an asset with none of them costs
one attribute test per window here. A window's verdict is a `Pending`: the mode it was
in, the channels faulty at it, and why it is not scored (`reason`, None when it is).
Skip reasons, first match wins: `sensor_fault`, `incomplete`, `unknown_mode`,
`not_scored` (a mode marked `scored: false`), `settling`.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass
from itertools import pairwise
from typing import Any

import numpy as np
from prometheus_client import Gauge

from agent.core.health import Reason as HealthReason
from agent.core.health import WindowStats, window_stats
from agent.core.limits import ZONES, ZoneLimits, zone_of
from agent.core.modes import UNKNOWN_MODE
from agent.core.windows.closed import ClosedWindow
from agent.ingest.buffers import Buffers
from agent.ops.logs import kv
from agent.ops.metrics import Metrics
from agent.pipeline.emit import Emitter, reset_detector
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
        self._gauges: dict[tuple[int, tuple[str, ...]], list[Any]] = {}

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

    def window(self, rt: AssetRuntime, w: ClosedWindow,
               stats: dict[int, WindowStats] | None = None) -> Pending:
        """Sensor health of the window's checked channels (from `stats` where
        `health_stats` had them), then its mode."""
        if not rt.layout.checked and rt.modes is None:  # nothing to judge but completeness
            return Pending(rt, w, rt.mode, (), None if w.complete else "incomplete")
        health = rt.health
        for ci in rt.layout.checked:  # passive channels: nothing to judge (decoders let no
            # non-finite sample through), and they can never be faulty
            st = stats.get(ci) if stats is not None else None
            if st is not None:
                change = health[ci].check_stats(st)
            else:
                change = health[ci].check_window(w.values[ci], w.timestamps[ci])
            if change is not None:
                self.emit.sensor_event(rt, ci, change, w.end, f"{w.start:.3f}", w)
        faulty = tuple(i for i in rt.layout.checked if health[i].faulty)
        settling = False
        scored = True
        if rt.modes is not None and rt.layout.mode_channel is not None:
            ch = rt.layout.mode_channel
            d = rt.modes.step(w.channel(ch, rt.layout.chan_at[ch]), w.start)
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

    @staticmethod
    def health_stats(wins: Sequence[tuple[AssetRuntime, ClosedWindow]]
                     ) -> list[dict[int, WindowStats] | None]:
        """The statistics sensor health needs of every checked channel of every window,
        computed together: one gather and a handful of row-wise reductions per matrix
        the cut made (blocks of full rows cut for many assets at once). Channels outside
        such blocks, or holding a non-finite sample, are left to `check_window`."""
        out: list[dict[int, WindowStats] | None] = [None] * len(wins)
        # Per cut matrix (by id): (values, timestamps, rows, (window, channel), rate?)
        mats: dict[int, tuple[np.ndarray, np.ndarray, list[int], list[tuple[int, int]],
                              list[bool]]] = {}
        for wi, (rt, w) in enumerate(wins):
            if not rt.layout.checked:
                continue
            is_checked, wants_rate = rt.layout.is_checked, rt.layout.wants_rate
            for blk in w.blocks:
                base, tbase = blk.base, blk.tbase
                if base is None or tbase is None or not blk.uniform:
                    continue
                got = mats.get(id(base))
                if got is None:
                    got = mats[id(base)] = (base, tbase, [], [], [])
                _, _, rows, where, rate = got
                for r, c in enumerate(blk.chans):
                    if is_checked[c]:
                        rows.append(blk.row0 + r)
                        where.append((wi, c))
                        rate.append(wants_rate[c])
        for base, tbase, rows, where, rate in mats.values():
            if not rows or base.shape[1] == 0:
                continue
            if len(rows) == base.shape[0] and rows[0] == 0 and rows[-1] == len(rows) - 1 \
                    and all(b - a == 1 for a, b in pairwise(rows)):
                vals, times = base, tbase  # every row, in order: no gather
            else:
                idx = np.asarray(rows, dtype=np.int64)
                vals, times = base[idx], tbase[idx]
            stats = window_stats(vals, times, np.asarray(rate, dtype=bool))
            for (wi, c), st in zip(where, stats, strict=True):
                if st is not None:
                    d = out[wi]
                    if d is None:
                        d = out[wi] = {}
                    d[c] = st
        return out

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
        machine). Gauges are set when their value changes (children looked up once)."""
        rt, w = p.rt, p.w
        for ci, at in rt.layout.velocity_at:
            v = float(row[at])
            if ci not in p.faulty and np.isfinite(v):
                cname = rt.cfg.channels[ci].name
                rt.last_velocity_mm_s[cname] = v
                # Prometheus wants base units: m/s (PITFALLS.md, promtool).
                self._gauge(self.metrics.velocity_rms, (rt.cfg.name, cname), v / 1000.0)
        for ci, at, mon in rt.limits:
            if ci in p.faulty:
                continue
            value = float(row[at])
            if not np.isfinite(value):
                continue
            rises = mon.step(value)
            if isinstance(mon, ZoneLimits):
                self._zone_gauges(rt, ci, mon)
            else:
                self._gauge(self.metrics.limit_level,
                            (rt.cfg.name, f"{rt.cfg.channels[ci].name}.{mon.cfg.feature}",
                             "limit"), _LEVEL_VALUE[mon.level])
            for rise in rises:
                zone = zone_of(value, mon.boundaries) if isinstance(mon, ZoneLimits) else None
                self.emit.limit_event(rt, rt.cfg.channels[ci].name, rise, zone, mon, w)

    def _zone_gauges(self, rt: AssetRuntime, ci: int, mon: ZoneLimits) -> None:
        name = rt.cfg.name
        self._gauge(self.metrics.vibration_zone, (name, rt.cfg.channels[ci].name),
                    ZONES.index(mon.zone) + 1)
        self._gauge(self.metrics.limit_level, (name, mon.feature, "operational"),
                    ("normal", "alarm", "trip").index(mon.operational))

    def _gauge(self, family: Gauge, labels: tuple[str, ...], value: float) -> None:
        """Set a gauge child to `value` unless it holds it already."""
        got = self._gauges.get((id(family), labels))
        if got is None:
            got = self._gauges[(id(family), labels)] = [family.labels(*labels), None]
        if got[1] != value:
            got[0].set(value)
            got[1] = value
