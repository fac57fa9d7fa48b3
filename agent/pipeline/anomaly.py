"""What a window that can change something says: the detector step of a scored window
that is not quiet (above its threshold, or its asset raised or with a suspect sensor)
and its events: `anomaly.raised` / `anomaly.cleared`, `anomaly.escalated`, and a
drifting sensor (`sensor.fault` with reason `suspect_drift`, and its recovery) instead
of a raise. The quiet windows, most of them, never come here (`Emitter.scored`).
"""

from __future__ import annotations

from typing import Any, Protocol

import numpy as np

from agent.core.detector import State, Transition
from agent.core.escalation import Escalated, leading_channels
from agent.core.events import EventType, rfc3339, severity_for, top_contributors
from agent.core.suspect import ALONE_SHARE, dominant_channel, drifting_channel
from agent.models.bundle import Bundle, BundleMeta
from agent.ops.metrics import Metrics
from agent.pipeline.messages import Kind, ratio
from agent.pipeline.runtime import AssetRuntime


class Events(Protocol):
    """What the anomaly step needs of the emitter (`emit.Emitter`)."""

    metrics: Metrics

    def event(self, rt: AssetRuntime, etype: EventType, time_s: float, data: dict[str, Any],
              kind: Kind, *, id_key: str) -> None: ...

    def time(self, ts: float) -> str: ...


class AnomalyStep:
    """The detector step of the windows that can change something, and their events
    (through `emit`, the one place that numbers them)."""

    def __init__(self, emit: Events) -> None:
        self.emit = emit

    def step(self, rt: AssetRuntime, start: float, end: float, mode: str, bundle: Bundle,
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
        earlier = hist[0][0][hist[0][1]] if len(hist) == hist.maxlen else None
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
                "window": {"start": self.emit.time(start), "end": self.emit.time(end)},
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
            self.emit.event(rt, EventType.ANOMALY_RAISED, end, data, Kind.ANOMALY,
                       id_key=f"{start:.3f}")
        elif tr is Transition.CLEARED:
            data = {**base, "peak_score": round(rt.detector.peak_score, 6),
                    "raised_at": rfc3339(rt.raised_at) if rt.raised_at else None,
                    "duration_s": round(end - rt.raised_at, 3) if rt.raised_at else None,
                    "sequence": None}
            self.emit.event(rt, EventType.ANOMALY_CLEARED, end, data, Kind.ANOMALY,
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
                                "window": {"start": self.emit.time(start),
                                           "end": self.emit.time(end)}}
        if meta is not None and sq is not None:
            data["detail"] = {"score": round(score, 6), "threshold": meta.threshold,
                              "contributors": top_contributors(meta.feature_names, sq)}
        self.emit.metrics.sensor_fault.labels(rt.cfg.name, channel).set(1 if suspect else 0)
        etype = EventType.SENSOR_FAULT if suspect else EventType.SENSOR_RECOVERED
        self.emit.event(rt, etype, end, data, Kind.EVENT, id_key=f"{channel}|suspect|{start:.3f}")

    def _escalated(self, rt: AssetRuntime, esc: Escalated, start: float, end: float,
                   mode: str, score: float, meta: BundleMeta, model: dict[str, Any],
                   sq: np.ndarray) -> None:
        """`anomaly.escalated`: a raised asset got worse or changed character."""
        data = {"asset": rt.cfg.name, "mode": mode,
                "window": {"start": self.emit.time(start), "end": self.emit.time(end)},
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
        self.emit.event(rt, EventType.ANOMALY_ESCALATED, end, data, Kind.ANOMALY,
                   id_key=f"{start:.3f}")
