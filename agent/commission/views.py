"""The judged views of `watchkeep evaluate`: a *scenario* (one scored series judged
with the bundle's thresholds: the recorded data, or one injected fault kind), the
*whole-asset* view (several modes, each window scored by its mode's bundle, one
detector for the asset as the daemon runs it), and the `Evaluation` that holds them.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from agent.commission.dataset import Dataset
from agent.commission.inject import FaultKind
from agent.commission.judging import Detection, judge, judge_transitions, roc_auc
from agent.commission.truth import (
    FaultSpan,
    TruthEvent,
    drop_sensor_spans,
    fitted_mask,
    truth_from_labels,
    truth_from_spans,
)
from agent.core.detector import Detector, DetectorParams, Transition
from agent.errors import DatasetError
from agent.models.bundle import Bundle

_SCORE_CHUNK = 4096


# --- scenarios --------------------------------------------------------------------------

@dataclass(frozen=True)
class Scenario:
    """One judged series: the recorded data or one injected fault kind."""

    name: str
    source: str  # "recorded" | "injected"
    scores: np.ndarray = field(repr=False)
    window_start: np.ndarray = field(repr=False)
    window_end: np.ndarray = field(repr=False)
    kinds: np.ndarray = field(repr=False)
    events: list[TruthEvent]
    auc: dict[str, float]
    detection: Detection
    alternatives: list[Detection]


@dataclass(frozen=True)
class Evaluation:
    bundle: dict[str, Any]
    dataset: dict[str, Any]
    params: DetectorParams
    threshold: float
    clear_threshold: float
    scenarios: list[Scenario]
    notes: list[str]
    whole_asset: WholeAsset | None = None

    def overall(self) -> list[dict[str, Any]]:
        """Per (k, n, m): detection and delay over every scenario's fault events, false
        alarms per day from the recorded scenario's normal windows, and apart from those
        the share of injected one-window spikes that raised (lower is better: a k-of-n
        rule is meant to ride through a transient)."""
        rows = []
        base = next((s for s in self.scenarios if s.source == "recorded"), None)
        for i, alt in enumerate(self.scenarios[0].alternatives):
            evs = [e for s in self.scenarios for e in s.alternatives[i].events
                   if not _is_spike(e.event)]
            spikes = [e for s in self.scenarios for e in s.alternatives[i].events
                      if _is_spike(e.event)]
            w = [e.delay_windows for e in evs if e.delay_windows is not None]
            sec = [e.delay_s for e in evs if e.delay_s is not None]
            fa = base.alternatives[i] if base is not None else None
            rows.append({
                "raise_k": alt.params.raise_k, "raise_n": alt.params.raise_n,
                "clear_m": alt.params.clear_m,
                "events": len(evs), "detected": sum(e.detected for e in evs),
                "detection_rate": (sum(e.detected for e in evs) / len(evs)) if evs else None,
                "median_delay_windows": float(np.median(w)) if w else None,
                "median_delay_s": float(np.median(sec)) if sec else None,
                "false_alarms": fa.false_alarms if fa else None,
                "false_alarms_per_day": _num(fa.false_alarms_per_day) if fa else None,
                "spike_events": len(spikes),
                "spikes_raised": (sum(e.detected for e in spikes) / len(spikes))
                if spikes else None,
                "current": alt.params == self.params,
            })
        return rows


def _is_spike(ev: TruthEvent) -> bool:
    return ev.fault_class == "injected" and ev.kind == FaultKind.SPIKE.value and \
        ev.last - ev.first < 2


def _num(x: float) -> float | None:
    return None if x is None or not math.isfinite(x) else float(x)


def score_windows(bundle: Bundle, x: np.ndarray) -> np.ndarray:
    """The bundle's score of each row of `x`, in chunks of `_SCORE_CHUNK` rows."""
    parts = [bundle.score(x[i:i + _SCORE_CHUNK])[0] for i in range(0, len(x), _SCORE_CHUNK)]
    return np.concatenate(parts) if parts else np.zeros(0)


def _auc_by_kind(scores: np.ndarray, kinds: np.ndarray) -> dict[str, float]:
    normal = kinds == ""
    out: dict[str, float] = {}
    for kind in sorted({str(k) for k in kinds if k != ""}):
        mask = kinds == kind
        out[kind] = roc_auc(scores[mask | normal], mask[mask | normal])
    if len(out) > 1:
        out["all"] = roc_auc(scores, ~normal)
    return out


def judge_scenario(name: str, source: str, scores: np.ndarray, ds: Dataset,
                   kinds: np.ndarray, events: list[TruthEvent], threshold: float,
                   clear: float, params: DetectorParams,
                   alternatives: Sequence[DetectorParams]) -> Scenario:
    """One scenario judged with `params` and each of `alternatives`."""
    alts = [judge(scores, ds.window_start, ds.window_end, kinds, events, threshold, clear, p)
            for p in alternatives]
    return Scenario(name, source, scores, ds.window_start, ds.window_end, kinds, events,
                    _auc_by_kind(scores, kinds),
                    judge(scores, ds.window_start, ds.window_end, kinds, events, threshold,
                          clear, params), alts)


