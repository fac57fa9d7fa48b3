"""Test helpers: configs, PCA-autoencoder bundles and invented plant data (test data only)."""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
import yaml
from paho.mqtt.enums import CallbackAPIVersion

from agent.commission.export import export_dense, pca_autoencoder
from agent.core.features import FEATURE_INDEX, segment_features
from agent.models.bundle import write_bundle

CHANNELS = ("temp", "current", "pressure")
FEATS = ("mean", "std")
RATE_HZ = 10.0


def channel_signal(rng: np.random.Generator, load: float, n: int, fault: float = 0.0
                   ) -> dict[str, np.ndarray]:
    """Invented correlated readings of a pump at `load`; `fault` shifts the current."""
    return {
        "temp": 40 + 10 * load + rng.normal(0, 0.2, n),
        "current": 20 * load + 8 * fault + rng.normal(0, 0.3 + 1.5 * fault, n),
        "pressure": 3 + 2 * load + rng.normal(0, 0.05, n),
    }


def window_features(sig: dict[str, np.ndarray]) -> np.ndarray:
    feats = segment_features([sig[c] for c in CHANNELS])
    return np.array([feats[i, FEATURE_INDEX[f]] for i in range(len(CHANNELS)) for f in FEATS])


def feature_names() -> list[str]:
    return [f"{c}.{f}" for c in CHANNELS for f in FEATS]


def loads(rng: np.random.Generator, n: int) -> np.ndarray:
    """A slowly wandering load between 0.5 and 1.0, as a duty cycle might."""
    return 0.75 + 0.25 * np.sin(np.arange(n) / 7.0 + rng.uniform(0, 6))


