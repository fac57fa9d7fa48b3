"""Real-data benchmark: the SKAB pump test bed (valve-1 runs), commissioned as an
integrator would, replayed through the daemon's own pipeline.

Data: `../shared/data/skab-valve1/` beside the checkout (or `$WATCHKEEP_SKAB_DIR`):
16 labelled runs of a laboratory water-circulation test bed (8 sensors at 1 Hz) from
the Skoltech Anomaly Benchmark v0.9 (Katser and Kozitsin, 2020, DOI
10.34740/KAGGLE/DSV/1693952, GPL-3.0). It is read where it lies, never copied into the
repository; without it the benchmark says so and exits 0.

Protocol (the benchmark's published outlier-detection protocol, from its README): per
run, the first 400 rows are normal running for training, the rest is the test part;
nothing of the test part, labels included, informs training, thresholds or settings.
One 0/1 prediction per test row; TP/FP/FN/TN summed over all runs; F1 =
TP / (TP + (FN + FP) / 2), FAR = FP / (FP + TN) x 100, MAR = FN / (FN + TP) x 100.

watchkeep, per run:
1. the first 400 rows are turned into sensor messages and fed to the daemon's own
   ingest, windows and features (`Replayer`, as `watchkeep demo` records its normal
   running); the closed windows go into a dataset (`DatasetWriter`);
2. `train_bundle` commissions the asset from that dataset with its defaults;
3. every row is replayed through the daemon pipeline with the bundle; the prediction
   for a row is the detector state (normal/anomalous) after the window that ends with
   that row, i.e. what the maintenance system sees on the state topic at that time.
Settings: 20 s windows with a 1 s hop (the issue's setting), every other setting a
default. None is fitted to the test rows.

Baselines on the same split and the same window features (one prediction per window,
no raise/clear logic): Hotelling T2 and SPE/Q of a PCA fitted on the training windows
(90 % of the variance; UCLs at alpha = 0.01, T2 from the F distribution and Q from
Jackson and Mudholkar 1979, via scipy), and scikit-learn's IsolationForest
(contamination 1 %). The published figures are the authors' (whole benchmark, their
README).

Run: `python -m tests.bench realdata` (`--runs 0,3` for a subset, `--verbose`).
"""

from __future__ import annotations

import argparse
import copy
import logging
import os
import sys
import tempfile
import time
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import orjson

from tests.bench.common import save, table

HERE = Path(__file__).resolve()
DEFAULT_DATA = HERE.parents[3] / "shared" / "data" / "skab-valve1"
TRAIN_ROWS = 400
CHANNELS = {  # CSV column -> watchkeep channel name
    "Accelerometer1RMS": "accel1_rms", "Accelerometer2RMS": "accel2_rms",
    "Current": "current", "Pressure": "pressure", "Temperature": "body_temp",
    "Thermocouple": "fluid_temp", "Voltage": "voltage", "Volume Flow RateRMS": "flow",
}
UNITS = {"accel1_rms": "g", "accel2_rms": "g", "current": "A", "pressure": "bar",
         "body_temp": "degC", "fluid_temp": "degC", "voltage": "V", "flow": "l/min"}
WINDOW = {"length_s": 20.0, "hop_s": 1.0}
PUBLISHED = [  # the authors' README, whole benchmark (34 runs)
    ("Conv-AE (published)", 0.78, 13.55, 28.02),
    ("MSET (published)", 0.78, 39.73, 14.13),
    ("T2+Q PCA (published)", 0.76, 26.62, 24.92),
    ("LSTM-AE (published)", 0.74, 29.96, 25.92),
    ("T2 (published)", 0.66, 19.21, 42.60),
    ("Isolation forest (published)", 0.29, 2.56, 82.89),
]


@dataclass
class Run:
    name: str
    t: np.ndarray          # unix seconds per row
    x: np.ndarray          # [rows, 8] in CHANNELS order
    label: np.ndarray      # 0/1 per row


def read_run(path: Path) -> Run:
    lines = path.read_text(encoding="utf-8").splitlines()
    head = lines[0].split(";")
    cols = [head.index(c) for c in CHANNELS]
    ai = head.index("anomaly")
    t, x, lab = [], [], []
    for ln in lines[1:]:
        if not ln.strip():
            continue
        f = ln.split(";")
        t.append(datetime.fromisoformat(f[0]).replace(tzinfo=UTC).timestamp())
        x.append([float(f[c]) for c in cols])
        lab.append(int(float(f[ai])))
    return Run(path.stem, np.array(t), np.array(x), np.array(lab, dtype=np.int8))


