"""Issue 20, finding 6, over real brokers and processes: deeply nested JSON, the local
broker's reconnect back-off, the ingest child's exit when its parent dies."""

from __future__ import annotations

import logging
import math
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from agent.config.load import load_config
from agent.daemon import Daemon
from tests.brokers import Broker, wait_for
from tests.helpers import asset_doc, publisher, readings, write_config
from tests.integration.test_ingest_worker import _children, _gone

WATCHKEEP = Path(sys.executable).parent / "watchkeep"


@pytest.mark.parametrize("worker", ["process", "thread"])
def test_deeply_nested_json_is_malformed_with_rate_limited_logs(
        tmp_path: Path, broker: Broker, upstream_broker: Broker, worker: str,
        caplog: pytest.LogCaptureFixture) -> None:
    """2,000 messages nested past the parsers' depth: all counted `malformed`, no callback
    error, one log line (not one traceback each); readings around them still scored."""
    cfg = load_config(write_config(tmp_path / "wk.yaml", broker.port, upstream_broker.port,
                                   [asset_doc("P-1", None)], ingest={"worker": worker}))
    caplog.set_level(logging.INFO)
    daemon = Daemon(cfg, logger=logging.getLogger("watchkeep.test"))
    daemon.start()
    pub = publisher(broker.port)
    try:
        wait_for(daemon.ingest.connected.is_set, what="connected")
        deep = b'{"ts": ' * 5000 + b"1" + b"}" * 5000  # 55 KB, under max_payload_bytes
        for _ in range(2000):
            pub.publish("plant/P-1/temp", deep, qos=0)
        t0 = math.floor(time.time()) + 1.0
        for topic, payload in readings("P-1", t0, 4, seed=1):
            pub.publish(topic, payload, qos=0)

        def malformed() -> float:
            daemon.handler.flush_counts()
            return daemon.metrics.messages_rejected.labels("malformed")._value.get()

        wait_for(lambda: malformed() == 2000, timeout_s=30, what="2,000 malformed")
        wait_for(lambda: daemon.metrics.windows_closed.labels("P-1")._value.get() >= 2,
                 timeout_s=20, what="windows closed")
        assert daemon.metrics.callback_errors.labels("ingest")._value.get() == 0
        lines = [r for r in caplog.records if "rejected" in r.getMessage()]
        assert 1 <= len(lines) <= 2, [r.getMessage() for r in lines]
        assert not any(r.exc_info or "Traceback" in r.getMessage() for r in caplog.records)
    finally:
        pub.disconnect()
        pub.loop_stop()
        daemon.stop()


def test_local_broker_reconnect_backoff_is_capped_at_10_s(
        tmp_path: Path, broker: Broker, upstream_broker: Broker) -> None:
    """A 16 s local broker stop: reconnected within 12 s of its return (the back-off
    1, 2, 4, 8, 10 s; with the old 30 s cap the next try came 15 s after)."""
    cfg = load_config(write_config(tmp_path / "wk.yaml", broker.port, upstream_broker.port,
                                   [asset_doc("P-1", None)]))
    daemon = Daemon(cfg, logger=logging.getLogger("watchkeep.test"))
    daemon.start()
    try:
        wait_for(daemon.ingest.connected.is_set, what="connected")
        broker.stop()
        wait_for(lambda: not daemon.ingest.connected.is_set(), what="the loss seen")
        time.sleep(16.0)  # the outage
        broker.start()
        back = time.monotonic()
        wait_for(daemon.ingest.connected.is_set, timeout_s=40, interval_s=0.1,
                 what="reconnected")
        took = time.monotonic() - back
        assert took < 12.0, f"reconnected {took:.1f} s after the broker came back"
    finally:
        daemon.stop()


def test_ingest_child_exits_without_a_traceback_when_its_parent_dies(
        tmp_path: Path, broker: Broker, upstream_broker: Broker) -> None:
    """SIGKILL of `watchkeep run` while readings flow: the child exits, and nothing it
    writes to the shared stderr is a traceback (BrokenPipeError)."""
    cfg_path = write_config(tmp_path / "wk.yaml", broker.port, upstream_broker.port,
                            [asset_doc("P-1", None)])
    log_path = tmp_path / "daemon.log"
    with log_path.open("ab") as log:
        proc = subprocess.Popen([str(WATCHKEEP), "run", "--config", str(cfg_path)],
                                stdout=subprocess.DEVNULL, stderr=log)
    stop = threading.Event()
    pub = publisher(broker.port)

    def flood() -> None:
        t0 = time.time()
        while not stop.is_set():
            for topic, payload in readings("P-1", t0, 1, seed=1):
                pub.publish(topic, payload, qos=0)
            t0 += 1.0
            time.sleep(0.01)

    feeder = threading.Thread(target=flood, daemon=True)
    try:
        kids = wait_for(lambda: _children(proc.pid), timeout_s=20, what="the ingest child")
        wait_for(lambda: "local broker connected" in log_path.read_text(), timeout_s=20,
                 what="the child connected")
        feeder.start()
        time.sleep(1.0)  # readings flowing through the child
        proc.kill()
        proc.wait(10)
        wait_for(lambda: _gone(kids[0]), timeout_s=10, what="the orphaned child to exit")
        text = log_path.read_text()
        assert "Traceback" not in text and "BrokenPipeError" not in text, text[-3000:]
    finally:
        stop.set()
        feeder.join(5)
        pub.disconnect()
        pub.loop_stop()
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
