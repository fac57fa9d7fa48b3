"""What a tick says: the detector step of each scored window and every message it makes.

`Emitter` is the one place that builds the tick's messages (events, the retained state,
score telemetry) and the one place that gives an asset's events their sequence numbers
(`event`). It keeps the per-tick caches of rfc3339 times and the assets' topics.
"""

from __future__ import annotations

import json
import logging
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
import orjson
from prometheus_client import Counter, Gauge

from agent.config.load import Config
from agent.core.detector import Detector, State
from agent.core.events import EventType, Source, make_event, rfc3339
from agent.core.health import Change, HealthChange
from agent.core.limits import FeatureLimits, LimitRise, ZoneLimits
from agent.core.windows.closed import ClosedWindow
from agent.models.bundle import Bundle
from agent.ops.logs import kv
from agent.ops.metrics import Metrics, PlainSeries
from agent.pipeline.anomaly import AnomalyStep
from agent.pipeline.infer import Scored, SqRow
from agent.pipeline.messages import (
    Kind,
    OutMessage,
    StatePayload,
    dumps_each,
    ratio,
    round_scaled,
)
from agent.pipeline.runtime import AssetRuntime

# Per window of a tick, the scores rounded to 6 digits and then their ratios to the
# thresholds rounded to 3 (NaN: null), and each of those as JSON (`Emitter._numbers`).
_Numbers = tuple[list[float], list[bytes]]
_SCALES = np.array([1e6, 1e3])  # 10**digits of the score, of its ratio

# `OutMessage(...)` given every field, made as the tuple it is (no Python-level
# `__new__`): the quiet window's state message, one per window.
_MESSAGE = tuple.__new__


