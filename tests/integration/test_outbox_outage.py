"""No event lost: upstream outage, SIGKILL with events in the outbox, a corrupt outbox file."""

from __future__ import annotations

import json
import logging
import math
import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

from agent.config.load import load_config
from agent.daemon import Daemon
from tests.brokers import Broker, free_port, wait_for
from tests.helpers import Collector, asset_doc, publisher, readings, train_pca_bundle, write_config

EVENTS = "watchkeep/testworks/gw1/assets/+/events"
WATCHKEEP = Path(sys.executable).parent / "watchkeep"
MSGS_PER_WINDOW = 30  # tests.helpers: 10 samples x 3 channels per 1 s window


def fault_cycles(n_windows: int, period: int = 8) -> set[int]:
    """Three faulty windows in every `period`: one raise and one clear per cycle."""
    return {w for w in range(n_windows) if w % period in (2, 3, 4)}


class DurableCollector:
    """A maintenance-side subscriber with a persistent session (clean_session False), so
    the broker keeps its subscription and queues QoS 1 messages across a broker restart."""

    def __init__(self, port: int, topic: str, client_id: str) -> None:
        self.messages: list[dict[str, Any]] = []
        self.lock = threading.Lock()
        self.subscribed = threading.Event()
        # (time.monotonic(), session present) per CONNACK: whether the broker kept the
        # session is what the outage test depends on, and what a failure report needs.
        self.connects: list[tuple[float, bool]] = []
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id,
                                  clean_session=False)
        self.client.reconnect_delay_set(0.2, 1)

        def on_connect(c: mqtt.Client, u: Any, f: Any, rc: Any, p: Any) -> None:
            with self.lock:
                self.connects.append((time.monotonic(), bool(f.session_present)))
            c.subscribe(topic, qos=1)

        def on_subscribe(c: mqtt.Client, u: Any, mid: Any, rc: Any, p: Any) -> None:
            self.subscribed.set()

        def on_message(c: mqtt.Client, u: Any, msg: mqtt.MQTTMessage) -> None:
            with self.lock:
                self.messages.append(json.loads(msg.payload))

        self.client.on_connect = on_connect
        self.client.on_subscribe = on_subscribe
        self.client.on_message = on_message
        self.client.connect("127.0.0.1", port, keepalive=15)
        self.client.loop_start()
        if not self.subscribed.wait(10):
            raise RuntimeError("collector did not subscribe")

    def events(self) -> list[dict[str, Any]]:
        with self.lock:
            return list(self.messages)

    def connects_since(self, t: float) -> list[tuple[float, bool]]:
        with self.lock:
            return [c for c in self.connects if c[0] >= t]

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def check_complete_in_order(events: list[dict[str, Any]], expected: int) -> int:
    """Every sequence 1..expected arrived, first arrivals in order; returns duplicates."""
    first: dict[str, dict[str, Any]] = {}
    for ev in events:
        first.setdefault(ev["id"], ev)
    seqs = [ev["data"]["sequence"] for ev in first.values()]
    assert seqs == list(range(1, expected + 1)), seqs
    return len(events) - len(first)


def _publish_paced(pub: mqtt.Client, msgs: Iterator[tuple[str, bytes]], window_s: float,
                   stop: threading.Event) -> None:
    """Publish window by window, `window_s` apart: the plant keeps producing."""
    for i, (topic, payload) in enumerate(msgs):
        if stop.is_set():
            return
        pub.publish(topic, payload, qos=0)
        if i % MSGS_PER_WINDOW == MSGS_PER_WINDOW - 1:
            stop.wait(window_s)


class _UpstreamConnects(logging.Handler):
    """When the daemon's upstream connection came up (time.monotonic()), from its log."""

    def __init__(self) -> None:
        super().__init__(logging.INFO)
        self.times: list[float] = []

    def emit(self, record: logging.LogRecord) -> None:
        if record.getMessage().startswith("upstream broker connected"):
            self.times.append(time.monotonic())


