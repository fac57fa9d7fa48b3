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
from collections.abc import Sequence
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
from agent.commission.splits import SPLIT_BLOCK, forward_windows, select_windows, split_early
from agent.commission.tail import (
    DEFAULT_BUDGET_PER_WEEK,
    DEFAULT_CLEAR_RATIO,
    DEFAULT_MARGIN,
    TailCalibration,
    calibrate_tail,
)
from agent.core.detector_params import DetectorParams
from agent.errors import BundleError, DatasetError
from agent.models.bundle import MODEL_JSON, Bundle, parse_meta, write_bundle

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


@dataclass(frozen=True)
class _Prepared:
    """The windows one bundle is fitted and calibrated on: the columns used (`x`), the
    fit's train and validation rows and the later calibration rows (indices into `x`)."""

    ds: Dataset
    asset: str
    mode: str
    geometry: WindowGeometry
    coverage: Coverage
    names: list[str]
    x: np.ndarray
    tr: np.ndarray
    va: np.ndarray
    ca: np.ndarray

    @property
    def early(self) -> int:
        """Windows before the calibration part (the fit's part)."""
        return len(self.x) - len(self.ca)


@dataclass(frozen=True)
class _Calibrator:
    """Exports a fitted model, scores the calibration windows through onnxruntime, and
    calibrates its thresholds to the false-alarm budget."""

    base_doc: dict[str, Any]
    label: str  # "<asset>/<mode> v<version>", for the ONNX doc string
    x_calib: np.ndarray
    geometry: WindowGeometry
    detector: DetectorParams
    budget: float
    margin: float
    clear_ratio: float

    def candidate(self, family: str, fit: FitResult) -> _Candidate:
        model_bytes = export_dense(fit.layers, doc=f"watchkeep {family} {self.label}")
        doc = {**self.base_doc, "scaler": {"mean": fit.scaler.mean.tolist(),
                                           "scale": fit.scaler.scale.tolist()}}
        scores = _runtime_scores(model_bytes, doc, self.x_calib)
        det, geo = self.detector, self.geometry
        cal = calibrate_tail(scores, length_s=geo.length_s, hop_s=geo.hop_s,
                             raise_k=det.raise_k, raise_n=det.raise_n,
                             budget_per_week=self.budget, margin=self.margin,
                             clear_ratio=self.clear_ratio)
        return _Candidate(family, fit, model_bytes, doc, scores, cal)


def _training_windows(dataset_dir: str | os.PathLike[str], *, asset: str | None,
                      mode: str | None, min_windows: int) -> tuple[Dataset, str, str]:
    """The dataset's normal windows of one asset and mode; the asset and mode."""
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
    return ds, asset_name, chosen_mode


def _split(ds: Dataset, asset_name: str, chosen_mode: str, *, val_fraction: float,
           calib_fraction: float, seed: int) -> _Prepared:
    """Split the windows (fit: train and validation; the last windows in time:
    calibration) and leave out the slow channels the fit's part does not cover."""
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
    tr, va = split_early(early, val_fraction, seed=seed)
    return _Prepared(ds, asset_name, chosen_mode, geometry, coverage, names,
                     ds.columns(names), tr, va, np.arange(early, ds.n_windows))


def _base_doc(p: _Prepared, version: int, now: datetime | None) -> dict[str, Any]:
    """model.json's fields every candidate shares."""
    stamp = (now or datetime.now(UTC)).astimezone(UTC)
    return {
        "asset": p.asset,
        "mode": p.mode,
        "model_id": f"{p.asset}/{p.mode}",
        "version": version,
        "feature_names": p.names,
        "score": {"function": "mse"},
        "onnx": {"input": INPUT_NAME, "output": OUTPUT_NAME, "opset": OPSET,
                 "ir_version": IR_VERSION},
        "created": stamp.isoformat(timespec="seconds").replace("+00:00", "Z"),
        "watchkeep_version": __version__,
    }


