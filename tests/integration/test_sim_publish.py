"""watchkeep-sim against a real Mosquitto started by the test on a free loopback port."""

from __future__ import annotations

import collections
import os
import signal
import socket
import subprocess
import sys
import threading
import time
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion

from agent.commission.capture import read_capture
from simulator.plant import simulate
from simulator.publish import publish
from simulator.scenario import load_scenario, parse_scenario

MOSQUITTO = "/usr/sbin/mosquitto"

pytestmark = pytest.mark.skipif(not os.path.exists(MOSQUITTO), reason="needs mosquitto")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _wait_until(predicate: Any, timeout_s: float, what: str) -> None:
    deadline = time.monotonic() + timeout_s
    while not predicate():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.02)


@pytest.fixture
def broker(tmp_path: Path) -> Iterator[int]:
    """A private Mosquitto on a free loopback port; stopped by PID afterwards."""
    port = _free_port()
    conf = tmp_path / "mosquitto.conf"
    # No per-client queue limit: a test subscriber that lags a burst must not lose
    # QoS 0 messages (Mosquitto's default of 1000 drops them silently).
    conf.write_text(f"listener {port} 127.0.0.1\nallow_anonymous true\n"
                    "max_queued_messages 0\npersistence false\n")
    log = (tmp_path / "mosquitto.log").open("w")
    proc = subprocess.Popen([MOSQUITTO, "-c", str(conf)], stdout=log, stderr=log)

    def accepts() -> bool:
        if proc.poll() is not None:
            raise AssertionError(f"mosquitto exited: {(tmp_path / 'mosquitto.log').read_text()}")
        try:
            socket.create_connection(("127.0.0.1", port), timeout=0.2).close()
            return True
        except OSError:
            return False

    try:
        _wait_until(accepts, 10, "mosquitto to accept connections")
        yield port
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=10)
        log.close()


class Subscriber:
    """A plain paho subscriber that records (topic, payload) as they arrive."""

    def __init__(self, port: int, topic_filter: str, qos: int = 0) -> None:
        self.received: list[tuple[str, bytes]] = []
        self._lock = threading.Lock()
        self._subscribed = threading.Event()
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2,
                                  client_id=f"test-sub-{uuid.uuid4().hex[:8]}")
        self.client.on_connect = lambda c, *_: c.subscribe(topic_filter, qos=qos)
        self.client.on_subscribe = lambda *_: self._subscribed.set()
        self.client.on_message = self._on_message
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()
        _wait_until(self._subscribed.is_set, 10, "SUBACK")

    def _on_message(self, _c: Any, _u: Any, msg: mqtt.MQTTMessage) -> None:
        with self._lock:
            self.received.append((msg.topic, bytes(msg.payload)))

    def count(self) -> int:
        with self._lock:
            return len(self.received)

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def _scenario_file(tmp_path: Path, plant: str, duration_s: float) -> Path:
    p = tmp_path / "scenario.yaml"
    p.write_text(f"""\
name: it
plant: {plant}
seed: 4
start: 2026-03-02T08:00:00Z
duration_s: {duration_s}
assets:
  - {{name: P-101, kind: pump, area: raw-water}}
  - {{name: C-301, kind: compressor, area: utilities}}
timeline:
  - {{at_s: 1, asset: P-101, fault: bearing_outer_race, ramp_s: 1}}
  - {{at_s: 1, asset: C-301, sensor_fault: dropout, channel: current, end_s: 2}}
""")
    return p


def _by_topic(msgs: list[tuple[str, bytes]]) -> dict[str, list[bytes]]:
    out: dict[str, list[bytes]] = collections.defaultdict(list)
    for topic, payload in msgs:
        out[topic].append(payload)
    return dict(out)