def _outage_report(collector: DurableCollector, connects: _UpstreamConnects,
                   restart_at: float, expected: int, upstream: Broker) -> str:
    """What a failed run needs to tell a lost session from a daemon fault: which events
    are missing, who reconnected when after the restart, and the broker's own log."""
    got = {e["data"]["sequence"] for e in collector.events()}
    missing = sorted(set(range(1, expected + 1)) - got)
    ours = [f"{t - restart_at:+.2f}s" for t in connects.times if t >= restart_at]
    theirs = [f"{t - restart_at:+.2f}s session_present={sp}"
              for t, sp in collector.connects_since(restart_at)]
    return (f"expected {expected} events, collector has {len(got)}, missing {missing}\n"
            f"after the upstream restart: daemon connected at {ours}; "
            f"collector connected at {theirs}\n"
            f"upstream broker log:\n{upstream.log_text()[-4000:]}")


def _anomalies(daemon: Daemon) -> int:
    total = 0.0
    for t in ("anomaly.raised", "anomaly.escalated", "anomaly.cleared"):
        total += daemon.registry.get_sample_value("watchkeep_events_total", {"type": t}) or 0
    return int(total)


def test_upstream_outage_loses_nothing_and_keeps_order(tmp_path: Path, broker: Broker) -> None:
    """Upstream stopped ~22 s while anomalies keep coming: all arrive in order after restart."""
    # tests.brokers keeps a root-started broker root: as user `mosquitto` it could not
    # write under pytest's private temp directory, saved no session, and the restart
    # forgot the collector's subscription, so events the daemon drained before the
    # collector subscribed again were acknowledged and dropped (the old flaky failure).
    upstream = Broker(tmp_path / "up", extra=(
        "persistence true\n"
        f"persistence_location {tmp_path / 'up'}/\n"
        "autosave_interval 1\n")).start()
    bundle = train_pca_bundle(tmp_path / "models" / "P-1", "P-1", seed=11)
    cfg = load_config(write_config(tmp_path / "wk.yaml", broker.port, upstream.port,
                                   [asset_doc("P-1", bundle)],
                                   ingest={"subscriptions": ["plant/#"]}))
    log = logging.getLogger("watchkeep.test.outage")
    # INFO, so the handler sees the daemon's "upstream broker connected" lines.
    log.setLevel(logging.INFO)
    upstream_connects = _UpstreamConnects()
    log.addHandler(upstream_connects)
    daemon = Daemon(cfg, logger=log)
    collector = DurableCollector(upstream.port, EVENTS, "maint-outage")
    daemon.start()
    stop = threading.Event()
    pub = publisher(broker.port)
    restart_at = math.inf
    try:
        wait_for(daemon.upstream.connected.is_set, what="upstream connected")
        # Readings sent before ingest has subscribed are lost (QoS 0): the scored-window
        # count below expects every window.
        wait_for(daemon.ingest.connected.is_set, what="ingest subscribed")
        n_windows = 120
        t0 = math.floor(time.time()) + 1.0
        feed = threading.Thread(target=_publish_paced, daemon=True, args=(
            pub, readings("P-1", t0, n_windows, seed=3, fault_windows=fault_cycles(n_windows)),
            0.25, stop))
        feed.start()
        wait_for(lambda: len(collector.events()) >= 2, timeout_s=20, what="events before cut")
        upstream.stop()
        cut_at = time.monotonic()
        # Written at shutdown: without it the broker cannot restore the collector's session.
        assert (tmp_path / "up" / "mosquitto.db").exists(), upstream.log_text()
        before = _anomalies(daemon)
        # The plant keeps producing: events pile up in the outbox while upstream is down.
        wait_for(lambda: _anomalies(daemon) >= before + 6, timeout_s=30,
                 what="anomalies during the outage")
        wait_for(lambda: time.monotonic() - cut_at >= 22, timeout_s=40, interval_s=0.2,
                 what="a 22 s outage")
        rows = daemon.registry.get_sample_value("watchkeep_outbox_rows")
        assert rows and rows >= 6
        assert not daemon.upstream.connected.is_set()
        assert daemon.upstream.seconds_since_ack() >= 20
        restart_at = time.monotonic()  # before start: the collector may be back at once
        upstream.start()
        # The premise of "loses nothing": the broker kept the collector's subscription over
        # the restart, so what the daemon drains before the collector is back is queued for
        # it. A session that is not present means lost events, not a daemon fault.
        back = wait_for(lambda: collector.connects_since(restart_at), what="collector back")
        assert back[0][1], ("upstream broker lost the collector's session over the restart\n"
                            + _outage_report(collector, upstream_connects, restart_at,
                                             _anomalies(daemon), upstream))
        feed.join(60)
        assert not feed.is_alive()
        wait_for(lambda: daemon.registry.get_sample_value(
            "watchkeep_windows_scored_total", {"asset": "P-1"}) >= n_windows - 2,
            timeout_s=30, what="all windows scored")
        # The last windows close on timeout after the feed ends: wait until no more
        # anomaly events are being made before counting what must have arrived.
        seen: list[int] = []

        def quiet() -> bool:
            seen.append(_anomalies(daemon))
            return len(seen) > 15 and seen[-1] == seen[-15]

        wait_for(quiet, timeout_s=30, interval_s=0.2, what="no new anomaly events")
        expected = _anomalies(daemon)
        try:
            wait_for(lambda: len({e["id"] for e in collector.events()}) >= expected,
                     timeout_s=30, what="every event delivered after the restart")
        except AssertionError:
            print(_outage_report(collector, upstream_connects, restart_at, expected, upstream))
            raise
        wait_for(lambda: daemon.outbox.counts()[0] == 0, timeout_s=10, what="outbox drained")
        dups = check_complete_in_order(collector.events(), expected)
        assert expected >= 12
        # Duplicates can only be messages that were in flight at the cut.
        assert dups <= cfg.outbox.inflight
        print(f"outage: {expected} anomaly events, {dups} duplicate(s) from the cut")
        assert daemon.registry.get_sample_value("watchkeep_broker_reconnects_total",
                                                {"broker": "upstream"}) >= 1
    finally:
        stop.set()
        pub.disconnect()
        pub.loop_stop()
        daemon.stop()
        collector.close()
        upstream.stop()
        log.removeHandler(upstream_connects)
        log.setLevel(logging.NOTSET)


