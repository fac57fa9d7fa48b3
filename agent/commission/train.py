"""`watchkeep train`: dataset -> fitted autoencoder -> calibrated, written bundle.

The windows of one asset and mode are split into three parts by a seeded, blocked
random split (blocks of consecutive windows, so near-duplicate neighbours do not
straddle the parts): `train` fits the weights, `val` decides early stopping, and
`calib` — never seen by the fit — gives the held-out normal scores the thresholds
come from. Calibration scores are computed through onnxruntime on the exported model
with `agent.models.bundle.Bundle.score`, i.e. exactly as the daemon will score.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from agent import __version__
from agent.commission.autoencoder import (
    FitResult,
    TrainConfig,
    block_spread,
    fit_autoencoder,
    fit_pca,
)
from agent.commission.coverage import Coverage, WindowGeometry, assess, window_geometry
from agent.commission.dataset import DEFAULT_MIN_WINDOWS, Dataset, read_dataset
from agent.commission.export import INPUT_NAME, IR_VERSION, OPSET, OUTPUT_NAME, export_dense
from agent.commission.tail import (
    DEFAULT_BUDGET_PER_WEEK,
    DEFAULT_CLEAR_RATIO,
    DEFAULT_MARGIN,
    MIN_FORWARD_WINDOWS,
    TailCalibration,
    calibrate_tail,
)
from agent.core.detector_params import DetectorParams
from agent.errors import BundleError, DatasetError
from agent.models.bundle import MODEL_JSON, Bundle, parse_meta, write_bundle

SPLIT_BLOCK = 10
DEFAULT_VAL_FRACTION = 0.15
FAMILIES = ("auto", "dense-autoencoder", "pca")
# The later part of the recording that the threshold comes from. It must be long enough
# to show how normal running moves after the part the model was fitted on; 40 % keeps
# most of a short recording for the fit while giving the threshold a real stretch of
# "later". Common practice for a time-ordered hold-out, no source.
DEFAULT_CALIB_FRACTION = 0.4


@dataclass(frozen=True)
class TrainReport:
    """What `train` did; `format()` is the text the CLI prints."""

    bundle_path: Path
    asset: str
    mode: str
    version: int
    n_windows: int
    n_train: int
    n_val: int
    n_calib: int
    widths: tuple[int, ...]
    train_loss: float
    val_loss: float
    best_epoch: int
    epochs_run: int
    calibration: TailCalibration
    coverage: Coverage
    n_params: int
    onnx_bytes: int
    train_time_s: float
    calib_scores: np.ndarray = field(repr=False)
    calib_index: np.ndarray = field(repr=False)

    @property
    def threshold(self) -> float:
        return self.calibration.threshold

    def format(self) -> str:
        c = self.calibration
        return "\n".join([
            f"bundle          {self.bundle_path} (asset {self.asset}, mode {self.mode}, "
            f"version {self.version})",
            f"windows used    {self.n_windows} (train {self.n_train}, val {self.n_val}, "
            f"calibration {self.n_calib})",
            f"network         widths {list(self.widths)}, {self.n_params} parameters, "
            f"ONNX {self.onnx_bytes} bytes",
            f"final loss      train {self.train_loss:.5g}, val {self.val_loss:.5g} "
            f"(best epoch {self.best_epoch} of {self.epochs_run})",
            f"threshold       {c.threshold:.5g} ({_method_text(c)}); clear "
            f"{c.clear_threshold:.5g}",
            f"false alarms    {_budget_text(c)}",
            *(f"  note: {r}" for r in c.reasons),
            *(f"recording       {line}" for line in self.coverage.lines()),
            f"training time   {self.train_time_s:.2f} s",
        ])


@dataclass(frozen=True)
class _Candidate:
    family: str
    fit: FitResult
    model_bytes: bytes
    doc: dict[str, Any]
    scores: np.ndarray
    cal: TailCalibration


def _method_text(c: TailCalibration) -> str:
    if c.method == "pot-gpd" and c.fit is not None:
        return (f"peaks over threshold, GPD xi {c.fit.xi:.3g}, at per-window rate "
                f"{c.target_exceedance:.2g}, x margin {c.margin:g}")
    return (f"largest of {c.n_windows} later-normal scores {c.max_score:.5g} x margin "
            f"{c.margin:g}")


def _budget_text(c: TailCalibration) -> str:
    if c.promised and c.expected_per_week is not None:
        return (f"about {c.expected_per_week:.2g} per week expected (budget "
                f"{c.budget_per_week:g}; {c.n_independent} independent later-normal windows)")
    return (f"budget of {c.budget_per_week:g} per week NOT promised: the recording is too "
            f"short or unsteady ({c.n_independent} independent later-normal windows, "
            f"about {c.needed_independent} needed)")


def forward_windows(n: int, calib_fraction: float, geometry: WindowGeometry) -> int:
    """How many of the last windows calibrate (forward validation); DatasetError when the
    recording cannot give the minimum (see tail.MIN_FORWARD_WINDOWS)."""
    if not 0 < calib_fraction < 1:
        raise ValueError("calib_fraction must be in (0, 1)")
    need = MIN_FORWARD_WINDOWS * geometry.per_length
    n_cal = max(round(calib_fraction * n), need)
    if n - n_cal < need:
        raise DatasetError(
            f"{n} window(s) cannot give both a fit and a forward calibration: the threshold "
            f"needs the last {need} windows ({MIN_FORWARD_WINDOWS} independent windows of "
            f"{geometry.length_s:g} s at a hop of {geometry.hop_s:g} s) and the fit at least "
            f"as many before them; record for at least "
            f"{2 * MIN_FORWARD_WINDOWS * geometry.length_s:g} s")
    return int(n_cal)


def split_early(n: int, val_fraction: float, *, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """(train, val) indices of the first `n` windows, a seeded split of whole blocks
    (validation only decides early stopping, so it may interleave with the fit)."""
    if not 0 < val_fraction < 1:
        raise ValueError("val_fraction must be in (0, 1)")
    n_blocks = max(2, -(-n // SPLIT_BLOCK))
    blocks = np.minimum(np.arange(n) * n_blocks // max(n, 1), n_blocks - 1)
    order = np.random.default_rng([seed, 0x5A17]).permutation(n_blocks)
    val_b = order[: max(1, round(val_fraction * n_blocks))]
    is_val = np.isin(blocks, val_b)
    idx = np.arange(n)
    return idx[~is_val], idx[is_val]


def split_blocks(n: int, val_fraction: float, calib_fraction: float, *, seed: int,
                 block: int = SPLIT_BLOCK) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Indices (train, val, calib), each sorted, from a seeded split of whole blocks."""
    if not (0 < val_fraction < 1 and 0 < calib_fraction < 1 and val_fraction + calib_fraction < 1):
        raise ValueError("val_fraction and calib_fraction must be in (0, 1) and sum below 1")
    n_blocks = max(3, -(-n // block))
    block = -(-n // n_blocks)
    blocks = np.arange(n) // block
    n_blocks = int(blocks.max()) + 1
    order = np.random.default_rng([seed, 0x5A17]).permutation(n_blocks)
    n_cal = max(1, round(calib_fraction * n_blocks))
    n_val = max(1, round(val_fraction * n_blocks))
    cal_b, val_b = order[:n_cal], order[n_cal:n_cal + n_val]
    idx = np.arange(n)
    calib = idx[np.isin(blocks, cal_b)]
    val = idx[np.isin(blocks, val_b)]
    train = idx[~np.isin(blocks, np.concatenate([cal_b, val_b]))]
    return train, val, calib


def select_windows(ds: Dataset, *, asset: str | None, mode: str | None) -> tuple[Dataset, str]:
    """The dataset's windows for `asset` / `mode`, and the mode chosen."""
    if asset is not None and ds.asset and asset != ds.asset:
        raise DatasetError(f"dataset {ds.path} is for asset {ds.asset!r}, not {asset!r}")
    modes = ds.modes
    if mode is None:
        if len(modes) != 1:
            raise DatasetError(f"dataset {ds.path} has modes {list(modes)}: choose one "
                               "(--mode); each mode gets its own bundle")
        return ds, modes[0]
    if mode not in modes:
        raise DatasetError(f"dataset {ds.path} has no windows in mode {mode!r} "
                           f"(its modes: {list(modes)})")
    return ds.select(ds.mode == mode), mode


def next_version(out_dir: Path) -> int:
    """One more than the bundle already at `out_dir`, else 1."""
    meta = out_dir / MODEL_JSON
    if not meta.exists():
        return 1
    try:
        doc = json.loads(meta.read_text(encoding="utf-8"))
        return int(doc["version"]) + 1
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise BundleError(str(out_dir), f"an existing {MODEL_JSON} is unreadable, so the next "
                                        f"version is unknown ({exc}); move it away first") from exc


def _runtime_scores(model_bytes: bytes, doc: dict[str, Any], x: np.ndarray) -> np.ndarray:
    """Scores of raw rows through onnxruntime, by the daemon's own `Bundle.score`."""
    import onnxruntime as ort

    from agent.models.bundle import _session_options  # the daemon's session settings, on purpose

    provisional = {"format": "watchkeep-bundle", "format_version": 1, **doc,
                   "threshold": 1.0, "clear_threshold": 1.0}
    meta = parse_meta(provisional, "<training>")
    session = ort.InferenceSession(model_bytes, sess_options=_session_options(),
                                   providers=["CPUExecutionProvider"])
    return Bundle(Path("."), meta, session).score(x)[0]


def train_bundle(dataset_dir: str | os.PathLike[str], out_dir: str | os.PathLike[str], *,
                 asset: str | None = None, mode: str | None = None,
                 widths: tuple[int, ...] | list[int] | None = None, seed: int = 0,
                 epochs: int = 300, batch_size: int = 64, learning_rate: float = 2e-3,
                 patience: int = 25, weight_decay: float = 0.0,
                 val_fraction: float = DEFAULT_VAL_FRACTION,
                 calib_fraction: float = DEFAULT_CALIB_FRACTION,
                 budget: float = DEFAULT_BUDGET_PER_WEEK,
                 margin: float = DEFAULT_MARGIN, clear_ratio: float = DEFAULT_CLEAR_RATIO,
                 detector: DetectorParams | None = None,
                 family: str = "auto",
                 min_windows: int = DEFAULT_MIN_WINDOWS,
                 now: datetime | None = None) -> TrainReport:
    """Train, calibrate and write a bundle to `out_dir` (temp-and-rename, never in place).

    Raises DatasetError for an unusable dataset (too few windows, NaNs, wrong asset or
    mode) and BundleError if an existing bundle at `out_dir` cannot be versioned.
    """
    out = Path(out_dir)
    ds_all = read_dataset(dataset_dir, min_windows=1)
    ds, chosen_mode = select_windows(ds_all, asset=asset, mode=mode)
    if ds.n_windows < min_windows:
        raise DatasetError(f"dataset {ds.path}: only {ds.n_windows} window(s) in mode "
                           f"{chosen_mode!r}; at least {min_windows} are needed to train "
                           "(record for longer)")
    if ds.label is not None and np.any(ds.label != 0):
        ds = ds.select(ds.label == 0)  # train on normal windows only
    asset_name = asset or ds.asset
    if not asset_name:
        raise DatasetError(f"dataset {ds.path} names no asset; give one (--asset)")
    version = next_version(out)
    config = TrainConfig(widths=tuple(widths) if widths else None, epochs=epochs,
                         batch_size=batch_size, learning_rate=learning_rate,
                         weight_decay=weight_decay, patience=patience, seed=seed)
    geometry = window_geometry(ds.window, ds.window_start, ds.window_end)
    n_cal = forward_windows(ds.n_windows, calib_fraction, geometry)
    early = ds.n_windows - n_cal
    coverage = assess(ds.feature_names, ds.features[:early], geometry)
    names = [n for n in ds.feature_names if n not in set(coverage.excluded)]
    if len(names) < 2:
        raise DatasetError(f"dataset {ds.path}: after leaving out the slow channels the recording "
                           f"does not cover ({', '.join(coverage.excluded)}), fewer than 2 "
                           "features remain; record until their wander repeats, or add "
                           "channels")
    x = ds.columns(names)
    tr, va = split_early(early, val_fraction, seed=seed)
    ca = np.arange(early, ds.n_windows)
    floor = block_spread(x[:early])
    det = detector or DetectorParams()
    stamp = (now or datetime.now(UTC)).astimezone(UTC)
    base_doc: dict[str, Any] = {
        "asset": asset_name,
        "mode": chosen_mode,
        "model_id": f"{asset_name}/{chosen_mode}",
        "version": version,
        "feature_names": names,
        "score": {"function": "mse"},
        "onnx": {"input": INPUT_NAME, "output": OUTPUT_NAME, "opset": OPSET,
                 "ir_version": IR_VERSION},
        "created": stamp.isoformat(timespec="seconds").replace("+00:00", "Z"),
        "watchkeep_version": __version__,
    }

    def candidate(family: str, fit: FitResult) -> _Candidate:
        model_bytes = export_dense(fit.layers, doc=f"watchkeep {family} {asset_name}/"
                                                    f"{chosen_mode} v{version}")
        doc = {**base_doc, "scaler": {"mean": fit.scaler.mean.tolist(),
                                      "scale": fit.scaler.scale.tolist()}}
        scores = _runtime_scores(model_bytes, doc, x[ca])
        cal = calibrate_tail(scores, length_s=geometry.length_s, hop_s=geometry.hop_s,
                             raise_k=det.raise_k, raise_n=det.raise_n,
                             budget_per_week=budget, margin=margin, clear_ratio=clear_ratio)
        return _Candidate(family, fit, model_bytes, doc, scores, cal)

    t0 = time.perf_counter()
    # Two model families, chosen by forward validation: both are calibrated to the same
    # false-alarm budget on the same later windows, in the same units (mean squared
    # error of the same standardised features), so the lower threshold is the model
    # that sees a smaller departure from normal at the same promised false-alarm rate.
    if family not in FAMILIES:
        raise ValueError(f"family must be one of {', '.join(FAMILIES)}")
    if widths and family == "auto":
        family = "dense-autoencoder"  # widths describe the dense network only
    cands = []
    if family in ("auto", "dense-autoencoder"):
        cands.append(candidate("dense-autoencoder", fit_autoencoder(x[tr], x[va], config,
                                                                    scale_floor=floor)))
    if family in ("auto", "pca"):
        cands.append(candidate("pca", fit_pca(x[tr], x[va], scale_floor=floor)))
    train_time = time.perf_counter() - t0
    best = min(cands, key=lambda c: (not c.cal.promised, c.cal.threshold))
    fit, model_bytes, doc, scores, cal = best.fit, best.model_bytes, best.doc, best.scores, \
        best.cal
    doc["threshold"] = cal.threshold
    doc["clear_threshold"] = cal.clear_threshold
    doc["calibration"] = {**cal.as_json(),
                          "detector": {"raise_k": det.raise_k, "raise_n": det.raise_n}}
    doc["training"] = {
        "n_windows": ds.n_windows,
        "features_recorded": list(ds.feature_names),
        "coverage": coverage.as_json(),
        "data_sha256": ds.content_sha256,
        "dataset": str(ds.path) if ds.path else "",
        "split": {"method": "forward: calibration on the last windows in time, validation "
                            "blocked-random within the earlier ones",
                  "block_windows": SPLIT_BLOCK, "seed": seed,
                  "train": len(tr), "val": len(va), "calib": len(ca)},
        "feature_mean": fit.scaler.mean.tolist(),
        "feature_std": fit.scaler.std.tolist(),
        "time_span": {"start": float(ds.window_start.min()), "end": float(ds.window_end.max())},
        "window": dict(ds.window),
        "units": dict(ds.units),
        "model_selection": {c.family: {"threshold": c.cal.threshold,
                                       "budget_promised": c.cal.promised} for c in cands},
        "architecture": {"family": best.family, "widths": list(fit.widths),
                         "hidden_activation": "tanh" if best.family != "pca" else "linear",
                         "output_activation": "linear", "n_params": fit.n_params},
        "optimiser": {"method": "adam", "learning_rate": learning_rate,
                      "batch_size": batch_size, "weight_decay": weight_decay,
                      "epochs_max": epochs, "patience": patience},
        "epochs_run": fit.epochs_run,
        "best_epoch": fit.best_epoch,
        "train_loss": fit.train_loss,
        "val_loss": fit.val_loss,
        "train_time_s": round(train_time, 3),
    }
    path = write_bundle(out, model_bytes, doc)
    return TrainReport(
        bundle_path=path, asset=asset_name, mode=chosen_mode, version=version,
        n_windows=ds.n_windows, n_train=len(tr), n_val=len(va), n_calib=len(ca),
        widths=fit.widths, train_loss=fit.train_loss, val_loss=fit.val_loss,
        best_epoch=fit.best_epoch, epochs_run=fit.epochs_run, calibration=cal,
        coverage=coverage,
        n_params=fit.n_params, onnx_bytes=len(model_bytes), train_time_s=train_time,
        calib_scores=scores, calib_index=ca)


def parse_widths(text: str) -> tuple[int, ...]:
    """'16,8,16' -> (16, 8, 16); argparse type."""
    try:
        widths = tuple(int(p) for p in text.split(",") if p.strip())
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"widths must be integers like 16,8,16: {text!r}") from exc
    if not widths or min(widths) < 1:
        raise argparse.ArgumentTypeError(f"widths must be positive integers: {text!r}")
    return widths


def add_train_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of `watchkeep train DATASET --out BUNDLE ...`."""
    parser.add_argument("dataset", help="dataset directory written by `watchkeep record`")
    parser.add_argument("--out", required=True, help="bundle directory to write (replaced "
                        "whole by rename; its version is one more than the old bundle's)")
    parser.add_argument("--asset", help="asset name (default: the dataset's)")
    parser.add_argument("--mode", help="operating mode to train (required if several)")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    parser.add_argument("--widths", type=parse_widths,
                        help="hidden widths, e.g. 16,8,16 (default [F/2, F/4, F/2])")
    parser.add_argument("--epochs", type=int, default=300, help="maximum epochs (default 300)")
    parser.add_argument("--batch-size", type=int, default=64)
    parser.add_argument("--learning-rate", type=float, default=2e-3)
    parser.add_argument("--patience", type=int, default=25,
                        help="stop after this many epochs without validation gain")
    parser.add_argument("--weight-decay", type=float, default=0.0, help="L2 weight decay")
    parser.add_argument("--model", choices=FAMILIES, default="auto",
                        help="model family; auto fits both and keeps the one with the lower "
                             "threshold at the same false-alarm budget (default auto)")
    parser.add_argument("--budget", type=float, default=DEFAULT_BUDGET_PER_WEEK,
                        help="false alarms per asset-week the threshold aims at (default "
                             f"{DEFAULT_BUDGET_PER_WEEK:g}); train says when the recording "
                             "cannot promise it")
    parser.add_argument("--val-fraction", type=float, default=DEFAULT_VAL_FRACTION,
                        help="share of the earlier windows held out for early stopping "
                             f"(default {DEFAULT_VAL_FRACTION:g})")
    parser.add_argument("--calib-fraction", type=float, default=DEFAULT_CALIB_FRACTION,
                        help="share of the recording, its last windows in time, that the "
                             f"threshold comes from (default {DEFAULT_CALIB_FRACTION:g})")
    parser.add_argument("--raise-k", type=int, default=DetectorParams().raise_k,
                        help="the detector's raise_k the budget is computed for")
    parser.add_argument("--raise-n", type=int, default=DetectorParams().raise_n,
                        help="the detector's raise_n the budget is computed for")
    parser.add_argument("--margin", type=float, default=DEFAULT_MARGIN)
    parser.add_argument("--clear-ratio", type=float, default=DEFAULT_CLEAR_RATIO)
    parser.add_argument("--min-windows", type=int, default=DEFAULT_MIN_WINDOWS)


def cmd_train(args: argparse.Namespace, *, out: TextIO | None = None) -> int:
    """Run `train` from parsed arguments, print the report, return the exit code.

    WatchkeepError subclasses propagate: the CLI turns them into one line.
    """
    report = train_bundle(
        args.dataset, args.out, asset=args.asset, mode=args.mode, widths=args.widths,
        seed=args.seed, epochs=args.epochs, batch_size=args.batch_size,
        learning_rate=args.learning_rate, patience=args.patience,
        weight_decay=args.weight_decay, val_fraction=args.val_fraction,
        calib_fraction=args.calib_fraction, budget=args.budget,
        detector=DetectorParams(args.raise_k, max(args.raise_n, args.raise_k)),
        margin=args.margin, family=args.model,
        clear_ratio=args.clear_ratio, min_windows=args.min_windows)
    print(report.format(), file=out or sys.stdout)
    return 0
