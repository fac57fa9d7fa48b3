"""Reload (SIGHUP) and stop (SIGTERM) on real brokers, in process and as a subprocess."""

from __future__ import annotations

import json
import logging
import math
import os
import signal
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest
import yaml

from agent.config.load import load_config
from agent.daemon import Daemon
from agent.models.bundle import MODEL_JSON, MODEL_ONNX, write_bundle
from tests.brokers import Broker, free_port, wait_for
from tests.helpers import Collector, asset_doc, publisher, readings, train_pca_bundle, write_config

ROOT = Path(__file__).resolve().parents[2]
# The stop bound run_daemon documents (Daemon.stop: pipeline join 10 s + upstream 5 s),
# with room for a slow machine; systemd's TimeoutStopSec in the unit is 30 s.
STOP_BOUND_S = 30


def set_threshold(bundle: Path, threshold: float) -> None:
    """Rewrite a bundle (temp-and-rename) with a new raise threshold."""
    meta = json.loads((bundle / MODEL_JSON).read_text())
    meta["threshold"] = threshold
    meta["clear_threshold"] = 0.8 * threshold
    write_bundle(bundle, (bundle / MODEL_ONNX).read_bytes(), meta)


def counter(daemon: Daemon, metric: str, *labels: str) -> float:
    return getattr(daemon.metrics, metric).labels(*labels)._value.get()


@pytest.fixture
def plant(tmp_path: Path, broker: Broker, upstream_broker: Broker):
    b1 = train_pca_bundle(tmp_path / "models" / "P-1", "P-1", seed=11)
    b2 = train_pca_bundle(tmp_path / "models" / "P-2", "P-2", seed=12)
    assets = [asset_doc("P-1", b1), asset_doc("P-2", b2)]
    cfg_path = write_config(tmp_path / "watchkeep.yaml", broker.port, upstream_broker.port,
                            assets)
    daemon = Daemon(load_config(cfg_path), logger=logging.getLogger("watchkeep.test"))
    collector = Collector(upstream_broker.port, "watchkeep/testworks/gw1/#")
    daemon.start()
    wait_for(daemon.ingest.connected.is_set, what="local broker connected")
    wait_for(daemon.upstream.connected.is_set, what="upstream connected")
    pub = publisher(broker.port)
    yield daemon, collector, pub, cfg_path, assets
    pub.disconnect()
    pub.loop_stop()
    daemon.stop()
    collector.close()


def _split(msgs: list[tuple[str, bytes]], asset: str, at_ts: float
           ) -> tuple[list[tuple[str, bytes]], list[tuple[str, bytes]]]:
    mine = [m for m in msgs if f"/{asset}/" in m[0]]
    before = [m for m in mine if json.loads(m[1])["ts"] < at_ts]
    return before, [m for m in mine if json.loads(m[1])["ts"] >= at_ts]


