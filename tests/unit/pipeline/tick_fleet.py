"""A fleet with every kind of check the tick knows, fed the same way for a seed, and the
trace of what the tick did: the oracle of tests/unit/pipeline/test_tick_differential.py.

Assets: two full-featured ones (a waveform channel with spectra and velocity RMS, slow
channels, sensor health of every kind, limits, operating modes whose speed moves
between bands, settling), one with a model per mode and a mode not scored, one with
ISO 10816-3 zones, one with hopping windows, two plain ones, one of two rates and one
without a model. The feed knocks them about: bursts that raise and clear anomalies,
spikes out of range, a flat-lined channel, a channel that goes silent (stale) and
comes back, samples short, late or missing for a tick, and a model swapped mid-run.

`trace(tmp, seed)` returns, per tick, a digest of the tick's messages (per asset, in
order), sequences and stats, and at the end a digest of the metrics (all but timing),
the runtimes' state and `status()`. The expected digests were written by the pipeline
before the one-tick rewrite of issue 22 (`python -m tests.unit.pipeline.tick_fleet
--write`, run on commit c25b27a's two-path pipeline), so the test holds the new tick to
the old one's exact output.
"""

from __future__ import annotations

import hashlib
import json
import logging
import sys
from pathlib import Path
from typing import Any

import numpy as np
from prometheus_client import CollectorRegistry

from agent.commission.export import export_dense, pca_autoencoder
from agent.config.load import parse_config
from agent.ingest.buffers import Buffers
from agent.models.bundle import load_bundle, write_bundle
from agent.ops.metrics import Metrics
from agent.pipeline.runtime import AssetRuntime
from agent.pipeline.tick import Pipeline

T0 = 1_796_119_200.0
VIB_HZ, SLOW_HZ = 256, 10
TD = ["mean", "std", "rms", "peak_to_peak", "kurtosis"]
GOLDEN = Path(__file__).with_name("tick_golden.json")
SEEDS = (0, 1, 2)
TICKS = 90


def _ch(asset: str, name: str, rate: int, feats: list[str], **extra: Any) -> dict[str, Any]:
    return {"topic": f"t/{asset}/{name}", "decoder": "json-batch", "rate_hz": rate,
            "features": feats, **extra}


def _full(name: str, **asset_extra: Any) -> dict[str, Any]:
    return {"name": name,
            "window": {"length_s": 1.0, "lateness_s": 0.25, "timeout_s": 0.6},
            "channels": {
                "vib": _ch(name, "vib", VIB_HZ, ["rms", "std", "kurtosis", "peak_to_peak"],
                           unit="m/s2", min=-40, max=40, flatline_windows=3, stale_s=3,
                           spectrum={"bands_hz": [[10, 60], [60, 128]],
                                     "velocity_rms": True, "orders": [1]},
                           limits={"kurtosis": {"alert": 5, "alarm": 9, "on_delay": 1}}),
                "temp": _ch(name, "temp", SLOW_HZ, ["mean", "max"], min=-40, max=150,
                            max_rate_per_s=40, stale_s=3,
                            limits={"max": {"alert": 70, "alarm": 90, "deadband": 2}}),
                "speed": _ch(name, "speed", SLOW_HZ, ["mean"], min=0, max=4000),
                "current": _ch(name, "current", SLOW_HZ, ["mean", "std"], min=0, max=500,
                               flatline_windows=3)},
            "speed_channel": "speed",
            "modes": {"channel": "speed", "hysteresis": 50, "settling_s": 2,
                      "states": {"stopped": {"max": 300, "scored": False},
                                 "low": {"min": 300, "max": 1500},
                                 "high": {"min": 1500}}},
            **asset_extra}


def _plain(name: str, rates: list[int], **window: float) -> dict[str, Any]:
    return {"name": name,
            "window": {"length_s": 1.0, "lateness_s": 0.0, "timeout_s": 0.6, **window},
            "channels": {f"c{c}": _ch(name, f"c{c}", r, ["mean", "std", "rms"])
                         for c, r in enumerate(rates)}}


def fleet_docs() -> list[dict[str, Any]]:
    zones = _full("Z0", iso10816={"group": 2, "support": "rigid", "baseline_mm_s": 0.5,
                                  "channels": ["vib"], "on_delay": 1})
    hop = _plain("H0", [20, 20], length_s=2.0, hop_s=1.0)
    hop["channels"]["c0"].update({"min": -30, "max": 30})
    return [_full("F0"), _full("F1"), _full("M0"), zones, hop,
            _plain("P0", [20, 20, 20]), _plain("P1", [20, 20, 20]),
            _plain("R0", [20, 10]), _plain("N0", [20, 20])]


