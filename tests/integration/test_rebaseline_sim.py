"""Rebaseline on simulator data, through the daemon's own pipeline (`Replayer`, offline).

The pump P-101 of our invented plant is trained on two regimes of normal running in one
mode (100 % and 75 % speed, recorded as two runs from thermal equilibrium): issue 7's
per-mode bundles would make "mode 2 is not forgotten" true by construction (a rebaseline
of one mode writes only that mode's bundle), so the forgetting check uses one model
that covers both set-points, where rehearsal is what keeps the other one.

The "modification" is a step in residual unbalance that then stays (a re-balanced or
trimmed impeller leaves a different 1x level): the simulator's `imbalance` entry with
`ramp_s: 0` and no end, read here as the machine's new normal. The genuine fault
afterwards is an outer-race bearing defect. Data is simulated, not field data.
"""

from __future__ import annotations

import copy
import json
import logging
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from agent.commission.dataset import DatasetWriter, read_dataset
from agent.commission.replay import Replayer
from agent.commission.train import train_bundle
from agent.config.load import parse_config
from agent.core.detector import DetectorParams
from agent.learning.rebaseline import (
    OldModel,
    Settings,
    layers_from_onnx,
    numpy_scores,
    rebaseline,
    reservoir,
)
from agent.learning.worker import JOB_JSON, RESULT_JSON, WINDOWS_NPZ, run_job
from agent.models.bundle import load_bundle
from agent.models.store import ModelStore, read_rehearsal
from simulator.plant import simulate
from simulator.scenario import parse_scenario

START = 1_767_225_600.0  # 2026-01-01T00:00:00Z, simulated
ASSET = {"name": "P-101", "kind": "pump", "area": "raw-water"}
MODIFICATION = {"at_s": 0, "asset": "P-101", "fault": "imbalance", "ramp_s": 0,
                "severity": 0.35}
FEATS = ["rms", "std", "peak_to_peak", "crest_factor", "kurtosis"]


def _channel(topic: str, decoder: str, rate: float, unit: str, feats: list[str]) -> dict:
    return {"topic": f"fernbrook/raw-water/P-101/{topic}", "decoder": decoder,
            "rate_hz": rate, "unit": unit, "features": feats}


def _config(bundle: Path | None) -> Any:
    asset: dict[str, Any] = {
        "name": "P-101",
        "channels": {"vib": _channel("vib", "json-batch", 2560, "m/s2", FEATS),
                     "bearing_temp": _channel("bearing_temp", "json", 1, "degC",
                                              ["mean", "std"]),
                     "current": _channel("current", "json", 10, "A", ["mean", "std"]),
                     "pressure": _channel("pressure", "text", 10, "bar", ["mean", "std"]),
                     "flow": _channel("flow", "json", 1, "m3/h", ["mean", "std"])},
        "window": {"length_s": 5.0, "lateness_s": 0.5, "timeout_s": 3.0,
                   "min_coverage": 0.8},
        "detector": {"raise_k": 2, "raise_n": 3, "clear_m": 3}}
    if bundle is not None:
        asset["bundle"] = str(bundle)
    doc = {"site": "fernbrook", "gateway": "gw-test", "state_dir": "/nonexistent",
           "pipeline": {"tick_s": 0.5}, "assets": [asset]}
    return parse_config(doc, Path("."))


def _scenario(seed: int, duration_s: float, timeline: list[dict], speed: float = 100) -> Any:
    return parse_scenario({"name": "t", "plant": "fernbrook", "site_name": "F", "seed": seed,
                           "start": None, "duration_s": duration_s, "ambient_c": 14.0,
                           "ambient_swing_c": 0.0, "timeline": copy.deepcopy(timeline),
                           "assets": [{**ASSET, "initial_speed_pct": speed}]})


def _run(cfg: Any, scenario: Any, start: float) -> tuple[np.ndarray, np.ndarray, list[dict],
                                                         tuple[str, ...]]:
    """Replay a scenario: (feature rows, window starts, events, feature names)."""
    rows: list[np.ndarray] = []
    starts: list[float] = []
    names: list[tuple[str, ...]] = []

    def obs(asset: str, mode: str, w: Any, row: np.ndarray, n: tuple[str, ...]) -> None:
        rows.append(row)
        starts.append(w.start)
        names[:] = [n]

    rep = Replayer.build(cfg, logging.getLogger("test"), observer=obs)
    for t, topic, payload in simulate(scenario, start_unix=start):
        rep.feed(t, topic, payload)
    rep.finish()
    return np.array(rows), np.array(starts), rep.sink.events(), names[0]


def _raised(events: list[dict]) -> list[dict]:
    return [e for e in events if e["type"].endswith("anomaly.raised")]


