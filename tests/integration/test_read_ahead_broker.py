"""The read-ahead client (what `make_client` builds) against a real Mosquitto: bursts far
larger than one read, a message larger than the read-ahead among small ones, QoS 0 and
1, MQTT 3.1.1 and 5, and a broker restart in between (nothing read before it may be
carried into the new connection)."""

from __future__ import annotations

import threading
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion

from agent.config.load import BrokerConfig, MqttProtocol
from agent.ingest.mqtt import make_client
from agent.ingest.mqtt_client import READ_AHEAD, ReadAheadClient
from tests.brokers import Broker, wait_for


class Receiver:
    def __init__(self, port: int, protocol: MqttProtocol, qos: int) -> None:
        self.got: list[bytes] = []
        self.lock = threading.Lock()
        self.subscribed = threading.Event()
        self.client = make_client(BrokerConfig(port=port, client_id=f"ra-{protocol.value}",
                                               protocol=protocol, keepalive_s=5))
        assert isinstance(self.client, ReadAheadClient)
        self.client.reconnect_delay_set(min_delay=1, max_delay=1)

        def on_connect(c: mqtt.Client, u: Any, flags: Any, rc: Any, props: Any) -> None:
            c.subscribe("ra/#", qos=qos)

        def on_message(c: mqtt.Client, u: Any, msg: mqtt.MQTTMessage) -> None:
            with self.lock:
                self.got.append(msg.payload)

        self.client.on_connect = on_connect
        self.client.on_subscribe = lambda *a: self.subscribed.set()
        self.client.on_message = on_message
        self.client.connect("127.0.0.1", port, keepalive=5)
        self.client.loop_start()
        assert self.subscribed.wait(10)

    def count(self) -> int:
        with self.lock:
            return len(self.got)

    def stop(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def send(port: int, payloads: list[bytes], qos: int) -> None:
    pub = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="ra-pub")
    pub.connect("127.0.0.1", port)
    pub.loop_start()
    try:
        infos = [pub.publish("ra/x", p, qos=qos) for p in payloads]
        for info in infos[-1:]:
            info.wait_for_publish(30)
    finally:
        pub.disconnect()
        pub.loop_stop()


def burst(tag: str, n: int) -> list[bytes]:
    big = bytes(range(256)) * (2 * READ_AHEAD // 256 + 3)
    return [b"%s-%d|" % (tag.encode(), i) + (big if i == n // 2 else b"x" * (i % 300))
            for i in range(n)]


@pytest.mark.parametrize("protocol", [MqttProtocol.V311, MqttProtocol.V5])
@pytest.mark.parametrize("qos", [0, 1])
def test_bursts_arrive_whole_and_in_order_across_a_broker_restart(
        tmp_path: Path, protocol: MqttProtocol, qos: int) -> None:
    # No per-client queue limit: QoS 0 to a slow subscriber is otherwise dropped by
    # Mosquitto (max_queued_messages 1000 by default), which is not what this checks.
    broker = Broker(tmp_path / "b", extra="max_queued_messages 0\nmax_queued_bytes 0\n")
    broker.start()
    rx = None
    try:
        rx = Receiver(broker.port, protocol, qos)
        first = burst("a", 5000)  # ~0.8 MB: many reads' worth, one message of 130 KB
        send(broker.port, first, qos)
        wait_for(lambda: rx.count() >= len(first), timeout_s=30)
        assert rx.got == first

        rx.subscribed.clear()
        broker.restart()
        assert rx.subscribed.wait(30)  # reconnected and subscribed again
        second = burst("b", 2000)
        send(broker.port, second, qos)
        wait_for(lambda: rx.count() >= len(first) + len(second), timeout_s=30)
        assert rx.got == first + second
        assert rx.client.buffered() == 0
    finally:
        if rx is not None:
            rx.stop()
        broker.stop()