def _names(doc: dict[str, Any]) -> list[str]:
    out = []
    for ch, c in doc["channels"].items():
        out += [f"{ch}.{f}" for f in c["features"]]
        sp = c.get("spectrum")
        if sp:
            out += [f"{ch}.band_{lo}_{hi}_hz" for lo, hi in sp["bands_hz"]]
            out += [f"{ch}.dominant_hz", f"{ch}.dominant_amp"]
            out += [f"{ch}.order_{o}x_amp" for o in sp.get("orders", [])]
            if sp.get("velocity_rms"):
                out.append(f"{ch}.velocity_rms_mm_s")
    return out


def _bundle(tmp: Path, asset: str, mode: str, names: list[str], seed: int,
            stats: tuple[np.ndarray, np.ndarray] | None) -> Path:
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(300, len(names)))
    mean, scale = stats if stats is not None else (np.zeros(len(names)), np.ones(len(names)))
    meta = {"asset": asset, "mode": mode, "model_id": f"{asset}/{mode}", "version": seed,
            "feature_names": names,
            "scaler": {"mean": [float(v) for v in mean], "scale": [float(v) for v in scale]},
            "score": {"function": "mse"}, "threshold": 30.0, "clear_threshold": 12.0,
            "onnx": {"input": "x", "output": "recon"}}
    return write_bundle(tmp / f"{asset}-{mode}-{seed}", export_dense(pca_autoencoder(z, 3)),
                        meta)


# Typical feature values of a quiet window (mean, spread), per feature name suffix:
# the scalers put a quiet window near 0 and a burst far off.
def _stats(names: list[str]) -> tuple[np.ndarray, np.ndarray]:
    typical = {"mean": (0.0, 0.5), "std": (1.0, 0.2), "rms": (1.0, 0.2),
               "kurtosis": (3.0, 1.0), "peak_to_peak": (5.0, 1.5), "max": (51.0, 1.0),
               "dominant_hz": (60.0, 40.0), "dominant_amp": (0.2, 0.1),
               "velocity_rms_mm_s": (2.0, 1.0)}
    mean, scale = [], []
    for n in names:
        ch, f = n.split(".", 1)
        m, s = typical.get(f, (0.01, 0.05))
        if ch == "temp" and f == "mean":
            m = 50.0
        if ch == "speed":
            m, s = 1000.0, 400.0
        if ch == "current" and f == "mean":
            m = 20.0
        mean.append(m)
        scale.append(s)
    return np.asarray(mean), np.asarray(scale)


class _Sink:
    def __init__(self) -> None:
        self.ticks: list[Any] = []

    def submit(self, msgs: Any, sequences: Any = None) -> None:
        # Per asset, in order: the order of different assets' messages within one
        # tick's batch is not part of the contract (the outbox keeps the batch whole).
        per_asset: dict[str, list[Any]] = {}
        for m in msgs:
            asset = m.topic.split("/assets/")[1].split("/")[0]
            per_asset.setdefault(asset, []).append(
                (m.topic, m.payload.decode(), m.kind.value, m.qos, m.retain, m.key))
        self.ticks.append((dict(sorted(per_asset.items())), sequences))


def build(tmp: Path) -> tuple[Pipeline, Buffers, _Sink, dict[str, Any]]:
    docs = fleet_docs()
    for d in docs:
        names = _names(d)
        if d["name"] == "M0":
            for i, m in enumerate(("low", "high")):
                d["modes"]["states"][m]["bundle"] = str(
                    _bundle(tmp, "M0", m, names, 10 + i, _stats(names)))
        elif d["name"] != "N0":
            d["bundle"] = str(_bundle(tmp, d["name"], "default", names, 1, _stats(names)))
    doc = {"site": "s", "gateway": "g", "state_dir": str(tmp / "state"), "assets": docs}
    cfg = parse_config(doc, tmp)
    buffers = Buffers(cfg)
    runtimes = []
    for a in cfg.assets:
        b = load_bundle(a.bundle) if a.bundle is not None else None
        runtimes.append(AssetRuntime.build(a, b, None))
    sink = _Sink()
    pipe = Pipeline(cfg, buffers, sink, Metrics(CollectorRegistry()),
                    logging.getLogger("tick-fleet"), runtimes)
    return pipe, buffers, sink, {d["name"]: d for d in docs}


def _signal(rng: np.random.Generator, ch: str, n: int, gain: float, speed: float
            ) -> np.ndarray:
    if ch == "temp":
        return 50.0 + 0.3 * rng.normal(size=n) * gain
    if ch == "speed":
        return speed + 5.0 * rng.normal(size=n)
    if ch == "current":
        return 20.0 + rng.normal(size=n) * gain
    return rng.normal(size=n) * gain


