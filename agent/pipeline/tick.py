"""One pipeline tick: close windows -> features -> batched inference -> detectors -> sink.

`Pipeline.tick(now)` does all the work of a tick and touches no clock, socket or
file itself: samples come from the ingest buffers, messages go to the injected
sink (the outbox) in one batch per tick. The loop that calls it lives in the
daemon.

Per closed window, in time order for each asset:

1. sensor health of every channel (`agent/core/health.py`) -> `sensor.fault` /
   `sensor.recovered` events; staleness is judged every tick from arrival times;
2. the operating mode (`agent/core/modes.py`), with hysteresis and settling;
3. features of all complete windows of the tick at once: time-domain
   (`features.py`) and spectral (`spectral.py`, one FFT per group of equal-length
   segments);
4. static limits and ISO 10816-3 zones (`limits.py`) on channels without a sensor
   fault -> `limit.exceeded`, with or without a model;
5. scoring by the mode's bundle (or the asset's), unless the window is skipped; the
   skip reasons counted in `watchkeep_windows_skipped_total` are `no_data`,
   `sensor_fault`, `incomplete`, `unknown_mode`, `not_scored` (a mode marked
   `scored: false`), `settling`, `no_model` and `model_error`, first match wins.

Two ways through a tick, with the same result (a twin-pipeline test holds them to
it): the general path above, window by window, and the lockstep path for the common
case. A *plain* asset (no health checks or staleness, modes, spectral features or
limits; `AssetRuntime.plain`) whose channels share one rate and hold exactly their
next tumbling window, in step, is cut together with the others like it into one
matrix (`agent/core/lockstep.py`); its feature row is a slice of one feature pass, and
standardising and the batched model runs are planned once per set of models. Only
the score, the detector step and the messages are left per window. An asset the
window observer wants (`observes`) takes the general path.
"""

from __future__ import annotations

import json
import logging
import math
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
import orjson
from prometheus_client import Counter, Gauge

from agent.config.load import FEATURES, Config
from agent.core.decode import Reason
from agent.core.detector import Detector, State, Transition
from agent.core.escalation import Escalated, leading_channels
from agent.core.events import EventType, Source, make_event, rfc3339, severity_for, top_contributors
from agent.core.features import block_features, segment_features, stack_rows
from agent.core.health import Change, HealthChange
from agent.core.health import Reason as HealthReason
from agent.core.limits import ZONES, FeatureLimits, LimitRise, ZoneLimits, zone_of
from agent.core.lockstep import LockstepCut
from agent.core.modes import UNKNOWN_MODE
from agent.core.spectral import spectral_features
from agent.core.suspect import ALONE_SHARE, dominant_channel, drifting_channel
from agent.core.timebase import Step
from agent.core.windows.assembler import Block, ClosedWindow
from agent.ingest.buffers import AssetInbox, Buffers, close_inboxes
from agent.models.bundle import Bundle, BundleMeta
from agent.ops.logs import RateLimited, kv
from agent.ops.metrics import Metrics, PlainSeries
from agent.pipeline.batched import BatchedModels
from agent.pipeline.messages import Kind, OutMessage
from agent.pipeline.runtime import AssetRuntime

_NF = len(FEATURES)



def _ratio(score: float, threshold: float) -> float | None:
    """The score relative to the threshold, as people read it (1.0 = at the threshold)."""
    return round(score / threshold, 3) if threshold > 0 else None

class Sink(Protocol):
    """Takes one tick's messages; `sequences` are the assets' event sequence numbers
    after the tick (only those that changed), stored with the messages."""

    def submit(self, msgs: Sequence[OutMessage],
               sequences: Mapping[str, int] | None = None) -> None: ...


WindowObserver = Callable[[str, str, ClosedWindow, np.ndarray, tuple[str, ...]], None]
# Whether the observer wants an asset's windows now (asked per window; None: always).
WindowWanted = Callable[[str], bool]


@dataclass(frozen=True)
class _AssetMetrics:
    """One asset's metric children, looked up once (`labels()` is not free per window)."""

    closed: PlainSeries
    scored: PlainSeries
    late: Counter
    score: PlainSeries
    threshold: Gauge
    anomalous: Gauge

    @classmethod
    def of(cls, m: Metrics, asset: str) -> _AssetMetrics:
        return cls(m.windows_closed.labels(asset), m.windows_scored.labels(asset),
                   m.late_samples.labels(asset), m.score.labels(asset),
                   m.threshold.labels(asset), m.anomalous.labels(asset))


@dataclass
class TickStats:
    windows_closed: int = 0
    windows_scored: int = 0
    messages: int = 0
    events: int = 0


