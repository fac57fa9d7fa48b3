"""The embedded MQTT 3.1.1 broker against real paho-mqtt clients and raw sockets on loopback."""

from __future__ import annotations

import signal
import socket
import subprocess
import sys
import threading
from collections.abc import Iterator, Sequence
from typing import Any

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion

from simulator.broker import EmbeddedBroker
from tests.brokers import wait_for

PUBLISH, PUBACK, PUBREC, PUBREL, PUBCOMP, SUBACK, PINGRESP = 3, 4, 5, 6, 7, 9, 13


def _len(n: int) -> bytes:
    """Remaining length, written from the spec's algorithm (section 2.2.3), not the broker's."""
    out = bytearray()
    while True:
        n, d = divmod(n, 128)
        out.append(d | (0x80 if n else 0))
        if not n:
            return bytes(out)


def _s(text: str | bytes) -> bytes:
    b = text.encode() if isinstance(text, str) else text
    return len(b).to_bytes(2, "big") + b


def _pkt(ptype: int, flags: int, body: bytes) -> bytes:
    return bytes([ptype << 4 | flags]) + _len(len(body)) + body


def _connect(client_id: str, keepalive: int = 60, will: tuple[str, bytes] | None = None,
             name: str = "MQTT", level: int = 4) -> bytes:
    flags = 0x02 | (0x04 | 0x08 if will else 0)  # clean session; will at QoS 1
    body = _s(name) + bytes([level, flags]) + keepalive.to_bytes(2, "big") + _s(client_id)
    if will:
        body += _s(will[0]) + _s(will[1])
    return _pkt(1, 0, body)


class Raw:
    """A hand-driven MQTT client on a plain socket; every read is bounded by a timeout."""

    def __init__(self, port: int) -> None:
        self.sock = socket.create_connection(("127.0.0.1", port), timeout=5)
        self.buf = b""

    def send(self, data: bytes) -> None:
        self.sock.sendall(data)

    def _fill(self, n: int) -> bool:
        while len(self.buf) < n:
            chunk = self.sock.recv(65536)
            if not chunk:
                return False
            self.buf += chunk
        return True

    def read(self) -> tuple[int, int, bytes] | None:
        """The next packet as (type, flags, body), or None at end of stream."""
        if not self._fill(2):
            return None
        length, mult, i = 0, 1, 1
        while True:
            assert self._fill(i + 1)
            length += (self.buf[i] & 0x7F) * mult
            mult *= 128
            i += 1
            if not self.buf[i - 1] & 0x80:
                break
        assert self._fill(i + length)
        first, body, self.buf = self.buf[0], self.buf[i:i + length], self.buf[i + length:]
        return first >> 4, first & 0x0F, body

    def connect(self, client_id: str, **kw: Any) -> int:
        self.send(_connect(client_id, **kw))
        pkt = self.read()
        assert pkt is not None and pkt[0] == 2
        return pkt[2][1]

    def closed_by_peer(self) -> bool:
        """Read until the broker closes the stream (bounded by the socket timeout)."""
        try:
            while self.read() is not None:
                pass
        except ConnectionResetError:
            pass
        return True

    def close(self) -> None:
        self.sock.close()


