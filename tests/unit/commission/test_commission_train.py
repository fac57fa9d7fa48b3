"""`train`: dataset in, a loadable, calibrated, versioned bundle out."""

from __future__ import annotations

import argparse
import io
import json
import re
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pytest

from agent import __version__
from agent.commission.dataset import write_dataset
from agent.commission.splits import split_blocks
from agent.commission.train import add_train_arguments, cmd_train, train_bundle
from agent.errors import BundleError, DatasetError
from agent.models.bundle import load_bundle

F = 40
NAMES = [f"ch{i // 5}.f{i % 5}" for i in range(F)]
# The keys agent/models/bundle.py's docstring lists for model.json (format and format_version
# are added by write_bundle).
BUNDLE_KEYS = {"format", "format_version", "asset", "mode", "model_id", "version",
               "feature_names", "scaler", "score", "threshold", "clear_threshold",
               "calibration", "training", "onnx", "created", "watchkeep_version"}
NOW = datetime(2026, 3, 4, 5, 6, 7, tzinfo=UTC)


def _windows(n: int, seed: int) -> np.ndarray:
    # Invented test data: 4 latent factors mixed nonlinearly into 40 features + 5 % noise;
    # the mixing matrix is fixed so every call describes the same "machine".
    mix = np.random.default_rng(1234).normal(size=(4, F))
    rng = np.random.default_rng(seed)
    lat = rng.normal(size=(n, 4))
    return 10.0 + 3.0 * (np.tanh(lat @ mix / 2.0) + 0.05 * rng.normal(size=(n, F)))


def _dataset(path: Path, n: int = 800, seed: int = 0, modes: list[str] | None = None,
             asset: str = "P-101") -> Path:
    t = 1.75e9 + 10.0 * np.arange(n)
    return write_dataset(path, _windows(n, seed), NAMES, t, t + 10.0, modes or ["run"] * n,
                         asset=asset, window={"length_s": 10.0})


@pytest.fixture(scope="module")
def trained(tmp_path_factory: pytest.TempPathFactory):
    d = tmp_path_factory.mktemp("train")
    ds = _dataset(d / "ds")
    report = train_bundle(ds, d / "bundle", epochs=60, now=NOW, family="dense-autoencoder")
    return d, report


def test_bundle_loads_and_has_exactly_the_documented_keys(trained) -> None:
    """model.json holds the keys agent.models.bundle documents, and load_bundle accepts it."""
    d, report = trained
    doc = json.loads((d / "bundle" / "model.json").read_text())
    assert set(doc) == BUNDLE_KEYS
    b = load_bundle(d / "bundle")
    assert b.meta.feature_names == tuple(NAMES)
    assert b.meta.model_id == "P-101/run" and b.meta.version == 1
    assert doc["created"] == "2026-03-04T05:06:07Z"
    assert doc["watchkeep_version"] == __version__
    assert doc["onnx"] == {"input": "x", "output": "recon", "opset": 17, "ir_version": 8}
    assert doc["calibration"]["method"] in ("pot-gpd", "max-margin")
    assert doc["calibration"]["validation"] == "forward"
    assert doc["calibration"]["n_windows"] == report.n_calib
    tr = doc["training"]
    assert tr["n_windows"] == 800 and re.fullmatch(r"[0-9a-f]{64}", tr["data_sha256"])
    assert len(tr["feature_mean"]) == len(tr["feature_std"]) == F
    assert tr["time_span"] == {"start": 1.75e9, "end": 1.75e9 + 8000.0}
    assert tr["split"]["train"] + tr["split"]["val"] + tr["split"]["calib"] == 800


def test_default_model_is_small(trained) -> None:
    """The default model for 40 features stays under 64 KB of ONNX."""
    _, report = trained
    assert report.widths == (20, 10, 20)
    assert report.onnx_bytes == (trained[0] / "bundle" / "model.onnx").stat().st_size
    assert report.onnx_bytes < 64 * 1024
    assert report.n_params == 2090


def test_shifted_window_scores_far_above_threshold(trained) -> None:
    """Fresh normal windows mostly stay below the threshold; a shifted one is far above."""
    d, _ = trained
    b = load_bundle(d / "bundle")
    normal = _windows(2000, seed=99)
    s, _ = b.score(normal)
    assert np.mean(s > b.meta.threshold) < 0.02
    shifted = normal[:50].copy()
    shifted[:, 10:15] += 4.0 * b.meta.scaler_scale[10:15]  # one channel, +4 sigma
    s_shift, err = b.score(shifted)
    assert np.all(s_shift > 5 * b.meta.threshold)
    # the explanation points at the shifted channel
    assert set(np.argsort(err.mean(axis=0))[-5:]) == set(range(10, 15))


