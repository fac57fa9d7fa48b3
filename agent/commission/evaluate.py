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

Definitions (window indices are in time order within the scenario; the truth is built
in `agent.commission.truth`, judged in `agent.commission.judging`, and the views —
scenarios, the whole asset — are in `agent.commission.views`):
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
import sys
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from agent.commission.coverage import window_geometry
from agent.commission.dataset import Dataset, read_dataset
from agent.commission.inject import InjectSpec, inject
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
from agent.commission.truth import (
    FaultSpan,
    TruthEvent,
    drop_sensor_spans,
    fitted_mask,
    load_labels,
    truth_from_labels,
    truth_from_spans,
)
from agent.commission.views import Evaluation, Scenario, judge_scenario, score_windows, whole_asset
from agent.core.detector import DetectorParams
from agent.errors import DatasetError
from agent.models.bundle import Bundle, load_bundle

DEFAULT_ALTERNATIVES: tuple[tuple[int, int, int], ...] = tuple(
    (k, n, m) for (k, n) in ((1, 1), (2, 3), (3, 5), (5, 8)) for m in (1, 3, 6))


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
    ds = _bundle_windows(bundle, ds, notes)
    thr, clear = meta.threshold, meta.clear_threshold
    alt_params = [DetectorParams(k, n, m) for (k, n, m) in alternatives]
    if params not in alt_params:
        alt_params.append(params)
    ds, fitted = _hold_out(bundle, ds, held_out, notes)
    if spans is not None:
        ds, kinds, events = _labelled_truth(bundle, ds, spans, notes)
        fitted = fitted_mask(meta.training, ds) if not held_out else np.zeros(ds.n_windows, bool)
    else:
        kinds, events = truth_from_labels(ds)
    x = ds.columns(meta.feature_names)
    scores = score_windows(bundle, x)
    scenarios = [judge_scenario("recorded", "recorded", scores, ds, kinds, events, thr, clear,
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
        scenarios += _feature_scenarios(bundle, ds, x, kinds, inject_specs, params,
                                        alt_params, seed, notes)
    info_b = {"path": str(bundle.path), "model_id": meta.model_id, "version": meta.version,
              "threshold": thr, "clear_threshold": clear, "n_features": bundle.n_features}
    info_d = {"path": str(ds.path) if ds.path else "", "asset": ds.asset,
              "n_windows": ds.n_windows, "content_sha256": ds.content_sha256,
              "time_span": [float(ds.window_start.min()), float(ds.window_end.max())],
              "fitted_windows": int(fitted.sum())}
    if injection:
        info_d["injection"] = injection
    return Evaluation(info_b, info_d, params, thr, clear, scenarios, notes)


def _bundle_windows(bundle: Bundle, ds: Dataset, notes: list[str]) -> Dataset:
    """The windows of the bundle's mode (all of them when the dataset has one mode), the
    model's features checked present; notes on what differs."""
    meta = bundle.meta
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
    return ds


def _hold_out(bundle: Bundle, ds: Dataset, held_out: bool, notes: list[str]
              ) -> tuple[Dataset, np.ndarray]:
    """The windows the model was fitted on: left out with `held_out`, counted in a note
    otherwise; returns the dataset and the mask of its fitted windows."""
    fitted = fitted_mask(bundle.meta.training, ds)
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
    return ds, fitted


def _labelled_truth(bundle: Bundle, ds: Dataset, spans: Sequence[FaultSpan],
                    notes: list[str]) -> tuple[Dataset, np.ndarray, list[TruthEvent]]:
    """The truth from labelled spans, the windows of sensor-class spans left out."""
    asset = ds.asset or bundle.meta.asset
    ds, spans = drop_sensor_spans(ds, spans, asset, notes)
    kinds, events = truth_from_spans(ds.window_start, ds.window_end, spans,
                                     ds.asset or bundle.meta.asset)
    if not events:
        notes.append("no labelled fault overlaps the dataset's windows of this asset")
    return ds, kinds, events


def _feature_scenarios(bundle: Bundle, ds: Dataset, x: np.ndarray, kinds: np.ndarray,
                       specs: Sequence[InjectSpec], params: DetectorParams,
                       alt_params: Sequence[DetectorParams], seed: int,
                       notes: list[str]) -> list[Scenario]:
    """The feature path: per spec, faults injected on the dataset's normal feature
    windows (`x`), scored and judged."""
    meta = bundle.meta
    notes.append("faults injected on feature windows (no raw capture used)")
    if any(isinstance(s, ChannelSpec) for s in specs):
        notes.append("a fault's CHANNEL is honoured on the raw path only; the feature "
                     "path picks channels from the seed")
    normal = kinds == ""
    base = ds.select(normal)
    xb = x[normal]
    sigma = meta.scaler_scale
    out: list[Scenario] = []
    for spec in specs:
        xi, injected = inject(xb, sigma, meta.feature_names, spec, seed=seed)
        ik = np.full(base.n_windows, "", dtype=object)
        for ev in injected:
            ik[ev.first:ev.last + 1] = spec.name
        ievents = [TruthEvent(spec.name, "injected", float(base.window_start[ev.first]),
                              ev.first, ev.last) for ev in injected]
        label = f"{spec.name} {spec.severity:g} sigma x {spec.length} windows"
        out.append(judge_scenario(f"inject:{label}", "injected", score_windows(bundle, xi),
                                  base, ik, ievents, meta.threshold, meta.clear_threshold,
                                  params, alt_params))
    return out


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
        out.append(judge_scenario(f"inject:{label}", "injected",
                                  score_windows(bundle, r.features), sub, r.kinds, ievents,
                                  thr, clear, params, alt_params))
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
