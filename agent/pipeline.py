"""One pipeline tick: close windows -> features -> batched inference -> detectors -> sink.

`Pipeline.tick(now)` does all the work of a tick and touches no clock, socket or
file itself: samples come from the ingest buffers, messages go to the injected
sink (the outbox) in one batch per tick. The loop that calls it lives in the
daemon.
"""

from __future__ import annotations

import json
import logging
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from agent.bundle import Bundle
from agent.config import FEATURES, AssetConfig, Config
from agent.core.detector import Detector, State, Transition
from agent.core.events import EventType, Source, make_event, rfc3339, severity_for, top_contributors
from agent.core.features import FEATURE_INDEX, segment_features
from agent.core.windows import ClosedWindow, WindowAssembler
from agent.ingest import Buffers
from agent.logs import kv
from agent.messages import Kind, OutMessage
from agent.metrics import Metrics

DEFAULT_MODE = "default"
_NF = len(FEATURES)


class Sink(Protocol):
    """Takes one tick's messages; `sequences` are the assets' event sequence numbers
    after the tick (only those that changed), stored with the messages."""

    def submit(self, msgs: Sequence[OutMessage],
               sequences: Mapping[str, int] | None = None) -> None: ...


WindowObserver = Callable[[str, str, ClosedWindow, np.ndarray, tuple[str, ...]], None]


def asset_feature_names(asset: AssetConfig) -> tuple[str, ...]:
    """Every feature the asset's config asks for, `<channel>.<feature>`, in config order."""
    return tuple(f"{ch.name}.{f}" for ch in asset.channels for f in ch.features)


def _full_index(asset: AssetConfig, names: Sequence[str]) -> np.ndarray:
    """Positions of `names` in the asset's [channels x FEATURES] feature block."""
    chan_pos = {ch.name: i for i, ch in enumerate(asset.channels)}
    idx = []
    for n in names:
        c, _, f = n.rpartition(".")
        idx.append(chan_pos[c] * _NF + FEATURE_INDEX[f])
    return np.asarray(idx, dtype=np.int64)


def check_bundle_fits(asset: AssetConfig, bundle: Bundle) -> str | None:
    """Why a bundle cannot serve an asset (feature names it cannot compute), or None."""
    have = set(asset_feature_names(asset))
    missing = [n for n in bundle.meta.feature_names if n not in have]
    if missing:
        shown = ", ".join(missing[:5]) + (" ..." if len(missing) > 5 else "")
        return (f"the model needs features this asset's config does not compute: {shown} "
                f"(add them to the channels' `features`)")
    return None