def asset_doc(name: str) -> dict[str, Any]:
    return {
        "name": name,
        "window": dict(WINDOW),
        "channels": {ch: {"topic": f"benchlab/loop-1/{name}/{ch}", "decoder": "json",
                          "rate_hz": 1, "unit": UNITS[ch]} for ch in CHANNELS.values()},
    }


def config_doc(state_dir: Path, asset: dict[str, Any]) -> dict[str, Any]:
    return {"site": "benchlab", "gateway": "gw-bench", "state_dir": str(state_dir),
            "local_broker": {"host": "127.0.0.1", "port": 1883},
            "upstream_broker": {"host": "127.0.0.1", "port": 1883},
            "http": {"host": "127.0.0.1", "port": 0},
            "pipeline": {"tick_s": 0.5}, "assets": [asset]}


def messages(run: Run, asset: str, rows: slice) -> list[tuple[float, str, bytes]]:
    out = []
    names = list(CHANNELS.values())
    for t, row in zip(run.t[rows], run.x[rows], strict=True):
        for ch, v in zip(names, row, strict=True):
            out.append((float(t), f"benchlab/loop-1/{asset}/{ch}",
                        orjson.dumps({"ts": float(t), "value": float(v)})))
    return out


@dataclass
class RunResult:
    pred: np.ndarray            # per test row
    label: np.ndarray
    raised_normal: int
    raised_fault: int
    delay_s: float | None
    features_train: np.ndarray  # training windows' features (for the baselines)
    features_test: np.ndarray   # one window per test row (ending with the row)
    summary: str


def watchkeep_run(run: Run, work: Path, log: logging.Logger) -> RunResult:
    from agent.commission.dataset import DatasetWriter, read_dataset
    from agent.commission.replay import Replayer
    from agent.commission.train import train_bundle
    from agent.config.load import parse_config

    asset = "P-" + run.name.zfill(2)
    base = asset_doc(asset)
    cfg = parse_config(config_doc(work, base), work)
    writer = DatasetWriter(work / "dataset", asset=asset, overwrite=True)
    rows_of: dict[float, np.ndarray] = {}

    def observe(a: str, mode: str, w: Any, row: Any, names: tuple[str, ...]) -> None:
        writer.add(row, names, w.start, w.end, mode)

    rep = Replayer.build(cfg, log, observer=observe)
    for t, topic, payload in messages(run, asset, slice(0, TRAIN_ROWS)):
        rep.feed(t, topic, payload)
    rep.finish()
    ds_path = writer.close()
    ds = read_dataset(ds_path, min_windows=1)
    report = train_bundle(ds_path, work / "bundle", asset=asset, seed=0)

    doc = copy.deepcopy(base)
    doc["bundle"] = str(work / "bundle")
    cfg2 = parse_config(config_doc(work, doc), work)

    def observe_all(a: str, mode: str, w: Any, row: Any, names: tuple[str, ...]) -> None:
        rows_of[round(w.end, 3)] = np.asarray(row, dtype=np.float64)

    rep2 = Replayer.build(cfg2, log, observer=observe_all)
    for t, topic, payload in messages(run, asset, slice(0, len(run.t))):
        rep2.feed(t, topic, payload)
    rep2.finish()

    state_at: dict[float, int] = {}
    raised_at: list[float] = []
    for m in rep2.sink.messages:
        doc_m = orjson.loads(m.payload)
        if m.topic.endswith("/state"):
            end_t = datetime.fromisoformat(doc_m["window_end"].replace("Z", "+00:00"))
            state_at[round(end_t.timestamp(), 3)] = int(doc_m["state"] == "anomalous")
        elif m.topic.endswith("/events") and doc_m["type"].endswith("anomaly.raised"):
            end = datetime.fromisoformat(doc_m["data"]["window"]["end"].replace("Z", "+00:00"))
            raised_at.append(end.timestamp())
    # Row i's window ends 1 s after its timestamp (windows are [start, end), hop 1 s).
    test = slice(TRAIN_ROWS, len(run.t))
    pred = np.zeros(len(run.t) - TRAIN_ROWS, dtype=np.int8)
    cur = 0
    ends = sorted(state_at)
    j = 0
    for i, t in enumerate(run.t[test]):
        while j < len(ends) and ends[j] <= t + 1.0 + 1e-6:
            cur = state_at[ends[j]]
            j += 1
        pred[i] = cur
    label = run.label[test]
    row_label = {round(float(t) + 1.0, 3): int(lb) for t, lb in zip(run.t, run.label,
                                                                      strict=True)}
    t_test0 = run.t[TRAIN_ROWS] + 1.0
    raised_normal = sum(1 for e in raised_at if e >= t_test0 and not row_label.get(round(e, 3)))
    raised_fault = sum(1 for e in raised_at if e >= t_test0 and row_label.get(round(e, 3)))
    fault_rows = np.flatnonzero(run.label[test])
    delay = None
    if fault_rows.size:
        t_fault = run.t[TRAIN_ROWS + fault_rows[0]]
        after = [e - 1.0 - t_fault for e in raised_at if e - 1.0 >= t_fault]
        first_pred = np.flatnonzero(pred[fault_rows[0]:])
        if first_pred.size:
            delay = float(run.t[TRAIN_ROWS + fault_rows[0] + first_pred[0]] - t_fault)
        elif after:
            delay = float(after[0])
    f_train = ds.features
    names = ds.feature_names
    test_rows = [rows_of.get(round(float(t) + 1.0, 3)) for t in run.t[test]]
    width = len(names)
    f_test = np.array([r if r is not None else np.full(width, np.nan) for r in test_rows])
    cal = report.calibration
    summary = (f"threshold {cal.threshold:.4g} clear {cal.clear_threshold:.4g} "
               f"({cal.method}); {report.n_windows} windows")
    return RunResult(pred, label, raised_normal, raised_fault, delay, f_train, f_test, summary)


