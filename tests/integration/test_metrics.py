"""/metrics, /healthz, /readyz, /status over real HTTP while the daemon runs on real brokers."""

from __future__ import annotations

import json
import logging
import math
import shutil
import subprocess
import time
import urllib.error
import urllib.request
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families

from agent import __version__
from agent.cli.main import main as cli_main
from agent.config.load import load_config
from agent.daemon import Daemon
from tests.brokers import Broker, wait_for
from tests.helpers import CHANNELS, asset_doc, publisher, readings, train_pca_bundle, write_config

PROMTOOL = shutil.which("promtool")


def get(url: str) -> tuple[int, str]:
    try:
        with urllib.request.urlopen(url, timeout=5) as r:
            return r.status, r.read().decode()
    except urllib.error.HTTPError as exc:
        return exc.code, exc.read().decode()


def samples(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    """Every sample of a scrape: (name, sorted labels) -> value, via prometheus_client's parser."""
    out = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


def value(scrape: dict, name: str, **labels: str) -> float:
    return scrape[(name, tuple(sorted(labels.items())))]


@pytest.fixture
def running(tmp_path: Path, broker: Broker, upstream_broker: Broker):
    b1 = train_pca_bundle(tmp_path / "models" / "P-1", "P-1", seed=11)
    cfg_path = write_config(tmp_path / "watchkeep.yaml", broker.port, upstream_broker.port,
                            [asset_doc("P-1", b1), asset_doc("P-2", None)])
    daemon = Daemon(load_config(cfg_path), logger=logging.getLogger("watchkeep.test"))
    daemon.start()
    wait_for(daemon.ingest.connected.is_set, what="local broker connected")
    wait_for(daemon.upstream.connected.is_set, what="upstream connected")
    assert daemon.http is not None
    yield daemon, f"http://127.0.0.1:{daemon.http.port}", broker
    daemon.stop()


def test_scrape_has_the_expected_series_and_values(running, tmp_path: Path) -> None:
    """20 windows of P-1 readings plus bad input -> counters, gauges, histograms as expected."""
    daemon, base, broker = running
    t0 = math.floor(time.time()) + 1.0
    pub = publisher(broker.port, "metrics-publisher")
    n_msgs = 0
    for topic, payload in readings("P-1", t0, 20, seed=3):
        pub.publish(topic, payload, qos=0)
        n_msgs += 1
    pub.publish("plant/P-1/temp", b"{broken", qos=0)
    pub.publish("plant/P-2/temp", b'{"value": 1.5}', qos=0)
    scored = daemon.metrics.windows_scored.labels("P-1")
    wait_for(lambda: scored._value.get() >= 19, timeout_s=30, what="19 windows scored")
    wait_for(lambda: daemon.metrics.messages_rejected.labels("malformed")._value.get() == 1,
             what="the broken message counted")
    pub.disconnect()
    pub.loop_stop()

    status, text = get(base + "/metrics")
    assert status == 200
    s = samples(text)
    # Counters: every reading of P-1 (10 Hz x 3 channels x 20 windows) plus the broken one.
    assert value(s, "watchkeep_messages_received_total", asset="P-1") == n_msgs + 1
    assert value(s, "watchkeep_messages_received_total", asset="P-2") == 1
    assert value(s, "watchkeep_messages_rejected_total", reason="malformed") == 1
    assert value(s, "watchkeep_messages_rejected_total", reason="non_finite") == 0
    for ch in CHANNELS:
        assert value(s, "watchkeep_samples_total", asset="P-1", channel=ch) == 200
    assert value(s, "watchkeep_windows_scored_total", asset="P-1") >= 19
    assert value(s, "watchkeep_windows_closed_total", asset="P-1") >= 19
    # Per-asset gauges follow the model.
    thr = daemon.pipeline.runtimes[0].models.shown.meta.threshold
    assert value(s, "watchkeep_anomaly_threshold", asset="P-1") == pytest.approx(thr)
    assert value(s, "watchkeep_anomaly_score", asset="P-1") < thr
    assert value(s, "watchkeep_asset_anomalous", asset="P-1") == 0
    assert value(s, "watchkeep_model_loaded", asset="P-1") == 1
    assert value(s, "watchkeep_model_loaded", asset="P-2") == 0
    assert value(s, "watchkeep_model_info", asset="P-1", model_id="P-1/default", version="1",
                 mode="default") == 1
    assert value(s, "watchkeep_info", version=__version__) == 1
    # Connections, ages, reloads, ticks.
    assert value(s, "watchkeep_broker_connected", broker="local") == 1
    assert value(s, "watchkeep_broker_connected", broker="upstream") == 1
    for ch in CHANNELS:
        age = value(s, "watchkeep_sensor_last_sample_age_seconds", asset="P-1", channel=ch)
        assert 0 <= age < 60
    assert value(s, "watchkeep_config_reloads_total", result="success") == 0
    assert value(s, "watchkeep_config_reloads_total", result="failure") == 0
    assert value(s, "watchkeep_config_last_reload_successful") == 1
    assert value(s, "watchkeep_pipeline_ticks_total") > 0
    assert value(s, "watchkeep_outbox_capacity_rows") == daemon.cfg.outbox.max_rows
    # Histograms: sub-millisecond to seconds, and they saw the work.
    feat = [k for k in s if k[0] == "watchkeep_feature_seconds_bucket"]
    les = sorted(float(dict(k[1])["le"]) for k in feat)
    assert les[0] < 0.0001 and les[-2] >= 5.0 and math.isinf(les[-1])
    assert value(s, "watchkeep_inference_seconds_count") >= 1
    assert value(s, "watchkeep_feature_seconds_count") >= 1
    # Labels only from bounded sets: no topic, id or value ever appears as a label value.
    for (name, labels), _ in s.items():
        for k, v in labels:
            assert "/" not in v or k == "model_id", (name, labels)

    if PROMTOOL:  # `promtool check metrics` lints names, units, _total and help texts
        scrape = tmp_path / "scrape.txt"
        scrape.write_text(text)
        res = subprocess.run([PROMTOOL, "check", "metrics"], input=text.encode(),
                             capture_output=True, timeout=60)
        assert res.returncode == 0 and not res.stdout.strip() and not res.stderr.strip(), \
            (res.stdout + res.stderr).decode()


@pytest.mark.skipif(PROMTOOL is None, reason="promtool not installed (Debian: prometheus)")
def test_promtool_is_available_in_ci() -> None:
    """A placeholder that documents the dependency: .ci/run installs `prometheus`."""
    assert PROMTOOL


def test_health_ready_status_and_the_status_command(running, capsys) -> None:
    """/healthz and /readyz are 200, /status is JSON per asset, `watchkeep status` a table."""
    daemon, base, _ = running
    assert get(base + "/healthz")[0] == 200
    assert get(base + "/readyz") == (200, "ready\n")
    assert get(base + "/nothing")[0] == 404
    code, body = get(base + "/status")
    assert code == 200
    doc = json.loads(body)
    assert [a["asset"] for a in doc["assets"]] == ["P-1", "P-2"]
    assert doc["assets"][0]["model"] == {"id": "P-1/default", "version": 1}
    assert doc["local_connected"] is True and doc["upstream_connected"] is True
    assert cli_main(["status", "--url", base]) == 0
    out = capsys.readouterr().out
    assert "ASSET" in out and "THRESHOLD" in out
    lines = {ln.split()[0]: ln for ln in out.splitlines() if ln.startswith("P-")}
    assert "P-1/default v1" in lines["P-1"] and "normal" in lines["P-1"]
    assert "none" in lines["P-2"]
    # Once the pipeline stops ticking, /healthz fails (and WATCHDOG=1 stops, see test_notify).
    daemon.loop.wedged.set()
    try:
        wait_for(lambda: get(base + "/healthz")[0] == 503, timeout_s=20,
                 what="/healthz to report the stalled pipeline")
    finally:
        daemon.loop.wedged.clear()


def test_readyz_fails_while_the_local_broker_is_down(running) -> None:
    """/readyz is 503 without the local broker and 200 again after it returns."""
    _, base, broker = running
    broker.stop()
    wait_for(lambda: get(base + "/readyz")[0] == 503, what="/readyz 503")
    assert "local broker" in get(base + "/readyz")[1]
    broker.start()
    wait_for(lambda: get(base + "/readyz")[0] == 200, timeout_s=30, what="/readyz 200 again")


def test_readyz_names_an_asset_whose_model_failed(tmp_path: Path, broker: Broker,
                                                  upstream_broker: Broker) -> None:
    """A bad bundle fails its asset only; /readyz says which model is not loaded."""
    bad = tmp_path / "models" / "bad"
    bad.mkdir(parents=True)
    (bad / "model.json").write_text("{}")
    (bad / "model.onnx").write_bytes(b"not onnx")
    cfg_path = write_config(tmp_path / "watchkeep.yaml", broker.port, upstream_broker.port,
                            [asset_doc("P-1", bad)])
    daemon = Daemon(load_config(cfg_path), logger=logging.getLogger("watchkeep.test"))
    daemon.start()
    try:
        wait_for(daemon.ingest.connected.is_set, what="local broker connected")
        assert daemon.http is not None
        code, body = get(f"http://127.0.0.1:{daemon.http.port}/readyz")
        assert code == 503 and "P-1" in body
    finally:
        daemon.stop()
