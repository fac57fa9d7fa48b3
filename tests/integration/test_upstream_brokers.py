"""MQTT 5 shared subscriptions upstream, and a local broker restart under a running daemon."""

from __future__ import annotations

import json
import logging
import math
import threading
import time
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.subscribeoptions import SubscribeOptions

from agent.config.load import load_config
from agent.daemon import Daemon
from tests.brokers import Broker, wait_for
from tests.helpers import Collector, asset_doc, publisher, readings, train_pca_bundle, write_config

SHARED = "$share/maint/watchkeep/testworks/gw1/assets/+/events"


class SharedConsumer:
    """One instance of a scaled-out maintenance consumer (MQTT 5, shared subscription)."""

    def __init__(self, port: int, client_id: str) -> None:
        self.ids: list[str] = []
        self.lock = threading.Lock()
        self.ready = threading.Event()
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id,
                                  protocol=mqtt.MQTTv5)

        def on_connect(c: mqtt.Client, u: Any, f: Any, rc: Any, p: Any) -> None:
            c.subscribe(SHARED, options=SubscribeOptions(qos=1))

        def on_subscribe(c: mqtt.Client, u: Any, mid: Any, rcs: Any, p: Any) -> None:
            assert not any(r.is_failure for r in rcs), rcs
            self.ready.set()

        def on_message(c: mqtt.Client, u: Any, msg: mqtt.MQTTMessage) -> None:
            with self.lock:
                self.ids.append(json.loads(msg.payload)["id"])

        self.client.on_connect = on_connect
        self.client.on_subscribe = on_subscribe
        self.client.on_message = on_message
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()
        if not self.ready.wait(10):
            raise RuntimeError("shared consumer did not subscribe")

    def got(self) -> list[str]:
        with self.lock:
            return list(self.ids)

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def _anomalies(daemon: Daemon) -> int:
    return int(sum(daemon.registry.get_sample_value("watchkeep_events_total", {"type": t}) or 0
                   for t in ("anomaly.raised", "anomaly.escalated", "anomaly.cleared")))


def _scored(daemon: Daemon) -> float:
    return daemon.registry.get_sample_value("watchkeep_windows_scored_total",
                                            {"asset": "P-1"}) or 0.0


def _daemon(tmp_path: Path, local: Broker, upstream: Broker, protocol: str) -> Daemon:
    bundle = train_pca_bundle(tmp_path / "models" / "P-1", "P-1", seed=11)
    path = write_config(tmp_path / "wk.yaml", local.port, upstream.port,
                        [asset_doc("P-1", bundle)], ingest={"subscriptions": ["plant/#"]})
    import yaml

    doc = yaml.safe_load(path.read_text())
    doc["upstream_broker"]["protocol"] = protocol
    path.write_text(yaml.safe_dump(doc))
    return Daemon(load_config(path), logger=logging.getLogger("watchkeep.test.brokers"))


def test_shared_subscription_gets_each_event_once_across_two_consumers(
        tmp_path: Path, broker: Broker, upstream_broker: Broker) -> None:
    """Two MQTT 5 consumers in one share group: every event exactly once between them."""
    daemon = _daemon(tmp_path, broker, upstream_broker, protocol="5")
    a = SharedConsumer(upstream_broker.port, "maint-a")
    b = SharedConsumer(upstream_broker.port, "maint-b")
    daemon.start()
    pub = publisher(broker.port)
    try:
        wait_for(daemon.upstream.connected.is_set, what="upstream connected over MQTT 5")
        wait_for(daemon.ingest.connected.is_set, what="ingest subscribed")
        n = 64
        t0 = math.floor(time.time()) + 1.0
        faults = {w for w in range(n) if w % 8 in (2, 3, 4)}
        for topic, payload in readings("P-1", t0, n, seed=9, fault_windows=faults):
            pub.publish(topic, payload, qos=0)
        wait_for(lambda: _scored(daemon) >= n - 2, timeout_s=30, what="windows scored")
        expected = _anomalies(daemon)
        assert expected >= 8
        wait_for(lambda: len(a.got()) + len(b.got()) >= expected, timeout_s=15,
                 what="all events consumed")
        wait_for(lambda: daemon.outbox.counts()[0] == 0, what="outbox drained")
        ids = a.got() + b.got()
        assert len(ids) == len(set(ids)) == expected
        assert a.got() and b.got()  # the broker spread the group's messages over both
    finally:
        pub.disconnect()
        pub.loop_stop()
        daemon.stop()
        a.close()
        b.close()


def test_local_broker_restart_resubscribes_and_detection_continues(
        tmp_path: Path, broker: Broker, upstream_broker: Broker) -> None:
    """Local broker restarted: reconnect counted, subscriptions back, the gap counted as
    windows without data, and the next fault is detected."""
    daemon = _daemon(tmp_path, broker, upstream_broker, protocol="3.1.1")
    collector = Collector(upstream_broker.port, "watchkeep/testworks/gw1/assets/+/events",
                          "maint-local")
    daemon.start()
    pub = publisher(broker.port)
    try:
        wait_for(daemon.ingest.connected.is_set, what="local broker connected")
        t0 = math.floor(time.time()) + 1.0
        for topic, payload in readings("P-1", t0, 12, seed=4, fault_windows={4, 5, 6}):
            pub.publish(topic, payload, qos=0)
        wait_for(lambda: len(collector.events()) >= 1, timeout_s=30, what="first event")
        wait_for(lambda: _scored(daemon) >= 10, timeout_s=30, what="first windows scored")
        pub.disconnect()
        pub.loop_stop()
        broker.restart()
        wait_for(lambda: daemon.registry.get_sample_value(
            "watchkeep_broker_reconnects_total", {"broker": "local"}), timeout_s=30,
            what="ingest reconnected")
        wait_for(daemon.ingest.connected.is_set, what="local broker connected again")
        before_events = len(collector.events())
        gap_before = daemon.registry.get_sample_value(
            "watchkeep_windows_skipped_total", {"asset": "P-1", "reason": "no_data"}) or 0
        pub = publisher(broker.port, client_id="test-publisher-2")
        # Readings resume 10 windows later: those windows saw no data (the gap).
        t1 = t0 + 22
        for topic, payload in readings("P-1", t1, 20, seed=5, fault_windows={6, 7, 8, 9}):
            pub.publish(topic, payload, qos=0)
        wait_for(lambda: any(e["type"].endswith("anomaly.raised")
                             for e in collector.events()[before_events:]), timeout_s=30,
                 what="an anomaly raised after the local broker restart")
        gap = daemon.registry.get_sample_value(
            "watchkeep_windows_skipped_total", {"asset": "P-1", "reason": "no_data"}) or 0
        assert gap - gap_before >= 5
    finally:
        pub.disconnect()
        pub.loop_stop()
        daemon.stop()
        collector.close()
