"""The tick's scores with batched inference equal each model's own `Bundle.score`.

Several assets, each with its own model (different weights), one window each per
tick: the scores the tick gives are those of `Bundle.score` on the window's feature
row (the per-model onnxruntime run), to float32 rounding. Also: a model swapped in
between ticks is used at once and joins the batch at the next build, and a batched
run that fails falls back to the per-model runs without losing a window.
"""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
import pytest
from prometheus_client import CollectorRegistry

from agent.commission.export import export_dense, pca_autoencoder
from agent.config.load import parse_config
from agent.ingest.buffers import Buffers
from agent.models.bundle import load_bundle, write_bundle
from agent.ops.metrics import Metrics
from agent.pipeline.runtime import AssetRuntime
from agent.pipeline.tick import Pipeline

FEATS = ["mean", "std", "rms", "peak_to_peak"]
N_ASSETS, N_CH, RATE = 5, 3, 20


class _Sink:
    def submit(self, msgs, **_) -> None:  # type: ignore[no-untyped-def]
        pass


def _bundle(tmp: Path, name: str, seed: int):  # type: ignore[no-untyped-def]
    names = [f"c{c}.{f}" for c in range(N_CH) for f in FEATS]
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(200, len(names))) * rng.uniform(0.5, 2.0, len(names))
    meta = {"asset": name, "mode": "default", "model_id": f"{name}/default", "version": seed,
            "feature_names": names,
            "scaler": {"mean": [0.5] * len(names), "scale": [2.0] * len(names)},
            "score": {"function": "mse"}, "threshold": 1e9, "clear_threshold": 1e8,
            "onnx": {"input": "x", "output": "recon"}}
    return load_bundle(write_bundle(tmp / f"{name}-{seed}", export_dense(pca_autoencoder(z, 3)),
                                    meta))


def _setup(tmp: Path):  # type: ignore[no-untyped-def]
    doc = {"site": "s", "gateway": "g", "state_dir": str(tmp / "state"),
           "assets": [{"name": f"A{i}",
                       "window": {"length_s": 1.0, "lateness_s": 0.0, "timeout_s": 0.5},
                       "channels": {f"c{c}": {"topic": f"t/A{i}/c{c}", "decoder": "json-batch",
                                              "rate_hz": RATE, "features": FEATS}
                                    for c in range(N_CH)}}
                      for i in range(N_ASSETS)]}
    cfg = parse_config(doc, tmp)
    buffers = Buffers(cfg)
    runtimes = [AssetRuntime.build(a, _bundle(tmp, a.name, i + 1), None)
                for i, a in enumerate(cfg.assets)]
    rows: dict[str, np.ndarray] = {}
    pipe = Pipeline(cfg, buffers, _Sink(), Metrics(CollectorRegistry()),
                    logging.getLogger("test"), runtimes,
                    observer=lambda asset, mode, w, row, names: rows.__setitem__(asset, row.copy()))
    return pipe, buffers, runtimes, rows


def _tick(pipe: Pipeline, buffers: Buffers, k: int, rng: np.random.Generator) -> None:
    ts = k + np.arange(RATE) / RATE
    for ai in range(N_ASSETS):
        for ci in range(N_CH):
            buffers.by_asset[ai][ci].append_block(ts, rng.normal(ci, 1.0 + ai, RATE), k + 1.0)
    pipe.tick(k + 2.0)


def _check_scores(runtimes: list[AssetRuntime], rows: dict[str, np.ndarray]) -> None:
    for rt in runtimes:
        bundle, _ = rt.models.for_mode(rt.mode)
        assert bundle is not None and rt.last_score is not None
        want, _ = bundle.score(rows[rt.cfg.name][None, :])
        np.testing.assert_allclose(rt.last_score, want[0], rtol=1e-5, atol=1e-9,
                                   err_msg=rt.cfg.name)


def test_batched_scores_equal_each_models_own_score(tmp_path: Path) -> None:
    pipe, buffers, runtimes, rows = _setup(tmp_path)
    assert pipe.scorer.batched.n_models == N_ASSETS and len(pipe.scorer.batched.groups) == 1
    rng = np.random.default_rng(0)
    for k in range(4):
        rows.clear()
        _tick(pipe, buffers, k, rng)
        if k >= 1:  # the first window is placed, not closed
            assert set(rows) == {rt.cfg.name for rt in runtimes}
            _check_scores(runtimes, rows)


def test_a_swapped_model_scores_at_once_and_joins_the_batch(tmp_path: Path) -> None:
    pipe, buffers, runtimes, rows = _setup(tmp_path)
    rng = np.random.default_rng(1)
    for k in range(2):
        _tick(pipe, buffers, k, rng)
    new = _bundle(tmp_path, "A2", 99)
    runtimes[2].set_bundle(new, None)
    assert not pipe.scorer.batched.considered(new)
    rows.clear()
    _tick(pipe, buffers, 2, rng)
    _check_scores(runtimes, rows)  # scored by its own run this tick
    assert pipe.scorer.batched.slot_of(new) is not None  # rebuilt after the tick
    rows.clear()
    _tick(pipe, buffers, 3, rng)
    _check_scores(runtimes, rows)


def test_a_failing_batched_run_falls_back_to_each_model(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
        caplog: pytest.LogCaptureFixture) -> None:
    pipe, buffers, runtimes, rows = _setup(tmp_path)
    rng = np.random.default_rng(2)
    _tick(pipe, buffers, 0, rng)

    def broken(z: np.ndarray, slots: np.ndarray) -> np.ndarray:
        raise RuntimeError("injected")

    monkeypatch.setattr(pipe.scorer.batched.groups[0], "run", broken)
    scored = pipe.metrics.windows_scored
    before = sum(scored.labels(rt.cfg.name)._value.get() for rt in runtimes)
    with caplog.at_level(logging.ERROR):
        rows.clear()
        _tick(pipe, buffers, 1, rng)
    assert "batched inference failed" in caplog.text
    _check_scores(runtimes, rows)
    after = sum(scored.labels(rt.cfg.name)._value.get() for rt in runtimes)
    assert after - before == N_ASSETS