class Pipeline:
    """The per-tick work for all assets."""

    def __init__(self, cfg: Config, buffers: Buffers, sink: Sink, metrics: Metrics,
                 logger: logging.Logger, runtimes: list[AssetRuntime], *,
                 observer: WindowObserver | None = None, observes: WindowWanted | None = None,
                 lockstep: bool = True) -> None:
        """`observer` gets every scoreable window with its feature row; `observes(asset)`
        says whether it wants an asset's windows now (without it, it wants all).
        `lockstep=False` takes every window through the general path (the tests compare
        the two)."""
        self.cfg = cfg
        self.buffers = buffers
        self.sink = sink
        self.metrics = metrics
        self.log = logger
        self.runtimes = runtimes
        self.observer = observer
        self.observes = observes
        self.lockstep = lockstep
        self.source = Source(cfg.site, cfg.gateway)
        self.prefix = cfg.topic_prefix
        self._m = {rt.cfg.name: _AssetMetrics.of(metrics, rt.cfg.name) for rt in runtimes}
        self._m_at = [self._m[rt.cfg.name] for rt in runtimes]
        # Ingest writes each asset's samples straight into its runtime's assembler.
        self._inboxes: list[AssetInbox] = []
        for rt, bufs in zip(runtimes, buffers.by_asset, strict=True):
            inbox = bufs[0].inbox
            if inbox.assembler is not rt.assembler:
                with inbox.lock:  # a fresh runtime: its buffers have had no samples yet
                    inbox.assembler = rt.assembler
            self._inboxes.append(inbox)
        # What each tick asks of every asset before taking any lock (`tick`).
        self._screen = [(rt.assembler, ib) for rt, ib in zip(runtimes, self._inboxes,
                                                              strict=True)]
        self._stale_at = [ai for ai, rt in enumerate(runtimes) if rt.stale_channels]
        # Staleness is judged every tick while this is true. A replay or an offline
        # record turns it off for the ticks after the data has ended (the end of a
        # recording is not every sensor going silent).
        self.judge_stale = True
        self._grace_s = cfg.ingest.startup_grace_s
        self._unstarted = [rt for rt in runtimes if rt.started_s is None]
        # Indices of the assets the last tick visited: only their next window can have
        # moved (the daemon recomputes ingest's wake-up times for these alone).
        self.last_due: list[int] = []
        self._times: dict[float, str] = {}  # rfc3339 of window bounds, per tick
        self._topic_cache: dict[str, tuple[str, str]] = {}
        self._layout_keys: dict[int, tuple[np.ndarray, bytes]] = {}
        self._scaler_cache: dict[int, tuple[tuple[Bundle, ...], np.ndarray, np.ndarray]] = {}
        self._plans: dict[tuple[int, ...], _Plan] = {}
        # Containment (issue 20): the assets whose work failed in this tick, and whether
        # every asset that has had work is failing now (the daemon's health and
        # watchdog follow it).
        self._failed_now: set[str] = set()
        self.all_failing = False
        self._n_worked = sum(1 for rt in runtimes if rt.worked)
        self._n_failing = sum(1 for rt in runtimes if rt.error is not None)
        self._errlog = RateLimited(logger)
        self._ahead = metrics.messages_rejected.labels(Reason.AHEAD.value)
        for rt in runtimes:
            rt.shown_threshold = rt.shown_anomalous = None
            self._publish_model_gauges(rt)
        self._batched: BatchedModels
        self._batched_stale: bool
        self._rebuild_batched()

    def _publish_model_gauges(self, rt: AssetRuntime) -> None:
        self.metrics.model_loaded.labels(rt.cfg.name).set(1 if rt.bundle else 0)
        if rt.bundle is not None:
            self._m[rt.cfg.name].threshold.set(rt.bundle.meta.threshold)

    def _skip(self, rt: AssetRuntime, reason: str, n: int = 1) -> None:
        if n:
            self.metrics.windows_skipped.labels(rt.cfg.name, reason).inc(n)

    def _failed(self, rt: AssetRuntime, stage: str, exc: BaseException) -> None:
        """One asset's work failed at `stage` in this tick: count it, remember it for
        health and status, log it (rate-limited per asset and stage); the other
        assets' work goes on."""
        name = rt.cfg.name
        detail = f"{type(exc).__name__}: {exc}"[:200]
        self.metrics.asset_errors.labels(name, stage).inc()
        if rt.error is None:
            self.metrics.asset_failing.labels(name).set(1)
            self._n_failing += 1
        rt.error = (stage, detail)
        rt.errors += 1
        self._failed_now.add(name)
        self._errlog.warning(f"asset_error:{name}:{stage}", "asset failed in a tick; the "
                             "other assets go on", asset=name, stage=stage, error=detail)

    def _clock_steps(self, rt: AssetRuntime, steps: list[tuple[int, Step]]) -> None:
        """A channel's time-base guard accepted a jump ahead (agent/core/timebase.py)."""
        for ci, st in steps:
            ch = rt.cfg.channels[ci].name
            self.metrics.clock_steps.labels(rt.cfg.name, ch).inc()
            self.log.warning(kv("channel time base jumped ahead; accepted as its new time "
                                "base", asset=rt.cfg.name, channel=ch,
                                jump_s=round(st.jump_s, 3)))

    def _set_coverage(self, rt: AssetRuntime, cov: float) -> None:
        rt.coverage = cov
        if cov != rt.shown_coverage:
            self.metrics.coverage.labels(rt.cfg.name).set(cov)
            rt.shown_coverage = cov

    def tick(self, now: float) -> TickStats:
        """Run one tick at wall-clock time `now` (seconds).

        Only assets with something to do are visited: a window due (`WindowAssembler.due`),
        late samples to count, or channels whose staleness is judged every tick. An
        asset skipped here is left exactly as a full close would leave it, so a tick in
        which a few windows close costs about as much as those few windows.
        """
        stats = TickStats()
        pending: list[_Pending] = []
        out: list[OutMessage] = []
        self._times.clear()
        if self._unstarted:
            for rt in self._unstarted:
                if rt.started_s is None:
                    rt.started_s = now
            self._unstarted = []
        # Read without the assets' locks: ingest only ever moves a sample time or an
        # arrival forward and adds to `late`, so a stale read here is the same as the
        # sample arriving just after this tick (the next tick, which ingest wakes, takes
        # it); what is closed is decided again under the locks.
        due = [ai for ai, (asm, ib) in enumerate(self._screen)
               if ib.late or ib.liveness or ib.ahead or ib.steps or asm.due(now)]
        if self._stale_at and self.judge_stale:
            due = sorted(set(due).union(self._stale_at))
        self.last_due = due
        runtimes = self.runtimes
        self._failed_now = set()
        seq_before = [runtimes[ai].sequence for ai in due]
        lockstep: list[int] = []
        if self.lockstep:
            observer, wants = self.observer, self.observes
            if observer is None:
                lockstep = [pos for pos, ai in enumerate(due) if runtimes[ai].plain]
            elif wants is not None:  # an observed window takes the general path, whole
                lockstep = [pos for pos, ai in enumerate(due)
                            if runtimes[ai].plain and not wants(runtimes[ai].cfg.name)]
        for ai in due:
            if self._inboxes[ai].liveness:  # Sparkplug deaths and births, before windows
                try:
                    self._check_liveness(runtimes[ai], self._inboxes[ai].take_liveness(),
                                         now, out, stats)
                except Exception as exc:
                    self._failed(runtimes[ai], "health", exc)
        notes: list[tuple[int, list[tuple[int, Step]]]] = []
        results, lates, cuts = close_inboxes([self._inboxes[ai] for ai in due], now,
                                             lockstep, notes)
        for ai, res, late, (ahead, steps) in zip(due, results, lates, notes, strict=True):
            if late:
                self._m_at[ai].late.inc(late)
            if ahead:
                self._ahead.inc(ahead)
            rt = runtimes[ai]
            if steps:
                self._clock_steps(rt, steps)
            if res is None:  # cut in lockstep
                continue
            if res.error is not None:
                self._failed(rt, "windows", res.error)
                with self._inboxes[ai].lock:  # start afresh on the next samples
                    rt.assembler.reset()
                continue
            n0 = len(pending)
            try:
                if rt.stale_channels and self.judge_stale:
                    self._check_stale(rt, ai, now, out, stats)
                if res.empty_skipped:
                    self._skip(rt, "no_data", res.empty_skipped)
                    rt.empty_streak += res.empty_skipped
                    if not res.windows:
                        self._set_coverage(rt, 0.0)
                for w in res.windows:
                    self._m_at[ai].closed.inc()
                    stats.windows_closed += 1
                    rt.empty_streak = 0
                    self._set_coverage(rt, min(w.coverage, default=1.0))
                    pending.append(self._judge_window(rt, w, out, stats))
            except Exception as exc:
                self._failed(rt, "health", exc)
                del pending[n0:]
        if pending:
            self._score(pending, out, stats)
        for cut in cuts:
            self._score_lockstep(
                [runtimes[due[pos]] for pos, _, _ in cut.items], cut, out, stats)
        failed = self._failed_now
        for ai in due:
            rt = runtimes[ai]
            if not rt.worked:
                rt.worked = True
                self._n_worked += 1
            if rt.cfg.name not in failed and rt.error is not None:
                rt.error = None
                self._n_failing -= 1
                self.metrics.asset_failing.labels(rt.cfg.name).set(0)
                self.log.info(kv("asset works again", asset=rt.cfg.name))
        # Every asset that has had work is failing: the tick failed for everyone.
        self.all_failing = 0 < self._n_worked == self._n_failing
        if out:
            seqs = {runtimes[ai].cfg.name: runtimes[ai].sequence
                    for ai, b in zip(due, seq_before, strict=True)
                    if runtimes[ai].sequence != b}
            if seqs:
                self.sink.submit(out, sequences=seqs)
            else:
                self.sink.submit(out)
            stats.messages = len(out)
        return stats

    # -- sensor health and modes (sequential per asset, before features) ---------------

    def _check_stale(self, rt: AssetRuntime, ai: int, now: float, out: list[OutMessage],
                     stats: TickStats) -> None:
        for ci in rt.stale_channels:
            h = rt.health[ci]
            buf = self.buffers.by_asset[ai][ci]
            if not buf.last_arrival:
                # Never published since start: *waiting*, not stale, for the startup
                # grace (or the channel's own stale_s, if longer); then stale.
                since = now - (rt.started_s if rt.started_s is not None else now)
                if since <= max(self._grace_s, h.limits.stale_s or 0.0):
                    continue
                last = rt.started_s if rt.started_s is not None else now
            else:
                last = buf.last_arrival
            change = h.check_stale(now - last)
            if change is not None:
                self._sensor_event(rt, ci, change, now, f"stale|{last:.3f}", None, out, stats)

    def _check_liveness(self, rt: AssetRuntime, notes: list[tuple[int, str | None, float]],
                        now: float, out: list[OutMessage], stats: TickStats) -> None:
        """Death certificates fault their channels at once (`sensor.fault`, reason
        node_death or device_death); a birth after one lets them recover."""
        for ci, death, t in notes:
            change = rt.health[ci].set_liveness(
                HealthReason(death) if death is not None else None, max(0.0, now - t))
            if change is not None:
                self._sensor_event(rt, ci, change, t, f"{death}|{t:.3f}", None, out, stats)

    def _judge_window(self, rt: AssetRuntime, w: ClosedWindow, out: list[OutMessage],
                      stats: TickStats) -> _Pending:
        if not rt.checked and rt.modes is None:  # nothing to judge but completeness
            return _Pending(rt, w, rt.mode, (), None if w.complete else "incomplete")
        health = rt.health
        for ci in rt.checked:  # passive channels: nothing to judge (decoders let no
            # non-finite sample through), and they can never be faulty
            change = health[ci].check_window(w.values[ci], w.timestamps[ci])
            if change is not None:
                self._sensor_event(rt, ci, change, w.end, f"{w.start:.3f}", w, out, stats)
        faulty = tuple(i for i in rt.checked if health[i].faulty)
        settling = False
        scored = True
        if rt.modes is not None and rt.mode_index_ch is not None:
            d = rt.modes.step(w.values[rt.mode_index_ch], w.start)
            if d.mode != rt.mode:
                self._set_mode(rt, d.mode)
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
        return _Pending(rt, w, rt.mode, faulty, reason)

    def _set_mode(self, rt: AssetRuntime, mode: str) -> None:
        gauge = self.metrics.mode
        gauge.labels(rt.cfg.name, rt.mode).set(0)
        gauge.labels(rt.cfg.name, mode).set(1)
        self.log.info(kv("mode changed", asset=rt.cfg.name, mode=mode, was=rt.mode))
        rt.mode = mode
        if rt.detector.state is State.NORMAL:
            # Windows scored in the old mode must not count toward a raise in the new one.
            rt.detector = Detector(rt.cfg.window_detector)

    def _sensor_event(self, rt: AssetRuntime, ci: int, change: HealthChange, time_s: float,
                      key: str, w: ClosedWindow | None, out: list[OutMessage],
                      stats: TickStats) -> None:
        ch = rt.cfg.channels[ci]
        fault = change.change is Change.FAULT
        self.metrics.sensor_fault.labels(rt.cfg.name, ch.name).set(1 if fault else 0)
        rt.sequence += 1
        data: dict[str, Any] = {
            "asset": rt.cfg.name, "channel": ch.name, "mode": rt.mode,
            "reasons": [r.value for r in change.reasons],
            "detail": {k: _finite(v) for k, v in change.detail.items()},
            "unit": ch.unit, "sequence": rt.sequence}
        if w is not None:
            data["window"] = {"start": rfc3339(w.start), "end": rfc3339(w.end)}
        etype = EventType.SENSOR_FAULT if fault else EventType.SENSOR_RECOVERED
        self._event(rt, etype, self.source.for_asset(rt.cfg.name), time_s, data, out,
                    Kind.EVENT, id_key=f"{ch.name}|{key}")
        stats.events += 1

    # -- features, limits, scoring ------------------------------------------------------

    def _features(self, todo: list[_Pending]) -> list[np.ndarray]:
        """The full feature row of each window (time-domain, then spectral per channel).

        Time-domain features come from one `block_features` pass per segment length over
        the full-length rate-group blocks of every window (the usual case), and one
        `segment_features` pass over the rest.
        """
        t0 = time.perf_counter()
        needed = frozenset().union(*{p.rt.td_needed for p in todo})
        by_len: dict[int, list[np.ndarray]] = {}
        n_by_len: dict[int, int] = {}
        ragged: list[np.ndarray] = []
        whole: dict[int, np.ndarray | None] = {}
        # Per block: (its channels, segment length or -1 for ragged, first row there).
        places: list[tuple[tuple[int, ...], int, int]] = []
        spans: list[tuple[int, int]] = []
        for p in todo:
            first = len(places)
            w = p.w
            if w.blocks:
                for blk in w.blocks:
                    self._place(blk, by_len, n_by_len, ragged, places, whole)
            else:  # a window built from per-channel arrays
                places.append((tuple(range(len(w.values))), -1, len(ragged)))
                ragged.extend(w.values)
            spans.append((first, len(places)))
        feats = {}
        for n, parts in by_len.items():
            base = whole.get(n)
            x = base if base is not None and base.shape[0] == n_by_len[n] else stack_rows(parts)
            feats[n] = block_features(x, needed)
        if ragged:
            feats[-1] = segment_features(ragged)
        spec_segs, spec_rates, spec_cfgs, spec_speeds, spec_at = [], [], [], [], []
        for wi, p in enumerate(todo):
            rt = p.rt
            if not rt.spectral:
                continue
            speed_hz = np.nan
            if rt.speed_index is not None:
                sv = p.w.values[rt.speed_index]
                speed_hz = float(sv.mean()) / 60.0 if sv.size else np.nan
            for ci in rt.spectral:
                ch = rt.cfg.channels[ci]
                assert ch.spectrum is not None
                spec_segs.append(p.w.values[ci])
                spec_rates.append(ch.rate_hz)
                spec_cfgs.append(ch.spectrum)
                spec_speeds.append(speed_hz)
                spec_at.append((wi, ci))
        spec = spectral_features(spec_segs, spec_rates, spec_cfgs, spec_speeds) \
            if spec_segs else []
        by_window: dict[tuple[int, int], np.ndarray] = dict(zip(spec_at, spec, strict=True))
        rows: list[np.ndarray] = []
        for wi, (p, (a, b)) in enumerate(zip(todo, spans, strict=True)):
            n_ch = len(p.rt.cfg.channels)
            if b - a == 1 and not p.rt.spectral:
                chans, n, off = places[a]
                if len(chans) == n_ch:  # one block of every channel in order: a view
                    rows.append(feats[n][off:off + n_ch].reshape(-1))
                    continue
            per_ch: list[np.ndarray] = [np.empty(0)] * n_ch
            for chans, n, off in places[a:b]:
                f = feats[n]
                for r, c in enumerate(chans):
                    per_ch[c] = f[off + r]
            parts = []
            for ci in range(n_ch):
                parts.append(per_ch[ci])
                extra = by_window.get((wi, ci))
                if extra is not None:
                    parts.append(extra)
            rows.append(np.concatenate(parts))
        self.metrics.feature_seconds.observe(time.perf_counter() - t0)
        return rows

    @staticmethod
    def _place(blk: Block, by_len: dict[int, list[np.ndarray]], n_by_len: dict[int, int],
               ragged: list[np.ndarray], places: list[tuple[tuple[int, ...], int, int]],
               whole: dict[int, np.ndarray | None]) -> None:
        if blk.uniform:
            n = blk.values.shape[1]
            off = n_by_len.get(n, 0)
            by_len.setdefault(n, []).append(blk.values)
            n_by_len[n] = off + len(blk.chans)
            places.append((blk.chans, n, off))
            # Still the rows 0..off of one matrix cut for all these blocks, in order?
            base = whole.get(n, blk.base) if off else blk.base
            whole[n] = base if base is not None and base is blk.base and blk.row0 == off \
                else None
        else:
            places.append((blk.chans, -1, len(ragged)))
            ragged.extend(blk.values[r, :k] for r, k in enumerate(blk.counts))

    def _limits(self, p: _Pending, row: np.ndarray, out: list[OutMessage],
                stats: TickStats) -> None:
        rt, w = p.rt, p.w
        name = rt.cfg.name
        for ci, at in rt.velocity_at:
            v = float(row[at])
            if ci not in p.faulty and np.isfinite(v):
                cname = rt.cfg.channels[ci].name
                rt.last_velocity_mm_s[cname] = v
                # Prometheus wants base units: m/s (PITFALLS.md, promtool).
                self.metrics.velocity_rms.labels(name, cname).set(v / 1000.0)
        for ci, at, mon in rt.limits:
            if ci in p.faulty:
                continue  # a faulty sensor's value says nothing about the machine
            value = float(row[at])
            if not np.isfinite(value):
                continue
            rises = mon.step(value)
            ch = rt.cfg.channels[ci]
            if isinstance(mon, ZoneLimits):
                zone = zone_of(value, mon.boundaries)
                self.metrics.vibration_zone.labels(name, ch.name).set(ZONES.index(mon.zone) + 1)
                self.metrics.limit_level.labels(name, mon.feature, "operational").set(
                    ("normal", "alarm", "trip").index(mon.operational))
            else:
                zone = None
                self.metrics.limit_level.labels(name, f"{ch.name}.{mon.cfg.feature}",
                                                "limit").set(_LEVEL_VALUE[mon.level])
            for rise in rises:
                self._limit_event(rt, ch.name, rise, zone, mon, w, out, stats)

    def _limit_event(self, rt: AssetRuntime, channel: str, rise: LimitRise, zone: str | None,
                     mon: FeatureLimits | ZoneLimits, w: ClosedWindow, out: list[OutMessage],
                     stats: TickStats) -> None:
        ch = rt.cfg.channel(channel)
        feature = rise.feature if "." in rise.feature else f"{channel}.{rise.feature}"
        rt.sequence += 1
        data: dict[str, Any] = {
            "asset": rt.cfg.name, "mode": rt.mode, "channel": channel, "feature": feature,
            "kind": rise.kind, "level": rise.level, "limit": rise.threshold,
            "value": round(rise.value, 6),
            "window": {"start": rfc3339(w.start), "end": rfc3339(w.end)},
            "sequence": rt.sequence}
        if isinstance(mon, ZoneLimits):
            iso = mon.cfg
            data.update({
                "unit": "mm/s", "zone": zone, "zone_held": mon.zone,
                "standard": "ISO 10816-3:2009 Annex A",
                "group": iso.group, "support": iso.support.value,
                "boundaries_mm_s": dict(zip(("A/B", "B/C", "C/D"), mon.boundaries,
                                            strict=True)),
                "alarm_mm_s": round(mon.alarm, 4), "trip_mm_s": round(mon.trip, 4),
                "baseline_mm_s": iso.baseline_mm_s})
        else:
            data["unit"] = ch.unit
        key = f"{feature}|{rise.kind}|{rise.level}|{w.start:.3f}"
        self._event(rt, EventType.LIMIT_EXCEEDED, self.source.for_asset(rt.cfg.name), w.end,
                    data, out, Kind.EVENT, id_key=key)
        stats.events += 1

    def _score(self, pending: list[_Pending], out: list[OutMessage], stats: TickStats) -> None:
        """Features, limits, inference and detectors of the general path's windows. Each
        stage runs for all windows at once; when it raises, it runs again asset by asset
        and only the asset that raises fails (`_failed`), the others go on."""
        failed = self._failed_now
        todo = [p for p in pending if p.w.complete]
        row_of = self._rows(todo) if todo else {}
        items: list[tuple[_Pending, np.ndarray, Bundle, np.ndarray]] = []
        for p in pending:
            rt = p.rt
            if rt.cfg.name in failed:
                continue
            try:
                row = row_of.get(id(p))
                if row is not None and (rt.limits or rt.velocity_at):
                    self._limits(p, row, out, stats)
                if p.reason is not None:
                    self._skip(rt, p.reason)
                    continue
                assert row is not None
                if self.observer is not None and (self.observes is None
                                                  or self.observes(rt.cfg.name)):
                    self.observer(rt.cfg.name, p.mode, p.w, row[rt.record_index],
                                  rt.record_names)
                bundle, index = rt.bundle_for(p.mode)
                if bundle is None:
                    self._skip(rt, "no_model")
                    continue
                items.append((p, row, bundle, index))
            except Exception as exc:
                self._failed(rt, "features", exc)
        results = self._scores(items) if items else {}
        # Step detectors in window order, so an asset's windows are judged in time order.
        for p in pending:
            got = results.get(id(p))
            if got is None or p.rt.cfg.name in failed:
                continue
            score, sq, bundle = got
            if not math.isfinite(score):
                self._skip(p.rt, "model_error")
                continue
            try:
                self._step(p.rt, p.w.start, p.w.end, p.mode, bundle, score, sq, out, stats)
            except Exception as exc:
                self._failed(p.rt, "detector", exc)

    def _by_asset(self, todo: Sequence[Any], rt_of: Callable[[Any], AssetRuntime]
                  ) -> dict[int, list[Any]]:
        groups: dict[int, list[Any]] = {}
        for it in todo:
            groups.setdefault(id(rt_of(it)), []).append(it)
        return groups

    def _rows(self, todo: list[_Pending]) -> dict[int, np.ndarray]:
        """`_features` of every window, by `id` of its `_Pending`; contained per asset."""
        try:
            return {id(p): r for p, r in zip(todo, self._features(todo), strict=True)}
        except Exception as exc:
            if len({id(p.rt) for p in todo}) == 1:
                self._failed(todo[0].rt, "features", exc)
                return {}
        rows: dict[int, np.ndarray] = {}
        for part in self._by_asset(todo, lambda p: p.rt).values():
            try:
                rows.update((id(p), r) for p, r in zip(part, self._features(part), strict=True))
            except Exception as exc:
                self._failed(part[0].rt, "features", exc)
        return rows

    def _scores(self, items: list[tuple[_Pending, np.ndarray, Bundle, np.ndarray]]
                ) -> dict[int, tuple[float, np.ndarray, Bundle]]:
        """`_infer`, contained per asset."""
        try:
            return self._infer(items)
        except Exception as exc:
            if len({id(it[0].rt) for it in items}) == 1:
                self._failed(items[0][0].rt, "inference", exc)
                return {}
        results: dict[int, tuple[float, np.ndarray, Bundle]] = {}
        for part in self._by_asset(items, lambda it: it[0].rt).values():
            try:
                results.update(self._infer(part))
            except Exception as exc:
                self._failed(part[0][0].rt, "inference", exc)
        return results

    def _infer(self, items: list[tuple[_Pending, np.ndarray, Bundle, np.ndarray]]
               ) -> dict[int, tuple[float, np.ndarray, Bundle]]:
        """Score every window: standardisation and squared errors for all windows of one
        model width at once, one onnxruntime run per window's model (each asset has its
        own). The arithmetic is `Bundle.score`'s, row by row."""
        t1 = time.perf_counter()
        results: dict[int, tuple[float, np.ndarray, Bundle]] = {}
        by_width: dict[int, list[tuple[_Pending, np.ndarray, Bundle, np.ndarray]]] = {}
        for it in items:
            by_width.setdefault(it[3].size, []).append(it)
        for group in by_width.values():
            # Rows of assets laid out alike share one gather of the model's features.
            by_layout: dict[tuple[int, bytes], list[int]] = {}
            for j, (_, row, _, index) in enumerate(group):
                key = self._layout_keys.get(id(index))
                if key is None or key[0] is not index:
                    key = self._layout_keys[id(index)] = (index, index.tobytes())
                by_layout.setdefault((row.size, key[1]), []).append(j)
            x = np.empty((len(group), group[0][3].size))
            for js in by_layout.values():
                idx = group[js[0]][3]
                x[js] = np.stack([group[j][1] for j in js])[:, idx]
            mean, scale = self._scalers(tuple(b for _, _, b, _ in group))
            z = ((x - mean) / scale).astype(np.float32)
            recon = np.empty_like(z)
            ok = np.ones(len(group), dtype=bool)
            # Models served by a batched group run in one call per group (batched.py);
            # the rest, and any group whose call fails, one by one.
            alone = self._run_batched(group, z, recon) if self._batched.groups \
                else range(len(group))
            if alone:
                self._run_alone(alone, [b for _, _, b, _ in group],
                                [p.rt for p, _, _, _ in group], z, recon, ok)
            err = (z - recon).astype(np.float64) ** 2
            scores = err.mean(axis=1)
            for j, (p, _, b, _) in enumerate(group):
                if ok[j]:
                    results[id(p)] = (float(scores[j]), err[j], b)
        self.metrics.inference_seconds.observe(time.perf_counter() - t1)
        if self._batched_stale:  # after the timing: a rebuild is not this tick's inference
            self._rebuild_batched()
        return results

    def _run_alone(self, alone: Sequence[int], bundles: Sequence[Bundle],
                   rts: Sequence[AssetRuntime], z: np.ndarray, recon: np.ndarray,
                   ok: np.ndarray) -> None:
        """Reconstruct rows `alone` of `z` into `recon`, each by its own model; a model
        that raises fails its rows only: they are marked in `ok` and counted skipped."""
        failed: set[int] = set()
        for j in alone:
            b, rt = bundles[j], rts[j]
            if id(b) in failed:
                ok[j] = False
                self._skip(rt, "model_error")
                continue
            try:
                b.reconstruct_row(z[j], recon[j])
            except Exception as exc:  # a model failing at run time fails its asset only
                failed.add(id(b))
                ok[j] = False
                self.log.error(kv("model failed", asset=rt.cfg.name, error=str(exc)[:200]))
                self._skip(rt, "model_error")

    def _run_batched(self, group: list[tuple[_Pending, np.ndarray, Bundle, np.ndarray]],
                     z: np.ndarray, recon: np.ndarray) -> list[int]:
        """Reconstruct the rows whose models sit in a batched group, one run per group,
        into `recon`; return the positions of the rows left to run one by one."""
        where = self._batched.slot_of
        alone: list[int] = []
        by_group: dict[int, tuple[list[int], list[int]]] = {}
        for j, it in enumerate(group):
            got = where(it[2])
            if got is None:
                alone.append(j)
                if not self._batched.considered(it[2]):  # swapped in since the build
                    self._batched_stale = True
            else:
                js, slots = by_group.setdefault(got[0], ([], []))
                js.append(j)
                slots.append(got[1])
        for gi, (js, slots) in by_group.items():
            try:
                recon[js] = self._batched.groups[gi].run(z[js], np.asarray(slots, np.int64))
            except Exception as exc:  # the models' own runs decide which asset fails
                self.log.error(kv("batched inference failed; running the models one by one",
                                  n=len(js), error=str(exc)[:200]))
                alone.extend(js)
        return alone

    def _rebuild_batched(self) -> None:
        """Group every model the runtimes now hold (after a model swap, at start)."""
        bundles = [b for rt in self.runtimes
                   for b in (rt.asset_bundle, *rt.mode_bundles.values()) if b is not None]
        self._batched = BatchedModels(bundles, self.log)
        self._batched_stale = False
        self._plans.clear()
        if self._batched.n_models:
            self.log.info(kv("batched inference", models=self._batched.n_models,
                             groups=len(self._batched.groups), of=len(bundles)))

    # -- the lockstep path ---------------------------------------------------------------

    def _lockstep_scores(self, rts: list[AssetRuntime], cut: LockstepCut
                        ) -> tuple[list[float], np.ndarray, np.ndarray]:
        """The scores of one lockstep cut's windows (`agent/core/lockstep.py`): the plain
        assets' complete windows, one per asset, rows of one matrix.

        What `_score` would do with these windows, in fewer steps: the feature rows are
        the feature pass's output reshaped (a plain asset's row is its channels'
        time-domain features in channel order), and what standardising and running
        the models needs is planned once per set of models (`_plan`)."""
        t0 = time.perf_counter()
        n = len(rts)
        needed = frozenset().union(*{rt.td_needed for rt in rts})
        rows = block_features(cut.values, needed).reshape(n, cut.n_ch * _NF)
        self.metrics.feature_seconds.observe(time.perf_counter() - t0)
        t1 = time.perf_counter()
        idx = [j for j, rt in enumerate(rts) if rt.asset_bundle is not None]
        if len(idx) < n:
            sel = [rts[j] for j in idx]
            rows = rows[idx]
        else:
            sel = rts
        scores: list[float] = []
        ok = np.ones(len(sel), dtype=bool)
        err = np.empty((0, 0))
        if sel:
            plan = self._plan(sel)
            x = rows[:, plan.index] if plan.index is not None else \
                np.stack([r[i] for r, i in zip(rows, plan.indices, strict=True)])
            z = ((x - plan.mean) / plan.scale).astype(np.float32)
            recon = np.empty_like(z)
            alone = list(plan.alone)
            for gi, pos, slots in plan.runs:
                try:
                    recon[pos] = self._batched.groups[gi].run(z[pos], slots)
                except Exception as exc:  # the models' own runs decide which asset fails
                    self.log.error(kv("batched inference failed; running the models one by "
                                      "one", n=len(slots), error=str(exc)[:200]))
                    alone.extend(np.arange(len(sel))[pos].tolist())
            if alone:
                self._run_alone(sorted(alone), plan.bundles, sel, z, recon, ok)
            err = (z - recon).astype(np.float64) ** 2
            scores = err.mean(axis=1).tolist()
        self.metrics.inference_seconds.observe(time.perf_counter() - t1)
        if self._batched_stale:
            self._rebuild_batched()
        return scores, ok, err

    def _score_lockstep(self, rts: list[AssetRuntime], cut: LockstepCut,
                                  out: list[OutMessage], stats: TickStats) -> None:
        """Score the windows of one lockstep cut (`_lockstep_scores`) and step the
        assets' detectors, contained per asset: when the cut's joint work raises, each
        asset's rows are scored alone and only an asset that raises again fails."""
        try:
            scores, ok, err = self._lockstep_scores(rts, cut)
        except Exception as exc:
            if len(rts) == 1:
                self._m[rts[0].cfg.name].closed.inc()
                stats.windows_closed += 1
                self._failed(rts[0], "features", exc)
                return
            n = cut.n_ch
            for j, (rt, item) in enumerate(zip(rts, cut.items, strict=True)):
                one = LockstepCut([item], cut.values[j * n:(j + 1) * n], n, cut.width)
                self._score_lockstep([rt], one, out, stats)
            return
        k = 0
        m_at = self._m
        expected = rts[0].assembler._expected
        cov = min(1.0, cut.width / expected[0]) if expected and expected[0] else 1.0
        for rt, (_, start, end) in zip(rts, cut.items, strict=True):
            m_at[rt.cfg.name].closed.inc()
            rt.empty_streak = 0
            if cov != rt.shown_coverage:
                self._set_coverage(rt, cov)
            else:
                rt.coverage = cov
            bundle = rt.asset_bundle
            if bundle is None:
                self._skip(rt, "no_model")
                continue
            j = k
            k += 1
            if not ok[j]:
                continue
            score = scores[j]
            if not math.isfinite(score):
                self._skip(rt, "model_error")
                continue
            try:
                self._step(rt, start, end, rt.mode, bundle, score, err[j], out, stats)
            except Exception as exc:
                self._failed(rt, "detector", exc)
        stats.windows_closed += len(rts)

    def _plan(self, rts: list[AssetRuntime]) -> _Plan:
        """How to score one window of each of `rts` (assets with a model) together,
        remembered while their models stay the same."""
        key = tuple([id(rt.model_index) for rt in rts])  # a new model, a new index
        plan = self._plans.get(key)
        if plan is not None:
            return plan
        bundles = [rt.asset_bundle for rt in rts]
        assert all(b is not None for b in bundles)
        bs: list[Bundle] = bundles  # type: ignore[assignment]
        indices = [rt.model_index for rt in rts]
        first = indices[0].tobytes()
        same = all(i.tobytes() == first for i in indices[1:])
        runs: dict[int, tuple[list[int], list[int]]] = {}
        alone: list[int] = []
        for j, b in enumerate(bs):
            got = self._batched.slot_of(b)
            if got is None:
                alone.append(j)
                if not self._batched.considered(b):  # swapped in since the build
                    self._batched_stale = True
            else:
                js, slots = runs.setdefault(got[0], ([], []))
                js.append(j)
                slots.append(got[1])
        plan = _Plan(bs, indices, indices[0] if same else None,
                     np.stack([b.meta.scaler_mean for b in bs]),
                     np.stack([b.meta.scaler_scale for b in bs]),
                     [(gi, slice(None) if len(js) == len(bs) else np.asarray(js, np.int64),
                       np.asarray(slots, np.int64)) for gi, (js, slots) in runs.items()],
                     alone)
        if len(self._plans) > 16:
            self._plans.clear()
        self._plans[key] = plan
        return plan

    def _step(self, rt: AssetRuntime, start: float, end: float, mode: str, bundle: Bundle,
              score: float, sq: np.ndarray, out: list[OutMessage], stats: TickStats) -> None:
        meta = bundle.meta
        name = rt.cfg.name
        m = self._m[name]
        m.scored.inc()
        m.score.set(score)
        if meta.threshold != rt.shown_threshold:
            m.threshold.set(meta.threshold)
            rt.shown_threshold = meta.threshold
        stats.windows_scored += 1
        rt.last_score = score
        rt.last_window_end = end
        rt.sq_history.append(np.array(sq, dtype=np.float64))
        tr = rt.detector.step(score, meta.threshold, meta.clear_threshold)
        end_s = self._time(end)
        model = bundle.model_ref
        if rt.suspects:
            self._suspects_recover(rt, score, meta.clear_threshold, end, out, stats)
        if tr is Transition.RAISED:
            hist = rt.sq_history
            earlier = hist[0] if len(hist) == hist.maxlen else None
            top, share = dominant_channel(meta.feature_names, sq)
            drift = top if top in rt.suspects and share >= ALONE_SHARE else \
                drifting_channel(meta.feature_names, sq, meta.clear_threshold, earlier,
                                 rt.cfg.level_channels)
            if drift is not None:
                # The signature of a drifting sensor, not of the machine: say so once,
                # and do not raise the machine for what that one channel alone explains.
                rt.detector.reset()
                tr = None
                if drift not in rt.suspects:
                    self._suspect_event(rt, drift, True, start, end, score, meta, sq, out)
                    stats.events += 1
                rt.suspects[drift] = 0
        if tr is not None:
            src = self.source.for_asset(name)
            base = {"asset": name, "mode": mode,
                    "window": {"start": self._time(start), "end": end_s},
                    "score": round(score, 6), "threshold": meta.threshold,
                    "score_ratio": _ratio(score, meta.threshold),
                    "clear_threshold": meta.clear_threshold, "model": model}
        # The escalation tracker sees every window's band (the raise rule's evidence);
        # the leading channels are worked out only while raised.
        lead = leading_channels(meta.feature_names, sq) \
            if tr is not None or rt.detector.state is State.ANOMALOUS else frozenset()
        rt.escalation.observe(severity_for(score, meta.threshold), lead)
        if tr is Transition.RAISED:
            rt.sequence += 1
            rt.raised_at = end
            rt.raised_window = (start, end)
            sev = rt.escalation.start(lead)
            data = {**base, "severity": sev.value,
                    "contributors": top_contributors(meta.feature_names, sq),
                    "sequence": rt.sequence}
            self._event(rt, EventType.ANOMALY_RAISED, src, end, data, out, Kind.ANOMALY,
                        id_key=f"{start:.3f}")
            stats.events += 1
        elif tr is None and rt.detector.state is State.ANOMALOUS:
            esc = rt.escalation.step()
            if esc is not None:
                self._escalated(rt, esc, start, end, mode, score, meta, model, sq, out)
                stats.events += 1
        elif tr is Transition.CLEARED:
            rt.sequence += 1
            data = {**base, "peak_score": round(rt.detector.peak_score, 6),
                    "raised_at": rfc3339(rt.raised_at) if rt.raised_at else None,
                    "duration_s": round(end - rt.raised_at, 3) if rt.raised_at else None,
                    "sequence": rt.sequence}
            self._event(rt, EventType.ANOMALY_CLEARED, src, end, data, out, Kind.ANOMALY,
                        id_key=f"{start:.3f}")
            rt.raised_at = None
            rt.escalation.stop()
            stats.events += 1
        state = rt.detector.state  # a StrEnum: it serialises as its value
        anomalous = 1 if state is State.ANOMALOUS else 0
        if anomalous != rt.shown_anomalous:
            m.anomalous.set(anomalous)
            rt.shown_anomalous = anomalous
        state_topic, scores_topic = self._topics(name)
        rounded = round(score, 6)
        doc = {"asset": name, "state": state, "mode": mode, "score": rounded,
               "score_ratio": _ratio(score, meta.threshold),
               "threshold": meta.threshold, "window_end": end_s, "model": model,
               "last_event": rt.last_event}
        out.append(OutMessage(state_topic, _json(doc), Kind.STATE, 1, True, state_topic))
        if self.cfg.publish_scores:
            tel = {"asset": name, "mode": mode, "window_end": end_s, "score": rounded,
                   "threshold": meta.threshold}
            out.append(OutMessage(scores_topic, _json(tel), Kind.SCORE, 0))

    def _scalers(self, bundles: tuple[Bundle, ...]) -> tuple[np.ndarray, np.ndarray]:
        """The bundles' scaler means and scales stacked row by row; the last few stacks
        are remembered (the same assets close windows tick after tick)."""
        got = self._scaler_cache.get(len(bundles))
        if got is None or got[0] != bundles:
            got = (bundles, np.stack([b.meta.scaler_mean for b in bundles]),
                   np.stack([b.meta.scaler_scale for b in bundles]))
            if len(self._scaler_cache) > 16:
                self._scaler_cache.clear()
            self._scaler_cache[len(bundles)] = got
        return got[1], got[2]

    def _suspects_recover(self, rt: AssetRuntime, score: float, clear_threshold: float,
                          end: float, out: list[OutMessage], stats: TickStats) -> None:
        """Suspect channels recover after `clear_m` consecutive normal windows."""
        if score >= clear_threshold:
            for ch in rt.suspects:
                rt.suspects[ch] = 0
            return
        for ch in list(rt.suspects):
            rt.suspects[ch] += 1
            if rt.suspects[ch] >= rt.cfg.detector.clear_m:
                del rt.suspects[ch]
                self._suspect_event(rt, ch, False, end, end, score, None, None, out)
                stats.events += 1

    def _suspect_event(self, rt: AssetRuntime, channel: str, suspect: bool, start: float,
                       end: float, score: float, meta: BundleMeta | None,
                       sq: np.ndarray | None, out: list[OutMessage]) -> None:
        """`sensor.fault` (reason `suspect_drift`) for a channel whose drift alone explains
        the anomaly, `sensor.recovered` when the asset is back to normal."""
        rt.sequence += 1
        unit = next((c.unit for c in rt.cfg.channels if c.name == channel), "")
        data: dict[str, Any] = {"asset": rt.cfg.name, "channel": channel, "mode": rt.mode,
                                "reasons": ["suspect_drift"], "unit": unit,
                                "sequence": rt.sequence,
                                "window": {"start": self._time(start), "end": self._time(end)}}
        if meta is not None and sq is not None:
            data["detail"] = {"score": round(score, 6), "threshold": meta.threshold,
                              "contributors": top_contributors(meta.feature_names, sq)}
        self.metrics.sensor_fault.labels(rt.cfg.name, channel).set(1 if suspect else 0)
        etype = EventType.SENSOR_FAULT if suspect else EventType.SENSOR_RECOVERED
        self._event(rt, etype, self.source.for_asset(rt.cfg.name), end, data, out,
                    Kind.EVENT, id_key=f"{channel}|suspect|{start:.3f}")

    def _escalated(self, rt: AssetRuntime, esc: Escalated, start: float, end: float,
                   mode: str, score: float, meta: BundleMeta, model: dict[str, Any],
                   sq: np.ndarray, out: list[OutMessage]) -> None:
        """`anomaly.escalated`: a raised asset got worse or changed character."""
        rt.sequence += 1
        data = {"asset": rt.cfg.name, "mode": mode,
                "window": {"start": self._time(start), "end": self._time(end)},
                "score": round(score, 6), "threshold": meta.threshold,
                "score_ratio": _ratio(score, meta.threshold),
                "clear_threshold": meta.clear_threshold, "model": model,
                "reason": esc.reason.value, "severity": esc.severity.value,
                "previous_severity": esc.previous_severity.value,
                "channels": sorted(esc.channels),
                "previous_channels": sorted(esc.previous_channels),
                "contributors": top_contributors(meta.feature_names, sq),
                "raised_at": rfc3339(rt.raised_at) if rt.raised_at else None,
                "sequence": rt.sequence}
        self._event(rt, EventType.ANOMALY_ESCALATED, self.source.for_asset(rt.cfg.name), end,
                    data, out, Kind.ANOMALY, id_key=f"{start:.3f}")

    def _topics(self, asset: str) -> tuple[str, str]:
        """The asset's state and scores topics."""
        got = self._topic_cache.get(asset)
        if got is None:
            base = f"{self.prefix}/assets/{asset}"
            got = self._topic_cache[asset] = (f"{base}/state", f"{base}/scores")
        return got

    def _time(self, ts: float) -> str:
        """rfc3339(ts), remembered for the tick: assets' windows share their bounds."""
        got = self._times.get(ts)
        if got is None:
            got = self._times[ts] = rfc3339(ts)
        return got

    def _event(self, rt: AssetRuntime, etype: EventType, src: str, time_s: float,
               data: dict[str, Any], out: list[OutMessage], kind: Kind, *, id_key: str) -> None:
        """Emit one event; its id is a UUIDv5 of source, type and `id_key` (events.py)."""
        ev = make_event(etype, src, rt.cfg.name, time_s, data, id_key=id_key)
        rt.last_event = {"type": ev["type"], "id": ev["id"], "time": ev["time"]}
        self.metrics.events.labels(etype.value).inc()
        self.log.info(kv("event", type=etype.value, asset=rt.cfg.name, id=ev["id"],
                         score=data.get("score"), threshold=data.get("threshold"),
                         channel=data.get("channel"), level=data.get("level")))
        out.append(OutMessage(f"{self.prefix}/assets/{rt.cfg.name}/events", _json(ev), kind,
                              qos=1))

    def status(self) -> dict[str, Any]:
        """Per-asset status for `/status` and `watchkeep status`."""
        assets = []
        for rt in self.runtimes:
            meta = rt.bundle.meta if rt.bundle else None
            serving, _ = rt.bundle_for(rt.mode)
            if serving is not None:
                meta = serving.meta
            limits = {}
            for ci, _at, mon in rt.limits:
                ch = rt.cfg.channels[ci]
                if isinstance(mon, ZoneLimits):
                    limits[mon.feature] = {"zone": mon.zone, "operational": mon.operational}
                else:
                    limits[f"{ch.name}.{mon.cfg.feature}"] = {"level": mon.level}
            assets.append({
                "asset": rt.cfg.name, "mode": rt.mode, "state": rt.state.value,
                "settling": rt.settling,
                "score": rt.last_score, "threshold": meta.threshold if meta else None,
                "last_window_end": rfc3339(rt.last_window_end) if rt.last_window_end else None,
                "last_event": rt.last_event,
                "model": ({"id": meta.model_id, "version": meta.version} if meta else None),
                "model_error": rt.bundle_error,
                "mode_models": {m: b.meta.model_id for m, b in rt.mode_bundles.items()},
                "mode_model_errors": dict(rt.mode_bundle_errors),
                "sensor_faults": {c.name: [r.value for r in h.reasons]
                                  for c, h in zip(rt.cfg.channels, rt.health, strict=True)
                                  if h.faulty},
                "velocity_rms_mm_s": {k: round(v, 4) for k, v in rt.last_velocity_mm_s.items()},
                "limits": limits,
                # Containment (issue 20): the stage and error of the asset's failing work,
                # None while it works; failures in all.
                "error": ({"stage": rt.error[0], "detail": rt.error[1]}
                          if rt.error is not None else None),
                "errors": rt.errors,
                "coverage": None if rt.coverage is None else round(rt.coverage, 4),
                "empty_windows": rt.empty_streak,
            })
        return {"site": self.cfg.site, "gateway": self.cfg.gateway, "assets": assets}