@pytest.mark.parametrize("qos", [0, 1])
def test_cli_publishes_every_message_to_a_real_broker(broker: int, tmp_path: Path,
                                                      qos: int) -> None:
    """`watchkeep-sim run --speed max` delivers each topic's messages, in order, once."""
    plant = f"itplant{uuid.uuid4().hex[:8]}"
    scenario = _scenario_file(tmp_path, plant, 3)
    expected = [(t, p) for _, t, p in simulate(load_scenario(scenario))]
    sub = Subscriber(broker, f"{plant}/#", qos=qos)
    try:
        out = tmp_path / "cap.jsonl"
        r = subprocess.run(
            [sys.executable, "-m", "simulator.cli", "run", "--scenario", str(scenario),
             "--broker", f"127.0.0.1:{broker}", "--speed", "max", "--qos", str(qos),
             "--out", str(out), "--labels", str(tmp_path / "labels.json")],
            capture_output=True, text=True, timeout=120)
        assert r.returncode == 0, r.stderr
        assert f"published {len(expected)} messages" in r.stderr
        _wait_until(lambda: sub.count() >= len(expected), 30, "all messages")
    finally:
        sub.close()
    got = _by_topic(sub.received)
    want = _by_topic(expected)
    assert {t: len(v) for t, v in got.items()} == {t: len(v) for t, v in want.items()}
    assert got == want
    assert len(want[f"{plant}/utilities/C-301/current"]) == 20  # 1 s of 3 s dropped
    assert [(t, p) for _, t, p in read_capture(out)] == expected


def test_paced_publish_in_process_keeps_order(broker: int) -> None:
    """publish() at 20x speed sends every message in simulated-time order."""
    plant = f"itplant{uuid.uuid4().hex[:8]}"
    s = parse_scenario({"plant": plant, "seed": 1, "start": 1000.0, "duration_s": 2,
                        "assets": [{"name": "B-201", "kind": "blower", "area": "aeration"}]})
    expected = list(simulate(s))
    seen: list[float] = []
    sub = Subscriber(broker, f"{plant}/#")
    try:
        stats = publish(iter(expected), host="127.0.0.1", port=broker, speed=20.0,
                        sim_origin=1000.0, on_sent=lambda m: seen.append(m[0]))
        _wait_until(lambda: sub.count() >= len(expected), 30, "all messages")
    finally:
        sub.close()
    assert stats.sent == len(expected) and stats.dropped == 0
    assert seen == [m[0] for m in expected]
    assert _by_topic(sub.received) == _by_topic([(t, p) for _, t, p in expected])


def test_wall_start_holds_each_message_until_its_wall_clock_time(broker: int) -> None:
    """With `wall_start`, the message at simulated time t leaves no earlier than
    wall_start + (t - sim_origin) / speed on the wall clock, whenever the run started."""
    origin, speed = 5000.0, 2.0
    msgs = [(origin + dt, "itwall/a", b"x") for dt in (0.0, 0.2, 0.4)]
    sent_at: list[float] = []
    wall_start = time.time() + 0.3
    stats = publish(iter(msgs), host="127.0.0.1", port=broker, speed=speed,
                    sim_origin=origin, wall_start=wall_start,
                    on_sent=lambda m: sent_at.append(time.time()))
    assert stats.sent == 3
    due = [wall_start + (t - origin) / speed for t, _, _ in msgs]
    assert all(s >= d - 0.005 for s, d in zip(sent_at, due, strict=True)), (sent_at, due)


def test_stop_event_ends_a_paced_run_early(broker: int) -> None:
    """Setting `stop` ends publish() at the next message; the rest are not sent."""
    s = parse_scenario({"plant": "itstop", "seed": 1, "start": 0.0, "duration_s": 600,
                        "assets": [{"name": "B-201", "kind": "blower", "area": "aeration"}]})
    stop = threading.Event()

    def on_sent(m: tuple[float, str, bytes]) -> None:
        if m[0] >= 0.5:
            stop.set()

    stats = publish(simulate(s), host="127.0.0.1", port=broker, speed=1.0, on_sent=on_sent,
                    stop=stop, sim_origin=0.0)
    assert 0 < stats.sent < 100


def test_sigterm_stops_a_live_run_cleanly(broker: int, tmp_path: Path) -> None:
    """SIGTERM mid-run: exit 143, one line on stderr, the capture holds whole lines only."""
    scenario = _scenario_file(tmp_path, f"itplant{uuid.uuid4().hex[:8]}", 600)
    out = tmp_path / "cap.jsonl"
    proc = subprocess.Popen(
        [sys.executable, "-m", "simulator.cli", "run", "--scenario", str(scenario),
         "--broker", f"127.0.0.1:{broker}", "--speed", "1", "--out", str(out)],
        stderr=subprocess.PIPE, text=True)
    try:
        _wait_until(lambda: out.exists() and out.stat().st_size > 0, 30, "capture lines")
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(timeout=10)
    assert proc.returncode == 143, err
    assert err.strip() == "watchkeep-sim: terminated"
    assert len(list(read_capture(out))) > 0