def test_changed_threshold_applies_and_the_other_asset_keeps_its_windows(plant) -> None:
    """SIGHUP after P-1's threshold drops: P-1 raises; P-2 keeps runtime, windows, buffers."""
    daemon, collector, pub, _, _ = plant
    t0 = math.floor(time.time()) + 1.0
    p1 = list(readings("P-1", t0, 12, seed=1))
    p2_before, p2_after = _split(list(readings("P-2", t0, 12, seed=2)), "P-2", t0 + 5.5)
    p1_before, p1_after = _split(p1, "P-1", t0 + 6)
    for topic, payload in p2_before + p1_before:
        pub.publish(topic, payload, qos=0)
    samples_p2 = daemon.metrics.samples.labels("P-2", "temp")
    wait_for(lambda: samples_p2._value.get() == 55, what="P-2's first 5.5 windows ingested")
    old_p2 = daemon.pipeline.runtimes[1]
    old_p2_asm, old_p1 = old_p2.assembler, daemon.pipeline.runtimes[0]
    assert old_p1.models.shown is not None
    new_thr = old_p1.models.shown.meta.threshold / 1e6  # every normal window is now "anomalous"
    set_threshold(Path(old_p1.cfg.bundle), new_thr)

    assert daemon.reload() is True

    p1_rt, p2_rt = daemon.pipeline.runtimes
    assert p2_rt is old_p2 and p2_rt.assembler is old_p2_asm
    assert p1_rt is not old_p1 and p1_rt.models.shown.meta.threshold == pytest.approx(new_thr)
    assert daemon.metrics.threshold.labels("P-1")._value.get() == pytest.approx(new_thr)
    assert counter(daemon, "reloads", "success") == 1
    for topic, payload in p2_after + p1_after:
        pub.publish(topic, payload, qos=0)
    wait_for(lambda: counter(daemon, "windows_scored", "P-2") >= 11, timeout_s=30,
             what="P-2's windows scored")
    # The window that straddled the reload (t0+5 .. t0+6) was completed, not lost.
    assert counter(daemon, "windows_skipped", "P-2", "incomplete") == 0
    wait_for(lambda: any(e["subject"] == "P-1" for e in collector.events()), timeout_s=30,
             what="P-1 raised under the new threshold")
    ev = next(e for e in collector.events() if e["subject"] == "P-1")
    assert ev["type"].endswith("anomaly.raised")
    assert ev["data"]["threshold"] == pytest.approx(new_thr)
    assert not any(e["subject"] == "P-2" for e in collector.events())


@pytest.mark.parametrize("breakage", ["yaml", "unknown_key", "bad_bundle", "restart_key"])
def test_a_broken_config_is_rejected_and_the_old_one_keeps_running(plant, tmp_path: Path,
                                                                   breakage: str) -> None:
    """Bad YAML, an unknown key, a broken bundle or a restart-only change: old config stays."""
    daemon, _, pub, cfg_path, _ = plant
    before = list(daemon.pipeline.runtimes)
    doc = yaml.safe_load(cfg_path.read_text())
    if breakage == "yaml":
        cfg_path.write_text(cfg_path.read_text() + "\n  - : [unclosed\n")
    elif breakage == "unknown_key":
        doc["assets"][0]["windw"] = {"length_s": 2.0}
        cfg_path.write_text(yaml.safe_dump(doc))
    elif breakage == "bad_bundle":
        bad = tmp_path / "models" / "broken"
        bad.mkdir(parents=True)
        (bad / MODEL_JSON).write_text("{}")
        (bad / MODEL_ONNX).write_bytes(b"\x00not onnx")
        doc["assets"][1]["bundle"] = str(bad)
        cfg_path.write_text(yaml.safe_dump(doc))
    else:
        doc["http"]["port"] = free_port()
        cfg_path.write_text(yaml.safe_dump(doc))

    assert daemon.reload() is False

    assert daemon.pipeline.runtimes == before
    assert all(a is b for a, b in zip(daemon.pipeline.runtimes, before, strict=True))
    assert counter(daemon, "reloads", "failure") == 1
    assert counter(daemon, "reloads", "success") == 0
    assert daemon.metrics.reload_ok._value.get() == 0
    t0 = math.floor(time.time()) + 1.0
    for topic, payload in readings("P-2", t0, 4, seed=5):
        pub.publish(topic, payload, qos=0)
    wait_for(lambda: counter(daemon, "windows_scored", "P-2") >= 3, timeout_s=30,
             what="the old config still scoring")