def scores(pred: np.ndarray, label: np.ndarray) -> dict[str, float]:
    tp = int(np.sum((pred == 1) & (label == 1)))
    fp = int(np.sum((pred == 1) & (label == 0)))
    fn = int(np.sum((pred == 0) & (label == 1)))
    tn = int(np.sum((pred == 0) & (label == 0)))
    f1 = tp / (tp + (fn + fp) / 2) if tp + fn + fp else 0.0
    far = 100.0 * fp / (fp + tn) if fp + tn else 0.0
    mar = 100.0 * fn / (fn + tp) if fn + tp else 0.0
    return {"f1": round(f1, 4), "far_pct": round(far, 2), "mar_pct": round(mar, 2),
            "tp": tp, "fp": fp, "fn": fn, "tn": tn}


def baseline_preds(f_train: np.ndarray, f_test: np.ndarray) -> dict[str, np.ndarray]:
    """T2, SPE/Q and isolation forest on the window features, one verdict per window."""
    from scipy import stats
    from sklearn.ensemble import IsolationForest

    mu = f_train.mean(axis=0)
    sd = f_train.std(axis=0)
    sd = np.where(sd > 1e-12, sd, 1.0)
    z = (f_train - mu) / sd
    zt = (np.nan_to_num(f_test, nan=0.0) - mu) / sd
    _u, s, vt = np.linalg.svd(z, full_matrices=False)
    var = s ** 2 / (len(z) - 1)
    k = int(np.searchsorted(np.cumsum(var) / var.sum(), 0.90) + 1)
    p = vt[:k].T
    lam = var[:k]
    n = len(z)
    alpha = 0.01
    t2 = np.sum((zt @ p) ** 2 / lam, axis=1)
    t2_ucl = k * (n - 1) * (n + 1) / (n * (n - k)) * stats.f.ppf(1 - alpha, k, n - k)
    resid = zt - (zt @ p) @ p.T
    q = np.sum(resid ** 2, axis=1)
    rest = var[k:]
    th1, th2, th3 = (float(np.sum(rest ** i)) for i in (1, 2, 3))
    if th1 > 0 and th2 > 0:
        h0 = 1 - 2 * th1 * th3 / (3 * th2 ** 2)
        ca = stats.norm.ppf(1 - alpha)
        q_ucl = th1 * (ca * np.sqrt(2 * th2 * h0 ** 2) / th1 + 1
                       + th2 * h0 * (h0 - 1) / th1 ** 2) ** (1 / h0)
    else:
        q_ucl = np.inf
    iso = IsolationForest(n_estimators=200, contamination=0.01, random_state=0).fit(z)
    missing = np.isnan(f_test).any(axis=1)
    out = {"Hotelling T2 (window features)": t2 > t2_ucl,
           "SPE/Q (window features)": q > q_ucl,
           "T2 or Q (window features)": (t2 > t2_ucl) | (q > q_ucl),
           "Isolation forest (window features)": iso.predict(zt) == -1}
    return {k2: np.where(missing, False, v).astype(np.int8) for k2, v in out.items()}


