"""`evaluate --inject` on the raw signal: capture -> replayed dataset -> train -> evaluate.

No broker: the capture is written from the invented `readings` generator and the
datasets are made with the daemon's own pipeline through `Replayer`, as `record` does.
"""

from __future__ import annotations

import argparse
import io
import json
from pathlib import Path

import numpy as np
import pytest
import yaml

from agent.commission.capture import write_capture
from agent.commission.dataset import DatasetWriter
from agent.commission.evaluate import add_evaluate_arguments, cmd_evaluate
from agent.commission.record import RAW_NAME
from agent.commission.replay import Replayer
from agent.commission.report import REPORT_JSON
from agent.commission.train import train_bundle
from agent.config.load import parse_config
from agent.errors import DatasetError
from tests.helpers import asset_doc, readings

ASSET = "P-7"
T0 = 1_780_000_000.0


def _config_doc(tmp: Path) -> dict:
    return {"site": "testworks", "gateway": "gw1", "state_dir": str(tmp / "state"),
            "http": {"enabled": False}, "assets": [asset_doc(ASSET, None)]}


def _record(tmp: Path, name: str, n_windows: int, seed: int, raw: bool) -> Path:
    """What `record --raw` leaves behind, made offline: the dataset and its capture."""
    cfg = parse_config(_config_doc(tmp), tmp)
    msgs = [(t, topic, payload) for (topic, payload), t in
            ((m, json.loads(m[1])["ts"]) for m in readings(ASSET, T0, n_windows, seed=seed))]
    a = cfg.asset(ASSET)
    w = a.window
    writer = DatasetWriter(
        tmp / name, asset=ASSET,
        window={"length_s": w.length_s, "hop_s": w.hop_s, "lateness_s": w.lateness_s,
                "timeout_s": w.timeout_s, "min_coverage": w.min_coverage},
        units={ch.name: ch.unit for ch in a.channels},
        extra={"channels": {ch.name: {"topic": ch.topic, "decoder": ch.decoder.value,
                                      "rate_hz": ch.rate_hz} for ch in a.channels}})
    r = Replayer.build(cfg, observer=lambda asset, mode, win, row, names:
                       writer.add(row, names, win.start, win.end, mode))
    for m in msgs:
        r.feed(*m)
    r.finish()
    path = writer.close()
    if raw:
        write_capture(tmp / f"{name}.{RAW_NAME}", msgs)
    return path


@pytest.fixture(scope="module")
def setup(tmp_path_factory: pytest.TempPathFactory) -> Path:
    d = tmp_path_factory.mktemp("evaluate-raw")
    _record(d, "train", 400, seed=11, raw=False)
    train_bundle(d / "train", d / "bundle", seed=0, epochs=150)
    _record(d, "eval", 300, seed=12, raw=True)
    _record(d, "eval-noraw", 300, seed=12, raw=False)
    return d


def _run(setup: Path, tmp: Path, dataset: str, *extra: str) -> tuple[str, dict]:
    parser = argparse.ArgumentParser()
    add_evaluate_arguments(parser)
    args = parser.parse_args([str(setup / "bundle"), str(setup / dataset), "--inject",
                              "step:4", "stuck", "noise:3", "--report", str(tmp / "rep"),
                              *extra])
    out = io.StringIO()
    assert cmd_evaluate(args, out=out) == 0
    return out.getvalue(), json.loads((tmp / "rep" / REPORT_JSON).read_text())


def test_raw_path_detects_step_faults(setup: Path, tmp_path: Path) -> None:
    """Step faults written into the raw readings and replayed are detected; the report
    says the raw path was used."""
    text, doc = _run(setup, tmp_path, "eval")
    assert doc["dataset"]["injection"]["path"] == "raw"
    assert doc["dataset"]["injection"]["config"] == "dataset manifest"
    assert "injected into the raw signal" in text
    by_name = {s["name"].split()[0]: s for s in doc["scenarios"]}
    assert set(by_name) == {"recorded", "inject:step", "inject:stuck", "inject:noise"}
    step = by_name["inject:step"]
    assert "raw" in step["name"]
    assert step["detection"]["events"] == 300 // (30 + 90)  # slots of L + max(3L, 30)
    assert step["detection"]["detection_rate"] == 1.0
    assert step["roc_auc"]["step"] > 0.95
    assert step["detection"]["false_alarms"] == 0
    assert by_name["recorded"]["detection"]["false_alarms"] == 0
    noise = by_name["inject:noise"]
    assert noise["roc_auc"]["noise"] > 0.9  # a burst changes each channel's std feature
    # raw stuck flattens the channel: its std feature collapses, which the model sees
    stuck = by_name["inject:stuck"]
    assert stuck["roc_auc"]["stuck"] > 0.9


def test_raw_path_is_deterministic_and_takes_a_channel(setup: Path, tmp_path: Path) -> None:
    """The same seed gives the same report; KIND:SIGMA:WINDOWS:CHANNEL hits that channel."""
    _, a = _run(setup, tmp_path / "a", "eval", "--seed", "3")
    _, b = _run(setup, tmp_path / "b", "eval", "--seed", "3")
    assert a["scenarios"] == b["scenarios"]
    parser = argparse.ArgumentParser()
    add_evaluate_arguments(parser)
    args = parser.parse_args([str(setup / "bundle"), str(setup / "eval"), "--inject",
                              "step:4:20:pressure"])
    out = io.StringIO()
    cmd_evaluate(args, out=out)
    assert "inject:step 4 sigma x 20 w raw, pressure" in out.getvalue()


def test_explicit_config(setup: Path, tmp_path: Path) -> None:
    """--config rebuilds the pipeline from the daemon's config instead of the manifest."""
    cfg = tmp_path / "daemon.yaml"
    cfg.write_text(yaml.safe_dump(_config_doc(tmp_path)))
    _, doc = _run(setup, tmp_path, "eval", "--config", str(cfg))
    assert doc["dataset"]["injection"] == {"path": "raw", "capture": str(
        setup / f"eval.{RAW_NAME}"), "config": str(cfg)}


def test_without_raw_messages_the_feature_path_is_used(setup: Path, tmp_path: Path) -> None:
    """A dataset with no capture beside it injects on feature windows, and says so."""
    text, doc = _run(setup, tmp_path, "eval-noraw")
    assert doc["dataset"]["injection"] == {"path": "features"}
    assert "injected on feature windows" in text
    assert [s["name"] for s in doc["scenarios"]][1] == "inject:step 4 sigma x 30 windows"
    with pytest.raises(DatasetError, match=r"raw capture .* not found"):
        _run(setup, tmp_path, "eval-noraw", "--inject-on", "raw")
    _, forced = _run(setup, tmp_path, "eval", "--inject-on", "features")
    assert forced["dataset"]["injection"] == {"path": "features"}
    assert np.isfinite(forced["scenarios"][1]["roc_auc"]["step"])
