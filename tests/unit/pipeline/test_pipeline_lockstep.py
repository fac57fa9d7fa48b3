"""The lockstep path gives what the general path gives: the same messages, metrics and
state, tick by tick.

Twin pipelines on one config and the same models, one with the lockstep path (the
default) and one without, get the same samples. The fleet mixes assets the lockstep
path takes (plain, one rate) with ones it must not (a sensor range check, two rates,
no model) and feeds that knock assets out of lockstep now and then (a channel a sample
short, a silent tick, samples late), bursts that raise and clear anomalies, and a
model swapped in mid-run. Every tick the two must hand the sink the same messages
per asset and the same event sequence numbers; at the end the metrics (all but the
timing histograms), the detectors and `status()` must agree.
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
    for lockstep in (True, False):
        buffers = Buffers(cfg)
        runtimes = [AssetRuntime.build(a, bundles[a.name], None) for a in cfg.assets]
        sink = _Sink()
        pipe = Pipeline(cfg, buffers, sink, Metrics(CollectorRegistry()),
                        logging.getLogger("test"), runtimes, lockstep=lockstep)
        twins.append((pipe, buffers, sink))
    return twins


def _metrics(pipe: Pipeline) -> list[tuple[str, str, float]]:
    return sorted((s.name, repr(sorted(s.labels.items())), s.value)
                  for f in pipe.metrics.registry.collect() for s in f.samples
                  if s.name.startswith("watchkeep_") and "_seconds" not in s.name
                  and not s.name.endswith("_created"))


@pytest.mark.parametrize("seed", range(4))
def test_lockstep_and_general_paths_agree(tmp_path: Path, seed: int) -> None:
    (fast, fast_bufs, fast_sink), (slow, slow_bufs, slow_sink) = _twins(tmp_path)
    taken = [0]
    score_lockstep = fast._score_lockstep

    def counted(rts, cut, out, stats):  # type: ignore[no-untyped-def]
        taken[0] += len(cut.items)
        score_lockstep(rts, cut, out, stats)

    fast._score_lockstep = counted  # type: ignore[method-assign]
    rng = np.random.default_rng(seed)
    names = list(FLEET)
    burst = dict.fromkeys(names, 0)
    t = T0
    swap_at = 40
    for tick in range(120):
        dt = float(rng.choice([0.25, 0.5, 0.5, 1.0]))
        arrival = t + dt
        for ai, name in enumerate(names):
            rates = FLEET[name][0]
            how = rng.choice(["step"] * 12 + ["short", "silent", "late"])
            if burst[name] == 0 and rng.random() < 0.03:
                burst[name] = 5  # ticks of large values: raises, then clears
            gain = 6.0 if burst[name] else 1.0
            burst[name] = max(0, burst[name] - 1)
            if how == "silent":
                continue
            for ci, r in enumerate(rates):
                k0, k1 = round((t - T0) * r), round((arrival - T0) * r)
                ts = T0 + np.arange(k0, k1) / r
                if how == "short" and ci == 0:
                    ts = ts[:-1]
                if how == "late":
                    ts = ts - 1.5  # already closed windows: counted late
                vals = rng.normal(0.0, gain, ts.size)
                for bufs in (fast_bufs, slow_bufs):
                    bufs.by_asset[ai][ci].append_block(ts, vals, arrival)
        if tick == swap_at:  # a new model for P1 on both: the plan must follow it
            new = _bundle(tmp_path, "P1", 3, 77)
            for pipe in (fast, slow):
                pipe.runtimes[1].set_bundle(new, None)
        now = arrival + float(rng.choice([0.0, 0.1, 0.7]))
        a, b = fast.tick(now), slow.tick(now)
        assert (a.windows_closed, a.windows_scored, a.messages, a.events) == \
            (b.windows_closed, b.windows_scored, b.messages, b.events), tick
        assert fast_sink.ticks[-1:] == slow_sink.ticks[-1:], tick
        t = arrival
    assert len(fast_sink.ticks) == len(slow_sink.ticks)
    assert _metrics(fast) == _metrics(slow)
    for x, y in zip(fast.runtimes, slow.runtimes, strict=True):
        assert (x.state, x.last_score, x.sequence, x.detector.peak_score) == \
            (y.state, y.last_score, y.sequence, y.detector.peak_score), x.cfg.name
    assert fast.status() == slow.status()
    # The comparison means something: a good share of the windows went the lockstep
    # way (7 of the 9 assets can, when their feed allows), and anomalies were raised
    # and cleared.
    closed = sum(v for n, _, v in _metrics(fast) if n == "watchkeep_windows_closed_total")
    assert taken[0] > 0.25 * closed
    payloads = [p for tk, _ in fast_sink.ticks for msgs in tk.values() for _, p, *_ in msgs]
    assert any(b"anomaly.raised" in p for p in payloads)
    assert any(b"anomaly.cleared" in p for p in payloads)


def test_a_failing_batched_run_in_lockstep_falls_back_to_each_model(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
        caplog: pytest.LogCaptureFixture) -> None:
    """The batched call raising: every window is still scored, by its own model, with
    the scores the general path gives."""
    (fast, fast_bufs, _), (slow, slow_bufs, _) = _twins(tmp_path)

    def broken(z: np.ndarray, slots: np.ndarray) -> np.ndarray:
        raise RuntimeError("injected")

    for g in fast._batched.groups:
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


def test_an_observed_asset_takes_the_general_path_and_the_rest_are_not_observed(
        tmp_path: Path) -> None:
    """`observes` picks the assets whose windows the observer gets (with the feature
    row); the others are neither observed nor kept from the lockstep path."""
    (pipe, bufs, _), _ = _twins(tmp_path)
    seen: list[tuple[str, float, int]] = []
    pipe.observer = lambda asset, mode, w, row, names: seen.append((asset, w.start, row.size))
    pipe.observes = lambda asset: asset == "P0"
    taken: list[str] = []
    score_lockstep = pipe._score_lockstep

    def counted(rts, cut, out, stats):  # type: ignore[no-untyped-def]
        taken.extend(rt.cfg.name for rt in rts)
        score_lockstep(rts, cut, out, stats)

    pipe._score_lockstep = counted  # type: ignore[method-assign]
    rng = np.random.default_rng(3)
    for k in range(4):
        for ai, name in enumerate(FLEET):
            for ci, r in enumerate(FLEET[name][0]):
                bufs.by_asset[ai][ci].append_block(T0 + k + np.arange(r) / r,
                                                   rng.normal(0.0, 1.0, r), T0 + k + 1.0)
        pipe.tick(T0 + k + 2.0)
    assert seen == [("P0", T0 + k, 3 * len(FEATS)) for k in range(4)]
    assert "P0" not in taken and {"P1", "Q0", "N0"} <= set(taken)
