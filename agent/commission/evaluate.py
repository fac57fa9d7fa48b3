"""`watchkeep evaluate`: score a dataset with a bundle and judge it as the daemon would.

Scenarios: `recorded` is the dataset as it is, its faults taken from a labels file or
the dataset's own `label` array (none: every window is normal). Each `--inject KIND`
adds a scenario: the dataset's normal windows with synthetic faults of that kind
(`agent.commission.inject`), or — when the dataset has a raw capture beside it and a
config to rebuild the pipeline — the same faults written into the raw signal and
replayed through the daemon's pipeline (`agent.commission.inject_raw`); the report's
`dataset.injection` and a note say which path was used. Every scenario is scored by the bundle
(`agent.models.bundle.Bundle.score`) and run through `agent.core.detector.run_detector`
with the bundle's thresholds — the daemon's rule, not a copy of it.

Definitions (window indices are in time order within the scenario):
- a fault *event* is one labelled span (or one run of labelled / injected windows); its
  windows are those overlapping the span;
- an event is *detected* when the detector is in the anomalous state at any of its
  windows; the *delay* runs from the fault's onset to the end of the first such window
  (0 windows if the detector was already anomalous at onset);
- a *false alarm* is a raise whose evidence — the raising window and the n-1 before
  it — holds no faulty window; false alarms per day divide by the time covered by
  normal windows (the union of their intervals, so hopping windows count once);
- ROC AUC per kind compares that kind's windows with the scenario's normal windows.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math
import os
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from agent.commission.coverage import window_geometry
from agent.commission.dataset import Dataset, read_dataset
from agent.commission.inject import FaultKind, InjectSpec, inject
from agent.commission.inject_raw import (
    ChannelSpec,
    RawCapture,
    capture_sigma,
    config_from_manifest,
    inject_and_replay,
    parse_raw_inject,
    replay_config,
    time_keys,
)
from agent.core.detector import DetectorParams, Transition, run_detector
from agent.errors import DatasetError
from agent.models.bundle import Bundle, load_bundle

SECONDS_PER_DAY = 86400.0
DEFAULT_ALTERNATIVES: tuple[tuple[int, int, int], ...] = tuple(
    (k, n, m) for (k, n) in ((1, 1), (2, 3), (3, 5), (5, 8)) for m in (1, 3, 6))
_SCORE_CHUNK = 4096


# --- metrics (pure) ---------------------------------------------------------------------

def rank_average(x: np.ndarray) -> np.ndarray:
    """1-based ranks with ties given their average rank."""
    x = np.asarray(x, np.float64)
    order = np.argsort(x, kind="mergesort")
    sx = x[order]
    # boundaries of runs of equal values
    starts = np.concatenate([[0], np.nonzero(np.diff(sx))[0] + 1])
    ends = np.concatenate([starts[1:], [sx.size]])
    avg = (starts + ends + 1) / 2.0  # mean of ranks starts+1 .. ends
    ranks = np.empty(x.size, np.float64)
    ranks[order] = np.repeat(avg, ends - starts)
    return ranks


def roc_auc(scores: np.ndarray, positive: np.ndarray) -> float:
    """ROC AUC by the Mann-Whitney rank statistic: P(score_pos > score_neg) + P(tie)/2.

    NaN when one class is empty.
    """
    s = np.asarray(scores, np.float64)
    y = np.asarray(positive, bool)
    n_pos = int(y.sum())
    n_neg = int(y.size - n_pos)
    if n_pos == 0 or n_neg == 0:
        return math.nan
    r = rank_average(s)
    u = r[y].sum() - n_pos * (n_pos + 1) / 2.0
    return float(u / (n_pos * n_neg))


def union_duration_s(start: np.ndarray, end: np.ndarray) -> float:
    """Length of the union of intervals [start, end) in seconds."""
    if len(start) == 0:
        return 0.0
    order = np.argsort(start, kind="mergesort")
    s, e = np.asarray(start, np.float64)[order], np.asarray(end, np.float64)[order]
    total, cur_s, cur_e = 0.0, s[0], e[0]
    for a, b in zip(s[1:], e[1:], strict=True):
        if a > cur_e:
            total += cur_e - cur_s
            cur_s, cur_e = a, b
        else:
            cur_e = max(cur_e, b)
    return float(total + cur_e - cur_s)


# --- ground truth -----------------------------------------------------------------------

@dataclass(frozen=True)
class FaultSpan:
    """One labelled fault: [start, end) unix seconds on an asset."""

    asset: str
    kind: str
    start: float
    end: float
    fault_class: str = "machine"


@dataclass(frozen=True)
class TruthEvent:
    kind: str
    fault_class: str
    onset_s: float
    first: int
    last: int  # inclusive


def load_labels(path: str | os.PathLike[str]) -> list[FaultSpan]:
    """Read a labels file: a JSON list of {"asset","kind","start","end","class"}, or the
    simulator's `{"labels": [...]}` document, whose entries name the class `fault_class`.
    CSV labels are not read here."""
    p = Path(path)
    try:
        doc = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise DatasetError(f"labels {p}: cannot be read as JSON ({exc})") from exc
    if isinstance(doc, dict) and isinstance(doc.get("labels"), list):
        doc = doc["labels"]
    if not isinstance(doc, list):
        raise DatasetError(f"labels {p}: expected a JSON list of fault spans (or an object "
                           "with a 'labels' list)")
    spans: list[FaultSpan] = []
    problems: list[str] = []
    for i, item in enumerate(doc):
        if not isinstance(item, dict):
            problems.append(f"[{i}]: expected an object")
            continue
        try:
            start, end = float(item["start"]), float(item["end"])
            cls = str(item.get("class", item.get("fault_class", "machine")))
            span = FaultSpan(asset=str(item["asset"]), kind=str(item["kind"]), start=start,
                             end=end, fault_class=cls)
        except (KeyError, TypeError, ValueError) as exc:
            problems.append(f"[{i}]: needs asset, kind, start, end ({exc})")
            continue
        if not (math.isfinite(start) and math.isfinite(end) and end > start):
            problems.append(f"[{i}]: end must be after start")
        elif cls not in ("machine", "sensor"):
            problems.append(f"[{i}].class: expected 'machine' or 'sensor', got {cls!r}")
        else:
            spans.append(span)
    if problems:
        raise DatasetError(f"labels {p}: " + "; ".join(problems[:10]))
    return spans


def truth_from_spans(window_start: np.ndarray, window_end: np.ndarray,
                     spans: Sequence[FaultSpan], asset: str
                     ) -> tuple[np.ndarray, list[TruthEvent]]:
    """Per-window kind ('' = normal) and the events; a window overlapping a span is faulty."""
    ws, we = np.asarray(window_start), np.asarray(window_end)
    kinds = np.full(ws.shape, "", dtype=object)
    events: list[TruthEvent] = []
    for sp in sorted((s for s in spans if s.asset == asset), key=lambda s: s.start):
        hit = np.nonzero((ws < sp.end) & (we > sp.start))[0]
        if hit.size == 0:
            continue
        kinds[hit] = np.where(kinds[hit] == "", sp.kind, kinds[hit])
        events.append(TruthEvent(sp.kind, sp.fault_class, sp.start, int(hit[0]), int(hit[-1])))
    return kinds, events


def truth_from_runs(window_start: np.ndarray, kinds: np.ndarray,
                    fault_class: str = "machine") -> list[TruthEvent]:
    """Events as maximal runs of equal non-empty kinds."""
    events: list[TruthEvent] = []
    i, n = 0, len(kinds)
    while i < n:
        if kinds[i] == "":
            i += 1
            continue
        j = i
        while j + 1 < n and kinds[j + 1] == kinds[i]:
            j += 1
        events.append(TruthEvent(str(kinds[i]), fault_class, float(window_start[i]), i, j))
        i = j + 1
    return events


# --- judging ----------------------------------------------------------------------------

@dataclass(frozen=True)
class EventOutcome:
    event: TruthEvent
    detected: bool
    delay_windows: int | None
    delay_s: float | None


@dataclass(frozen=True)
class Detection:
    """How one (k, n, m) setting did on one scenario."""

    params: DetectorParams
    events: list[EventOutcome]
    false_alarms: int
    normal_s: float
    raises: int

    @property
    def n_events(self) -> int:
        return len(self.events)

    @property
    def n_detected(self) -> int:
        return sum(e.detected for e in self.events)

    @property
    def detection_rate(self) -> float:
        return self.n_detected / self.n_events if self.events else math.nan

    def delays(self) -> tuple[list[int], list[float]]:
        w = [e.delay_windows for e in self.events if e.delay_windows is not None]
        s = [e.delay_s for e in self.events if e.delay_s is not None]
        return w, s

    @property
    def false_alarms_per_day(self) -> float:
        return self.false_alarms / (self.normal_s / SECONDS_PER_DAY) if self.normal_s else math.nan


def judge(scores: np.ndarray, window_start: np.ndarray, window_end: np.ndarray,
          kinds: np.ndarray, events: Sequence[TruthEvent], threshold: float,
          clear_threshold: float, params: DetectorParams) -> Detection:
    """Run the daemon's detector over `scores` and score it against the truth."""
    transitions = run_detector(scores, threshold, clear_threshold, params)
    return judge_transitions(transitions, len(scores), window_start, window_end, kinds, events,
                             params)


