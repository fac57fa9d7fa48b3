"""The evaluation report: a text summary, `report.json` and `report.png`.

matplotlib is optional (the `plot` extra, kept off the gateway); it is imported only
when a plot is drawn, through its object API (no pyplot, no global figure state).
Without it the JSON is still written and the outcome says the plot was skipped.
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from agent.commission.judging import Detection
from agent.commission.views import Evaluation, Scenario
from agent.fsutil import write_file_atomic

REPORT_JSON = "report.json"
REPORT_PNG = "report.png"
REPORT_FORMAT = "watchkeep-evaluation"


@dataclass(frozen=True)
class ReportFiles:
    json_path: Path
    png_path: Path | None
    plot_note: str = ""


def _num(x: float | None) -> float | None:
    return None if x is None or not math.isfinite(x) else float(x)


def _detection_json(d: Detection) -> dict[str, Any]:
    w, s = d.delays()
    return {
        "raise_k": d.params.raise_k, "raise_n": d.params.raise_n, "clear_m": d.params.clear_m,
        "events": d.n_events, "detected": d.n_detected,
        "detection_rate": _num(d.detection_rate),
        "mean_delay_windows": _num(float(np.mean(w))) if w else None,
        "median_delay_windows": _num(float(np.median(w))) if w else None,
        "mean_delay_s": _num(float(np.mean(s))) if s else None,
        "median_delay_s": _num(float(np.median(s))) if s else None,
        "raises": d.raises, "false_alarms": d.false_alarms,
        "normal_hours": d.normal_s / 3600.0,
        "false_alarms_per_day": _num(d.false_alarms_per_day),
    }


def _scenario_json(s: Scenario) -> dict[str, Any]:
    faulty = s.kinds != ""
    return {
        "name": s.name, "source": s.source, "windows": len(s.scores),
        "faulty_windows": int(faulty.sum()),
        "roc_auc": {k: _num(v) for k, v in s.auc.items()},
        "detection": _detection_json(s.detection),
        "events": [{"kind": o.event.kind, "class": o.event.fault_class,
                    "onset": o.event.onset_s, "first_window": o.event.first,
                    "last_window": o.event.last, "detected": o.detected,
                    "delay_windows": o.delay_windows, "delay_s": o.delay_s}
                   for o in s.detection.events],
        "score_quantiles": {q: _num(float(np.quantile(s.scores[~faulty], float(q))))
                            if (~faulty).any() else None for q in ("0.5", "0.99", "0.999")},
        "alternatives": [_detection_json(a) for a in s.alternatives],
    }


def to_json(ev: Evaluation) -> dict[str, Any]:
    """The whole evaluation as plain JSON values (NaN becomes null)."""
    return {
        "format": REPORT_FORMAT, "format_version": 1,
        "bundle": ev.bundle, "dataset": ev.dataset,
        "detector": {"raise_k": ev.params.raise_k, "raise_n": ev.params.raise_n,
                     "clear_m": ev.params.clear_m, "threshold": ev.threshold,
                     "clear_threshold": ev.clear_threshold},
        "scenarios": [_scenario_json(s) for s in ev.scenarios],
        "alternatives_overall": ev.overall(),
        "whole_asset": ev.whole_asset.as_json() if ev.whole_asset is not None else None,
        "notes": list(ev.notes),
    }


def _fmt(x: float | None, spec: str = ".3f") -> str:
    return "-" if x is None or (isinstance(x, float) and not math.isfinite(x)) else format(x, spec)


def format_summary(ev: Evaluation) -> str:
    """The text `evaluate` prints: per-scenario figures, then the (k, n, m) table."""
    p = ev.params
    lines = [f"bundle {ev.bundle['model_id']} v{ev.bundle['version']}: threshold "
             f"{ev.threshold:.5g}, clear {ev.clear_threshold:.5g}; detector raise "
             f"{p.raise_k} of {p.raise_n}, clear after {p.clear_m}",
             f"dataset {ev.dataset['path']}: {ev.dataset['n_windows']} windows"
             + (f", {ev.dataset['fitted_windows']} of them in the span the model was trained "
                "and calibrated on (FA/day there is not a forecast)"
                if ev.dataset.get("fitted_windows") else ""), ""]
    lines.append(f"{'scenario':<36} {'AUC':>14} {'events':>7} {'detected':>9} "
                 f"{'delay w':>8} {'delay s':>9} {'FA/day':>8}")
    for s in ev.scenarios:
        d = s.detection
        w, sec = d.delays()
        auc = ", ".join(f"{k} {_fmt(v)}" for k, v in s.auc.items()) or "-"
        lines.append(f"{s.name:<36} {auc:>14} {d.n_events:>7} "
                     f"{_fmt(d.detection_rate if d.events else None, '.0%'):>9} "
                     f"{_fmt(float(np.median(w)) if w else None, '.1f'):>8} "
                     f"{_fmt(float(np.median(sec)) if sec else None, '.0f'):>9} "
                     f"{_fmt(_num(d.false_alarms_per_day), '.2f'):>8}")
    lines += ["", "alternative detector settings (all scenarios; false alarms from the "
              "recorded data):",
              f"{'k':>3} {'n':>3} {'m':>3} {'detected':>9} {'median delay w':>15} "
              f"{'median delay s':>15} {'FA/day':>8} {'spikes raised':>14}"]
    for r in ev.overall():
        mark = "  <- current" if r["current"] else ""
        lines.append(f"{r['raise_k']:>3} {r['raise_n']:>3} {r['clear_m']:>3} "
                     f"{_fmt(r['detection_rate'], '.0%'):>9} "
                     f"{_fmt(r['median_delay_windows'], '.1f'):>15} "
                     f"{_fmt(r['median_delay_s'], '.0f'):>15} "
                     f"{_fmt(r['false_alarms_per_day'], '.2f'):>8} "
                     f"{_fmt(r['spikes_raised'], '.0%'):>14}{mark}")
    wa = ev.whole_asset
    if wa is not None:
        j = wa.as_json()
        lines += ["", f"whole asset ({len(wa.modes)} modes, each window judged by its mode's "
                  "bundle, one detector):"]
        for mode, m in wa.modes.items():
            model = f"{m['model']} threshold {m['threshold']:.5g}" if m["model"] else \
                "no bundle: not scored"
            lines.append(f"  {mode:<16} {m['windows']:>7} windows  {model}")
        lines.append(f"  {j['scored']} of {j['windows']} windows scored; {j['events']} fault "
                     f"events, {j['detected']} detected, median delay "
                     f"{_fmt(j['median_delay_s'], '.0f')} s; {j['false_alarms']} false "
                     f"alarm(s), {_fmt(j['false_alarms_per_day'], '.2f')} per day over "
                     f"{j['normal_hours']:.1f} h of normal running")
    lines += [f"note: {n}" for n in ev.notes]
    return "\n".join(lines)


def _atomic_write(path: Path, data: bytes) -> None:
    write_file_atomic(path, data)


def plot_png(ev: Evaluation) -> bytes:
    """Score over time against the thresholds (fault spans shaded) and the score
    histograms of normal vs faulty windows, one row per scenario. Needs matplotlib."""
    import io

    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    rows = len(ev.scenarios)
    fig = Figure(figsize=(12, 2.8 * rows), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(rows, 2, squeeze=False, gridspec_kw={"width_ratios": [3, 1]})
    floor = max(ev.clear_threshold * 1e-3, 1e-12)
    for (ax_t, ax_h), s in zip(axes, ev.scenarios, strict=True):
        t0 = float(s.window_start[0]) if len(s.window_start) else 0.0
        t_h = (np.asarray(s.window_end) - t0) / 3600.0
        scores = np.maximum(s.scores, floor)
        ax_t.plot(t_h, scores, lw=0.7, color="tab:blue", label="score")
        ax_t.axhline(ev.threshold, color="tab:red", lw=1, label="threshold")
        ax_t.axhline(ev.clear_threshold, color="tab:orange", lw=1, ls="--", label="clear")
        for e in s.events:
            ax_t.axvspan((float(s.window_start[e.first]) - t0) / 3600.0,
                         (float(s.window_end[e.last]) - t0) / 3600.0,
                         color="tab:red", alpha=0.15, lw=0)
        ax_t.set_yscale("log")
        ax_t.set_xlabel("hours from start")
        ax_t.set_ylabel("score (MSE)")
        ax_t.set_title(s.name, fontsize=9, loc="left")
        if s is ev.scenarios[0]:
            ax_t.legend(loc="upper right", fontsize=7)
        faulty = s.kinds != ""
        bins = np.geomspace(floor if scores.min() <= floor else scores.min(),
                            max(scores.max(), ev.threshold * 1.01), 40)
        ax_h.hist(scores[~faulty], bins=bins, alpha=0.6, color="tab:blue", label="normal")
        if faulty.any():
            ax_h.hist(scores[faulty], bins=bins, alpha=0.6, color="tab:red", label="faulty")
        ax_h.axvline(ev.threshold, color="tab:red", lw=1)
        ax_h.set_xscale("log")
        ax_h.set_yscale("log")
        ax_h.set_xlabel("score")
        ax_h.legend(fontsize=7)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    return buf.getvalue()


def write_report(ev: Evaluation, out_dir: str | os.PathLike[str], *,
                 plot: bool = True) -> ReportFiles:
    """Write `report.json` and, if matplotlib is installed, `report.png` (temp-and-rename)."""
    d = Path(out_dir)
    d.mkdir(parents=True, exist_ok=True)
    jpath = d / REPORT_JSON
    _atomic_write(jpath, (json.dumps(to_json(ev), indent=2, allow_nan=False) + "\n").encode())
    if not plot:
        return ReportFiles(jpath, None, "plot not requested")
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        return ReportFiles(jpath, None, "matplotlib is not installed (pip install "
                                        "'watchkeep[plot]')")
    ppath = d / REPORT_PNG
    _atomic_write(ppath, plot_png(ev))
    return ReportFiles(jpath, ppath, "")