def test_retrain_bumps_version_and_replaces_whole(tmp_path: Path) -> None:
    """A second train at the same path writes version 2 by rename, leaving no temp dirs."""
    ds = _dataset(tmp_path / "ds", n=300)
    train_bundle(ds, tmp_path / "b", epochs=5)
    r2 = train_bundle(ds, tmp_path / "b", epochs=5)
    assert r2.version == 2 and load_bundle(tmp_path / "b").meta.version == 2
    assert sorted(p.name for p in tmp_path.iterdir()) == ["b", "ds"]


def test_unreadable_old_bundle_is_not_overwritten(tmp_path: Path) -> None:
    """If the old version cannot be read, train refuses instead of restarting at 1."""
    ds = _dataset(tmp_path / "ds", n=300)
    (tmp_path / "b").mkdir()
    (tmp_path / "b" / "model.json").write_text("not json")
    with pytest.raises(BundleError, match="next version is unknown"):
        train_bundle(ds, tmp_path / "b", epochs=5)


def test_same_seed_same_bundle(tmp_path: Path) -> None:
    """Same data and seed -> the same ONNX bytes and thresholds."""
    ds = _dataset(tmp_path / "ds", n=300)
    a = train_bundle(ds, tmp_path / "a", epochs=10, seed=3, now=NOW)
    b = train_bundle(ds, tmp_path / "b", epochs=10, seed=3, now=NOW)
    assert (tmp_path / "a/model.onnx").read_bytes() == (tmp_path / "b/model.onnx").read_bytes()
    assert a.threshold == b.threshold
    ja = json.loads((tmp_path / "a/model.json").read_text())
    jb = json.loads((tmp_path / "b/model.json").read_text())
    for doc in (ja, jb):
        doc["training"].pop("train_time_s")
    assert ja == jb


@pytest.mark.parametrize(("n", "kwargs", "message"), [
    (30, {}, r"only 30 window\(s\) in mode 'run'; at least 50 are needed to train"),
    (300, {"min_windows": 400}, "at least 400 are needed"),
    (300, {"asset": "F-201"}, "is for asset 'P-101', not 'F-201'"),
    (300, {"mode": "idle"}, "has no windows in mode 'idle'"),
])
def test_refusals(tmp_path: Path, n: int, kwargs: dict, message: str) -> None:
    """Unusable datasets are refused with a clear message, and nothing is written."""
    ds = _dataset(tmp_path / "ds", n=n)
    with pytest.raises(DatasetError, match=message):
        train_bundle(ds, tmp_path / "b", epochs=2, **kwargs)
    assert not (tmp_path / "b").exists()


def test_several_modes_need_a_choice(tmp_path: Path) -> None:
    """A dataset with two modes trains one mode at a time."""
    ds = _dataset(tmp_path / "ds", n=300, modes=["run"] * 150 + ["idle"] * 150)
    with pytest.raises(DatasetError, match=r"has modes \['run', 'idle'\]: choose one"):
        train_bundle(ds, tmp_path / "b", epochs=2)
    r = train_bundle(ds, tmp_path / "b", epochs=2, mode="idle", min_windows=100)
    assert r.mode == "idle" and r.n_windows == 150
    assert load_bundle(tmp_path / "b").meta.model_id == "P-101/idle"


def test_split_blocks_partition() -> None:
    """The three parts partition the windows in whole blocks, the same for a seed."""
    tr, va, ca = split_blocks(1000, 0.15, 0.15, seed=0)
    assert sorted(np.concatenate([tr, va, ca]).tolist()) == list(range(1000))
    assert len(va) == len(ca) == 150
    for part in (va, ca):
        assert set((part // 10).tolist()) == {i // 10 for i in part}
        assert all(np.isin(np.arange(b * 10, b * 10 + 10), part).all() for b in set(part // 10))
    again = split_blocks(1000, 0.15, 0.15, seed=0)
    for x, y in zip((tr, va, ca), again, strict=True):
        np.testing.assert_array_equal(x, y)


def test_cli_entry(tmp_path: Path) -> None:
    """cmd_train runs from parsed arguments and prints the report."""
    ds = _dataset(tmp_path / "ds", n=300)
    parser = argparse.ArgumentParser()
    add_train_arguments(parser)
    args = parser.parse_args([str(ds), "--out", str(tmp_path / "b"), "--widths", "12,6,12",
                              "--epochs", "5", "--seed", "1"])
    out = io.StringIO()
    assert cmd_train(args, out=out) == 0
    text = out.getvalue()
    for word in ("windows used", "threshold", "parameters", "ONNX", "training time"):
        assert word in text
    assert load_bundle(tmp_path / "b").meta.raw["training"]["architecture"]["widths"] == [12, 6,
                                                                                           12]


def test_cli_rejects_bad_widths() -> None:
    """--widths must be positive integers."""
    parser = argparse.ArgumentParser()
    add_train_arguments(parser)
    with pytest.raises(SystemExit):
        parser.parse_args(["ds", "--out", "b", "--widths", "16,x"])