class ScoredWindow(Protocol):
    """A scored window on its way through the tick: whose, its bounds, its mode."""

    @property
    def rt(self) -> AssetRuntime: ...

    @property
    def w(self) -> ClosedWindow: ...

    @property
    def mode(self) -> str: ...


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
        """The window is scored by `bundle` (not the last window's); the payload made
        for the last one's model and threshold goes."""
        self.bundle = bundle
        self.threshold = bundle.meta.threshold
        self.model = bundle.model_ref
        self.payload = None


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
        # The assets whose sequence number moved since the tick started, with it now.
        self.moved: dict[str, int] = {}
        self._anomaly = AnomalyStep(self)

    def start_tick(self) -> tuple[list[OutMessage], TickStats]:
        """A fresh message list and stats for a tick."""
        self._times.clear()
        self._times_json.clear()
        self.out = []
        self.stats = TickStats()
        self.moved = {}
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
        self.moved[name] = rt.sequence
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

    # -- the detector step of the scored windows --------------------------------------

    def scored(self, wins: Sequence[ScoredWindow], bundles: Sequence[Bundle], got: Scored,
               failed: set[str], on_skip: Callable[[AssetRuntime], None],
               on_error: Callable[[AssetRuntime, Exception], None]) -> None:
        """Count and publish each scored window (`got[j]` by `bundles[j]`), step its
        asset's detector and say what changed, in order (an asset's windows in time
        order). Left out: windows whose model failed, assets in `failed` (`on_error`
        adds to it), non-finite scores (`on_skip`). A quiet window (NORMAL, not above a
        positive threshold, no suspect) changes only its detector's and escalation
        tracker's history; the rest take `AnomalyStep.step` (`_loud`)."""
        score, sqs, ok, out_append = got.score, got.sq, got.ok, self.out.append
        rounded, js = numbers = self._numbers(score, got.threshold)
        get, normal, plain, n = self._slots.get, State.NORMAL, not self.publish_scores, len(js)
        counted, last_end, end_json, retained = 0, math.nan, b"", Kind.STATE  # read once
        for j, p in enumerate(wins):
            rt = p.rt
            if (ok is not None and not ok[j]) or (failed and rt.cfg.name in failed):
                continue
            s = score[j]
            if s - s != 0.0:  # not finite
                on_skip(rt)
                continue
            try:
                slot = get(id(rt))
                if slot is None or slot.rt is not rt or slot.bundle is not bundles[j]:
                    slot = self._serve(rt, bundles[j])
                threshold = slot.threshold
                slot.scored.value += 1.0
                slot.score.value = s
                if threshold != rt.shown_threshold:
                    slot.m.threshold.set(threshold)
                    rt.shown_threshold = threshold
                counted += 1
                rt.last_score = s
                rt.last_window_end = end = p.w.end
                rt.sq_history.append(sqs[j])
                det = rt.detector
                if not (det.state is normal and not s > threshold and threshold > 0
                        and not rt.suspects):
                    self._loud(slot, rt, p, bundles[j], s, sqs[j], numbers, j)
                    continue
                if not det.settled:  # quiet: once settled, `quiet` changes nothing
                    det.quiet()
                if not (esc := rt.escalation).settled:
                    esc.observe_quiet()
                if rt.shown_anomalous != 0:
                    slot.m.anomalous.set(0)
                    rt.shown_anomalous = 0
                tpl = slot.payload
                if not (plain and tpl is not None and tpl.ok and tpl.state is normal
                        and tpl.last_event is rt.last_event and tpl.mode == p.mode):
                    self._state_message(slot, rt, end, p.mode, normal, s, numbers, j)
                    continue
                if end != last_end:  # windows of a tick mostly end together
                    last_end, end_json = end, self.time_json(end)
                out_append(_MESSAGE(OutMessage, (
                    slot.state_topic, tpl.fmt % (js[j], js[n // 2 + j], end_json), retained,
                    1, True, slot.state_topic, slot.name, None, None, rounded[j], threshold)))
            except Exception as exc:
                on_error(rt, exc)
        self.stats.windows_scored += counted

    def _serve(self, rt: AssetRuntime, bundle: Bundle) -> _AssetSlot:
        """The asset's slot (made for a runtime not seen yet), serving `bundle`."""
        slot = self._slots.get(id(rt))
        if slot is None or slot.rt is not rt:
            slot = self._slot(rt)
        if slot.bundle is not bundle:
            slot.serve(bundle)
        return slot

    def _loud(self, slot: _AssetSlot, rt: AssetRuntime, p: ScoredWindow, bundle: Bundle,
              score: float, sq: SqRow, numbers: _Numbers, j: int) -> None:
        """A window that can change something: the detector step and its events, then
        its state message."""
        w = p.w
        self._anomaly.step(rt, w.start, w.end, p.mode, bundle, score, sq[0][sq[1]])
        state = rt.detector.state  # a StrEnum: it serialises as its value
        anomalous = 1 if state is State.ANOMALOUS else 0
        if anomalous != rt.shown_anomalous:
            slot.m.anomalous.set(anomalous)
            rt.shown_anomalous = anomalous
        self._state_message(slot, rt, w.end, p.mode, state, score, numbers, j)

    @staticmethod
    def _numbers(score: list[float], threshold: np.ndarray) -> _Numbers:
        """The windows' scores rounded to 6 digits, then their ratios to the thresholds
        rounded to 3 (NaN, written as null, unless the threshold is positive); and each
        as JSON."""
        n = len(score)
        x = np.asarray(score, dtype=np.float64)
        r = np.divide(x, threshold, out=np.full(n, math.nan), where=threshold > 0)
        rounded = round_scaled(np.concatenate((x, r)), np.repeat(_SCALES, n))
        return rounded, dumps_each(rounded)

    def _state_message(self, slot: _AssetSlot, rt: AssetRuntime, end: float, mode: str,
                       state: State, score: float, numbers: _Numbers, j: int) -> None:
        """The retained state message of a scored window (and its score telemetry)."""
        threshold = slot.threshold
        rounded = numbers[0][j]
        tpl = slot.payload
        last_event = rt.last_event
        # `serve` drops the payload: the model and threshold it was made for still serve.
        if tpl is None or tpl.state is not state or tpl.last_event is not last_event or (
                tpl.mode is not mode and tpl.mode != mode):
            tpl = slot.payload = StatePayload(slot.name, state, mode, threshold, slot.model,
                                              last_event)
        if tpl.ok:
            js = numbers[1]
            payload = tpl.render(js[j], js[j + len(js) // 2], self.time_json(end))
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

def reset_detector(rt: AssetRuntime) -> None:
    """Windows scored in an old mode must not count toward a raise in the new one."""
    if rt.detector.state is State.NORMAL:
        rt.detector = Detector(rt.cfg.window_detector)