def judge_transitions(transitions: Sequence[tuple[int, Transition]], n: int,
                      window_start: np.ndarray, window_end: np.ndarray, kinds: np.ndarray,
                      events: Sequence[TruthEvent], params: DetectorParams) -> Detection:
    """`judge` from the detector's transitions (index into the `n` windows) already run."""
    faulty = np.asarray([k != "" for k in kinds], bool)
    anomalous = np.zeros(n, bool)
    state, last = False, 0
    for idx, t in transitions:
        anomalous[last:idx] = state
        state = t is Transition.RAISED
        last = idx
    anomalous[last:] = state
    raises = [i for i, t in transitions if t is Transition.RAISED]
    false_alarms = sum(1 for i in raises
                       if not faulty[max(0, i - params.raise_n + 1):i + 1].any())
    outcomes = []
    for ev in events:
        hit = np.nonzero(anomalous[ev.first:ev.last + 1])[0]
        if hit.size:
            j = ev.first + int(hit[0])
            outcomes.append(EventOutcome(ev, True, j - ev.first,
                                         max(0.0, float(window_end[j]) - ev.onset_s)))
        else:
            outcomes.append(EventOutcome(ev, False, None, None))
    normal_s = union_duration_s(np.asarray(window_start)[~faulty],
                                np.asarray(window_end)[~faulty])
    return Detection(params, outcomes, false_alarms, normal_s, len(raises))


