"""What a tick says: the detector step of each scored window and every message it makes.

`Emitter` is the one place that builds the tick's messages (events, the retained state,
score telemetry) and the one place that gives an asset's events their sequence numbers
(`event`). It keeps the per-tick caches of rfc3339 times and the assets' topics.
"""

from __future__ import annotations

import json
import logging
from dataclasses import dataclass
from typing import Any

import numpy as np
import orjson
from prometheus_client import Counter, Gauge

from agent.config.load import Config
from agent.core.detector import Detector, State, Transition
from agent.core.escalation import Escalated, leading_channels
from agent.core.events import EventType, Source, make_event, rfc3339, severity_for, top_contributors
from agent.core.health import Change, HealthChange
from agent.core.limits import FeatureLimits, LimitRise, ZoneLimits
from agent.core.suspect import ALONE_SHARE, dominant_channel, drifting_channel
from agent.core.windows.closed import ClosedWindow
from agent.models.bundle import Bundle, BundleMeta
from agent.ops.logs import kv
from agent.ops.metrics import Metrics, PlainSeries
from agent.pipeline.messages import Kind, OutMessage, StatePayload, round_to
from agent.pipeline.runtime import AssetRuntime


@dataclass
class TickStats:
    windows_closed: int = 0
    windows_scored: int = 0
    messages: int = 0
    events: int = 0


@dataclass(frozen=True)
class AssetMetrics:
    """One asset's metric children, looked up once (`labels()` is not free per window)."""

    closed: PlainSeries
    scored: PlainSeries
    late: Counter
    score: PlainSeries
    threshold: Gauge
    anomalous: Gauge

    @classmethod
    def of(cls, m: Metrics, asset: str) -> AssetMetrics:
        return cls(m.windows_closed.labels(asset), m.windows_scored.labels(asset),
                   m.late_samples.labels(asset), m.score.labels(asset),
                   m.threshold.labels(asset), m.anomalous.labels(asset))


def ratio(score: float, threshold: float) -> float | None:
    """The score relative to the threshold, as people read it (1.0 = at the threshold)."""
    return round(score / threshold, 3) if threshold > 0 else None


def finite(v: float) -> float | None:
    return round(float(v), 6) if np.isfinite(v) else None


def to_json(doc: Any) -> bytes:
    # orjson writes the same compact JSON several times faster. Numbers are finite by
    # the time they get here (scores are checked, health details pass `finite`).
    try:
        return orjson.dumps(doc)
    except TypeError:  # a type orjson does not know (numpy scalars are known)
        return json.dumps(doc, separators=(",", ":"), allow_nan=False).encode()


class _AssetSlot:
    """What `step` reads of one asset, in one place (a window touches few objects): its
    name, metric children and topics, what it reads of the bundle serving it (a
    bundle's meta is fixed), and the last state payload rendered."""

    __slots__ = ("bundle", "m", "model", "name", "payload", "rt", "score", "scored",
                 "scores_topic", "state_topic", "threshold")

    def __init__(self, rt: AssetRuntime, name: str, m: AssetMetrics, state_topic: str,
                 scores_topic: str) -> None:
        self.rt = rt
        self.name = name
        self.m = m
        self.scored = m.scored
        self.score = m.score
        self.state_topic = state_topic
        self.scores_topic = scores_topic
        self.bundle: Bundle | None = None
        self.threshold = 0.0
        self.model: dict[str, Any] = {}
        self.payload: StatePayload | None = None

    def serve(self, bundle: Bundle) -> None:
        """The window is scored by `bundle` (not the last window's)."""
        self.bundle = bundle
        self.threshold = bundle.meta.threshold
        self.model = bundle.model_ref