class Client:
    """A paho 2.x client that records what it receives; subscribes in on_connect."""

    def __init__(self, port: int, client_id: str, subs: Sequence[tuple[str, int]] = ()) -> None:
        self.messages: list[tuple[str, bytes, int, bool]] = []
        self.lock = threading.Lock()
        self.subscribed = threading.Event()
        self.connects = 0
        self.disconnects = 0
        self.c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id)
        self.c.max_inflight_messages_set(0)  # paho would otherwise hold QoS 1 behind QoS 0
        self.c.reconnect_delay_set(1, 1)
        self.subs = list(subs)
        self.c.on_connect = self._on_connect
        self.c.on_subscribe = lambda *a: self.subscribed.set()
        self.c.on_message = self._on_message
        self.c.on_disconnect = self._on_disconnect
        self.port = port
        self.c.connect_async("127.0.0.1", port)
        self.c.loop_start()
        if self.subs:
            wait_for(self.subscribed.is_set, what=f"{client_id} subscribed")
        else:
            wait_for(lambda: self.connects, what=f"{client_id} connected")

    def _on_connect(self, c: mqtt.Client, u: Any, f: Any, rc: Any, p: Any) -> None:
        self.connects += 1
        if self.subs:
            c.subscribe(self.subs)

    def _on_disconnect(self, c: mqtt.Client, u: Any, f: Any, rc: Any, p: Any) -> None:
        self.disconnects += 1

    def _on_message(self, c: mqtt.Client, u: Any, msg: mqtt.MQTTMessage) -> None:
        with self.lock:
            self.messages.append((msg.topic, bytes(msg.payload), msg.qos, bool(msg.retain)))

    def got(self) -> list[tuple[str, bytes, int, bool]]:
        with self.lock:
            return list(self.messages)

    def wait_count(self, n: int, timeout_s: float = 10.0) -> list[tuple[str, bytes, int, bool]]:
        wait_for(lambda: len(self.got()) >= n, timeout_s, what=f"{n} messages")
        return self.got()

    def stop(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()


@pytest.fixture
def broker() -> Iterator[EmbeddedBroker]:
    b = EmbeddedBroker()
    b.start()
    yield b
    b.stop()


@pytest.fixture
def clients() -> Iterator[list[Client]]:
    made: list[Client] = []
    yield made
    for c in made:
        c.stop()


def test_qos0_qos1_wildcards_and_order(broker: EmbeddedBroker, clients: list[Client]) -> None:
    """Deliveries follow the wildcards, arrive at min(pub, sub) QoS and in publish order."""
    temps = Client(broker.port, "t-temps", [("plant/+/temp", 1)])
    everything = Client(broker.port, "t-all", [("plant/#", 0)])
    pub = Client(broker.port, "t-pub")
    clients += [temps, everything, pub]
    sent = [(f"plant/P-10{i % 3}/{'temp' if i % 2 else 'flow'}", str(i).encode(), i % 2)
            for i in range(300)]
    for topic, payload, qos in sent:
        pub.c.publish(topic, payload, qos=qos)
    want_temps = [(t, p, q, False) for t, p, q in sent if t.endswith("/temp")]
    assert temps.wait_count(len(want_temps)) == want_temps
    assert everything.wait_count(len(sent)) == [(t, p, 0, False) for t, p, _ in sent]


def test_twenty_thousand_messages_complete_in_order(broker: EmbeddedBroker,
                                                    clients: list[Client]) -> None:
    """A burst of 20k small QoS 0 messages from one publisher arrives whole and in order."""
    sub = Client(broker.port, "burst-sub", [("burst/#", 0)])
    pub = Client(broker.port, "burst-pub")
    clients += [sub, pub]
    for i in range(20_000):
        pub.c.publish("burst/x", str(i).encode())
    got = sub.wait_count(20_000, timeout_s=30)
    assert [int(p) for _, p, _, _ in got] == list(range(20_000))
    assert broker.dropped == 0


def test_retained_delivery_and_deletion(broker: EmbeddedBroker, clients: list[Client]) -> None:
    """Retained messages reach later subscribers flagged retain; an empty payload deletes."""
    live = Client(broker.port, "r-live", [("ret/#", 1)])
    pub = Client(broker.port, "r-pub")
    clients += [live, pub]
    pub.c.publish("ret/status", b"online", qos=1, retain=True).wait_for_publish(5)
    assert live.wait_count(1) == [("ret/status", b"online", 1, False)]  # live: retain 0
    late = Client(broker.port, "r-late", [("ret/+", 0)])
    clients.append(late)
    assert late.wait_count(1) == [("ret/status", b"online", 0, True)]
    pub.c.publish("ret/status", b"", qos=1, retain=True).wait_for_publish(5)
    assert live.wait_count(2)[1] == ("ret/status", b"", 1, False)  # forwarded as normal
    after = Client(broker.port, "r-after", [("ret/#", 1)])
    clients.append(after)
    pub.c.publish("ret/marker", b"m", qos=1)
    assert after.wait_count(1) == [("ret/marker", b"m", 1, False)]  # nothing retained first


def test_will_on_abrupt_close_not_on_disconnect(broker: EmbeddedBroker,
                                                clients: list[Client]) -> None:
    """A dropped socket publishes the will; DISCONNECT discards it."""
    watcher = Client(broker.port, "w-watch", [("will/#", 1)])
    clients.append(watcher)
    polite = Raw(broker.port)
    assert polite.connect("w-polite", will=("will/polite", b"gone")) == 0
    polite.send(_pkt(14, 0, b""))
    assert polite.closed_by_peer()
    rude = Raw(broker.port)
    assert rude.connect("w-rude", will=("will/rude", b"gone")) == 0
    rude.close()
    assert watcher.wait_count(1) == [("will/rude", b"gone", 1, False)]


def test_same_client_id_takes_over(broker: EmbeddedBroker, clients: list[Client]) -> None:
    """A second connection with a client id disconnects the first (spec 3.1.4-2)."""
    watcher = Client(broker.port, "to-watch", [("takeover/#", 1)])
    clients.append(watcher)
    first, second = Raw(broker.port), Raw(broker.port)
    assert first.connect("gw-1", will=("takeover/first", b"gone")) == 0
    assert second.connect("gw-1") == 0
    assert first.closed_by_peer()
    second.send(_pkt(12, 0, b""))
    assert second.read() == (PINGRESP, 0, b"")
    assert watcher.wait_count(1) == [("takeover/first", b"gone", 1, False)]


def test_keepalive_timeout_fires_the_will(broker: EmbeddedBroker, clients: list[Client]) -> None:
    """A client silent for 1.5 x keepalive is cut off and its will goes out."""
    watcher = Client(broker.port, "ka-watch", [("ka/#", 1)])
    clients.append(watcher)
    quiet = Raw(broker.port)
    assert quiet.connect("ka-quiet", keepalive=1, will=("ka/quiet", b"lost")) == 0
    assert quiet.closed_by_peer()
    assert watcher.wait_count(1) == [("ka/quiet", b"lost", 1, False)]


@pytest.mark.parametrize("bad", [
    b"\x00\x00",  # reserved packet type 0
    _pkt(PUBLISH, 0b0110, _s("a/b") + b"\x00\x01"),  # QoS 3
    _pkt(PUBLISH, 0b1000, _s("a/b")),  # DUP on QoS 0
    _pkt(PUBLISH, 0, _s("a/+")),  # wildcard in a topic name
    _pkt(PUBLISH, 0, _s(b"\xff\xfe")),  # not UTF-8
    _pkt(8, 0, b"\x00\x01" + _s("a") + b"\x00"),  # SUBSCRIBE with flags 0
    _pkt(8, 2, b"\x00\x01"),  # SUBSCRIBE without filters
    _pkt(1, 0, b""),  # a second CONNECT
    b"\x30\xff\xff\xff\xff\x01",  # remaining length of five bytes
    _pkt(PUBLISH, 0, b"\x00\x09ab"),  # string longer than the packet
])
def test_malformed_packet_closes_only_that_connection(broker: EmbeddedBroker,
                                                      clients: list[Client], bad: bytes) -> None:
    """A protocol violation closes the offender; other clients keep working."""
    sub = Client(broker.port, "m-sub", [("m/#", 1)])
    pub = Client(broker.port, "m-pub")
    clients += [sub, pub]
    raw = Raw(broker.port)
    assert raw.connect("m-raw") == 0
    raw.send(bad)
    assert raw.closed_by_peer()
    pub.c.publish("m/ok", b"still here", qos=1)
    assert sub.wait_count(1) == [("m/ok", b"still here", 1, False)]
    assert sub.disconnects == 0 and pub.disconnects == 0


def test_oversized_packet_closes_the_connection(clients: list[Client]) -> None:
    """A packet above max_packet_bytes closes that connection; one below passes."""
    with EmbeddedBroker(max_packet_bytes=1024) as small:
        sub = Client(small.port, "big-sub", [("big/#", 0)])
        clients.append(sub)
        raw = Raw(small.port)
        assert raw.connect("big-pub") == 0
        raw.send(_pkt(PUBLISH, 0, _s("big/ok") + b"x" * 900))
        assert sub.wait_count(1)[0][1] == b"x" * 900
        raw.send(_pkt(PUBLISH, 0, _s("big/no") + b"x" * 2000))
        assert raw.closed_by_peer()
        sub.stop()
        clients.remove(sub)


def test_large_payload_passes(broker: EmbeddedBroker, clients: list[Client]) -> None:
    """A 3 MB payload (four length bytes) goes through under the default 16 MB limit."""
    sub = Client(broker.port, "l-sub", [("large", 1)])
    pub = Client(broker.port, "l-pub")
    clients += [sub, pub]
    payload = bytes(range(256)) * (3 * 4096)
    pub.c.publish("large", payload, qos=1)
    assert sub.wait_count(1)[0][1] == payload


@pytest.mark.parametrize(("name", "level"), [("MQIsdp", 3), ("MQTT", 5)])
def test_other_protocol_levels_refused(broker: EmbeddedBroker, name: str, level: int) -> None:
    """Protocol levels other than 4 get CONNACK return code 1, then the socket closes."""
    raw = Raw(broker.port)
    assert raw.connect("old", name=name, level=level) == 1
    assert raw.closed_by_peer()


def test_qos2_inbound_handshake(broker: EmbeddedBroker, clients: list[Client]) -> None:
    """QoS 2 in: PUBREC, delivery once despite a DUP resend, PUBCOMP after PUBREL."""
    sub = Client(broker.port, "q2-sub", [("q2/#", 2)])
    clients.append(sub)
    raw = Raw(broker.port)
    assert raw.connect("q2-raw") == 0
    publish = _s("q2/x") + b"\x00\x07" + b"once"
    raw.send(_pkt(PUBLISH, 0b0100, publish))
    assert raw.read() == (PUBREC, 0, b"\x00\x07")
    raw.send(_pkt(PUBLISH, 0b1100, publish))  # DUP resend before PUBREL
    assert raw.read() == (PUBREC, 0, b"\x00\x07")
    raw.send(_pkt(PUBREL, 2, b"\x00\x07"))
    assert raw.read() == (PUBCOMP, 0, b"\x00\x07")
    pub = Client(broker.port, "q2-pub")
    clients.append(pub)
    info = pub.c.publish("q2/y", b"paho", qos=2)
    info.wait_for_publish(5)
    assert info.is_published()
    got = sub.wait_count(2)
    assert got == [("q2/x", b"once", 1, False), ("q2/y", b"paho", 1, False)]  # granted 1


def test_qos1_outbound_packet_ids_and_inflight_bound(clients: list[Client]) -> None:
    """QoS 1 deliveries carry packet ids; no more than max_inflight go out unacknowledged."""
    with EmbeddedBroker(max_inflight=2) as b:
        raw = Raw(b.port)
        assert raw.connect("if-raw") == 0
        raw.send(_pkt(8, 2, b"\x00\x05" + _s("if/#") + b"\x01"))
        assert raw.read() == (SUBACK, 0, b"\x00\x05\x01")
        pub = Client(b.port, "if-pub")
        clients.append(pub)
        for i in range(5):
            pub.c.publish("if/x", str(i).encode(), qos=1).wait_for_publish(5)
        raw.send(_pkt(12, 0, b""))
        first = [raw.read(), raw.read(), raw.read()]
        assert first[2] == (PINGRESP, 0, b"")  # only two PUBLISHes before the ping answer
        ids = []
        for pkt in first[:2]:
            assert pkt is not None and pkt[0] == PUBLISH and pkt[1] == 0b0010
            ids.append(pkt[2][6:8])
        assert ids[0] != ids[1]
        for pid in ids:
            raw.send(_pkt(PUBACK, 0, pid))
        rest = []
        for _ in range(3):
            pkt = raw.read()
            assert pkt is not None and pkt[0] == PUBLISH
            rest.append(pkt)
            raw.send(_pkt(PUBACK, 0, pkt[2][6:8]))
        assert [p[2][8:] for p in first[:2] + rest if p] == [b"0", b"1", b"2", b"3", b"4"]
        pub.stop()
        clients.remove(pub)


def test_unsubscribe_stops_delivery(broker: EmbeddedBroker, clients: list[Client]) -> None:
    """After UNSUBACK the filter no longer delivers; other filters still do."""
    sub = Client(broker.port, "u-sub", [("u/a", 1), ("u/b", 1)])
    pub = Client(broker.port, "u-pub")
    clients += [sub, pub]
    done = threading.Event()
    sub.c.on_unsubscribe = lambda *a: done.set()
    sub.c.unsubscribe("u/a")
    wait_for(done.is_set, what="UNSUBACK")
    pub.c.publish("u/a", b"1", qos=1)
    pub.c.publish("u/b", b"2", qos=1)
    assert sub.wait_count(1) == [("u/b", b"2", 1, False)]


def test_dollar_topics_skip_leading_wildcards(broker: EmbeddedBroker,
                                              clients: list[Client]) -> None:
    """`#` does not see `$`-topics; a `$SYS/#` subscriber does (spec 4.7.2)."""
    hashed = Client(broker.port, "d-hash", [("#", 0)])
    sys_sub = Client(broker.port, "d-sys", [("$SYS/#", 0)])
    pub = Client(broker.port, "d-pub")
    clients += [hashed, sys_sub, pub]
    pub.c.publish("$SYS/load", b"1")
    pub.c.publish("plain", b"2")
    assert sys_sub.wait_count(1) == [("$SYS/load", b"1", 0, False)]
    assert hashed.wait_count(1) == [("plain", b"2", 0, False)]


def test_slow_subscriber_does_not_block_publisher(clients: list[Client]) -> None:
    """A subscriber that never reads loses messages (counted); the publisher is not held."""
    with EmbeddedBroker(max_queued=10) as b:
        raw = Raw(b.port)
        raw.sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)
        assert raw.connect("slow") == 0
        raw.send(_pkt(8, 2, b"\x00\x01" + _s("slow/#") + b"\x00"))
        assert raw.read() == (SUBACK, 0, b"\x00\x01\x00")
        pub = Client(b.port, "fast-pub")
        clients.append(pub)
        infos = [pub.c.publish("slow/x", b"y" * 10_000, qos=1) for _ in range(500)]
        for info in infos:
            info.wait_for_publish(10)
        assert all(info.is_published() for info in infos)
        assert b.dropped > 0
        pub.stop()
        clients.remove(pub)
        raw.close()