def fitted_mask(training: Any, ds: Dataset) -> np.ndarray:
    """Windows the bundle was trained and calibrated on: all of them when the dataset is
    the training dataset (same content hash), else those inside the training time span."""
    n = ds.n_windows
    if not isinstance(training, Mapping):
        return np.zeros(n, bool)
    if ds.content_sha256 and training.get("data_sha256") == ds.content_sha256:
        return np.ones(n, bool)
    span = training.get("time_span")
    if not isinstance(span, Mapping):
        return np.zeros(n, bool)
    try:
        lo, hi = float(span["start"]), float(span["end"])
    except (KeyError, TypeError, ValueError):
        return np.zeros(n, bool)
    return np.asarray((ds.window_start >= lo) & (ds.window_end <= hi), bool)


def drop_sensor_spans(ds: Dataset, spans: Sequence[FaultSpan], asset: str, notes: list[str]
                      ) -> tuple[Dataset, list[FaultSpan]]:
    """The dataset without the windows of sensor-class spans, and the other spans."""
    sensor = [sp for sp in spans if sp.fault_class == "sensor" and sp.asset == asset]
    rest = [sp for sp in spans if sp.fault_class != "sensor"]
    if not sensor:
        return ds, rest
    hit = np.zeros(ds.n_windows, bool)
    for sp in sensor:
        hit |= (ds.window_start < sp.end) & (ds.window_end > sp.start)
    if hit.any():
        kinds = sorted({sp.kind for sp in sensor})
        notes.append(f"{int(hit.sum())} window(s) in {len(sensor)} sensor-class label span(s) "
                     f"({', '.join(kinds)}) left out: a sensor fault is for the sensor-health "
                     "checks (sensor.fault), not a machine fault for the model to find")
        if hit.all():
            raise DatasetError(f"dataset {ds.path}: every window lies in a sensor-class label "
                               "span; nothing left to evaluate")
        ds = ds.select(~hit)
    return ds, rest


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
    from agent.core.detector import Detector

    params = params or DetectorParams()
    notes = notes if notes is not None else []
    ds = dataset
    asset = ds.asset or next(iter(bundles.values())).meta.asset
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
    if spans is not None:
        ds, spans = drop_sensor_spans(ds, spans, asset, notes)
        kinds, events = truth_from_spans(ds.window_start, ds.window_end, spans, asset)
    else:
        kinds, events = truth_from_labels(ds)
    scores = np.full(ds.n_windows, np.nan)
    for mode, b in bundles.items():
        mask = ds.mode == mode
        if mask.any():
            scores[mask] = _score(b, ds.columns(b.meta.feature_names)[mask])
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


