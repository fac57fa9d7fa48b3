"""A drifting sensor is not a sick machine, and a fault that grows as slowly is still one.

P-101 of the invented Fernbrook plant (the demo's simulator and config) is commissioned
on 40 minutes of simulated normal running through the daemon's own ingest, windows,
features and `train_bundle`; then two scenarios are replayed through the daemon
pipeline (Replayer, simulated clock):

* the bearing temperature *sensor* drifts +6 degC over 30 minutes (the machine is
  healthy): no `anomaly.raised`; the channel is reported with `sensor.fault` reason
  `suspect_drift`;
* the drive-end bearing develops an outer-race defect over the same 30 minutes: it is
  raised as `anomaly.raised`, explained by the accelerometer.
"""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any

import pytest
import yaml

from agent.commission.dataset import DatasetWriter
from agent.commission.replay import Replayer
from agent.commission.train import train_bundle
from agent.config.load import parse_config
from simulator.plant import simulate
from simulator.scenario import parse_scenario

DEMO = Path(__file__).resolve().parents[2] / "config" / "demo"
START = 1_767_225_600.0
ASSET = {"name": "P-101", "kind": "pump", "area": "raw-water", "initial_speed_pct": 100,
         "speed_sensor": True}


def _scenario(seed: int, duration_s: float, timeline: list[dict[str, Any]]) -> Any:
    return parse_scenario({"name": "drift-test", "plant": "fernbrook", "seed": seed,
                           "duration_s": duration_s, "ambient_c": 14.0,
                           "assets": [ASSET], "timeline": timeline})


def _config(state: Path, bundle: Path | None) -> Any:
    doc = yaml.safe_load((DEMO / "watchkeep.yaml").read_text(encoding="utf-8"))
    doc["state_dir"] = str(state)
    doc["assets"] = [a for a in doc["assets"] if a["name"] == "P-101"]
    if bundle is not None:
        doc["assets"][0]["bundle"] = str(bundle)
    return parse_config(doc, DEMO)


@pytest.fixture(scope="module")
def bundle(tmp_path_factory: pytest.TempPathFactory) -> Path:
    d = tmp_path_factory.mktemp("drift")
    w = DatasetWriter(d / "ds", asset="P-101", overwrite=True)

    def observe(a: str, mode: str, win: Any, row: Any, names: tuple[str, ...]) -> None:
        w.add(row, names, win.start, win.end, mode)

    rep = Replayer.build(_config(d, None), logging.getLogger("test"), observer=observe)
    for t, topic, payload in simulate(_scenario(11, 2400, []), start_unix=START):
        rep.feed(t, topic, payload)
    rep.finish()
    train_bundle(w.close(), d / "bundle", asset="P-101", seed=0)
    return d / "bundle"


def _replay(bundle: Path, tmp: Path, timeline: list[dict[str, Any]]) -> list[dict[str, Any]]:
    rep = Replayer.build(_config(tmp, bundle), logging.getLogger("test"))
    for t, topic, payload in simulate(_scenario(12, 2400, timeline), start_unix=START + 7200):
        rep.feed(t, topic, payload)
    rep.finish()
    return rep.sink.events()


def test_a_drifting_temperature_sensor_raises_no_machine_anomaly(bundle: Path,
                                                                 tmp_path: Path) -> None:
    """+6 degC of sensor drift over 30 min: no anomaly.raised; a suspect-drift sensor.fault."""
    ev = _replay(bundle, tmp_path, [{"at_s": 300, "asset": "P-101", "sensor_fault": "drift",
                                     "channel": "bearing_temp", "ramp_s": 1800,
                                     "magnitude": 6.0}])
    types = [e["type"].removeprefix("io.watchkeep.") for e in ev]
    assert "anomaly.raised" not in types, ev
    suspect = [e for e in ev if e["type"].endswith("sensor.fault")
               and "suspect_drift" in e["data"]["reasons"]]
    assert [e["data"]["channel"] for e in suspect] == ["bearing_temp"]


def test_a_bearing_defect_growing_as_slowly_is_raised(bundle: Path, tmp_path: Path) -> None:
    """An outer-race defect ramping over the same 30 min is raised, explained by vib."""
    ev = _replay(bundle, tmp_path, [{"at_s": 300, "asset": "P-101",
                                     "fault": "bearing_outer_race", "ramp_s": 1800,
                                     "severity": 1.0}])
    raised = [e for e in ev if e["type"].endswith("anomaly.raised")]
    assert raised, [e["type"] for e in ev]
    assert raised[0]["data"]["contributors"][0]["feature"].startswith("vib.")
    assert not any("suspect_drift" in e["data"].get("reasons", []) for e in ev)
