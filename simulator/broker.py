"""An embedded MQTT 3.1.1 broker for the demo, for machines without the `mosquitto` binary.

It speaks the OASIS MQTT Version 3.1.1 protocol to loopback clients only, on an asyncio
loop in one background thread:

    broker = EmbeddedBroker(port=0)   # 0 picks a free port
    broker.start()                    # returns once it listens; broker.port is the port
    ...
    broker.stop()                     # closes every connection and the listener, joins the thread

Covered: CONNECT/CONNACK (level 4; other levels get return code 1), client-id takeover,
keepalive (1.5 x), SUBSCRIBE/UNSUBSCRIBE with `+`/`#` (section 4.7), PUBLISH QoS 0, 1 and 2
inbound and QoS 0/1 outbound (QoS 2 subscriptions are granted QoS 1), retained messages,
Last Will, PINGREQ, DISCONNECT, a maximum packet size. Every session is treated as clean:
nothing survives a disconnect, and nothing survives `stop()` (like Mosquitto without
persistence). Any protocol violation closes that one connection (spec section 4.8).
Each subscriber has a bounded outbound queue, so a slow reader never blocks a publisher;
messages that do not fit are dropped and counted in `dropped`. A client that sends faster
than it reads its own acknowledgements is not read from until it catches up.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import logging
import signal
import socket
import threading
import uuid
from collections import deque
from dataclasses import dataclass, field
from typing import NamedTuple

log = logging.getLogger(__name__)

HOST = "127.0.0.1"
MAX_REMAINING_LENGTH = 268_435_455  # four length bytes, spec section 2.2.3
CONNECT_TIMEOUT_S = 10.0  # a socket that never sends CONNECT is closed (spec 3.1.4)
_PAUSE_READING_BYTES = 1 << 20

CONNECT, CONNACK, PUBLISH, PUBACK, PUBREC, PUBREL, PUBCOMP = 1, 2, 3, 4, 5, 6, 7
SUBSCRIBE, SUBACK, UNSUBSCRIBE, UNSUBACK, PINGREQ, PINGRESP, DISCONNECT = range(8, 15)
# The fixed-header flags each client-to-server packet must carry (spec table 2.2).
_REQUIRED_FLAGS = {PUBACK: 0, PUBREC: 0, PUBREL: 2, PUBCOMP: 0, SUBSCRIBE: 2,
                   UNSUBSCRIBE: 2, PINGREQ: 0, DISCONNECT: 0}


class ProtocolError(Exception):
    """The peer broke the protocol; the broker closes its connection."""


class Message(NamedTuple):
    """An application message as the broker routes it."""

    topic: str
    payload: bytes
    qos: int
    retain: bool


def encode_remaining_length(n: int) -> bytes:
    """The variable-length encoding of a remaining length (spec section 2.2.3)."""
    if not 0 <= n <= MAX_REMAINING_LENGTH:
        raise ValueError(f"remaining length {n} out of range")
    out = bytearray()
    while True:
        n, digit = divmod(n, 128)
        out.append(digit | (0x80 if n else 0))
        if not n:
            return bytes(out)


def packet(ptype: int, flags: int, body: bytes) -> bytes:
    """A whole control packet: fixed header plus `body`."""
    return bytes([ptype << 4 | flags]) + encode_remaining_length(len(body)) + body


def _utf8(s: str) -> bytes:
    b = s.encode()
    return len(b).to_bytes(2, "big") + b


def valid_filter(topic_filter: str) -> bool:
    """Whether a topic filter uses `+` and `#` as spec section 4.7.1 allows."""
    if not topic_filter or "\x00" in topic_filter:
        return False
    levels = topic_filter.split("/")
    for i, level in enumerate(levels):
        if "#" in level and (level != "#" or i != len(levels) - 1):
            return False
        if "+" in level and level != "+":
            return False
    return True


def valid_topic_name(topic: str) -> bool:
    """Whether `topic` may be published to: not empty, no wildcards, no NUL (spec 4.7.3)."""
    return bool(topic) and not any(ch in topic for ch in "+#\x00")


def topic_matches(topic_filter: str, topic: str) -> bool:
    """Whether a valid filter matches a topic name, by the rules of spec section 4.7.

    `#` matches the parent level and any number of levels below it; `+` matches exactly
    one level, an empty one included; a filter that starts with a wildcard does not match
    a topic that starts with `$`.
    """
    if topic.startswith("$") and topic_filter[:1] in ("+", "#"):
        return False
    f_levels, t_levels = topic_filter.split("/"), topic.split("/")
    for i, f in enumerate(f_levels):
        if f == "#":
            return True
        if i >= len(t_levels) or (f != "+" and f != t_levels[i]):
            return False
    return len(f_levels) == len(t_levels)


class _Body:
    """A cursor over a packet's variable header and payload; underruns are protocol errors."""

    def __init__(self, data: bytes) -> None:
        self.data, self.pos = data, 0

    def take(self, n: int) -> bytes:
        if self.pos + n > len(self.data):
            raise ProtocolError("packet shorter than its fields")
        chunk = self.data[self.pos:self.pos + n]
        self.pos += n
        return chunk

    def u8(self) -> int:
        return self.take(1)[0]

    def u16(self) -> int:
        return int.from_bytes(self.take(2), "big")

    def binary(self) -> bytes:
        return self.take(self.u16())

    def string(self) -> str:
        try:
            s = self.binary().decode("utf-8")  # strict: surrogates are refused too
        except UnicodeDecodeError as e:
            raise ProtocolError("malformed UTF-8 string") from e
        if "\x00" in s:
            raise ProtocolError("U+0000 in a string")
        return s

    def packet_id(self) -> int:
        pid = self.u16()
        if pid == 0:
            raise ProtocolError("packet identifier 0")
        return pid

    def rest(self) -> bytes:
        chunk, self.pos = self.data[self.pos:], len(self.data)
        return chunk

    def at_end(self) -> bool:
        return self.pos == len(self.data)