def test_stop_closes_connections_and_leaves_no_thread() -> None:
    """stop() closes clients and the listener and joins the broker thread."""
    before = set(threading.enumerate())
    b = EmbeddedBroker()
    b.start()
    raw = Raw(b.port)
    assert raw.connect("stopper", will=("stop/will", b"x")) == 0
    b.stop()
    assert raw.closed_by_peer()
    assert set(threading.enumerate()) == before
    with pytest.raises(ConnectionRefusedError):
        socket.create_connection(("127.0.0.1", b.port), timeout=2).close()
    b.stop()  # a second stop is a no-op


def test_client_resubscribes_after_broker_restart(clients: list[Client]) -> None:
    """watchkeep's pattern: connect_async + loop_start, subscribe in on_connect, survive restart."""
    b = EmbeddedBroker()
    b.start()
    try:
        sub = Client(b.port, "rs-sub", [("rs/#", 1)])
        clients.append(sub)
        port = b.port
        b.stop()
        wait_for(lambda: sub.disconnects, what="client noticed the broker stop")
        sub.subscribed.clear()
        b.start()
        assert b.port == port
        wait_for(sub.subscribed.is_set, what="resubscribe after restart")
        assert sub.connects == 2
        pub = Client(b.port, "rs-pub")
        clients.append(pub)
        pub.c.publish("rs/after", b"back", qos=1)
        assert sub.wait_count(1) == [("rs/after", b"back", 1, False)]
    finally:
        for c in clients:
            c.stop()
        clients.clear()
        b.stop()


def test_cli_runs_until_interrupted() -> None:
    """`python -m simulator.broker --port 0` serves until SIGINT and exits 0."""
    proc = subprocess.Popen([sys.executable, "-m", "simulator.broker", "--port", "0"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        assert proc.stdout is not None
        line = proc.stdout.readline()
        port = int(line.split()[2].rstrip(";").rsplit(":", 1)[1])
        raw = Raw(port)
        assert raw.connect("cli") == 0
        proc.send_signal(signal.SIGINT)
        assert proc.wait(10) == 0
        assert raw.closed_by_peer()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(5)