def _score(bundle: Bundle, x: np.ndarray) -> np.ndarray:
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


def _scenario(name: str, source: str, scores: np.ndarray, ds: Dataset, kinds: np.ndarray,
              events: list[TruthEvent], threshold: float, clear: float,
              params: DetectorParams, alternatives: Sequence[DetectorParams]) -> Scenario:
    alts = [judge(scores, ds.window_start, ds.window_end, kinds, events, threshold, clear, p)
            for p in alternatives]
    return Scenario(name, source, scores, ds.window_start, ds.window_end, kinds, events,
                    _auc_by_kind(scores, kinds),
                    judge(scores, ds.window_start, ds.window_end, kinds, events, threshold,
                          clear, params), alts)


def truth_from_labels(ds: Dataset) -> tuple[np.ndarray, list[TruthEvent]]:
    """Per-window kind and fault events from the dataset's own `label` array (none: every
    window is normal)."""
    if ds.label is None:
        return np.full(ds.n_windows, "", dtype=object), []
    kinds = np.asarray(["" if v == 0 else f"label_{int(v)}" for v in ds.label], object)
    return kinds, truth_from_runs(ds.window_start, kinds)


def _promise(cal: Mapping[str, Any]) -> str:
    """What the bundle's calibration promised about false alarms (model.json)."""
    budget = cal.get("false_alarm_budget_per_week")
    if budget is None:
        return (f"the bundle's threshold comes from a {cal.get('method', 'unknown')} "
                "calibration that states no false-alarm rate per week")
    if cal.get("budget_promised"):
        return (f"the bundle promises about {cal.get('expected_false_alarms_per_week')} false "
                f"alarm(s) per asset-week (budget {budget:g}; forward-validated)")
    return (f"the bundle does not promise its budget of {budget:g} false alarm(s) per "
            f"asset-week: its recording was too short or unsteady (see model.json "
            f"calibration.reasons)")


