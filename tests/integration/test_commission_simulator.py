"""Commissioning on simulator data: train on normal running, evaluate on machine faults.

The simulator's pump P-101 is run through the daemon's own pipeline (`Replayer`, the
exact ingest/window/feature code) with the demo's channel and window settings; a
bundle is trained with `train_bundle`; its scores are judged against the scenario's
ground truth. Data is simulated (our invented plant), not field data.
"""

from __future__ import annotations

import copy
import logging
from pathlib import Path

import numpy as np
import pytest
import yaml

from agent.cli.demo import DEMO_DIR
from agent.commission.dataset import DatasetWriter, read_dataset
from agent.commission.judging import roc_auc
from agent.commission.replay import Replayer
from agent.commission.train import train_bundle
from agent.config.load import parse_config
from agent.core.detector import DetectorParams, Transition, run_detector
from agent.models.bundle import load_bundle
from simulator.plant import simulate
from simulator.scenario import labels, parse_scenario

START = 1_767_225_600.0  # 2026-01-01T00:00:00Z, simulated
ASSET = {"name": "P-101", "kind": "pump", "area": "raw-water", "initial_speed_pct": 100,
         "speed_sensor": True}


def _scenario(name: str, seed: int, duration_s: float, timeline: list[dict]) -> dict:
    return {"name": name, "plant": "fernbrook", "site_name": "Fernbrook (invented)",
            "seed": seed, "start": None, "duration_s": duration_s, "ambient_c": 14.0,
            "ambient_swing_c": 0.0, "assets": [ASSET], "timeline": timeline}


def _config():
    doc = yaml.safe_load((DEMO_DIR / "watchkeep.yaml").read_text())
    doc["assets"] = [a for a in doc["assets"] if a["name"] == "P-101"]
    return parse_config(doc, DEMO_DIR)


def _features(cfg, scenario: dict, start: float, out: Path) -> Path:
    w = DatasetWriter(out, asset="P-101")
    rep = Replayer.build(cfg, logging.getLogger("test"),
                         observer=lambda a, m, win, row, names: w.add(row, names, win.start,
                                                                      win.end, m))
    for t, topic, payload in simulate(parse_scenario(copy.deepcopy(scenario)),
                                      start_unix=start):
        rep.feed(t, topic, payload)
    rep.finish()
    return w.close()


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("simeval")
    cfg = _config()
    normal = _scenario("train", 7, 1800, [])
    ds = _features(cfg, normal, START, tmp / "train")
    train_bundle(ds, tmp / "bundle", asset="P-101", seed=0)
    return cfg, load_bundle(tmp / "bundle"), tmp


def test_machine_faults_score_high_and_held_out_hour_is_quiet(trained) -> None:
    """ROC AUC >= 0.95 for imbalance and outer-race windows; no raise in a held-out hour."""
    cfg, bundle, tmp = trained
    faults = _scenario("faults", 9, 1200, [
        {"at_s": 300, "asset": "P-101", "fault": "imbalance", "ramp_s": 0, "severity": 0.5,
         "end_s": 600},
        {"at_s": 800, "asset": "P-101", "fault": "bearing_outer_race", "ramp_s": 0,
         "severity": 0.5, "end_s": 1200}])
    fstart = START + 86400
    ds = read_dataset(_features(cfg, faults, fstart, tmp / "faults"))
    scores, _ = bundle.score(ds.columns(bundle.meta.feature_names))
    truth = labels(parse_scenario(copy.deepcopy(faults)), start_unix=fstart)
    normal_mask = np.ones(ds.n_windows, bool)
    aucs = {}
    for lb in truth:
        inside = (ds.window_start >= lb.start) & (ds.window_end <= lb.end)
        normal_mask &= ~((ds.window_start < lb.end) & (ds.window_end > lb.start))
        aucs[lb.kind] = inside
    for kind, inside in aucs.items():
        sel = inside | normal_mask
        # ROC AUC by the rank statistic; checked against sklearn in the unit tests.
        auc = roc_auc(scores[sel], inside[sel])
        assert auc >= 0.95, (kind, auc)
    held = _scenario("holdout", 8, 3600, [])
    hds = read_dataset(_features(cfg, held, START + 2 * 86400, tmp / "holdout"))
    hscores, _ = bundle.score(hds.columns(bundle.meta.feature_names))
    raised = [i for i, t in run_detector(hscores, bundle.meta.threshold,
                                         bundle.meta.clear_threshold, DetectorParams(2, 3, 3))
              if t is Transition.RAISED]
    table = {k: round(roc_auc(scores[v | normal_mask], v[v | normal_mask]), 4)
             for k, v in aucs.items()}
    ratio = float(hscores.max() / bundle.meta.threshold)
    print(f"\nAUC {table}; held-out hour: {hds.n_windows} windows, {len(raised)} raised, "
          f"max score/threshold {ratio:.2f}")
    assert raised == []
