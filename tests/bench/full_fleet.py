"""The full-featured fleet of `python -m tests.bench pipeline` (its `full_featured` row).

200 assets, each with every kind of check the tick knows: a waveform channel (1,024 Hz,
time-domain features, band powers, the dominant line and velocity RMS), three slow
channels (10 Hz), sensor health on every channel (range, flatline, rate of change,
staleness), a static limit on the waveform's kurtosis and on the temperature's max,
operating modes on the speed channel, and one model per asset (weights of its own).

The bare reference does the same feature and inference work with bare numpy and
onnxruntime: the time-domain features of every channel, one real FFT over every
waveform segment with the same spectral features, one `run` per model. It does none of
the judging (health, modes, limits, detector, messages): that is what the pipeline adds.
"""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any

import numpy as np
import onnxruntime as ort
from prometheus_client import CollectorRegistry

from agent.config.load import parse_config
from agent.core.spectral import VELOCITY_BAND_HZ, band_mask, hann
from agent.ingest.buffers import Buffers
from agent.models.bundle import _session_options, load_bundle
from agent.ops.metrics import Metrics
from agent.pipeline.runtime import AssetRuntime
from agent.pipeline.tick import Pipeline
from tests.bench.common import quiet_bundle

N_ASSETS = 200
VIB_HZ, SLOW_HZ = 1024, 10
VIB_FEATS = ["rms", "std", "peak_to_peak", "kurtosis", "crest_factor"]
BANDS = [[10, 100], [100, 300], [300, 512]]
SLOW = {"temp": ["mean", "max"], "speed": ["mean"], "current": ["mean", "std"]}


class NullSink:
    def __init__(self) -> None:
        self.n = 0

    def submit(self, msgs: Any, **_: Any) -> None:
        self.n += len(msgs)


def asset_doc(i: int, bundle: Path | None) -> dict[str, Any]:
    """One full-featured asset's config."""
    name = f"F{i:03d}"
    doc: dict[str, Any] = {
        "name": name,
        "window": {"length_s": 1.0, "lateness_s": 0.0, "timeout_s": 0.5},
        "channels": {
            "vib": {"topic": f"f/{name}/vib", "decoder": "json-batch", "rate_hz": VIB_HZ,
                    "unit": "m/s2", "features": VIB_FEATS, "min": -500, "max": 500,
                    "flatline_windows": 3, "stale_s": 10,
                    "spectrum": {"bands_hz": BANDS, "velocity_rms": True},
                    "limits": {"kurtosis": {"alert": 60, "alarm": 100}}},
            "temp": {"topic": f"f/{name}/temp", "decoder": "json-batch", "rate_hz": SLOW_HZ,
                     "features": SLOW["temp"], "min": -40, "max": 150, "max_rate_per_s": 50,
                     "stale_s": 10, "limits": {"max": {"alert": 800, "alarm": 950}}},
            "speed": {"topic": f"f/{name}/speed", "decoder": "json-batch", "rate_hz": SLOW_HZ,
                      "features": SLOW["speed"], "min": 0, "max": 4000},
            "current": {"topic": f"f/{name}/current", "decoder": "json-batch",
                        "rate_hz": SLOW_HZ, "features": SLOW["current"], "min": 0,
                        "max": 500, "flatline_windows": 3},
        },
        "speed_channel": "speed",
        "modes": {"channel": "speed", "hysteresis": 50, "settling_s": 0,
                  "states": {"low": {"max": 1500}, "high": {"min": 1500}}},
    }
    if bundle is not None:
        doc["bundle"] = str(bundle)
    return doc


def feature_names() -> list[str]:
    spec = [f"band_{lo}_{hi}_hz" for lo, hi in BANDS] + ["dominant_hz", "dominant_amp",
                                                          "velocity_rms_mm_s"]
    names = [f"vib.{f}" for f in VIB_FEATS] + [f"vib.{f}" for f in spec]
    for ch, fs in SLOW.items():
        names += [f"{ch}.{f}" for f in fs]
    return names