def evaluate(bundle: Bundle, dataset: Dataset, *, spans: Sequence[FaultSpan] | None = None,
             inject_specs: Sequence[InjectSpec] = (),
             params: DetectorParams | None = None,
             alternatives: Sequence[tuple[int, int, int]] = DEFAULT_ALTERNATIVES,
             seed: int = 0, raw: RawCapture | None = None,
             held_out: bool = False) -> Evaluation:
    """Score `dataset` with `bundle`, judge each scenario (see the module docstring).

    With `raw`, injected faults go into the raw capture and are replayed (the raw path);
    without it they are injected on the feature windows. Labelled spans of class
    `sensor` are not faults for the model to find (the sensor-health checks report
    them, and the daemon does not score a faulty channel's windows): their windows are
    left out. Windows inside the span the bundle was trained and calibrated on are
    counted (`dataset.fitted_windows`, a note), or left out with `held_out`.
    """
    meta = bundle.meta
    notes: list[str] = []
    ds = dataset
    # The detector as the daemon applies it to these windows (strided over hopping ones).
    geo = window_geometry(ds.window, ds.window_start, ds.window_end)
    params = (params or DetectorParams()).over_windows(geo.length_s, geo.hop_s)
    notes.append(_promise(meta.raw.get("calibration") or {}))
    modes = ds.modes
    if meta.mode in modes:
        if len(modes) > 1:
            notes.append(f"evaluated the {meta.mode!r} windows only (dataset modes "
                         f"{list(modes)})")
            ds = ds.select(ds.mode == meta.mode)
    elif len(modes) == 1:
        notes.append(f"the dataset's mode {modes[0]!r} differs from the bundle's "
                     f"{meta.mode!r}; evaluated anyway")
    else:
        raise DatasetError(f"dataset {ds.path} has no windows in the bundle's mode "
                           f"{meta.mode!r} (its modes: {list(modes)})")
    if ds.asset and ds.asset != meta.asset:
        notes.append(f"dataset asset {ds.asset!r} differs from the bundle's {meta.asset!r}")
    ds.columns(meta.feature_names)  # the model's features are all there (or a clear error)
    extra = [n for n in ds.feature_names if n not in set(meta.feature_names)]
    if extra:
        notes.append(f"{len(extra)} dataset feature(s) the model does not use were ignored")
    thr, clear = meta.threshold, meta.clear_threshold
    alt_params = [DetectorParams(k, n, m) for (k, n, m) in alternatives]
    if params not in alt_params:
        alt_params.append(params)

    fitted = fitted_mask(meta.training, ds)
    if held_out and fitted.any():
        if fitted.all():
            raise DatasetError(f"dataset {ds.path}: every window lies in the span the model "
                               "was trained and calibrated on; nothing is held out (record a "
                               "later stretch, or evaluate without --held-out)")
        notes.append(f"--held-out: {int(fitted.sum())} window(s) the model was trained and "
                     "calibrated on were left out")
        ds = ds.select(~fitted)
        fitted = np.zeros(ds.n_windows, bool)
    elif fitted.any():
        notes.append(f"{int(fitted.sum())} of {ds.n_windows} windows lie in the span the model "
                     "was trained and calibrated on: false alarms per day on them understate "
                     "what to expect on new data (evaluate a later recording, or --held-out)")
    if spans is not None:
        ds, spans = drop_sensor_spans(ds, spans, ds.asset or meta.asset, notes)
        fitted = fitted_mask(meta.training, ds) if not held_out else np.zeros(ds.n_windows, bool)
        kinds, events = truth_from_spans(ds.window_start, ds.window_end, spans,
                                         ds.asset or meta.asset)
        if not events:
            notes.append("no labelled fault overlaps the dataset's windows of this asset")
    else:
        kinds, events = truth_from_labels(ds)
    x = ds.columns(meta.feature_names)
    scores = _score(bundle, x)
    scenarios = [_scenario("recorded", "recorded", scores, ds, kinds, events, thr, clear,
                           params, alt_params)]

    injection: dict[str, Any] = {}
    if inject_specs and raw is not None:
        injection = {"path": "raw", "capture": raw.path, "config": raw.config_source}
        notes.append(f"faults injected into the raw signal of {raw.path} and replayed "
                     f"through the daemon pipeline (config: {raw.config_source})")
        scenarios += _raw_scenarios(bundle, ds, kinds, raw, inject_specs, thr, clear, params,
                                    alt_params, seed, notes)
    elif inject_specs:
        injection = {"path": "features"}
        notes.append("faults injected on feature windows (no raw capture used)")
        if any(isinstance(s, ChannelSpec) for s in inject_specs):
            notes.append("a fault's CHANNEL is honoured on the raw path only; the feature "
                         "path picks channels from the seed")
        normal = kinds == ""
        base = ds.select(normal)
        xb = x[normal]
        sigma = meta.scaler_scale
        for spec in inject_specs:
            xi, injected = inject(xb, sigma, meta.feature_names, spec, seed=seed)
            ik = np.full(base.n_windows, "", dtype=object)
            for ev in injected:
                ik[ev.first:ev.last + 1] = spec.name
            ievents = [TruthEvent(spec.name, "injected", float(base.window_start[ev.first]),
                                  ev.first, ev.last) for ev in injected]
            label = f"{spec.name} {spec.severity:g} sigma x {spec.length} windows"
            scenarios.append(_scenario(f"inject:{label}", "injected", _score(bundle, xi),
                                       base, ik, ievents, thr, clear, params, alt_params))
    info_b = {"path": str(bundle.path), "model_id": meta.model_id, "version": meta.version,
              "threshold": thr, "clear_threshold": clear, "n_features": bundle.n_features}
    info_d = {"path": str(ds.path) if ds.path else "", "asset": ds.asset,
              "n_windows": ds.n_windows, "content_sha256": ds.content_sha256,
              "time_span": [float(ds.window_start.min()), float(ds.window_end.max())],
              "fitted_windows": int(fitted.sum())}
    if injection:
        info_d["injection"] = injection
    return Evaluation(info_b, info_d, params, thr, clear, scenarios, notes)