@dataclass(eq=False)
class _Client:
    """One connected client's state; touched only on the broker's event loop."""

    writer: asyncio.StreamWriter
    client_id: str = ""
    keepalive_s: int = 0
    will: Message | None = None
    subs: dict[str, int] = field(default_factory=dict)
    queue: deque[Message] = field(default_factory=deque)
    wake: asyncio.Event = field(default_factory=asyncio.Event)
    inflight: set[int] = field(default_factory=set)
    qos2_received: set[int] = field(default_factory=set)
    next_id: int = 1
    dropped: int = 0
    closed: bool = False

    def send(self, data: bytes) -> None:
        if not self.closed and not self.writer.transport.is_closing():
            self.writer.write(data)


class EmbeddedBroker:
    """An in-process MQTT 3.1.1 broker on 127.0.0.1.

    `port=0` picks a free port; after `start()` the bound port is in `.port`, and a later
    `start()` after `stop()` binds the same port again. `max_packet_bytes` bounds a whole
    inbound packet (larger ones close that connection); `max_queued` bounds each
    subscriber's outbound queue; `max_inflight` bounds unacknowledged QoS 1 deliveries
    per subscriber. `dropped` counts messages dropped on full queues.
    """

    def __init__(self, port: int = 0, *, max_packet_bytes: int = 16 * 1024 * 1024,
                 max_queued: int = 100_000, max_inflight: int = 1000) -> None:
        if not 0 < max_packet_bytes <= MAX_REMAINING_LENGTH + 5:
            raise ValueError("max_packet_bytes must be in 1 .. 256 MB")
        if not 0 < max_inflight < 65536 or max_queued < 1:
            raise ValueError("max_inflight must be in 1 .. 65535 and max_queued at least 1")
        self.port = port
        self.max_packet_bytes = max_packet_bytes
        self.max_queued = max_queued
        self.max_inflight = max_inflight
        self.dropped = 0
        self._thread: threading.Thread | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self._stop_event: asyncio.Event | None = None
        self._ready = threading.Event()
        self._start_error: BaseException | None = None
        self._clients: dict[str, _Client] = {}
        self._retained: dict[str, Message] = {}
        self._tasks: set[asyncio.Task[None]] = set()
        self._stopping = False

    def __enter__(self) -> EmbeddedBroker:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def start(self, timeout_s: float = 10.0) -> None:
        """Bind and listen; return once clients can connect. Raises OSError if the port is taken."""
        if self._thread is not None:
            raise RuntimeError("broker already running")
        sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        try:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            sock.bind((HOST, self.port))
            sock.listen(128)
        except OSError:
            sock.close()
            raise
        self.port = sock.getsockname()[1]
        self._clients, self._retained, self._tasks, self._stopping = {}, {}, set(), False
        self._start_error = None
        self._ready.clear()
        self._thread = threading.Thread(target=asyncio.run, args=(self._main(sock),),
                                        name=f"embedded-mqtt-broker-{self.port}", daemon=True)
        self._thread.start()
        if not self._ready.wait(timeout_s) or self._start_error is not None:
            self._thread.join(timeout_s)
            self._thread = None
            raise RuntimeError(f"embedded broker did not start: {self._start_error}")

    def stop(self, timeout_s: float = 10.0) -> None:
        """Close every connection and the listening socket, and join the loop thread."""
        thread, loop, stop_event = self._thread, self._loop, self._stop_event
        if thread is None:
            return
        if loop is not None and stop_event is not None:
            with contextlib.suppress(RuntimeError):  # the loop already ended by itself
                loop.call_soon_threadsafe(stop_event.set)
        thread.join(timeout_s)
        if thread.is_alive():
            raise RuntimeError("embedded broker thread did not stop")
        self._thread = self._loop = self._stop_event = None

    async def _main(self, sock: socket.socket) -> None:
        self._loop, self._stop_event = asyncio.get_running_loop(), asyncio.Event()
        try:
            server = await asyncio.start_server(self._connection, sock=sock)
        except BaseException as e:
            self._start_error = e
            raise
        finally:
            self._ready.set()
        log.info("embedded MQTT broker listening on %s:%d", HOST, self.port)
        await self._stop_event.wait()
        self._stopping = True
        server.close()
        for client in list(self._clients.values()):
            self._close(client, publish_will=False)
        for task in list(self._tasks):
            task.cancel()
        await asyncio.gather(*self._tasks, return_exceptions=True)
        await server.wait_closed()

    async def _read_packet(self, reader: asyncio.StreamReader) -> tuple[int, int, bytes]:
        first = (await reader.readexactly(1))[0]
        length = 0
        for shift in range(0, 28, 7):
            digit = (await reader.readexactly(1))[0]
            length |= (digit & 0x7F) << shift
            if not digit & 0x80:
                break
        else:
            raise ProtocolError("remaining length longer than four bytes")
        size = 2 + shift // 7 + length
        if size > self.max_packet_bytes:
            raise ProtocolError(f"packet of {size} bytes over the maximum")
        return first >> 4, first & 0x0F, await reader.readexactly(length)

    async def _connection(self, reader: asyncio.StreamReader,
                          writer: asyncio.StreamWriter) -> None:
        task = asyncio.current_task()
        assert task is not None
        self._tasks.add(task)
        client = _Client(writer)
        pump: asyncio.Task[None] | None = None
        publish_will, flush = True, False
        try:
            first = await asyncio.wait_for(self._read_packet(reader), CONNECT_TIMEOUT_S)
            if not self._on_connect(client, *first):
                publish_will, flush = False, True  # the refusing CONNACK must get out
                return
            pump = asyncio.create_task(self._pump(client))
            timeout_s = 1.5 * client.keepalive_s or None
            while not client.closed:  # closed by a takeover
                ptype, flags, body = await asyncio.wait_for(self._read_packet(reader), timeout_s)
                if ptype == DISCONNECT:
                    if flags or body:
                        raise ProtocolError("malformed DISCONNECT")
                    publish_will = False
                    return
                self._dispatch(client, ptype, flags, _Body(body))
                if writer.transport.get_write_buffer_size() > _PAUSE_READING_BYTES:
                    # It sends faster than it reads our replies: stop reading until it
                    # catches up, so its backlog stays bounded (and only it waits).
                    await asyncio.wait_for(writer.drain(), timeout_s)
        except TimeoutError:
            log.info("client %r: keepalive or CONNECT timeout, closing", client.client_id)
        except ProtocolError as e:
            log.warning("client %r: protocol error, closing: %s", client.client_id, e)
        except (asyncio.IncompleteReadError, ConnectionError):
            pass  # the peer went away; its will (if any) goes out below
        except asyncio.CancelledError:
            # Only stop() cancels; ending normally keeps Python 3.11's streams from
            # logging the cancelled connection task as an error.
            publish_will = False
        finally:
            self._close(client, publish_will=publish_will and not self._stopping, flush=flush)
            if pump is not None:
                pump.cancel()
            self._tasks.discard(task)

    def _close(self, client: _Client, *, publish_will: bool, flush: bool = False) -> None:
        """Forget `client` and close its socket; idempotent. Publishes its will if asked.

        Without `flush` the socket is aborted: waiting to flush would keep a peer that does
        not read (or is gone) connected indefinitely.
        """
        if client.closed:
            return
        client.closed = True
        if self._clients.get(client.client_id) is client:
            del self._clients[client.client_id]
        if flush:
            client.writer.close()
        else:
            client.writer.transport.abort()
        will, client.will = client.will, None
        if will is not None and publish_will:
            self._route(will)

    def _on_connect(self, client: _Client, ptype: int, flags: int, body: bytes) -> bool:
        """Handle the first packet; True when the client is now connected."""
        if ptype != CONNECT or flags:
            raise ProtocolError("first packet is not CONNECT")
        b = _Body(body)
        name, level, cflags, client.keepalive_s = b.string(), b.u8(), b.u8(), b.u16()
        if name not in ("MQTT", "MQIsdp"):  # spec 3.1.2.1: the server may just disconnect
            raise ProtocolError(f"unknown protocol name {name!r}")
        if level != 4:
            client.send(packet(CONNACK, 0, b"\x00\x01"))  # unacceptable protocol version
            return False
        will_qos, clean = (cflags >> 3) & 3, bool(cflags & 0x02)
        if (cflags & 0x01 or will_qos == 3 or (cflags & 0x40 and not cflags & 0x80)
                or (not cflags & 0x04 and cflags & 0x38)):
            raise ProtocolError(f"invalid connect flags {cflags:#04x}")
        client_id, will = b.string(), None
        if cflags & 0x04:
            topic, payload = b.string(), b.binary()
            if not valid_topic_name(topic):
                raise ProtocolError(f"invalid will topic {topic!r}")
            will = Message(topic, payload, will_qos, bool(cflags & 0x20))
        if cflags & 0x80:
            b.string()  # user name: accepted and ignored
        if cflags & 0x40:
            b.binary()  # password: accepted and ignored
        if not b.at_end():
            raise ProtocolError("trailing bytes in CONNECT")
        if not client_id:
            if not clean:
                client.send(packet(CONNACK, 0, b"\x00\x02"))  # identifier rejected
                return False
            client_id = f"auto-{uuid.uuid4().hex}"
        client.client_id, client.will = client_id, will
        old = self._clients.get(client_id)
        if old is not None:  # spec 3.1.4-2: the existing client is disconnected
            log.info("client %r taken over by a new connection", client_id)
            self._close(old, publish_will=True)
        self._clients[client_id] = client
        # Every session is clean, so "session present" is always 0 (spec 3.2.2.2).
        client.send(packet(CONNACK, 0, b"\x00\x00"))
        return True

    def _dispatch(self, client: _Client, ptype: int, flags: int, b: _Body) -> None:
        if ptype == PUBLISH:
            self._on_publish(client, flags, b)
            return
        if _REQUIRED_FLAGS.get(ptype) != flags:
            raise ProtocolError(f"packet type {ptype} with flags {flags:#x} not allowed here")
        if ptype == PUBACK:
            client.inflight.discard(b.packet_id())
            client.wake.set()
        elif ptype == PUBREL:
            pid = b.packet_id()
            client.qos2_received.discard(pid)
            client.send(packet(PUBCOMP, 0, pid.to_bytes(2, "big")))
        elif ptype in (PUBREC, PUBCOMP):
            b.packet_id()  # never expected: outbound QoS is at most 1
        elif ptype == SUBSCRIBE:
            self._on_subscribe(client, b)
        elif ptype == UNSUBSCRIBE:
            pid = b.packet_id()
            while not b.at_end():
                client.subs.pop(b.string(), None)
            client.send(packet(UNSUBACK, 0, pid.to_bytes(2, "big")))
        elif ptype == PINGREQ:
            client.send(packet(PINGRESP, 0, b""))
        if not b.at_end():
            raise ProtocolError(f"trailing bytes in packet type {ptype}")

    def _on_publish(self, client: _Client, flags: int, b: _Body) -> None:
        qos, retain = (flags >> 1) & 3, bool(flags & 1)
        if qos == 3 or (qos == 0 and flags & 0x08):
            raise ProtocolError(f"invalid PUBLISH flags {flags:#x}")
        topic = b.string()
        if not valid_topic_name(topic):
            raise ProtocolError(f"invalid topic name {topic!r}")
        pid = b.packet_id() if qos else 0
        msg = Message(topic, b.rest(), qos, retain)
        if qos == 2:
            # Method of spec figure 4.3: deliver once, until PUBREL releases the identifier.
            if pid not in client.qos2_received:
                client.qos2_received.add(pid)
                self._route(msg)
            client.send(packet(PUBREC, 0, pid.to_bytes(2, "big")))
            return
        self._route(msg)
        if qos == 1:
            client.send(packet(PUBACK, 0, pid.to_bytes(2, "big")))

    def _on_subscribe(self, client: _Client, b: _Body) -> None:
        pid = b.packet_id()
        granted: list[tuple[str, int]] = []
        codes = bytearray()
        while not b.at_end():
            topic_filter, requested = b.string(), b.u8()
            if requested > 2:
                raise ProtocolError(f"invalid requested QoS {requested}")
            if not valid_filter(topic_filter):
                codes.append(0x80)
                continue
            qos = min(requested, 1)  # QoS 2 subscriptions are served at QoS 1
            client.subs[topic_filter] = qos
            granted.append((topic_filter, qos))
            codes.append(qos)
        if not codes:
            raise ProtocolError("SUBSCRIBE without topic filters")
        client.send(packet(SUBACK, 0, pid.to_bytes(2, "big") + bytes(codes)))
        for topic_filter, qos in granted:  # spec 3.8.4-3: retained go out on every subscribe
            for msg in list(self._retained.values()):
                if topic_matches(topic_filter, msg.topic):
                    self._enqueue(client, msg._replace(qos=min(qos, msg.qos), retain=True))

    def _route(self, msg: Message) -> None:
        """Store or delete a retained message, then queue `msg` for every matching subscriber."""
        if msg.retain:
            if msg.payload:
                self._retained[msg.topic] = msg
            else:
                self._retained.pop(msg.topic, None)
        for client in list(self._clients.values()):
            # One copy per client, at the highest QoS of its matching subscriptions.
            qos = max((q for f, q in client.subs.items() if topic_matches(f, msg.topic)),
                      default=-1)
            if qos >= 0:
                self._enqueue(client, msg._replace(qos=min(qos, msg.qos), retain=False))

    def _enqueue(self, client: _Client, msg: Message) -> None:
        if len(client.queue) >= self.max_queued:
            if not client.dropped:
                log.warning("client %r falls behind: dropping messages", client.client_id)
            client.dropped += 1
            self.dropped += 1
            return
        client.queue.append(msg)
        client.wake.set()

    async def _pump(self, client: _Client) -> None:
        """Write `client`'s queue to its socket in order, honouring the in-flight bound."""
        with contextlib.suppress(ConnectionError):
            while not client.closed:
                queue = client.queue
                if not queue or (queue[0].qos and len(client.inflight) >= self.max_inflight):
                    client.wake.clear()
                    await client.wake.wait()
                    continue
                msg = queue.popleft()
                header = _utf8(msg.topic)
                if msg.qos:
                    pid = client.next_id
                    while pid in client.inflight:
                        pid = pid % 65535 + 1
                    client.next_id = pid % 65535 + 1
                    client.inflight.add(pid)
                    header += pid.to_bytes(2, "big")
                client.send(packet(PUBLISH, msg.qos << 1 | msg.retain, header + msg.payload))
                await client.writer.drain()


def main(argv: list[str] | None = None) -> int:
    """`python -m simulator.broker --port N`: run the broker until Ctrl-C or SIGTERM."""
    parser = argparse.ArgumentParser(prog="python -m simulator.broker",
                                     description="embedded MQTT 3.1.1 broker on 127.0.0.1")
    parser.add_argument("--port", type=int, default=0, help="port (default 0: a free one)")
    parser.add_argument("--max-packet-bytes", type=int, default=16 * 1024 * 1024)
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="%(levelname)s %(message)s")
    broker = EmbeddedBroker(args.port, max_packet_bytes=args.max_packet_bytes)
    # Ctrl-C and SIGTERM only set an event, from before the "listening" line: a
    # KeyboardInterrupt raised between that line and the wait used to skip the stop
    # below, and the broker's thread then kept the process alive.
    done = threading.Event()
    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, lambda *_: done.set())
    try:
        broker.start()
    except OSError as e:
        print(f"error: cannot listen on {HOST}:{args.port}: {e.strerror}")
        return 1
    try:
        print(f"listening on {HOST}:{broker.port}; Ctrl-C stops", flush=True)
        done.wait()
    finally:
        broker.stop()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