def _digest(x: Any) -> str:
    return hashlib.sha256(json.dumps(x, sort_keys=True, default=str).encode()).hexdigest()[:16]


def _metrics(pipe: Pipeline) -> list[tuple[str, str, float]]:
    return sorted((s.name, repr(sorted(s.labels.items())), s.value)
                  for f in pipe.metrics.registry.collect() for s in f.samples
                  if s.name.startswith("watchkeep_") and "_seconds" not in s.name
                  and not s.name.endswith("_created"))


def trace(tmp: Path, seed: int, ticks: int = TICKS) -> dict[str, Any]:
    """Run the fleet for `ticks` ticks; the digests of what the tick did."""
    pipe, buffers, sink, docs = build(tmp)
    rng = np.random.default_rng(seed)
    names = list(docs)
    burst = dict.fromkeys(names, 0)
    flat = dict.fromkeys(names, 0)
    silent = dict.fromkeys(names, 0)
    per_tick: list[str] = []
    t = T0
    speeds = [1000.0] * 30 + [2000.0] * 20 + [100.0] * 10 + [1000.0] * (ticks + 10)
    events: dict[str, int] = {}
    for tick in range(ticks):
        dt = float(rng.choice([0.25, 0.5, 0.5, 1.0]))
        arrival = t + dt
        for ai, name in enumerate(names):
            how = rng.choice(["step"] * 14 + ["short", "silent", "late"])
            if burst[name] == 0 and rng.random() < 0.04:
                burst[name] = 6
            if flat[name] == 0 and rng.random() < 0.02:
                flat[name] = 8
            if silent[name] == 0 and rng.random() < 0.01:
                silent[name] = 10
            gain = 6.0 if burst[name] else 1.0
            burst[name] = max(0, burst[name] - 1)
            if how == "silent":
                continue
            chans = list(docs[name]["channels"].items())
            for ci, (ch, c) in enumerate(chans):
                if ci == 0 and silent[name]:
                    continue
                r = c["rate_hz"]
                k0, k1 = round((t - T0) * r), round((arrival - T0) * r)
                ts = T0 + np.arange(k0, k1) / r
                if how == "short" and ci == 0:
                    ts = ts[:-1]
                if how == "late":
                    ts = ts - 1.5
                vals = _signal(rng, ch, ts.size, gain, speeds[tick])
                if flat[name] and ci == len(chans) - 1:
                    vals = np.full(ts.size, 3.0)
                if rng.random() < 0.01 and vals.size:
                    vals[rng.integers(vals.size)] = 1e4  # a spike out of range
                buffers.by_asset[ai][ci].append_block(ts, vals, arrival)
            flat[name] = max(0, flat[name] - 1)
            silent[name] = max(0, silent[name] - 1)
        if tick == 45:  # a model swapped in mid-run
            p1 = names.index("P1")
            nm = _names(docs["P1"])
            pipe.runtimes[p1].set_bundle(
                load_bundle(_bundle(tmp, "P1", "default", nm, 77, _stats(nm))), None)
        now = arrival + float(rng.choice([0.0, 0.1, 0.7]))
        n_before = len(sink.ticks)
        st = pipe.tick(now)
        got = sink.ticks[n_before:]
        for per_asset, _ in got:
            for _, payload, *_ in (m for msgs in per_asset.values() for m in msgs):
                if '"specversion"' in payload:
                    etype = json.loads(payload)["type"]
                    events[etype] = events.get(etype, 0) + 1
        per_tick.append(_digest([got, [st.windows_closed, st.windows_scored, st.messages,
                                       st.events]]))
        t = arrival
    state = [(rt.cfg.name, rt.state.value, rt.last_score, rt.sequence, rt.mode,
              rt.detector.peak_score, rt.coverage, rt.empty_streak) for rt in pipe.runtimes]
    return {"ticks": per_tick, "metrics": _digest(_metrics(pipe)), "state": _digest(state),
            "status": _digest(pipe.status()), "events": dict(sorted(events.items()))}


def main(argv: list[str]) -> int:
    import tempfile

    if argv[1:] != ["--write"]:
        print("usage: python -m tests.unit.pipeline.tick_fleet --write", file=sys.stderr)
        return 2
    out = {}
    for seed in SEEDS:
        with tempfile.TemporaryDirectory() as d:
            out[str(seed)] = trace(Path(d), seed)
        print(seed, out[str(seed)]["events"])
    GOLDEN.write_text(json.dumps(out, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv))