@pytest.fixture(scope="module")
def plant(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    tmp = tmp_path_factory.mktemp("rebaseline")
    cfg0 = _config(None)
    w = DatasetWriter(tmp / "train", asset="P-101")
    for i, (seed, speed) in enumerate(((7, 100), (8, 75))):
        x, st, _, names = _run(cfg0, _scenario(seed, 900, [], speed), START + i * 900)
        for r, s in zip(x, st, strict=True):
            w.add(r, names, s, s + 5, "default")
    ds = read_dataset(w.close())
    train_bundle(ds.path, tmp / "bundle", asset="P-101", seed=0, family="dense-autoencoder")
    store = ModelStore(tmp / "models", keep=3)
    b = load_bundle(tmp / "bundle")
    reh = reservoir(ds.columns(b.meta.feature_names), b.meta.feature_names, 512)
    assert store.adopt("P-101", "default", tmp / "bundle", reh) == 1
    return {"tmp": tmp, "store": store, "names": names}


def _job(tmp: Path, store: ModelStore, x: np.ndarray, starts: np.ndarray, name: str,
         accept_shift: bool = False) -> dict[str, Any]:
    """Run one rebaseline job as the daemon's worker would (in-process here)."""
    job = tmp / name
    job.mkdir()
    np.savez(job / WINDOWS_NPZ, features=x, window_start=starts)
    (job / JOB_JSON).write_text(json.dumps({
        "asset": "P-101", "mode": "default",
        "store": {"root": str(store.root), "keep": store.keep},
        "base_version": store.active_version("P-101", "default"),
        "new_version": store.next_version("P-101", "default"),
        "request": {"reason": name, "accept_shift": accept_shift},
        "settings": {}, "detector": [2, 3, 3]}))
    run_job(job)
    return json.loads((job / RESULT_JSON).read_text())


def _model_cols(names: tuple[str, ...], bundle: Any) -> list[int]:
    return [names.index(n) for n in bundle.meta.feature_names]


def test_modification_rebaseline_fault_and_forgetting(plant: dict[str, Any]) -> None:
    """Old model flags the modification; after rebaseline the new normal is quiet, a bearing
    fault is still caught, and the other regime stays quiet only with rehearsal."""
    tmp, store = plant["tmp"], plant["store"]
    link = store.active_link("P-101", "default")
    cfg = _config(link)
    # 1. The modification with the old model: anomalies.
    _, _, ev_old, _ = _run(cfg, _scenario(20, 300, [MODIFICATION]), START + 86400)
    raised_old = _raised(ev_old)
    assert raised_old, "the old model should flag the modified machine"
    # 2. Learn the new normal: 240 windows (20 min) of the modified machine at 100 %.
    x_new, st_new, _, names = _run(cfg, _scenario(21, 1200, [MODIFICATION]), START + 2 * 86400)
    v1 = load_bundle(link)
    cols = _model_cols(names, v1)
    res = _job(tmp, store, x_new[:, cols], st_new, "job-modification")
    f = res["figures"]
    assert res["verdict"] == "accepted", res
    store.activate("P-101", "default", res["version"])
    v2 = load_bundle(link)
    assert v2.meta.version == 2 and v2.meta.raw["lineage"]["parent"] == 1
    # 3. A held-out hour of the new normal with the new model: nothing raised.
    x_hold, _, ev_hold, _ = _run(cfg, _scenario(22, 3600, [MODIFICATION]), START + 3 * 86400)
    assert _raised(ev_hold) == []
    hold_ratio = float(np.max(v2.score(x_hold[:, cols])[0]) / v2.meta.threshold)
    # 4. A genuine fault afterwards: an outer-race defect from 300 s.
    onset = START + 4 * 86400 + 300
    fault = [MODIFICATION, {"at_s": 300, "asset": "P-101", "fault": "bearing_outer_race",
                            "ramp_s": 0, "severity": 0.3}]
    x_f, st_f, ev_f, _ = _run(cfg, _scenario(23, 600, fault), START + 4 * 86400)
    raised_f = _raised(ev_f)
    assert raised_f, "the bearing defect must still be detected"
    from datetime import datetime

    t_raise = datetime.fromisoformat(raised_f[0]["data"]["window"]["end"].replace(
        "Z", "+00:00")).timestamp()
    delay_s = t_raise - onset
    assert 0 < delay_s <= 20, delay_s  # 2 of 3 windows of 5 s, plus the window in progress
    fault_ratio = float(np.median(v2.score(x_f[st_f >= onset][:, cols])[0])
                        / v2.meta.threshold)
    # 5. Forgetting: the other regime (75 %, unmodified) with and without rehearsal.
    x_r2, _, ev_r2, _ = _run(cfg, _scenario(24, 1200, [], 75), START + 5 * 86400)
    fa_reh = float(np.mean(v2.score(x_r2[:, cols])[0] > v2.meta.threshold))
    old = OldModel(layers_from_onnx((v1.path / "model.onnx").read_bytes()),
                   v1.meta.feature_names, v1.meta.scaler_mean, v1.meta.scaler_scale,
                   v1.meta.threshold, v1.meta.clear_threshold, 1, v1.meta.calibration)
    reh = read_rehearsal(store.version_path("P-101", "default", 1))
    bare = rebaseline(old, x_new[:, cols], reh, Settings(train_on_rehearsal=False,
                                                         detector=DetectorParams(2, 3, 3)),
                      accept_shift=False)
    assert bare.layers is not None and bare.threshold is not None
    s_bare = numpy_scores(bare.layers, old.z(x_r2[:, cols]))
    fa_bare = float(np.mean(s_bare > bare.threshold))
    s_old = numpy_scores(old.layers, old.z(x_r2[:, cols]))
    fa_old = float(np.mean(s_old > old.threshold))
    print(f"\nold model on the modification: {len(raised_old)} raised in 300 s; "
          f"shift {f['shift']} (max feature {f['max_feature_shift']} "
          f"{f['max_feature_shift_sd']} sd); old FA on new normal {f['old_false_alarm_rate']}"
          f"\nrebaseline v1->v2: threshold {f['old_threshold']} -> {f['threshold']}, "
          f"FA on held-out new normal {f['false_alarm_rate']} (budget "
          f"{f['false_alarm_budget']}), rehearsal score x{f['rehearsal_ratio']}, "
          f"fine-tune {f['fine_tune']}, worker {res['train_time_s']} s"
          f"\nheld-out hour of new normal: {len(x_hold)} windows, 0 raised, max "
          f"score/threshold {hold_ratio:.2f}"
          f"\nbearing defect after rebaseline: raised {delay_s:.1f} s after onset, median "
          f"score/threshold {fault_ratio:.1f}"
          f"\nother regime (75 %): FA old model {fa_old:.3f}, rebaselined with rehearsal "
          f"{fa_reh:.3f} ({len(_raised(ev_r2))} raised in {len(x_r2)} windows), without "
          f"rehearsal {fa_bare:.3f} (its rehearsal score x{bare.figures['rehearsal_ratio']}, "
          f"verdict {bare.verdict.value})")
    assert _raised(ev_r2) == []
    assert fa_reh <= 0.02
    assert fa_bare > 3 * max(fa_reh, 0.01), (fa_bare, fa_reh)
    assert bare.verdict.value == "rejected"  # the gate would have caught the forgetting
    # 6. Rollback restores v1's behaviour exactly: same bytes, same scores.
    s1 = v1.score(x_f[:, cols])[0]
    store.activate("P-101", "default", 1)
    again = load_bundle(link)
    assert again.digest == v1.digest
    np.testing.assert_array_equal(again.score(x_f[:, cols])[0], s1)
    store.activate("P-101", "default", 2)


def test_shift_guard_refuses_an_active_bearing_defect(plant: dict[str, Any]) -> None:
    """New windows with an outer-race defect are refused (no training) unless accept_shift,
    and the outcome records that the shift was accepted."""
    tmp, store = plant["tmp"], plant["store"]
    link = store.active_link("P-101", "default")
    cfg = _config(link)
    bearing = [{"at_s": 0, "asset": "P-101", "fault": "bearing_outer_race", "ramp_s": 0,
                "severity": 0.3}]
    x, st, _, names = _run(cfg, _scenario(30, 360, bearing), START + 10 * 86400)
    active = store.active_version("P-101", "default")
    cols = _model_cols(names, load_bundle(link))
    before = set(store.versions("P-101", "default"))
    res = _job(tmp, store, x[:, cols], st, "job-bearing")
    assert res["verdict"] == "refused", res
    assert res["figures"]["shift"] > res["figures"]["settings"]["max_shift"]
    assert "accept-shift" in res["reasons"][0]
    assert "fine_tune" not in res["figures"]  # refused before any training
    assert set(store.versions("P-101", "default")) == before
    forced = _job(tmp, store, x[:, cols], st, "job-bearing-forced", accept_shift=True)
    assert forced["verdict"] in ("accepted", "rejected")
    assert forced["figures"]["accept_shift"] is True
    assert forced["figures"]["shift_exceeded"] is True
    assert store.active_version("P-101", "default") == active  # the worker never activates
    print(f"\nbearing defect as 'new normal': shift {res['figures']['shift']} x threshold "
          f"(max {res['figures']['settings']['max_shift']}), refused; with --accept-shift: "
          f"{forced['verdict']}")