@dataclass
class AssetRuntime:
    """Everything the pipeline keeps for one asset between ticks."""

    cfg: AssetConfig
    assembler: WindowAssembler
    detector: Detector
    bundle: Bundle | None = None
    bundle_error: str | None = None
    model_index: np.ndarray = field(default_factory=lambda: np.empty(0, np.int64))
    record_index: np.ndarray = field(default_factory=lambda: np.empty(0, np.int64))
    mode: str = DEFAULT_MODE
    sequence: int = 0
    last_score: float | None = None
    last_window_end: float | None = None
    last_event: dict[str, Any] | None = None
    raised_at: float | None = None
    raised_window: tuple[float, float] | None = None

    @classmethod
    def build(cls, cfg: AssetConfig, bundle: Bundle | None, bundle_error: str | None
              ) -> AssetRuntime:
        rt = cls(cfg=cfg,
                 assembler=WindowAssembler(cfg.window, tuple(c.rate_hz for c in cfg.channels)),
                 detector=Detector(cfg.detector))
        rt.record_index = _full_index(cfg, asset_feature_names(cfg))
        rt.set_bundle(bundle, bundle_error)
        return rt

    def set_bundle(self, bundle: Bundle | None, error: str | None) -> None:
        if bundle is not None and error is None:
            error = check_bundle_fits(self.cfg, bundle)
        if error is not None:
            bundle = None
        self.bundle = bundle
        self.bundle_error = error
        self.model_index = (_full_index(self.cfg, bundle.meta.feature_names)
                            if bundle is not None else np.empty(0, np.int64))
        self.detector.reset()
        self.raised_at = None

    @property
    def state(self) -> State:
        return self.detector.state


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
                 observer: WindowObserver | None = None) -> None:
        self.cfg = cfg
        self.buffers = buffers
        self.sink = sink
        self.metrics = metrics
        self.log = logger
        self.runtimes = runtimes
        self.observer = observer
        self.source = Source(cfg.site, cfg.gateway)
        self.prefix = cfg.topic_prefix
        m = metrics
        self._m = {rt.cfg.name: {
            "closed": m.windows_closed.labels(rt.cfg.name),
            "scored": m.windows_scored.labels(rt.cfg.name),
            "late": m.late_samples.labels(rt.cfg.name),
            "score": m.score.labels(rt.cfg.name),
            "threshold": m.threshold.labels(rt.cfg.name),
            "anomalous": m.anomalous.labels(rt.cfg.name),
        } for rt in runtimes}
        for rt in runtimes:
            self._publish_model_gauges(rt)

    def _publish_model_gauges(self, rt: AssetRuntime) -> None:
        self.metrics.model_loaded.labels(rt.cfg.name).set(1 if rt.bundle else 0)
        if rt.bundle is not None:
            self._m[rt.cfg.name]["threshold"].set(rt.bundle.meta.threshold)

    def _skip(self, rt: AssetRuntime, reason: str, n: int = 1) -> None:
        if n:
            self.metrics.windows_skipped.labels(rt.cfg.name, reason).inc(n)

    def tick(self, now: float) -> TickStats:
        """Run one tick at wall-clock time `now` (seconds)."""
        stats = TickStats()
        seq_before = [rt.sequence for rt in self.runtimes]
        pending: list[tuple[AssetRuntime, ClosedWindow]] = []
        for ai, rt in enumerate(self.runtimes):
            asm = rt.assembler
            late = 0
            for ci, buf in enumerate(self.buffers.by_asset[ai]):
                got = buf.take()
                if got is not None:
                    late += asm.add(ci, got[0], got[1], buf.last_arrival)
            if late:
                self._m[rt.cfg.name]["late"].inc(late)
            res = asm.close_due(now)
            self._skip(rt, "no_data", res.empty_skipped)
            for w in res.windows:
                self._m[rt.cfg.name]["closed"].inc()
                stats.windows_closed += 1
                if not w.complete:
                    self._skip(rt, "incomplete")
                elif rt.bundle is None and self.observer is None:
                    self._skip(rt, "no_model")
                else:
                    pending.append((rt, w))
        out: list[OutMessage] = []
        if pending:
            self._score(pending, out, stats)
        if out:
            seqs = {rt.cfg.name: rt.sequence for rt, b in zip(self.runtimes, seq_before,
                                                              strict=True) if rt.sequence != b}
            if seqs:
                self.sink.submit(out, sequences=seqs)
            else:
                self.sink.submit(out)
            stats.messages = len(out)
        return stats

    def _score(self, pending: list[tuple[AssetRuntime, ClosedWindow]], out: list[OutMessage],
               stats: TickStats) -> None:
        t0 = time.perf_counter()
        segments = [seg for _, w in pending for seg in w.values]
        feats = segment_features(segments)
        rows: list[np.ndarray] = []
        pos = 0
        for rt, _w in pending:
            n = len(rt.cfg.channels)
            rows.append(feats[pos:pos + n].reshape(-1))
            pos += n
        self.metrics.feature_seconds.observe(time.perf_counter() - t0)
        by_model: dict[int, list[int]] = {}
        for i, (rt, w) in enumerate(pending):
            if self.observer is not None:
                self.observer(rt.cfg.name, rt.mode, w, rows[i][rt.record_index],
                              _names(rt))
            if rt.bundle is None:
                self._skip(rt, "no_model")
                continue
            by_model.setdefault(id(rt.bundle), []).append(i)
        results: dict[int, tuple[float, np.ndarray]] = {}
        for idxs in by_model.values():
            rt0 = pending[idxs[0]][0]
            assert rt0.bundle is not None
            x = np.stack([rows[i][pending[i][0].model_index] for i in idxs])
            t1 = time.perf_counter()
            try:
                scores, sq = rt0.bundle.score(x)
            except Exception as exc:  # a model failing at run time fails its asset only
                self.log.error(kv("model failed", asset=rt0.cfg.name, error=str(exc)[:200]))
                for i in idxs:
                    self._skip(pending[i][0], "model_error")
                continue
            self.metrics.inference_seconds.observe(time.perf_counter() - t1)
            for j, i in enumerate(idxs):
                results[i] = (float(scores[j]), sq[j])
        for i, (rt, w) in enumerate(pending):
            if i not in results:
                continue
            score, sq = results[i]
            if not np.isfinite(score):
                self._skip(rt, "model_error")
                continue
            self._step(rt, w, score, sq, out, stats)

    def _step(self, rt: AssetRuntime, w: ClosedWindow, score: float, sq: np.ndarray,
              out: list[OutMessage], stats: TickStats) -> None:
        assert rt.bundle is not None
        meta = rt.bundle.meta
        m = self._m[rt.cfg.name]
        m["scored"].inc()
        m["score"].set(score)
        stats.windows_scored += 1
        rt.last_score = score
        rt.last_window_end = w.end
        tr = rt.detector.step(score, meta.threshold, meta.clear_threshold)
        name = rt.cfg.name
        src = self.source.for_asset(name)
        base = {"asset": name, "mode": rt.mode,
                "window": {"start": rfc3339(w.start), "end": rfc3339(w.end)},
                "score": round(score, 6), "threshold": meta.threshold,
                "clear_threshold": meta.clear_threshold,
                "model": {"id": meta.model_id, "version": meta.version}}
        if tr is Transition.RAISED:
            rt.sequence += 1
            rt.raised_at = w.end
            rt.raised_window = (w.start, w.end)
            data = {**base, "severity": severity_for(score, meta.threshold).value,
                    "contributors": top_contributors(meta.feature_names, sq),
                    "sequence": rt.sequence}
            self._event(rt, EventType.ANOMALY_RAISED, src, w, data, out, Kind.ANOMALY)
            stats.events += 1
        elif tr is Transition.CLEARED:
            rt.sequence += 1
            data = {**base, "peak_score": round(rt.detector.peak_score, 6),
                    "raised_at": rfc3339(rt.raised_at) if rt.raised_at else None,
                    "duration_s": round(w.end - rt.raised_at, 3) if rt.raised_at else None,
                    "sequence": rt.sequence}
            self._event(rt, EventType.ANOMALY_CLEARED, src, w, data, out, Kind.ANOMALY)
            rt.raised_at = None
            stats.events += 1
        m["anomalous"].set(1 if rt.state is State.ANOMALOUS else 0)
        state_topic = f"{self.prefix}/assets/{name}/state"
        state = {"asset": name, "state": rt.state.value, "mode": rt.mode,
                 "score": round(score, 6), "threshold": meta.threshold,
                 "window_end": rfc3339(w.end),
                 "model": {"id": meta.model_id, "version": meta.version},
                 "last_event": rt.last_event}
        out.append(OutMessage(state_topic, _json(state), Kind.STATE, qos=1, retain=True,
                              key=state_topic))
        if self.cfg.publish_scores:
            tel = {"asset": name, "mode": rt.mode, "window_end": rfc3339(w.end),
                   "score": round(score, 6), "threshold": meta.threshold}
            out.append(OutMessage(f"{self.prefix}/assets/{name}/scores", _json(tel),
                                  Kind.SCORE, qos=0))

    def _event(self, rt: AssetRuntime, etype: EventType, src: str, w: ClosedWindow,
               data: dict[str, Any], out: list[OutMessage], kind: Kind) -> None:
        ev = make_event(etype, src, rt.cfg.name, w.end, data, id_key=f"{w.start:.3f}")
        rt.last_event = {"type": ev["type"], "id": ev["id"], "time": ev["time"]}
        self.metrics.events.labels(etype.value).inc()
        self.log.info(kv("event", type=etype.value, asset=rt.cfg.name, id=ev["id"],
                         score=data.get("score"), threshold=data.get("threshold")))
        out.append(OutMessage(f"{self.prefix}/assets/{rt.cfg.name}/events", _json(ev), kind,
                              qos=1))

    def status(self) -> dict[str, Any]:
        """Per-asset status for `/status` and `watchkeep status`."""
        assets = []
        for rt in self.runtimes:
            meta = rt.bundle.meta if rt.bundle else None
            assets.append({
                "asset": rt.cfg.name, "mode": rt.mode, "state": rt.state.value,
                "score": rt.last_score, "threshold": meta.threshold if meta else None,
                "last_window_end": rfc3339(rt.last_window_end) if rt.last_window_end else None,
                "last_event": rt.last_event,
                "model": ({"id": meta.model_id, "version": meta.version} if meta else None),
                "model_error": rt.bundle_error,
            })
        return {"site": self.cfg.site, "gateway": self.cfg.gateway, "assets": assets}


def _names(rt: AssetRuntime) -> tuple[str, ...]:
    return asset_feature_names(rt.cfg)


def _json(doc: Any) -> bytes:
    return json.dumps(doc, separators=(",", ":"), allow_nan=False).encode()