def train_pca_bundle(dest: Path, asset: str, *, seed: int = 1, n_windows: int = 300,
                     samples: int = 10, components: int = 2, quantile: float = 0.995,
                     margin: float = 1.5) -> Path:
    """A linear (PCA) autoencoder bundle trained on invented normal windows."""
    rng = np.random.default_rng(seed)
    x = np.stack([window_features(channel_signal(rng, ld, samples))
                  for ld in rng.uniform(0.5, 1.0, n_windows)])
    mean, scale = x.mean(0), x.std(0)
    z = (x - mean) / scale
    layers = pca_autoencoder(z[: n_windows // 2], components)
    from agent.commission.export import forward_numpy

    held = z[n_windows // 2:]
    scores = ((held - forward_numpy(layers, held)) ** 2).mean(1)
    thr = float(np.quantile(scores, quantile) * margin)
    meta = {
        "asset": asset, "mode": "default", "model_id": f"{asset}/default", "version": 1,
        "feature_names": feature_names(),
        "scaler": {"mean": mean.tolist(), "scale": scale.tolist()},
        "score": {"function": "mse"}, "threshold": thr, "clear_threshold": 0.8 * thr,
        "calibration": {"method": "quantile", "quantile": quantile, "margin": margin,
                        "n_windows": int(held.shape[0])},
        "training": {"n_windows": n_windows, "data_sha256": "test"},
        "onnx": {"input": "x", "output": "recon", "opset": 17, "ir_version": 8},
        "created": "2026-12-01T00:00:00.000Z", "watchkeep_version": "test",
    }
    return write_bundle(dest, export_dense(layers), meta)


def asset_doc(name: str, bundle: Path | None, *, prefix: str = "plant") -> dict[str, Any]:
    doc: dict[str, Any] = {
        "name": name,
        "window": {"length_s": 1.0, "lateness_s": 0.2, "timeout_s": 2.0, "min_coverage": 0.8},
        "detector": {"raise_k": 2, "raise_n": 3, "clear_m": 3},
        "channels": {c: {"topic": f"{prefix}/{name}/{c}", "decoder": "json",
                         "rate_hz": RATE_HZ, "features": list(FEATS)} for c in CHANNELS},
    }
    if bundle is not None:
        doc["bundle"] = str(bundle)
    return doc


def rates_doc(state_dir: Path, rates: dict[str, tuple[float, ...]],
              feats: dict[str, list[str]], default: list[str], **window: float
              ) -> dict[str, Any]:
    """A config document of assets whose `json-batch` channels c0, c1, ... have the
    rates `rates[asset]`, each wanting the features `feats.get(asset, default)`: 1 s
    windows closing at once (lateness 0, timeout 0.5 s), with `window`'s other keys."""
    return {"site": "s", "gateway": "g", "state_dir": str(state_dir),
            "assets": [{"name": a, "window": {"length_s": 1.0, "lateness_s": 0.0,
                                              "timeout_s": 0.5, **window},
                        "channels": {f"c{i}": {"topic": f"t/{a}/{i}", "decoder": "json-batch",
                                               "rate_hz": r,
                                               "features": feats.get(a, default)}
                                     for i, r in enumerate(rs)}}
                       for a, rs in rates.items()]}


def write_config(path: Path, local_port: int, upstream_port: int, assets: list[dict[str, Any]],
                 **extra: Any) -> Path:
    doc = {"site": "testworks", "gateway": "gw1", "state_dir": str(path.parent / "state"),
           "local_broker": {"host": "127.0.0.1", "port": local_port},
           "upstream_broker": {"host": "127.0.0.1", "port": upstream_port, "keepalive_s": 15},
           "http": {"port": 0}, "pipeline": {"tick_s": 0.05}, "assets": assets, **extra}
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    return path


def readings(asset: str, t0: float, n_windows: int, *, seed: int, fault_windows: range = range(0),
             prefix: str = "plant") -> Iterator[tuple[str, bytes]]:
    """(topic, payload) of `json` readings, window by window, in time order."""
    rng = np.random.default_rng(seed)
    n = int(RATE_HZ)
    for w, ld in enumerate(loads(rng, n_windows)):
        sig = channel_signal(rng, float(ld), n, fault=1.0 if w in fault_windows else 0.0)
        for i in range(n):
            ts = t0 + w + i / RATE_HZ
            for c in CHANNELS:
                yield (f"{prefix}/{asset}/{c}",
                       json.dumps({"ts": round(ts, 4), "value": float(sig[c][i])}).encode())


class Collector:
    """A plain paho subscriber, as a maintenance system would run one."""

    def __init__(self, port: int, topic: str, client_id: str = "test-collector") -> None:
        self.messages: list[tuple[str, bytes, bool]] = []
        self.lock = threading.Lock()
        self.ready = threading.Event()
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id)
        self.topic = topic

        def on_connect(c: mqtt.Client, u: Any, f: Any, rc: Any, p: Any) -> None:
            c.subscribe(topic, qos=1)

        def on_subscribe(c: mqtt.Client, u: Any, mid: Any, rc: Any, p: Any) -> None:
            self.ready.set()

        def on_message(c: mqtt.Client, u: Any, msg: mqtt.MQTTMessage) -> None:
            with self.lock:
                self.messages.append((msg.topic, msg.payload, bool(msg.retain)))

        self.client.on_connect = on_connect
        self.client.on_subscribe = on_subscribe
        self.client.on_message = on_message
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()
        if not self.ready.wait(10):
            raise RuntimeError("collector did not subscribe")

    def json(self, suffix: str = "") -> list[dict[str, Any]]:
        with self.lock:
            return [json.loads(p) for t, p, _ in self.messages if t.endswith(suffix)]

    def events(self) -> list[dict[str, Any]]:
        return [m for m in self.json("/events")]

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def publisher(port: int, client_id: str = "test-publisher") -> mqtt.Client:
    c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id)
    c.connect("127.0.0.1", port)
    c.loop_start()
    return c


class StampedCollector:
    """A maintenance-side subscriber on one broker noting when (time.monotonic()) each
    message came; `clean_session=False` keeps its session and QoS 1 queue on the broker."""

    def __init__(self, port: int, topic: str, client_id: str, *,
                 clean_session: bool = True) -> None:
        self.got: list[tuple[float, dict[str, Any]]] = []
        self.lock = threading.Lock()
        self.suback: list[Any] = []
        ready = threading.Event()
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id,
                                  clean_session=clean_session)
        self.client.reconnect_delay_set(0.2, 1)

        def on_subscribe(c: mqtt.Client, u: Any, mid: Any, rcs: Any, p: Any) -> None:
            self.suback = list(rcs)
            ready.set()

        self.client.on_connect = lambda c, u, f, rc, p: c.subscribe(topic, qos=1)
        self.client.on_subscribe = on_subscribe
        self.client.on_message = self._on_message
        self.client.connect("127.0.0.1", port, keepalive=15)
        self.client.loop_start()
        if not ready.wait(20):
            raise RuntimeError("collector did not subscribe")

    def _on_message(self, c: mqtt.Client, u: Any, msg: mqtt.MQTTMessage) -> None:
        with self.lock:
            self.got.append((time.monotonic(), json.loads(msg.payload)))

    def events(self) -> list[tuple[float, dict[str, Any]]]:
        with self.lock:
            return list(self.got)

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def sparkplug_payload(seq: int | None, metrics: list[dict[str, Any]],
                      ts_ms: int | None) -> bytes:
    """A Sparkplug B payload: its timestamp and seq when given, each metric's fields as
    given (name, alias, datatype, a value field, ...)."""
    from agent.sparkplug_b.sparkplug_b_pb2 import Payload

    p = Payload()
    if ts_ms is not None:
        p.timestamp = ts_ms
    if seq is not None:
        p.seq = seq
    for spec in metrics:
        m = p.metrics.add()
        for k, v in spec.items():
            setattr(m, k, v)
    return p.SerializeToString()


def rows_both_ways(todo: Any, monkeypatch: Any) -> tuple[Any, Any]:
    """`featurize.feature_rows(todo)` held row for row, bit for bit, to the general
    path's (the aligned shortcut turned off); returns the rows and `_aligned(todo)`."""
    from agent.pipeline import featurize

    real = featurize._aligned
    got = featurize.feature_rows(todo)
    monkeypatch.setattr(featurize, "_aligned", lambda todo: None)
    want = featurize.feature_rows(todo)
    monkeypatch.setattr(featurize, "_aligned", real)
    assert len(got) == len(want) == len(todo)
    for g, w in zip(got, want, strict=True):
        np.testing.assert_array_equal(g, w)
    return got, real(todo)