class Fleet:
    """The fleet, its pipeline and buffers, and the signals fed to it window by window."""

    def __init__(self, tmp: Path, seed: int = 0, n_assets: int = N_ASSETS,
                 observer: Any = None, observes: Any = None) -> None:
        rng = np.random.default_rng(seed)
        self.n = n_assets
        names = feature_names()
        made = [quiet_bundle(tmp / f"full{i:03d}", names,
                             rng.normal(size=(500, len(names))), mean=0.0)
                for i in range(n_assets)]
        self.made = made
        doc = {"site": "bench", "gateway": "gw", "state_dir": str(tmp / "state"),
               "assets": [asset_doc(i, made[i][0]) for i in range(n_assets)]}
        self.cfg = parse_config(doc, tmp)
        self.metrics = Metrics(CollectorRegistry())
        self.buffers = Buffers(self.cfg)
        runtimes = [AssetRuntime.build(a, load_bundle(made[i][0]), None)
                    for i, a in enumerate(self.cfg.assets)]
        self.sink = NullSink()
        self.pipe = Pipeline(self.cfg, self.buffers, self.sink, self.metrics,
                             logging.getLogger("bench"), runtimes, observer=observer,
                             observes=observes)
        self.rng = rng
        self.vib = rng.normal(size=(n_assets, VIB_HZ))
        self.slow = np.stack([50 + rng.normal(size=(n_assets, SLOW_HZ)),
                              1200 + 10 * rng.normal(size=(n_assets, SLOW_HZ)),
                              20 + rng.normal(size=(n_assets, SLOW_HZ))], axis=1)
        self.t_vib = np.arange(VIB_HZ) / VIB_HZ
        self.t_slow = np.arange(SLOW_HZ) / SLOW_HZ
        self.k = 0

    def feed(self) -> None:
        """One window of every channel of every asset, into the buffers."""
        k = self.k
        for ai, chans in enumerate(self.buffers.by_asset):
            chans[0].append_block(k + self.t_vib, self.vib[ai], k + 1.0)
            for ci in range(3):
                chans[1 + ci].append_block(k + self.t_slow, self.slow[ai, ci], k + 1.0)
        self.k = k + 1

    def sessions(self) -> list[ort.InferenceSession]:
        return [ort.InferenceSession(model, sess_options=_session_options(),
                                     providers=["CPUExecutionProvider"])
                for _, model in self.made]


def _td(x: np.ndarray) -> np.ndarray:
    """mean, std, rms, peak-to-peak, kurtosis, crest factor of every row (bare numpy)."""
    mean = x.mean(1)
    d = x - mean[:, None]
    d2 = d * d
    m2 = d2.mean(1)
    rms = np.sqrt((x * x).mean(1))
    peak = np.abs(x).max(1)
    return np.stack([mean, np.sqrt(m2), rms, np.ptp(x, 1), (d2 * d2).mean(1) / (m2 * m2),
                     peak / rms], 1)


class Bare:
    """The same feature and inference work with bare numpy + onnxruntime."""

    def __init__(self, fleet: Fleet) -> None:
        self.fleet = fleet
        self.sessions = fleet.sessions()
        n = VIB_HZ
        self.w = hann(n)
        self.freqs = np.fft.rfftfreq(n, 1.0 / VIB_HZ)
        c = np.full(n // 2 + 1, 2.0)
        c[0] = c[-1] = 1.0
        self.p_scale = c / (VIB_HZ * float(np.sum(self.w * self.w)))
        self.a_scale = c / float(np.sum(self.w))
        nyq = VIB_HZ / 2
        self.masks = np.stack([band_mask(self.freqs, lo, hi, nyq)
                               for lo, hi in BANDS]).T.astype(np.float64)
        lo, hi = VELOCITY_BAND_HZ
        band = band_mask(self.freqs, lo, min(hi, nyq), nyq) & (self.freqs > 0)
        self.vel = np.zeros_like(self.freqs)
        self.vel[band] = 1.0 / (2 * np.pi * self.freqs[band]) ** 2

    def window(self) -> int:
        f = self.fleet
        x = f.vib
        td_v = _td(x)  # [A, 6]: mean std rms ptp kurt crest
        d = x - td_v[:, :1]
        mag = np.abs(np.fft.rfft(d * self.w, axis=1))
        p = mag * mag * self.p_scale
        amp = mag * self.a_scale
        df = VIB_HZ / VIB_HZ
        bands = p @ self.masks * df
        k = 1 + np.argmax(amp[:, 1:], axis=1)
        rows = np.arange(f.n)
        vel = np.sqrt((p @ self.vel) * df) * 1000.0
        slow = _td(f.slow.reshape(-1, SLOW_HZ)).reshape(f.n, 3, -1)
        slow_max = f.slow.max(axis=2)
        feats = np.column_stack([
            td_v[:, 2], td_v[:, 1], td_v[:, 3], td_v[:, 4], td_v[:, 5],
            bands, self.freqs[k], amp[rows, k], vel,
            slow[:, 0, 0], slow_max[:, 0], slow[:, 1, 0], slow[:, 2, 0], slow[:, 2, 1],
        ]).astype(np.float32)
        for i, s in enumerate(self.sessions):
            s.run(None, {"x": feats[i:i + 1]})
        return f.n