def _raw_scenarios(bundle: Bundle, ds: Dataset, kinds: np.ndarray, raw: RawCapture,
                   specs: Sequence[InjectSpec], thr: float, clear: float,
                   params: DetectorParams, alt_params: Sequence[DetectorParams], seed: int,
                   notes: list[str]) -> list[Scenario]:
    """The raw path: per spec, faults written into the capture on the dataset's normal
    windows, replayed, scored and judged like the feature path."""
    meta = bundle.meta
    normal = kinds == ""
    base = ds.select(normal)
    channels = list(dict.fromkeys(n.split(".", 1)[0] for n in meta.feature_names))
    sigma = capture_sigma(raw, channels)
    notes.append("raw fault sizes in sigma of each channel's signal over the capture: " +
                 ", ".join(f"{c} {s:.4g}" for c, s in sigma.items()))
    out: list[Scenario] = []
    for spec in specs:
        r = inject_and_replay(raw, meta.feature_names, base.window_start, base.window_end,
                              spec, sigma, seed=seed)
        if r.missing:
            notes.append(f"{spec.name}: {r.missing} dataset window(s) were not scored in "
                         "the replay (incomplete or a sensor-health check); left out")
        keep = np.isin(time_keys(base.window_start), time_keys(r.window_start))
        sub = base.select(keep)
        sub = dataclasses.replace(sub, window_start=r.window_start, window_end=r.window_end)
        ievents = [TruthEvent(spec.name, "injected", onset, first, last)
                   for first, last, onset in r.events]
        where = f", {spec.channel}" if isinstance(spec, ChannelSpec) else ""
        label = f"{spec.name} {spec.severity:g} sigma x {spec.length} w raw{where}"
        out.append(_scenario(f"inject:{label}", "injected", _score(bundle, r.features), sub,
                             r.kinds, ievents, thr, clear, params, alt_params))
    return out


# --- CLI --------------------------------------------------------------------------------

