"""Machine know-how on simulated plant data: sensor faults, operating modes, spectra, zones.

The simulator's pump P-1 (with its drive's speed reading) is the test bench. Scenarios
that must cross a real broker (stuck sensor, zone crossing) run the daemon on a
simulated clock against a Mosquitto started for the test; the model comparisons run the
same pipeline offline through `Replayer`, which is the daemon's pipeline fed directly.
"""

from __future__ import annotations

import copy
import logging
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from agent.cli.demo import SimClock
from agent.commission.dataset import DatasetWriter
from agent.commission.replay import Replayer
from agent.commission.train import train_bundle
from agent.config.load import Config, parse_config
from agent.daemon import Daemon
from simulator.config import watchkeep_assets
from simulator.plant import simulate
from simulator.publish import publish
from simulator.scenario import Scenario, parse_scenario
from tests.brokers import Broker, wait_for
from tests.helpers import Collector

START = 1_767_225_600.0  # 2026-01-01T00:00:00Z, simulated
WINDOW = {"length_s": 5.0, "lateness_s": 0.5, "timeout_s": 3.0, "min_coverage": 0.8}
TIME_FEATURES = ["rms", "std", "peak_to_peak", "crest_factor", "kurtosis"]
SPECTRUM = {"bands_hz": [[10, 400], [400, 1000], [1000, 1280]], "envelope_hz": [600, 1100],
            "velocity_rms": True}
MODES = {"channel": "speed", "hysteresis": 60, "settling_s": 15,
         "states": {"stopped": {"max": 300, "scored": False},
                    "reduced": {"min": 300, "max": 2700},
                    "rated": {"min": 2700}}}


def scenario(duration_s: float, timeline: list[dict[str, Any]], seed: int = 11) -> Scenario:
    return parse_scenario({"name": "knowhow", "plant": "knowhow", "seed": seed,
                           "duration_s": duration_s, "assets": [
                               {"name": "P-1", "kind": "pump", "area": "test",
                                "speed_sensor": True}],
                           "timeline": timeline})


def asset_doc(*, spectral: bool = False, modes: dict[str, Any] | None = None,
              bundle: Path | None = None, vib_extra: dict[str, Any] | None = None,
              iso: dict[str, Any] | None = None) -> dict[str, Any]:
    """P-1 as the simulator publishes it, without the slow bearing temperature."""
    a = watchkeep_assets(scenario(1, []))[0]
    ch = a["channels"]
    del ch["bearing_temp"]
    ch["vib"]["features"] = list(TIME_FEATURES)
    for name in ("current", "pressure"):
        ch[name]["features"] = ["mean", "std"]
    ch["flow"]["features"] = ["mean"]
    ch["speed"]["features"] = ["mean"]
    if spectral:
        ch["vib"]["spectrum"] = copy.deepcopy(SPECTRUM)
    ch["vib"].update(vib_extra or {})
    doc: dict[str, Any] = {"name": "P-1", "channels": ch, "window": dict(WINDOW),
                           "detector": {"raise_k": 2, "raise_n": 3, "clear_m": 3},
                           "speed_channel": "speed"}
    if modes is not None:
        doc["modes"] = modes
    if bundle is not None:
        doc["bundle"] = str(bundle)
    if iso is not None:
        doc["iso10816"] = iso
    return doc


def config(asset: dict[str, Any], tmp: Path, port: int = 1883) -> Config:
    return parse_config({"site": "testworks", "gateway": "gw1", "state_dir": str(tmp / "state"),
                         "local_broker": {"host": "127.0.0.1", "port": port},
                         "upstream_broker": {"host": "127.0.0.1", "port": port},
                         "http": {"enabled": False}, "pipeline": {"tick_s": 0.05},
                         "assets": [asset]}, tmp)


def run_offline(cfg: Config, sc: Scenario) -> Replayer:
    rep = Replayer.build(cfg, logging.getLogger("watchkeep.test"))
    for t, topic, payload in simulate(sc, start_unix=START):
        rep.feed(t, topic, payload)
    rep.finish()
    return rep