def test_added_and_removed_assets(plant) -> None:
    """A new asset (its own topics) is subscribed and scored; a removed one's series go."""
    daemon, _, pub, cfg_path, assets = plant
    doc = yaml.safe_load(cfg_path.read_text())
    doc["assets"] = [doc["assets"][0], asset_doc("F-3", Path(assets[1]["bundle"]),
                                                 prefix="plant")]
    cfg_path.write_text(yaml.safe_dump(doc))
    # F-3 reuses P-2's model (same feature names), which is allowed.
    assert daemon.reload() is True
    assert [rt.cfg.name for rt in daemon.pipeline.runtimes] == ["P-1", "F-3"]
    t0 = math.floor(time.time()) + 1.0

    def fed() -> bool:  # the SUBSCRIBE may take a moment: keep feeding fresh windows
        nonlocal t0
        for topic, payload in readings("F-3", t0, 3, seed=7):
            pub.publish(topic, payload, qos=0)
        t0 += 3
        return counter(daemon, "windows_scored", "F-3") >= 2

    wait_for(fed, timeout_s=30, interval_s=0.5, what="F-3 scored after the reload")
    names = {m.name for m in daemon.registry.collect()}
    assert "watchkeep_anomaly_score" in names
    exported = [s for m in daemon.registry.collect() for s in m.samples
                if s.labels.get("asset") == "P-2"]
    assert exported == []


def _status(port: int) -> dict:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/status", timeout=5) as r:
        return json.loads(r.read())


def _metric(port: int, line_start: str) -> float | None:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
        for line in r.read().decode().splitlines():
            if line.startswith(line_start):
                return float(line.rsplit(" ", 1)[1])
    return None


def test_sighup_and_sigterm_on_the_real_process(tmp_path: Path, broker: Broker,
                                                upstream_broker: Broker) -> None:
    """`watchkeep run`: SIGHUP good -> applied, SIGHUP broken -> kept, SIGTERM -> exit 0 and
    a retained offline status upstream."""
    b1 = train_pca_bundle(tmp_path / "models" / "P-1", "P-1", seed=11)
    http_port = free_port()
    cfg_path = write_config(tmp_path / "watchkeep.yaml", broker.port, upstream_broker.port,
                            [asset_doc("P-1", b1)], http={"port": http_port})
    env = {k: v for k, v in os.environ.items() if k != "NOTIFY_SOCKET"}
    proc = subprocess.Popen([sys.executable, "-m", "agent.cli.main", "run", "-c", str(cfg_path)],
                            cwd=ROOT, env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE)
    collector = Collector(upstream_broker.port, "watchkeep/testworks/gw1/status", "st-sub")
    try:
        def up() -> bool:
            try:
                return bool(_status(http_port)["local_connected"])
            except OSError:
                assert proc.poll() is None, proc.stderr.read().decode() if proc.stderr else ""
                return False

        wait_for(up, timeout_s=60, interval_s=0.1, what="daemon serving /status")
        thr = _status(http_port)["assets"][0]["threshold"]
        set_threshold(b1, thr * 2)
        proc.send_signal(signal.SIGHUP)
        wait_for(lambda: _status(http_port)["assets"][0]["threshold"] == pytest.approx(thr * 2),
                 timeout_s=30, what="new threshold in /status")
        assert _metric(http_port, 'watchkeep_config_reloads_total{result="success"}') == 1
        cfg_path.write_text("assets: [unclosed\n")
        proc.send_signal(signal.SIGHUP)
        wait_for(lambda: _metric(http_port, 'watchkeep_config_reloads_total{result="failure"}')
                 == 1, timeout_s=30, what="the broken reload counted")
        assert _status(http_port)["assets"][0]["threshold"] == pytest.approx(thr * 2)
        assert proc.poll() is None
        wait_for(lambda: any(s["state"] == "online" for s in collector.json()),
                 what="online status")
        proc.send_signal(signal.SIGTERM)
        rc = proc.wait(timeout=STOP_BOUND_S)
        stderr = proc.stderr.read().decode() if proc.stderr else ""
        assert rc == 0, stderr
        wait_for(lambda: collector.json() and collector.json()[-1]["state"] == "offline",
                 what="offline status published")
        assert collector.json()[-1].get("reason") == "stopped"
        assert "config reload rejected" in stderr and "config reloaded" in stderr
        for line in stderr.splitlines():  # one line per record, even for errors
            assert line.split(" ", 3)[2] in {"INFO", "WARNING", "ERROR", "DEBUG"}, line
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
        collector.close()