def _outbox_events(db_path: Path) -> list[str]:
    """Event ids waiting in the outbox file, read as an outside reader would (WAL)."""
    if not db_path.exists():
        return []
    try:
        db = sqlite3.connect(f"file:{db_path}?mode=ro", uri=True, timeout=1)
        try:
            rows = db.execute("SELECT payload FROM outbox WHERE kind = 3 ORDER BY id").fetchall()
        finally:
            db.close()
    except sqlite3.Error:
        return []
    return [json.loads(r[0])["id"] for r in rows]


def _spawn(cfg_path: Path, log: Path) -> subprocess.Popen[bytes]:
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    return subprocess.Popen([str(WATCHKEEP), "run", "--config", str(cfg_path)],
                            stdout=subprocess.DEVNULL, stderr=log.open("ab"), env=env)


def _end(proc: subprocess.Popen[bytes]) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(5)


def test_sigkill_with_events_in_the_outbox_then_all_delivered(tmp_path: Path,
                                                              broker: Broker) -> None:
    """SIGKILL while upstream is down: after a restart every stored event is delivered and
    sequence numbers continue."""
    up_port = free_port()
    bundle = train_pca_bundle(tmp_path / "models" / "P-1", "P-1", seed=11)
    cfg_path = write_config(tmp_path / "wk.yaml", broker.port, up_port,
                            [asset_doc("P-1", bundle)], ingest={"subscriptions": ["plant/#"]},
                            http={"enabled": False})
    db_path = tmp_path / "state" / "outbox.sqlite"
    log = tmp_path / "daemon.log"
    proc = _spawn(cfg_path, log)
    pub = publisher(broker.port)
    upstream: Broker | None = None
    try:
        wait_for(lambda: "local broker connected" in log.read_text(), timeout_s=30,
                 what="daemon subprocess connected locally")
        t0 = math.floor(time.time()) + 1.0
        n = 40
        for topic, payload in readings("P-1", t0, n, seed=5, fault_windows=fault_cycles(n)):
            pub.publish(topic, payload, qos=0)
        wait_for(lambda: len(_outbox_events(db_path)) >= 6, timeout_s=30,
                 what="events waiting in the outbox")
        proc.send_signal(signal.SIGKILL)
        proc.wait(10)
        stored = _outbox_events(db_path)
        assert len(stored) >= 6
        upstream = Broker(tmp_path / "up", port=up_port).start()
        collector = Collector(up_port, EVENTS, "maint-sigkill")
        proc = _spawn(cfg_path, log)
        wait_for(lambda: {e["id"] for e in collector.events()} >= set(stored), timeout_s=30,
                 what="every stored event delivered after the restart")
        got = collector.events()
        assert [e["id"] for e in got[:len(stored)]] == stored  # in order
        assert [e["data"]["sequence"] for e in got[:len(stored)]] == \
            list(range(1, len(stored) + 1))
        # Sequence numbers survive the crash: the next event carries the next number.
        # The log holds both runs; the connect line may come before or after "started".
        wait_for(lambda: log.read_text().count("local broker connected") >= 2, timeout_s=30,
                 what="restarted daemon connected")
        t1 = t0 + n + 5
        for topic, payload in readings("P-1", t1, 12, seed=6, fault_windows={4, 5, 6}):
            pub.publish(topic, payload, qos=0)
        wait_for(lambda: len(collector.events()) > len(stored), timeout_s=30,
                 what="an event after the restart")
        assert collector.events()[len(stored)]["data"]["sequence"] == len(stored) + 1
        collector.close()
    finally:
        pub.disconnect()
        pub.loop_stop()
        _end(proc)
        if upstream is not None:
            upstream.stop()


