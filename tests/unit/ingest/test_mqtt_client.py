"""ReadAheadClient: paho's own packet parsing over a read-ahead buffer hands on the very
messages plain paho does, wherever the stream is cut, and never leaves a read byte
behind when paho goes back to select. Real sockets (a socketpair), real paho."""

from __future__ import annotations

import select
import socket
from collections.abc import Iterator
from contextlib import contextmanager

import paho.mqtt.client as mqtt
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from paho.mqtt.enums import CallbackAPIVersion

from agent.ingest.mqtt_client import READ_AHEAD, ReadAheadClient


def remaining_length(n: int) -> bytes:
    """MQTT 3.1.1 section 2.2.3: 7 bits per byte, low first, top bit = more follow."""
    out = bytearray()
    while True:
        n, digit = n >> 7, n & 0x7F
        out.append(digit | (0x80 if n else 0))
        if not n:
            return bytes(out)


def publish(topic: str, payload: bytes) -> bytes:
    """A QoS 0 PUBLISH packet (MQTT 3.1.1 section 3.3)."""
    t = topic.encode()
    body = len(t).to_bytes(2, "big") + t + payload
    return b"\x30" + remaining_length(len(body)) + body


def test_remaining_length_matches_the_spec_examples() -> None:
    # MQTT 3.1.1 section 2.2.3, Table 2.4: the bounds of each encoded length.
    assert remaining_length(127) == b"\x7f"
    assert remaining_length(128) == b"\x80\x01"
    assert remaining_length(16_383) == b"\xff\x7f"
    assert remaining_length(16_384) == b"\x80\x80\x01"


def test_paho_still_has_the_methods_it_overrides() -> None:
    # If a paho release renames these, the read-ahead would stop (or, for _sock_close,
    # could carry bytes into a new connection): fail here instead.
    for name in ("_sock_recv", "_sock_close", "_packet_read", "loop_read", "reconnect"):
        assert callable(vars(mqtt.Client).get(name)), name


@contextmanager
def wired(cls: type[mqtt.Client]) -> Iterator[tuple[mqtt.Client, socket.socket, list]]:
    """A client whose socket is one end of a socketpair; what it hands on_message."""
    ours, theirs = socket.socketpair()
    ours.setblocking(False)
    client = cls(CallbackAPIVersion.VERSION2, client_id="t")
    got: list[tuple[str, bytes]] = []
    client.on_message = lambda c, u, m: got.append((m.topic, m.payload))
    client._sock = ours  # what connect() would have set
    try:
        yield client, theirs, got
    finally:
        client._sock = None
        ours.close()
        theirs.close()


def pump(client: mqtt.Client, sock: socket.socket) -> None:
    """What paho's loop does: loop_read while select says the socket is readable."""
    while select.select([sock], [], [], 0)[0]:
        client.loop_read()


def feed(cls: type[mqtt.Client], stream: bytes, cuts: list[int]) -> list[tuple[str, bytes]]:
    with wired(cls) as (client, theirs, got):
        ours = client._sock
        assert ours is not None
        at = 0
        for cut in [*sorted(set(cuts)), len(stream)]:
            if cut > at:
                theirs.sendall(stream[at:cut])
                at = cut
                pump(client, ours)
        if isinstance(client, ReadAheadClient):
            assert client.buffered() == 0  # nothing read and left behind
        return got


messages = st.lists(st.tuples(st.sampled_from(["p/A/c0", "p/B/vibration/x", "t"]),
                              st.binary(max_size=300)), min_size=1, max_size=40)


@settings(max_examples=150, deadline=None)
@given(msgs=messages, data=st.data())
def test_same_messages_as_plain_paho_wherever_the_stream_is_cut(
        msgs: list[tuple[str, bytes]], data: st.DataObject) -> None:
    stream = b"".join(publish(t, p) for t, p in msgs)
    cuts = data.draw(st.lists(st.integers(0, len(stream)), max_size=12))
    assert feed(ReadAheadClient, stream, cuts) == msgs
    assert feed(mqtt.Client, stream, cuts) == msgs  # the reference: paho's own reads