def main() -> int:
    ap = argparse.ArgumentParser(prog="python -m tests.bench realdata")
    ap.add_argument("--data", default=os.environ.get("WATCHKEEP_SKAB_DIR", str(DEFAULT_DATA)))
    ap.add_argument("--runs", help="comma-separated run names (default: all)")
    ap.add_argument("--verbose", action="store_true")
    args = ap.parse_args(sys.argv[1:])
    data = Path(args.data)
    files = sorted((p for p in data.glob("*.csv") if p.stem.isdigit()),
                   key=lambda p: int(p.stem))
    if not files:
        print(f"realdata: skipped: no SKAB valve-1 runs at {data} (see this module's "
              "docstring; the data is read where it lies, never copied into the repository)")
        return 0
    if args.runs:
        want = set(args.runs.split(","))
        files = [p for p in files if p.stem in want]
    log = logging.getLogger("watchkeep.bench.realdata")
    log.setLevel(logging.ERROR)
    t0 = time.monotonic()
    results: dict[str, RunResult] = {}
    with tempfile.TemporaryDirectory(prefix="watchkeep-realdata-") as tmp:
        for p in files:
            run = read_run(p)
            results[p.stem] = watchkeep_run(run, Path(tmp) / p.stem, log)
            r = results[p.stem]
            s = scores(r.pred, r.label)
            print(f"run {p.stem:>2}: F1 {s['f1']:.3f} FAR {s['far_pct']:5.1f}% "
                  f"MAR {s['mar_pct']:5.1f}%  raised normal {r.raised_normal} fault "
                  f"{r.raised_fault}  delay {r.delay_s}  {r.summary}", flush=True)
    pred = np.concatenate([r.pred for r in results.values()])
    label = np.concatenate([r.label for r in results.values()])
    wk = scores(pred, label)
    n_runs = len(results)
    wk["raised_in_normal_per_run"] = round(sum(r.raised_normal for r in results.values())
                                           / n_runs, 3)
    wk["raised_in_fault_per_run"] = round(sum(r.raised_fault for r in results.values())
                                          / n_runs, 3)
    delays = [r.delay_s for r in results.values() if r.delay_s is not None]
    wk["detection_delay_s_median"] = float(np.median(delays)) if delays else None
    wk["faults_detected"] = len(delays)
    wk["runs"] = n_runs
    base: dict[str, dict[str, Any]] = {}
    per_base: dict[str, list[np.ndarray]] = {}
    for r in results.values():
        for k, v in baseline_preds(r.features_train, r.features_test).items():
            per_base.setdefault(k, []).append(v)
    for k, vs in per_base.items():
        base[k] = scores(np.concatenate(vs), label)
    always = scores(np.ones_like(label), label)
    rows = [["watchkeep (detector state)", f"{wk['f1']:.3f}", f"{wk['far_pct']:.1f}",
             f"{wk['mar_pct']:.1f}", f"{wk['raised_in_normal_per_run']:.2f}"]]
    rows += [[k, f"{v['f1']:.3f}", f"{v['far_pct']:.1f}", f"{v['mar_pct']:.1f}", "-"]
             for k, v in base.items()]
    rows.append(["always alarm", f"{always['f1']:.3f}", f"{always['far_pct']:.1f}",
                 f"{always['mar_pct']:.1f}", "-"])
    rows += [[n, f"{f:.2f}", f"{a:.2f}", f"{m:.2f}", "-"] for n, f, a, m in PUBLISHED]
    print()
    print(table(rows, ["detector", "F1", "FAR %", "MAR %", "raised in normal / run"]))
    print(f"\nfaults detected {wk['faults_detected']}/{n_runs}, median delay "
          f"{wk['detection_delay_s_median']} s; {time.monotonic() - t0:.0f} s")
    save("realdata", {"watchkeep": wk, "baselines": base, "always_alarm": always,
                      "published": {n: {"f1": f, "far_pct": a, "mar_pct": m}
                                    for n, f, a, m in PUBLISHED},
                      "per_run": {k: {**scores(r.pred, r.label),
                                      "raised_in_normal": r.raised_normal,
                                      "raised_in_fault": r.raised_fault,
                                      "delay_s": r.delay_s, "calibration": r.summary}
                                  for k, r in results.items()},
                      "settings": {"window": WINDOW, "train_rows": TRAIN_ROWS}})
    return 0


if __name__ == "__main__":
    sys.exit(main())