def _fit_candidates(p: _Prepared, family: str, widths: Sequence[int] | None,
                    config: TrainConfig, calibrator: _Calibrator) -> list[_Candidate]:
    """Fit the model family (or both, `auto`), each exported and calibrated."""
    # Two model families, chosen by forward validation: both are calibrated to the same
    # false-alarm budget on the same later windows, in the same units (mean squared
    # error of the same standardised features), so the lower threshold is the model
    # that sees a smaller departure from normal at the same promised false-alarm rate.
    if family not in FAMILIES:
        raise ValueError(f"family must be one of {', '.join(FAMILIES)}")
    if widths and family == "auto":
        family = "dense-autoencoder"  # widths describe the dense network only
    x, tr, va = p.x, p.tr, p.va
    floor = block_spread(x[:p.early])
    cands = []
    if family in ("auto", "dense-autoencoder"):
        cands.append(calibrator.candidate(
            "dense-autoencoder", fit_autoencoder(x[tr], x[va], config, scale_floor=floor)))
    if family in ("auto", "pca"):
        cands.append(calibrator.candidate("pca", fit_pca(x[tr], x[va], scale_floor=floor)))
    return cands


def _training_doc(p: _Prepared, best: _Candidate, cands: Sequence[_Candidate],
                  config: TrainConfig, seed: int, train_time: float) -> dict[str, Any]:
    """model.json's `training` section: what the bundle was fitted on, and how."""
    ds, fit = p.ds, best.fit
    return {
        "n_windows": ds.n_windows,
        "features_recorded": list(ds.feature_names),
        "coverage": p.coverage.as_json(),
        "data_sha256": ds.content_sha256,
        "dataset": str(ds.path) if ds.path else "",
        "split": {"method": "forward: calibration on the last windows in time, validation "
                            "blocked-random within the earlier ones",
                  "block_windows": SPLIT_BLOCK, "seed": seed,
                  "train": len(p.tr), "val": len(p.va), "calib": len(p.ca)},
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
        "optimiser": {"method": "adam", "learning_rate": config.learning_rate,
                      "batch_size": config.batch_size, "weight_decay": config.weight_decay,
                      "epochs_max": config.epochs, "patience": config.patience},
        "epochs_run": fit.epochs_run,
        "best_epoch": fit.best_epoch,
        "train_loss": fit.train_loss,
        "val_loss": fit.val_loss,
        "train_time_s": round(train_time, 3),
    }


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
    ds, asset_name, chosen_mode = _training_windows(dataset_dir, asset=asset, mode=mode,
                                                    min_windows=min_windows)
    version = next_version(out)
    config = TrainConfig(widths=tuple(widths) if widths else None, epochs=epochs,
                         batch_size=batch_size, learning_rate=learning_rate,
                         weight_decay=weight_decay, patience=patience, seed=seed)
    p = _split(ds, asset_name, chosen_mode, val_fraction=val_fraction,
               calib_fraction=calib_fraction, seed=seed)
    det = detector or DetectorParams()
    calibrator = _Calibrator(_base_doc(p, version, now), f"{p.asset}/{p.mode} v{version}",
                             p.x[p.ca], p.geometry, det, budget, margin, clear_ratio)
    t0 = time.perf_counter()
    cands = _fit_candidates(p, family, widths, config, calibrator)
    train_time = time.perf_counter() - t0
    best = min(cands, key=lambda c: (not c.cal.promised, c.cal.threshold))
    fit, model_bytes, doc, cal = best.fit, best.model_bytes, best.doc, best.cal
    doc["threshold"] = cal.threshold
    doc["clear_threshold"] = cal.clear_threshold
    doc["calibration"] = {**cal.as_json(),
                          "detector": {"raise_k": det.raise_k, "raise_n": det.raise_n}}
    doc["training"] = _training_doc(p, best, cands, config, seed, train_time)
    path = write_bundle(out, model_bytes, doc)
    return TrainReport(
        bundle_path=path, asset=p.asset, mode=p.mode, version=version,
        n_windows=p.ds.n_windows, n_train=len(p.tr), n_val=len(p.va), n_calib=len(p.ca),
        widths=fit.widths, train_loss=fit.train_loss, val_loss=fit.val_loss,
        best_epoch=fit.best_epoch, epochs_run=fit.epochs_run, calibration=cal,
        coverage=p.coverage,
        n_params=fit.n_params, onnx_bytes=len(model_bytes), train_time_s=train_time,
        calib_scores=best.scores, calib_index=p.ca)


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
