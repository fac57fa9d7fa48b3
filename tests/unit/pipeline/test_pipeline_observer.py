"""Batched inference across assets in the one tick: a failing batched call falls back
to each model's own run, and the window observer gets only the assets it wants.

(The exact equality of the tick with the two-path pipeline it replaced is held by
test_tick_differential.py.)
"""

from __future__ import annotations

import logging
from collections import defaultdict
from pathlib import Path

import numpy as np
import pytest
from prometheus_client import CollectorRegistry

from agent.commission.export import export_dense, pca_autoencoder
from agent.config.load import parse_config
from agent.ingest.buffers import Buffers
from agent.models.bundle import Bundle, load_bundle, write_bundle
from agent.ops.metrics import Metrics
from agent.pipeline.runtime import AssetRuntime
from agent.pipeline.tick import Pipeline

FEATS = ["mean", "std", "rms", "peak_to_peak"]
RATE = 20
T0 = 1_796_119_200.0


class _Sink:
    def __init__(self) -> None:
        self.ticks: list[tuple[dict[str, list[tuple]], dict[str, int] | None]] = []

    def submit(self, msgs, sequences=None) -> None:  # type: ignore[no-untyped-def]
        per_asset: dict[str, list[tuple]] = defaultdict(list)
        for m in msgs:
            asset = m.topic.split("/assets/")[1].split("/")[0]
            per_asset[asset].append((m.topic, m.payload, m.kind, m.qos, m.retain, m.key))
        self.ticks.append((dict(per_asset), sequences))


def _channels(asset: str, rates: list[int], **extra) -> dict:  # type: ignore[no-untyped-def]
    return {f"c{c}": {"topic": f"t/{asset}/c{c}", "decoder": "json-batch", "rate_hz": r,
                      "features": FEATS, **(extra if c == 0 else {})}
            for c, r in enumerate(rates)}


# name -> (channel rates, extra keys of channel c0, lateness_s, has a model)
FLEET = {
    "P0": ([RATE] * 3, {}, 0.0, True),
    "P1": ([RATE] * 3, {}, 0.0, True),
    "P2": ([RATE] * 3, {}, 0.0, True),
    "P3": ([RATE] * 3, {}, 0.25, True),
    "Q0": ([RATE] * 2, {}, 0.0, True),  # another shape: a cut of its own
    "Q1": ([RATE] * 2, {}, 0.0, True),
    "N0": ([RATE] * 3, {}, 0.0, False),  # no model
    "H0": ([RATE] * 3, {"min": -50.0, "max": 50.0}, 0.0, True),  # a range check
    "R0": ([RATE, RATE // 2, RATE], {}, 0.0, True),  # two rates
}


def _bundle(tmp: Path, asset: str, n_ch: int, seed: int) -> Bundle:
    names = [f"c{c}.{f}" for c in range(n_ch) for f in FEATS]
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(300, len(names))) * rng.uniform(0.5, 2.0, len(names))
    meta = {"asset": asset, "mode": "default", "model_id": f"{asset}/default", "version": seed,
            "feature_names": names,
            # Features of N(0, 1) windows standardised about here; a burst (x6) is far off.
            "scaler": {"mean": [0.0, 1.0, 1.0, 3.5] * n_ch, "scale": [0.3, 0.3, 0.3, 1.0] * n_ch},
            "score": {"function": "mse"}, "threshold": 40.0, "clear_threshold": 20.0,
            "onnx": {"input": "x", "output": "recon"}}
    return load_bundle(write_bundle(tmp / f"{asset}-{seed}", export_dense(pca_autoencoder(z, 3)),
                                    meta))


def _twins(tmp: Path):  # type: ignore[no-untyped-def]
    doc = {"site": "s", "gateway": "g", "state_dir": str(tmp / "state"),
           "assets": [{"name": name,
                       "window": {"length_s": 1.0, "lateness_s": late, "timeout_s": 0.6},
                       "channels": _channels(name, rates, **extra)}
                      for name, (rates, extra, late, _) in FLEET.items()]}
    cfg = parse_config(doc, tmp)
    bundles = {name: (_bundle(tmp, name, len(rates), i + 1) if model else None)
               for i, (name, (rates, _, _, model)) in enumerate(FLEET.items())}
    twins = []
    for _ in range(2):
        buffers = Buffers(cfg)
        runtimes = [AssetRuntime.build(a, bundles[a.name], None) for a in cfg.assets]
        sink = _Sink()
        pipe = Pipeline(cfg, buffers, sink, Metrics(CollectorRegistry()),
                        logging.getLogger("test"), runtimes)
        twins.append((pipe, buffers, sink))
    return twins


def test_a_failing_batched_run_falls_back_to_each_model(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
        caplog: pytest.LogCaptureFixture) -> None:
    """The batched call raising: every window is still scored, by its own model, with
    the scores a pipeline whose batched call works gives."""
    (fast, fast_bufs, _), (slow, slow_bufs, _) = _twins(tmp_path)

    def broken(z: np.ndarray, slots: np.ndarray) -> np.ndarray:
        raise RuntimeError("injected")

    for g in fast.scorer.batched.groups:
        monkeypatch.setattr(g, "run", broken)
    rng = np.random.default_rng(5)
    for k in range(4):
        for ai, name in enumerate(FLEET):
            for ci, r in enumerate(FLEET[name][0]):
                ts = T0 + k + np.arange(r) / r
                vals = rng.normal(0.0, 1.0, r)
                for bufs in (fast_bufs, slow_bufs):
                    bufs.by_asset[ai][ci].append_block(ts, vals, T0 + k + 1.0)
        with caplog.at_level(logging.ERROR):
            a, b = fast.tick(T0 + k + 2.0), slow.tick(T0 + k + 2.0)
        assert a.windows_scored == b.windows_scored
    assert "batched inference failed" in caplog.text
    scored = [(x.last_score, y.last_score) for x, y in zip(fast.runtimes, slow.runtimes,
                                                            strict=True)]
    assert sum(1 for x, _ in scored if x is not None) == 8
    for x, y in scored:
        assert (x is None) == (y is None)
        if x is not None:
            np.testing.assert_allclose(x, y, rtol=1e-5)


def test_only_the_assets_the_observer_wants_are_observed(tmp_path: Path) -> None:
    """`observes` picks the assets whose windows the observer gets (with the feature
    row); the others are not observed and are scored as usual."""
    (pipe, bufs, _), _ = _twins(tmp_path)
    seen: list[tuple[str, float, int]] = []
    pipe.observer = lambda asset, mode, w, row, names: seen.append((asset, w.start, row.size))
    pipe.observes = lambda asset: asset == "P0"
    rng = np.random.default_rng(3)
    scored = 0
    for k in range(4):
        for ai, name in enumerate(FLEET):
            for ci, r in enumerate(FLEET[name][0]):
                bufs.by_asset[ai][ci].append_block(T0 + k + np.arange(r) / r,
                                                   rng.normal(0.0, 1.0, r), T0 + k + 1.0)
        scored += pipe.tick(T0 + k + 2.0).windows_scored
    assert seen == [("P0", T0 + k, 3 * len(FEATS)) for k in range(4)]
    assert scored == 4 * 8  # every asset with a model, observed or not