# --- whole asset (several modes) -------------------------------------------------------

@dataclass(frozen=True)
class WholeAsset:
    """An asset with several modes judged as the daemon runs it: each window scored by
    its mode's bundle, one detector for the asset, reset on a mode change while normal."""

    modes: dict[str, dict[str, Any]]
    detection: Detection
    scored: int
    windows: int

    def as_json(self) -> dict[str, Any]:
        d = self.detection
        w, sec = d.delays()
        return {"windows": self.windows, "scored": self.scored, "modes": self.modes,
                "events": d.n_events, "detected": d.n_detected,
                "detection_rate": _num(d.detection_rate),
                "median_delay_s": float(np.median(sec)) if sec else None,
                "median_delay_windows": float(np.median(w)) if w else None,
                "raises": d.raises, "false_alarms": d.false_alarms,
                "normal_hours": d.normal_s / 3600.0,
                "false_alarms_per_day": _num(d.false_alarms_per_day)}


def whole_asset(bundles: Mapping[str, Bundle], dataset: Dataset, *,
                spans: Sequence[FaultSpan] | None = None,
                params: DetectorParams | None = None,
                notes: list[str] | None = None, held_out: bool = False) -> WholeAsset:
    """Judge every window of `dataset`, whatever its mode (see `WholeAsset`). Windows in
    a mode without a bundle are not scored (the daemon skips them as `no_model`) and
    leave the detector as it was."""
    params = params or DetectorParams()
    notes = notes if notes is not None else []
    ds = _whole_asset_windows(bundles, dataset, held_out, notes)
    asset = dataset.asset or next(iter(bundles.values())).meta.asset
    if spans is not None:
        ds, spans = drop_sensor_spans(ds, spans, asset, notes)
        kinds, events = truth_from_spans(ds.window_start, ds.window_end, spans, asset)
    else:
        kinds, events = truth_from_labels(ds)
    scores = np.full(ds.n_windows, np.nan)
    for mode, b in bundles.items():
        mask = ds.mode == mode
        if mask.any():
            scores[mask] = score_windows(b, ds.columns(b.meta.feature_names)[mask])
    transitions = _one_detector(bundles, ds, scores, params)
    detection = judge_transitions(transitions, ds.n_windows, ds.window_start, ds.window_end,
                                  kinds, events, params)
    modes: dict[str, dict[str, Any]] = {}
    for mode in ds.modes:
        mask = ds.mode == mode
        mb = bundles.get(mode)
        modes[mode] = {"windows": int(mask.sum()),
                       "model": mb.meta.model_id if mb is not None else None,
                       "threshold": mb.meta.threshold if mb is not None else None}
    unscored = [m for m in ds.modes if m not in bundles]
    if unscored:
        notes.append(f"whole asset: windows in mode(s) {', '.join(unscored)} have no bundle "
                     "and are not scored (as the daemon skips them)")
    return WholeAsset(modes, detection, int(np.isfinite(scores).sum()), ds.n_windows)


def _whole_asset_windows(bundles: Mapping[str, Bundle], ds: Dataset, held_out: bool,
                         notes: list[str]) -> Dataset:
    """The windows to judge: without those a bundle was fitted on when `held_out` (a
    note otherwise)."""
    fitted = np.zeros(ds.n_windows, bool)
    for b in bundles.values():
        fitted |= fitted_mask(b.meta.training, ds)
    if held_out and fitted.any():
        if fitted.all():
            raise DatasetError(f"dataset {ds.path}: no window is held out from the bundles' "
                               "training spans")
        ds = ds.select(~fitted)
    elif fitted.any():
        notes.append(f"whole asset: {int(fitted.sum())} of {ds.n_windows} windows lie in a "
                     "span a bundle was trained and calibrated on (false alarms on them "
                     "understate new data)")
    return ds


def _one_detector(bundles: Mapping[str, Bundle], ds: Dataset, scores: np.ndarray,
                  params: DetectorParams) -> list[tuple[int, Transition]]:
    """One detector over the asset's windows, each judged with its mode's thresholds;
    reset on a mode change while normal, as the daemon does."""
    det = Detector(params)
    transitions: list[tuple[int, Transition]] = []
    last_mode: str | None = None
    for i, mode in enumerate(str(m) for m in ds.mode):
        if mode != last_mode:
            if det.state.value == "normal":  # the daemon's rule (pipeline._set_mode)
                det = Detector(params)
            last_mode = mode
        mb = bundles.get(mode)
        if mb is None:
            continue
        t = det.step(float(scores[i]), mb.meta.threshold, mb.meta.clear_threshold)
        if t is not None:
            transitions.append((i, t))
    return transitions
