"""A raised asset whose anomaly moves to another channel says so (`anomaly.escalated`)
and clears once the machine is back: the second fault is not hidden by the first.

Through the daemon's own ingest, windows, features, a bundle trained by `train_bundle`
on a dataset recorded through the same path, and the pipeline (Replayer, simulated
clock). Invented data: three 10 Hz channels of a pump in our demo plant."""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any

import numpy as np
import orjson

from agent.commission.dataset import DatasetWriter
from agent.commission.replay import Replayer
from agent.commission.train import train_bundle
from agent.config.load import parse_config

CH = ("flow", "pressure", "current")
T0 = 1_767_225_600.0


def _cfg(tmp: Path, bundle: Path | None) -> Any:
    asset: dict[str, Any] = {
        "name": "P-101", "window": {"length_s": 10},
        "channels": {c: {"topic": f"fernbrook/raw-water/P-101/{c}", "rate_hz": 10,
                         "features": ["mean", "std"]} for c in CH}}
    if bundle is not None:
        asset["bundle"] = str(bundle)
    doc = {"site": "fernbrook", "gateway": "gw-test", "state_dir": str(tmp),
           "local_broker": {"host": "127.0.0.1"}, "upstream_broker": {"host": "127.0.0.1"},
           "http": {"port": 0}, "assets": [asset]}
    return parse_config(doc, tmp)


def _signal(n_s: int, seed: int, shifts: dict[str, list[tuple[int, int, float]]]
            ) -> np.ndarray:
    """[n_s*10, 3] readings: a shared load wander plus noise; `shifts` add steps per channel
    as (start_s, end_s, size in noise sigmas)."""
    rng = np.random.default_rng(seed)
    t = np.arange(n_s * 10) / 10.0
    load = np.sin(2 * np.pi * t / 300.0)
    x = np.column_stack([30 + 2 * load, 4 + 0.3 * load, 12 + 0.8 * load])
    x += rng.normal(0, [0.2, 0.03, 0.08], x.shape)
    for ci, c in enumerate(CH):
        for a, b, size in shifts.get(c, []):
            x[a * 10:b * 10, ci] += size * [0.2, 0.03, 0.08][ci]
    return x


def _feed(rep: Replayer, x: np.ndarray, t0: float) -> None:
    for i, row in enumerate(x):
        t = t0 + i / 10.0
        for c, v in zip(CH, row, strict=True):
            rep.feed(t, f"fernbrook/raw-water/P-101/{c}",
                     orjson.dumps({"ts": t, "value": float(v)}))
    rep.finish()


def test_second_fault_on_another_channel_escalates_and_all_clears(tmp_path: Path) -> None:
    """Raised on flow; pressure then carries the error: escalated (explanation); cleared
    after both faults end."""
    log = logging.getLogger("test")
    w = DatasetWriter(tmp_path / "ds", asset="P-101", overwrite=True)

    def observe(a: str, mode: str, win: Any, row: Any, names: tuple[str, ...]) -> None:
        w.add(row, names, win.start, win.end, mode)

    rec = Replayer.build(_cfg(tmp_path, None), log, observer=observe)
    _feed(rec, _signal(3600, 1, {}), T0)
    train_bundle(w.close(), tmp_path / "bundle", seed=0)
    rep = Replayer.build(_cfg(tmp_path, tmp_path / "bundle"), log)
    x = _signal(1500, 2, {"flow": [(300, 900, -25.0)], "pressure": [(600, 900, 80.0)]})
    _feed(rep, x, T0 + 7200)
    ev = [e for e in rep.sink.events() if "anomaly" in e["type"]]
    kinds = [e["type"].rsplit(".", 1)[-1] for e in ev]
    assert kinds[0] == "raised" and "flow" in ev[0]["data"]["contributors"][0]["feature"]
    esc = [e for e in ev if e["type"].endswith("anomaly.escalated")]
    assert esc, kinds
    assert "pressure" in esc[0]["data"]["channels"]
    assert esc[0]["data"]["previous_channels"] == ["flow"]
    assert kinds[-1] == "cleared"
    seqs = [e["data"]["sequence"] for e in ev]
    assert seqs == sorted(seqs) and len(set(seqs)) == len(seqs)