def _inject_type(text: str) -> InjectSpec:
    try:
        return parse_raw_inject(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from exc


def add_evaluate_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of `watchkeep evaluate BUNDLE DATASET ...`."""
    d = DetectorParams()
    parser.add_argument("bundle", help="model bundle directory")
    parser.add_argument("dataset", help="dataset directory")
    parser.add_argument("--labels", help="JSON list of fault spans {asset, kind, start, end, "
                        "class} (default: the dataset's own labels, if any)")
    parser.add_argument("--inject", type=_inject_type, nargs="+", action="extend",
                        default=[], metavar="KIND[:SIGMA[:WINDOWS[:CHANNEL]]]",
                        help="inject synthetic faults into normal windows: step, drift, "
                             "noise, stuck, spike (into the raw signal when the dataset "
                             "has a raw capture)")
    parser.add_argument("--raw", metavar="FILE", help="the raw capture recorded with the "
                        "dataset (default: <dataset>.raw.jsonl beside it, if present)")
    parser.add_argument("--config", "-c", metavar="FILE", help="the daemon config to rebuild "
                        "the pipeline for raw injection (default: from the dataset manifest)")
    parser.add_argument("--inject-on", choices=("auto", "raw", "features"), default="auto",
                        help="where to inject: the raw signal, the feature windows, or raw "
                             "when a capture and a pipeline are available (default)")
    parser.add_argument("--report", help="directory for report.json and report.png")
    parser.add_argument("--raise-k", type=int, default=d.raise_k)
    parser.add_argument("--raise-n", type=int, default=d.raise_n)
    parser.add_argument("--clear-m", type=int, default=d.clear_m)
    parser.add_argument("--seed", type=int, default=0, help="seed for injected faults")
    parser.add_argument("--mode-bundle", action="append", default=[], metavar="MODE=BUNDLE",
                        help="the bundle of another operating mode (repeat per mode): adds "
                             "a whole-asset view, every window judged by its mode's bundle "
                             "with one detector, as the daemon runs the asset")
    parser.add_argument("--held-out", action="store_true",
                        help="leave out the windows the model was trained and calibrated on")


def cmd_evaluate(args: argparse.Namespace, *, out: TextIO | None = None) -> int:
    """Run `evaluate` from parsed arguments; print the summary; return the exit code.

    WatchkeepError subclasses propagate: the CLI turns them into one line.
    """
    from agent.commission.report import format_summary, write_report

    stream = out or sys.stdout
    try:
        params = DetectorParams(args.raise_k, args.raise_n, args.clear_m)
    except ValueError as exc:
        raise DatasetError(f"detector settings: {exc}") from exc
    bundle = load_bundle(args.bundle)
    ds = read_dataset(args.dataset)
    spans = load_labels(args.labels) if args.labels else None
    raw, why = _raw_capture(args, ds, bundle) if args.inject else (None, "")
    result = evaluate(bundle, ds, spans=spans, inject_specs=list(args.inject), params=params,
                      seed=args.seed, raw=raw, held_out=bool(getattr(args, "held_out", False)))
    if why:
        result.notes.append(why)
    extra = getattr(args, "mode_bundle", None) or []
    if extra:
        bundles = {bundle.meta.mode: bundle}
        for item in extra:
            mode, sep, path = item.partition("=")
            if not sep or not mode or not path:
                raise DatasetError(f"--mode-bundle {item!r}: expected MODE=BUNDLE")
            b = load_bundle(path)
            if b.meta.mode != mode:
                result.notes.append(f"--mode-bundle {mode}: the bundle was trained for mode "
                                    f"{b.meta.mode!r}; used for {mode!r} as asked")
            bundles[mode] = b
        result = dataclasses.replace(result, whole_asset=whole_asset(
            bundles, ds, spans=spans, params=params, notes=result.notes,
            held_out=bool(getattr(args, "held_out", False))))
    print(format_summary(result), file=stream)
    if args.report:
        written = write_report(result, args.report)
        print(f"report: {written.json_path}", file=stream)
        print(f"plot: {written.png_path}" if written.png_path else f"plot skipped: "
              f"{written.plot_note}", file=stream)
    return 0


def _raw_capture(args: argparse.Namespace, ds: Dataset, bundle: Bundle
                 ) -> tuple[RawCapture | None, str]:
    """The raw capture and pipeline for raw injection, or None and why not (auto mode).

    `--inject-on raw` (or an explicit `--raw`) makes a missing piece an error.
    """
    from agent.commission.capture import read_capture
    from agent.commission.record import RAW_NAME
    from agent.config.load import load_config

    mode = getattr(args, "inject_on", "auto")
    if mode == "features":
        return None, ""
    strict = mode == "raw" or bool(getattr(args, "raw", None))
    dpath = Path(args.dataset)
    path = Path(args.raw) if getattr(args, "raw", None) else \
        dpath.parent / f"{dpath.name}.{RAW_NAME}"
    if not path.is_file():
        if strict:
            raise DatasetError(f"raw capture {path}: not found (record with --raw, or pass "
                               "--raw FILE)")
        return None, f"raw path not used: no capture at {path} (record --raw writes one)"
    try:
        if getattr(args, "config", None):
            cfg, source = load_config(args.config), str(args.config)
        else:
            cfg, source = config_from_manifest(ds.manifest, ds.feature_names), \
                "dataset manifest"
        cfg = replay_config(cfg, ds.asset or bundle.meta.asset)
    except DatasetError as exc:
        if strict:
            raise
        return None, f"raw path not used: {exc}"
    return RawCapture(cfg, list(read_capture(path)), str(path), source), ""