def events(rep: Replayer, kind: str) -> list[dict[str, Any]]:
    import json

    return [ev for m in rep.sink.messages if m.topic.endswith("/events")
            for ev in [json.loads(m.payload)] if ev["type"] == f"io.watchkeep.{kind}"]


def skipped(reg: Any, reason: str) -> float:
    return reg.get_sample_value("watchkeep_windows_skipped_total",
                                {"asset": "P-1", "reason": reason}) or 0.0


# -- models: trained once per module from simulated normal running -----------------------

NORMAL = [{"at_s": 900, "asset": "P-1", "action": "speed", "speed_pct": 80}]


@pytest.fixture(scope="module")
def models(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Per-mode bundles (rated 100 %, reduced 80 %) with and without spectral features,
    trained on 30 simulated minutes of normal running (15 at each speed)."""
    tmp = tmp_path_factory.mktemp("knowhow-models")
    out: dict[str, Path] = {}
    normal = scenario(1800, NORMAL, seed=3)
    for spectral in (False, True):
        cfg = config(asset_doc(spectral=spectral, modes=MODES), tmp)
        tag = "spectral" if spectral else "time"
        writer = DatasetWriter(tmp / f"ds-{tag}", asset="P-1", overwrite=True)

        def observe(asset: str, mode: str, w: Any, row: Any, names: tuple[str, ...],
                    writer: DatasetWriter = writer) -> None:
            writer.add(row, names, w.start, w.end, mode)

        rep = Replayer.build(cfg, logging.getLogger("watchkeep.test"), observer=observe)
        for t, topic, payload in simulate(normal, start_unix=START - 3600):
            rep.feed(t, topic, payload)
        rep.finish()
        writer.close()
        modes = ("rated", "reduced") if not spectral else ("rated",)
        for mode in modes:
            out[f"{tag}-{mode}"] = tmp / f"{tag}-{mode}"
            train_bundle(tmp / f"ds-{tag}", out[f"{tag}-{mode}"], asset="P-1", mode=mode,
                         seed=0, epochs=150)
    return out


def per_mode(models: dict[str, Path]) -> dict[str, Any]:
    m = copy.deepcopy(MODES)
    m["states"]["rated"]["bundle"] = str(models["time-rated"])
    m["states"]["reduced"]["bundle"] = str(models["time-reduced"])
    return m


# -- operating modes ---------------------------------------------------------------------

SPEED_CHANGE = [{"at_s": 120, "asset": "P-1", "action": "speed", "speed_pct": 80}]


def test_speed_change_per_mode_models_stay_quiet(models: dict[str, Path],
                                                 tmp_path: Path) -> None:
    """100 % -> 80 % speed: per-mode models raise nothing (settling windows are counted);
    the same change scored by the single 100 % model raises an anomaly."""
    sc = scenario(360, SPEED_CHANGE)
    single = run_offline(config(asset_doc(bundle=models["time-rated"]), tmp_path), sc)
    raised = events(single, "anomaly.raised")
    assert raised, "the single-mode model should flag the new speed"
    assert raised[0]["data"]["mode"] == "default"

    moded = run_offline(config(asset_doc(modes=per_mode(models)), tmp_path), sc)
    assert events(moded, "anomaly.raised") == []
    reg = moded.metrics.registry
    assert skipped(reg, "settling") >= 2  # 15 s of 5 s windows after the change
    assert reg.get_sample_value("watchkeep_asset_mode", {"asset": "P-1", "mode": "reduced"}) == 1
    st = moded.pipeline.status()["assets"][0]
    assert st["mode"] == "reduced" and st["model"]["id"] == "P-1/reduced"
    scored = reg.get_sample_value("watchkeep_windows_scored_total", {"asset": "P-1"})
    assert scored and scored > 50


def test_stopped_mode_is_not_scored(models: dict[str, Path], tmp_path: Path) -> None:
    """A stop: windows in the `stopped` mode are skipped as not_scored, nothing raised."""
    sc = scenario(200, [{"at_s": 60, "asset": "P-1", "action": "stop"}])
    rep = run_offline(config(asset_doc(modes=per_mode(models)), tmp_path), sc)
    assert events(rep, "anomaly.raised") == []
    assert skipped(rep.metrics.registry, "not_scored") >= 15


# -- sensor health over a real broker -----------------------------------------------------

def run_live(cfg_doc: dict[str, Any], sc: Scenario, tmp: Path, broker: Broker,
             speed: float = 15.0) -> tuple[Daemon, list[dict[str, Any]]]:
    """Publish the scenario through the broker at `speed` x real time into a daemon on
    the same simulated clock; return the daemon (stopped) and the events it sent."""
    cfg = config(cfg_doc, tmp, broker.port)
    clock = SimClock(origin=START, speed=speed)
    daemon = Daemon(cfg, logger=logging.getLogger("watchkeep.test"), clock=clock)
    collector = Collector(broker.port, "watchkeep/testworks/gw1/assets/+/events",
                          client_id=f"knowhow-{time.monotonic_ns()}")
    stop = threading.Event()
    try:
        daemon.start()
        wait_for(daemon.ingest.connected.is_set, what="daemon connected")
        pub = threading.Thread(target=publish, args=(simulate(sc, start_unix=START),),
                               kwargs={"host": "127.0.0.1", "port": broker.port,
                                       "speed": speed, "stop": stop, "sim_origin": START},
                               daemon=True)
        pub.start()
        pub.join(sc.duration_s / speed + 60)
        assert not pub.is_alive(), "the simulator did not finish"
        asm = daemon.pipeline.runtimes[0].assembler
        last_start = START + sc.duration_s - WINDOW["length_s"]
        wait_for(lambda: (asm.next_start or 0) > last_start, timeout_s=30,
                 what="the last window closed")
        sent = daemon.pipeline.runtimes[0].sequence  # every event carries a sequence number
        wait_for(lambda: len(collector.events()) >= sent, timeout_s=30,
                 what="all events delivered")
    finally:
        stop.set()
        daemon.stop()
    got = collector.events()
    collector.close()
    return daemon, got


@pytest.fixture
def live_broker(tmp_path: Path) -> Iterator[Broker]:
    b = Broker(tmp_path / "broker").start()
    yield b
    b.stop()


STUCK = [{"at_s": 40, "asset": "P-1", "sensor_fault": "stuck", "channel": "vib", "end_s": 100}]


def test_stuck_sensor_is_a_sensor_fault_not_an_anomaly(models: dict[str, Path], tmp_path: Path,
                                                       live_broker: Broker) -> None:
    """A stuck accelerometer raises sensor.fault (then sensor.recovered), never
    anomaly.raised; its windows are skipped as sensor_fault. Without the flatline check
    the same data does raise an anomaly, so the health check is what keeps it quiet."""
    sc = scenario(150, STUCK)
    doc = asset_doc(bundle=models["time-rated"], vib_extra={"flatline_windows": 2})
    daemon, got = run_live(doc, sc, tmp_path, live_broker)
    kinds = [e["type"].removeprefix("io.watchkeep.") for e in got]
    assert "anomaly.raised" not in kinds, kinds
    faults = [e for e in got if e["type"] == "io.watchkeep.sensor.fault"]
    assert len(faults) == 1 and faults[0]["data"]["channel"] == "vib"
    assert faults[0]["data"]["reasons"] == ["flatline"]
    assert "sensor.recovered" in kinds
    reg = daemon.metrics.registry
    assert skipped(reg, "sensor_fault") >= 8

    blind = run_offline(config(asset_doc(bundle=models["time-rated"]), tmp_path), sc)
    assert events(blind, "anomaly.raised"), "a stuck sensor should fool a model alone"


def test_sensor_event_ids_are_deterministic(models: dict[str, Path], tmp_path: Path) -> None:
    """The same data gives the same sensor event ids (id from source, type, channel, window)."""
    sc = scenario(150, STUCK)
    doc = asset_doc(vib_extra={"flatline_windows": 2})
    a = [e["id"] for e in events(run_offline(config(doc, tmp_path), sc), "sensor.fault")]
    b = [e["id"] for e in events(run_offline(config(doc, tmp_path), sc), "sensor.fault")]
    assert a and a == b


# -- ISO zone over a real broker ------------------------------------------------------------

# Imbalance severity 0.115 puts P-1's velocity RMS at about 1.39-1.42 mm/s (seed 11):
# hovering on the group 2 rigid A/B boundary (1.4 mm/s, ISO 10816-3:2009 Table A.2).
HOVER = [{"at_s": 30, "asset": "P-1", "fault": "imbalance", "ramp_s": 40, "severity": 0.115}]


def test_zone_crossing_raises_limit_exceeded_once(tmp_path: Path, live_broker: Broker) -> None:
    """Velocity RMS hovering on the A/B boundary raises one limit.exceeded (zone B), with no
    model at all; without deadband and on-delay the same data chatters."""
    sc = scenario(200, HOVER)
    iso = {"group": 2, "support": "rigid", "deadband_mm_s": 0.1, "on_delay": 2}
    doc = asset_doc(spectral=True, iso=iso)
    daemon, got = run_live(doc, sc, tmp_path, live_broker)
    limits = [e for e in got if e["type"] == "io.watchkeep.limit.exceeded"]
    assert len(limits) == 1, [e["data"] for e in limits]
    d = limits[0]["data"]
    assert (d["kind"], d["level"], d["zone_held"]) == ("zone", "B", "B")
    assert d["feature"] == "vib.velocity_rms_mm_s" and d["unit"] == "mm/s"
    assert d["boundaries_mm_s"] == {"A/B": 1.4, "B/C": 2.8, "C/D": 4.5}
    v = daemon.metrics.registry.get_sample_value(
        "watchkeep_vibration_velocity_rms_meters_per_second", {"asset": "P-1", "channel": "vib"})
    assert v is not None and 1.2e-3 < v < 1.6e-3  # m/s, base units

    chatty = run_offline(config(asset_doc(spectral=True, iso={**iso, "deadband_mm_s": 0,
                                                               "on_delay": 1}), tmp_path), sc)
    assert len(events(chatty, "limit.exceeded")) > 1


# -- bearing fault: spectral vs time-domain features ----------------------------------------

# A slowly growing defect (severity 0 -> 0.1 over 10 minutes), so that how early it is
# seen depends on the features rather than on the defect jumping in.
BEARING = [{"at_s": 60, "asset": "P-1", "fault": "bearing_outer_race", "ramp_s": 600,
            "severity": 0.1}]


def _delay_windows(rep: Replayer, onset: float) -> int | None:
    from datetime import datetime

    for ev in events(rep, "anomaly.raised"):
        end = datetime.fromisoformat(ev["data"]["window"]["end"].replace("Z", "+00:00"))
        if end.timestamp() > onset:
            return round((end.timestamp() - onset) / WINDOW["length_s"])
    return None


def test_bearing_defect_is_seen_earlier_with_spectral_features(
        models: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """An outer-race defect growing over 10 minutes: the model with spectral features
    (band powers, envelope, velocity) raises in fewer windows after onset than the model
    on time-domain features alone."""
    sc = scenario(400, BEARING)
    onset = START + BEARING[0]["at_s"]
    m_time = copy.deepcopy(MODES)
    m_time["states"]["rated"]["bundle"] = str(models["time-rated"])
    m_spec = copy.deepcopy(MODES)
    m_spec["states"]["rated"]["bundle"] = str(models["spectral-rated"])
    d_time = _delay_windows(run_offline(config(asset_doc(modes=m_time), tmp_path), sc), onset)
    d_spec = _delay_windows(run_offline(config(asset_doc(spectral=True, modes=m_spec),
                                               tmp_path), sc), onset)
    with capsys.disabled():
        print(f"\nbearing outer race, windows after onset to anomaly.raised: "
              f"time-domain {d_time}, spectral {d_spec}")
    assert d_spec is not None
    assert d_time is None or d_spec < d_time