def test_corrupt_outbox_is_moved_aside_and_reported(tmp_path: Path, broker: Broker,
                                                    upstream_broker: Broker) -> None:
    """A corrupt outbox file: moved aside, the daemon runs and says so (log, metric, status)."""
    bundle = train_pca_bundle(tmp_path / "models" / "P-1", "P-1", seed=11)
    cfg = load_config(write_config(tmp_path / "wk.yaml", broker.port, upstream_broker.port,
                                   [asset_doc("P-1", bundle)],
                                   ingest={"subscriptions": ["plant/#"]}))
    cfg.outbox.path.parent.mkdir(parents=True, exist_ok=True)
    cfg.outbox.path.write_bytes(b"\x00garbage, not SQLite\x00" * 512)
    status = Collector(upstream_broker.port, "watchkeep/testworks/gw1/#", "maint-corrupt")
    daemon = Daemon(cfg, logger=logging.getLogger("watchkeep.test.corrupt"))
    daemon.start()
    pub = publisher(broker.port)
    try:
        moved = list(cfg.outbox.path.parent.glob("outbox.sqlite.corrupt-*"))
        assert len(moved) == 1
        assert daemon.registry.get_sample_value("watchkeep_outbox_corrupt_resets_total") == 1
        assert daemon.status()["outbox"]["corrupt_reset"]["moved_to"] == str(moved[0])
        online = wait_for(lambda: [s for s in status.json("/status") if s["state"] == "online"],
                          what="online status")
        assert online[0]["outbox"]["corrupt_reset"]["moved_to"] == str(moved[0])
        wait_for(daemon.ingest.connected.is_set, what="ingest subscribed")
        t0 = math.floor(time.time()) + 1.0
        for topic, payload in readings("P-1", t0, 16, seed=7, fault_windows={4, 5, 6}):
            pub.publish(topic, payload, qos=0)
        wait_for(lambda: status.events(), timeout_s=30, what="events through the new outbox")
    finally:
        pub.disconnect()
        pub.loop_stop()
        daemon.stop()
        status.close()