class Emitter:
    """Builds the tick's messages into `out`; counts events into `stats`."""

    def __init__(self, cfg: Config, metrics: Metrics, logger: logging.Logger,
                 asset_metrics: dict[str, AssetMetrics]) -> None:
        self.metrics = metrics
        self.log = logger
        self.source = Source(cfg.site, cfg.gateway)
        self.prefix = cfg.topic_prefix
        self.publish_scores = cfg.publish_scores
        self._m = asset_metrics
        self._times: dict[float, str] = {}
        self._times_json: dict[float, bytes] = {}
        # Per runtime (by id; the slot holds it): what `step` reads of an asset.
        self._slots: dict[int, _AssetSlot] = {}
        self._slot_ids: dict[str, int] = {}
        self._topic_cache: dict[str, tuple[str, str, str]] = {}
        self.out: list[OutMessage] = []
        self.stats = TickStats()

    def start_tick(self) -> tuple[list[OutMessage], TickStats]:
        """A fresh message list and stats for a tick."""
        self._times.clear()
        self._times_json.clear()
        self.out = []
        self.stats = TickStats()
        return self.out, self.stats

    def time(self, ts: float) -> str:
        """rfc3339(ts), remembered for the tick: assets' windows share their bounds."""
        got = self._times.get(ts)
        if got is None:
            got = self._times[ts] = rfc3339(ts)
        return got

    def time_json(self, ts: float) -> bytes:
        """`time(ts)` as JSON, remembered for the tick."""
        got = self._times_json.get(ts)
        if got is None:
            got = self._times_json[ts] = orjson.dumps(self.time(ts))
        return got

    def topics(self, asset: str) -> tuple[str, str, str]:
        """The asset's state, scores and events topics."""
        got = self._topic_cache.get(asset)
        if got is None:
            base = f"{self.prefix}/assets/{asset}"
            got = self._topic_cache[asset] = (f"{base}/state", f"{base}/scores",
                                              f"{base}/events")
        return got

    def event(self, rt: AssetRuntime, etype: EventType, time_s: float, data: dict[str, Any],
              kind: Kind, *, id_key: str) -> None:
        """Emit one event of the tick (`message`), logged."""
        msg = self.message(rt, etype, time_s, data, kind, id_key=id_key)
        self.log.info(kv("event", type=etype.value, asset=rt.cfg.name, id=msg.event_id,
                         score=data.get("score"), threshold=data.get("threshold"),
                         channel=data.get("channel"), level=data.get("level")))
        self.out.append(msg)
        self.stats.events += 1

    def message(self, rt: AssetRuntime, etype: EventType, time_s: float, data: dict[str, Any],
                kind: Kind, *, id_key: str) -> OutMessage:
        """One event as a message: the one place an asset's sequence number moves (`data`
        keeps a `sequence` key where the payload shows it; re-learning's events come
        through here too, agent/pipeline/control.py). Its id is a UUIDv5 of source, type
        and `id_key` (events.py)."""
        rt.sequence += 1
        data["sequence"] = rt.sequence
        name = rt.cfg.name
        ev = make_event(etype, self.source.for_asset(name), name, time_s, data, id_key=id_key)
        rt.last_event = {"type": ev["type"], "id": ev["id"], "time": ev["time"]}
        self.metrics.events.labels(etype.value).inc()
        anomaly = kind is Kind.ANOMALY
        return OutMessage(self.topics(name)[2], to_json(ev), kind, qos=1, asset=name,
                          event=etype, event_id=ev["id"],
                          score=data.get("score") if anomaly else None,
                          threshold=data.get("threshold") if anomaly else None)

    # -- sensor health and limits ------------------------------------------------------

    def sensor_event(self, rt: AssetRuntime, ci: int, change: HealthChange, time_s: float,
                     key: str, w: ClosedWindow | None) -> None:
        ch = rt.cfg.channels[ci]
        fault = change.change is Change.FAULT
        self.metrics.sensor_fault.labels(rt.cfg.name, ch.name).set(1 if fault else 0)
        data: dict[str, Any] = {
            "asset": rt.cfg.name, "channel": ch.name, "mode": rt.mode,
            "reasons": [r.value for r in change.reasons],
            "detail": {k: finite(v) for k, v in change.detail.items()},
            "unit": ch.unit, "sequence": None}
        if w is not None:
            data["window"] = {"start": rfc3339(w.start), "end": rfc3339(w.end)}
        etype = EventType.SENSOR_FAULT if fault else EventType.SENSOR_RECOVERED
        self.event(rt, etype, time_s, data, Kind.EVENT, id_key=f"{ch.name}|{key}")

    def limit_event(self, rt: AssetRuntime, channel: str, rise: LimitRise, zone: str | None,
                    mon: FeatureLimits | ZoneLimits, w: ClosedWindow) -> None:
        ch = rt.cfg.channel(channel)
        feature = rise.feature if "." in rise.feature else f"{channel}.{rise.feature}"
        data: dict[str, Any] = {
            "asset": rt.cfg.name, "mode": rt.mode, "channel": channel, "feature": feature,
            "kind": rise.kind, "level": rise.level, "limit": rise.threshold,
            "value": round(rise.value, 6),
            "window": {"start": rfc3339(w.start), "end": rfc3339(w.end)},
            "sequence": None}
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
        self.event(rt, EventType.LIMIT_EXCEEDED, w.end, data, Kind.EVENT, id_key=key)

    # -- the detector step of a scored window ------------------------------------------

    def step(self, rt: AssetRuntime, start: float, end: float, mode: str, bundle: Bundle,
             score: float, sq: np.ndarray) -> None:
        """Count and publish one scored window, step the asset's detector and say what
        changed (raised, escalated, cleared; a drifting sensor instead of a raise)."""
        slot = self._slots.get(id(rt))
        if slot is None or slot.rt is not rt:
            slot = self._slot(rt)
        if slot.bundle is not bundle:
            slot.serve(bundle)
        threshold = slot.threshold
        slot.scored.inc()
        slot.score.set(score)
        if threshold != rt.shown_threshold:
            slot.m.threshold.set(threshold)
            rt.shown_threshold = threshold
        self.stats.windows_scored += 1
        rt.last_score = score
        rt.last_window_end = end
        rt.sq_history.append(sq)
        det = rt.detector
        if det.state is State.NORMAL and not score > threshold and threshold > 0 \
                and not rt.suspects:
            # The usual window: nothing can change. The detector cannot raise on a
            # window not above the threshold, no suspect waits to recover, and the
            # window's severity band is the lowest (its score is under the threshold).
            det.quiet()
            rt.escalation.observe_quiet()
            state = State.NORMAL
        else:
            self._detect(rt, start, end, mode, bundle, score, sq)
            state = rt.detector.state  # a StrEnum: it serialises as its value
        anomalous = 1 if state is State.ANOMALOUS else 0
        if anomalous != rt.shown_anomalous:
            slot.m.anomalous.set(anomalous)
            rt.shown_anomalous = anomalous
        self._state_message(slot, rt, end, mode, state, score)

    def _state_message(self, slot: _AssetSlot, rt: AssetRuntime, end: float, mode: str,
                       state: State, score: float) -> None:
        """The retained state message of a scored window (and its score telemetry)."""
        threshold = slot.threshold
        rounded = round_to(score, 6)
        tpl = slot.payload
        last_event = rt.last_event
        if tpl is None or not tpl.fits(state, mode, threshold, slot.model, last_event):
            tpl = slot.payload = StatePayload(slot.name, state, mode, threshold, slot.model,
                                              last_event)
        if tpl.ok:
            payload = tpl.render(
                orjson.dumps(rounded),
                orjson.dumps(round_to(score / threshold, 3)) if threshold > 0 else b"null",
                self.time_json(end))
        else:
            payload = to_json({"asset": slot.name, "state": state, "mode": mode,
                               "score": rounded, "score_ratio": ratio(score, threshold),
                               "threshold": threshold, "window_end": self.time(end),
                               "model": slot.model, "last_event": last_event})
        topic = slot.state_topic
        self.out.append(OutMessage(topic, payload, Kind.STATE, 1, True, topic, slot.name,
                                   None, None, rounded, threshold))
        if self.publish_scores:
            tel = {"asset": slot.name, "mode": mode, "window_end": self.time(end),
                   "score": rounded, "threshold": threshold}
            self.out.append(OutMessage(slot.scores_topic, to_json(tel), Kind.SCORE, 0))

    def _slot(self, rt: AssetRuntime) -> _AssetSlot:
        name = rt.cfg.name
        old = self._slot_ids.get(name)
        if old is not None:  # a runtime replaced under the same name: let the old go
            self._slots.pop(old, None)
        state_topic, scores_topic, _ = self.topics(name)
        slot = self._slots[id(rt)] = _AssetSlot(rt, name, self._m[name], state_topic,
                                                scores_topic)
        self._slot_ids[name] = id(rt)
        return slot

    def _detect(self, rt: AssetRuntime, start: float, end: float, mode: str, bundle: Bundle,
                score: float, sq: np.ndarray) -> None:
        """The detector step of a window that can change something, and its events."""
        meta = bundle.meta
        tr = rt.detector.step(score, meta.threshold, meta.clear_threshold)
        if rt.suspects:
            self._suspects_recover(rt, score, meta.clear_threshold, end)
        if tr is Transition.RAISED and self._drifting(rt, start, end, score, meta, sq):
            tr = None
        state = rt.detector.state
        # The escalation tracker sees every window's band (the raise rule's evidence);
        # the leading channels are worked out only while raised.
        lead = leading_channels(meta.feature_names, sq) \
            if tr is not None or state is State.ANOMALOUS else frozenset()
        rt.escalation.observe(severity_for(score, meta.threshold), lead)
        if tr is not None:
            self._transition(rt, tr, start, end, mode, bundle, score, sq, lead)
        elif state is State.ANOMALOUS:
            esc = rt.escalation.step()
            if esc is not None:
                self._escalated(rt, esc, start, end, mode, score, meta, bundle.model_ref, sq)

    def _drifting(self, rt: AssetRuntime, start: float, end: float, score: float,
                  meta: BundleMeta, sq: np.ndarray) -> bool:
        """A raise that one drifting channel alone explains: the signature of a sensor,
        not of the machine. Say so once, and do not raise the machine for it."""
        hist = rt.sq_history
        earlier = hist[0] if len(hist) == hist.maxlen else None
        top, share = dominant_channel(meta.feature_names, sq)
        drift = top if top in rt.suspects and share >= ALONE_SHARE else \
            drifting_channel(meta.feature_names, sq, meta.clear_threshold, earlier,
                             rt.cfg.level_channels)
        if drift is None:
            return False
        rt.detector.reset()
        if drift not in rt.suspects:
            self._suspect_event(rt, drift, True, start, end, score, meta, sq)
        rt.suspects[drift] = 0
        return True

    def _transition(self, rt: AssetRuntime, tr: Transition, start: float, end: float,
                    mode: str, bundle: Bundle, score: float, sq: np.ndarray,
                    lead: frozenset[str]) -> None:
        meta = bundle.meta
        base = {"asset": rt.cfg.name, "mode": mode,
                "window": {"start": self.time(start), "end": self.time(end)},
                "score": round(score, 6), "threshold": meta.threshold,
                "score_ratio": ratio(score, meta.threshold),
                "clear_threshold": meta.clear_threshold, "model": bundle.model_ref}
        if tr is Transition.RAISED:
            rt.raised_at = end
            rt.raised_window = (start, end)
            sev = rt.escalation.start(lead)
            data = {**base, "severity": sev.value,
                    "contributors": top_contributors(meta.feature_names, sq),
                    "sequence": None}
            self.event(rt, EventType.ANOMALY_RAISED, end, data, Kind.ANOMALY,
                       id_key=f"{start:.3f}")
        elif tr is Transition.CLEARED:
            data = {**base, "peak_score": round(rt.detector.peak_score, 6),
                    "raised_at": rfc3339(rt.raised_at) if rt.raised_at else None,
                    "duration_s": round(end - rt.raised_at, 3) if rt.raised_at else None,
                    "sequence": None}
            self.event(rt, EventType.ANOMALY_CLEARED, end, data, Kind.ANOMALY,
                       id_key=f"{start:.3f}")
            rt.raised_at = None
            rt.escalation.stop()

    def _suspects_recover(self, rt: AssetRuntime, score: float, clear_threshold: float,
                          end: float) -> None:
        """Suspect channels recover after `clear_m` consecutive normal windows."""
        if score >= clear_threshold:
            for ch in rt.suspects:
                rt.suspects[ch] = 0
            return
        for ch in list(rt.suspects):
            rt.suspects[ch] += 1
            if rt.suspects[ch] >= rt.cfg.detector.clear_m:
                del rt.suspects[ch]
                self._suspect_event(rt, ch, False, end, end, score, None, None)

    def _suspect_event(self, rt: AssetRuntime, channel: str, suspect: bool, start: float,
                       end: float, score: float, meta: BundleMeta | None,
                       sq: np.ndarray | None) -> None:
        """`sensor.fault` (reason `suspect_drift`) for a channel whose drift alone explains
        the anomaly, `sensor.recovered` when the asset is back to normal."""
        unit = next((c.unit for c in rt.cfg.channels if c.name == channel), "")
        data: dict[str, Any] = {"asset": rt.cfg.name, "channel": channel, "mode": rt.mode,
                                "reasons": ["suspect_drift"], "unit": unit,
                                "sequence": None,
                                "window": {"start": self.time(start), "end": self.time(end)}}
        if meta is not None and sq is not None:
            data["detail"] = {"score": round(score, 6), "threshold": meta.threshold,
                              "contributors": top_contributors(meta.feature_names, sq)}
        self.metrics.sensor_fault.labels(rt.cfg.name, channel).set(1 if suspect else 0)
        etype = EventType.SENSOR_FAULT if suspect else EventType.SENSOR_RECOVERED
        self.event(rt, etype, end, data, Kind.EVENT, id_key=f"{channel}|suspect|{start:.3f}")

    def _escalated(self, rt: AssetRuntime, esc: Escalated, start: float, end: float,
                   mode: str, score: float, meta: BundleMeta, model: dict[str, Any],
                   sq: np.ndarray) -> None:
        """`anomaly.escalated`: a raised asset got worse or changed character."""
        data = {"asset": rt.cfg.name, "mode": mode,
                "window": {"start": self.time(start), "end": self.time(end)},
                "score": round(score, 6), "threshold": meta.threshold,
                "score_ratio": ratio(score, meta.threshold),
                "clear_threshold": meta.clear_threshold, "model": model,
                "reason": esc.reason.value, "severity": esc.severity.value,
                "previous_severity": esc.previous_severity.value,
                "channels": sorted(esc.channels),
                "previous_channels": sorted(esc.previous_channels),
                "contributors": top_contributors(meta.feature_names, sq),
                "raised_at": rfc3339(rt.raised_at) if rt.raised_at else None,
                "sequence": None}
        self.event(rt, EventType.ANOMALY_ESCALATED, end, data, Kind.ANOMALY,
                   id_key=f"{start:.3f}")


def reset_detector(rt: AssetRuntime) -> None:
    """Windows scored in an old mode must not count toward a raise in the new one."""
    if rt.detector.state is State.NORMAL:
        rt.detector = Detector(rt.cfg.window_detector)
