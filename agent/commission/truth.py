"""Ground truth for `watchkeep evaluate`: which windows are faulty, and the fault events.

A fault *event* is one labelled span (or one run of labelled / injected windows); its
windows are those overlapping the span. Also here: which windows a bundle was fitted
on, and leaving out the windows of sensor-class spans (those are for the sensor-health
checks, not faults for the model to find).
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from agent.commission.dataset import Dataset
from agent.errors import DatasetError


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


def truth_from_labels(ds: Dataset) -> tuple[np.ndarray, list[TruthEvent]]:
    """Per-window kind and fault events from the dataset's own `label` array (none: every
    window is normal)."""
    if ds.label is None:
        return np.full(ds.n_windows, "", dtype=object), []
    kinds = np.asarray(["" if v == 0 else f"label_{int(v)}" for v in ds.label], object)
    return kinds, truth_from_runs(ds.window_start, kinds)


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