@dataclass(eq=False, slots=True)
class _Plan:
    """How a lockstep cut's rows are scored: per row its model and feature positions
    (`index` when all rows share them), the stacked scalers, the batched runs (group,
    rows, slots) and the rows whose models run alone. Holding the runtimes' index
    arrays keeps their ids, the key it is found by, their own."""

    bundles: list[Bundle]
    indices: list[np.ndarray]
    index: np.ndarray | None
    mean: np.ndarray
    scale: np.ndarray
    runs: list[tuple[int, slice | np.ndarray, np.ndarray]]
    alone: list[int]


@dataclass(eq=False, slots=True)
class _Pending:
    """One closed window on its way through the tick, with what was judged about it."""

    rt: AssetRuntime
    w: ClosedWindow
    mode: str
    faulty: tuple[int, ...]  # channels with a sensor fault at this window
    reason: str | None  # why it is not scored, if it is not


_LEVEL_VALUE = {"normal": 0, "alert": 1, "alarm": 2, "alert_low": 1, "alarm_low": 2}


def _finite(v: float) -> float | None:
    return round(float(v), 6) if np.isfinite(v) else None


def _json(doc: Any) -> bytes:
    # orjson writes the same compact JSON several times faster. Numbers are finite by
    # the time they get here (scores are checked, health details pass `_finite`).
    try:
        return orjson.dumps(doc)
    except TypeError:  # a type orjson does not know (numpy scalars are known)
        return json.dumps(doc, separators=(",", ":"), allow_nan=False).encode()