def test_a_message_larger_than_the_read_ahead_and_many_small_ones_after_it() -> None:
    msgs = [("big", bytes(range(256)) * (3 * READ_AHEAD // 256)), *[("s", b"x")] * 5000]
    stream = b"".join(publish(t, p) for t, p in msgs)
    assert feed(ReadAheadClient, stream, list(range(0, len(stream), 50_000))) == msgs


def test_one_select_hands_on_every_whole_packet_read() -> None:
    # 500 small packets arrive at once: one loop_read (one select in paho's loop)
    # takes them all, where paho alone takes one per select.
    msgs = [(f"p/{i}", b"%d" % i) for i in range(500)]
    with wired(ReadAheadClient) as (client, theirs, got):
        theirs.sendall(b"".join(publish(t, p) for t, p in msgs))
        client.loop_read()
        assert got == msgs
        assert client.buffered() == 0  # type: ignore[attr-defined]


def test_a_closed_connection_leaves_nothing_buffered() -> None:
    with wired(ReadAheadClient) as (client, theirs, got):
        assert isinstance(client, ReadAheadClient)
        theirs.sendall(publish("a", b"1") + publish("b", b"2")[:3])
        client.loop_read()
        assert got == [("a", b"1")]
        client._ra_buf, client._ra_pos = b"stale", 0  # as if bytes were left over
        client._sock_close()
        assert client.buffered() == 0


def test_the_peer_closing_is_a_lost_connection_as_with_paho() -> None:
    for cls in (ReadAheadClient, mqtt.Client):
        with wired(cls) as (client, theirs, got):
            theirs.sendall(publish("a", b"1"))
            theirs.shutdown(socket.SHUT_WR)
            assert client.loop_read() == mqtt.MQTT_ERR_SUCCESS
            assert got == [("a", b"1")]
            assert client.loop_read() == mqtt.MQTT_ERR_CONN_LOST


def test_without_a_socket_it_raises_as_paho_does() -> None:
    client = ReadAheadClient(CallbackAPIVersion.VERSION2, client_id="t")
    with pytest.raises(ConnectionError):
        client._sock_recv(1)


def _accept_connect(server: socket.socket) -> socket.socket:
    """Accept the client, read its CONNECT and answer CONNACK accepted (MQTT 3.1.1 3.2)."""
    conn, _ = server.accept()
    conn.settimeout(5)
    assert conn.recv(1)[0] >> 4 == 1  # CONNECT
    length = mult = 0
    while True:
        b = conn.recv(1)[0]
        length += (b & 0x7F) << mult
        mult += 7
        if not b & 0x80:
            break
    while length:
        length -= len(conn.recv(length))
    conn.sendall(b"\x20\x02\x00\x00")
    return conn


def _read_all(conn: socket.socket, quiet_s: float = 0.3) -> bytes:
    out = b""
    conn.settimeout(quiet_s)
    try:
        while chunk := conn.recv(65536):
            out += chunk
    except TimeoutError:
        pass
    return out


def test_unacknowledged_messages_go_to_the_next_endpoint_first_with_dup() -> None:
    """What agent/delivery/upstream.py relies on when it fails over: `connect_async` to another
    address keeps paho's unacknowledged QoS 1 messages, and after the reconnect they go
    out first, in order, with the DUP flag (MQTT 3.1.1 section 3.3.1.1)."""
    servers = [socket.create_server(("127.0.0.1", 0)) for _ in range(2)]
    client = ReadAheadClient(CallbackAPIVersion.VERSION2, client_id="failover-probe")
    try:
        client.connect("127.0.0.1", servers[0].getsockname()[1])
        a = _accept_connect(servers[0])
        for _ in range(5):
            client.loop(0.05)
        mids = [client.publish("t", f"m{i}".encode(), qos=1).mid for i in range(3)]
        for _ in range(5):
            client.loop(0.05)
        first = _read_all(a)
        assert first.count(b"\x32") >= 3 and b"m2" in first  # sent once, never acknowledged
        a.close()  # the node dies
        for _ in range(20):
            if client.loop(0.05) != mqtt.MQTT_ERR_SUCCESS:
                break
        client.connect_async("127.0.0.1", servers[1].getsockname()[1])
        client.reconnect()
        b = _accept_connect(servers[1])
        for _ in range(10):
            client.loop(0.05)
        resent = _read_all(b)
        # Three PUBLISH packets, QoS 1 with DUP (0x3A), the same ids, in the old order.
        expected = b"".join(b"\x3a" + remaining_length(2 + 1 + 2 + 2) + b"\x00\x01t"
                            + mid.to_bytes(2, "big") + f"m{i}".encode()
                            for i, mid in enumerate(mids))
        assert resent.startswith(expected), resent
        b.close()
    finally:
        client.loop(0.01)
        for s in servers:
            s.close()
