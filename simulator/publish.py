"""Publishing simulated messages to an MQTT broker: the simulator's only network I/O.

`publish` sends ``(t, topic, payload)`` messages in order, paced so that simulated
time runs `speed` times faster than the wall clock (or as fast as the broker takes
them when `speed` is None). paho-mqtt 2.x with `CallbackAPIVersion.VERSION2`;
callbacks only set events, so nothing slow or raising runs on the network thread.
"""

from __future__ import annotations

import os
import threading
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion, MQTTErrorCode

from simulator.errors import PublishError

Message = tuple[float, str, bytes]
ClientFactory = Callable[[str], mqtt.Client]

# For QoS 0 paho holds unsent messages in memory without bound; waiting on every
# Nth message keeps the backlog to N messages when running as fast as possible.
_BACKLOG = 256
_WRITE_TIMEOUT_S = 30.0


@dataclass(frozen=True)
class PublishStats:
    """What a run did: messages handed to the client, and those refused while offline."""

    sent: int
    dropped: int
    wall_s: float


def parse_broker(text: str) -> tuple[str, int]:
    """``HOST:PORT`` (or ``HOST``, port 1883) -> (host, port); ValueError if malformed."""
    host, sep, port_s = text.rpartition(":")
    if not sep:
        host, port_s = text, "1883"
    host = host.strip("[]")
    if not host:
        raise ValueError(f"broker {text!r}: expected HOST:PORT")
    try:
        port = int(port_s)
    except ValueError:
        raise ValueError(f"broker {text!r}: port {port_s!r} is not a number") from None
    if not 0 < port < 65536:
        raise ValueError(f"broker {text!r}: port {port} out of range")
    return host, port


def default_client(client_id: str) -> mqtt.Client:
    return mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id,
                       protocol=mqtt.MQTTv311)


def publish(
    messages: Iterable[Message],
    *,
    host: str,
    port: int,
    speed: float | None = 1.0,
    qos: int = 0,
    sim_origin: float | None = None,
    on_sent: Callable[[Message], None] | None = None,
    stop: threading.Event | None = None,
    client_factory: ClientFactory = default_client,
    client_id: str | None = None,
    clock: Callable[[], float] = time.monotonic,
    connect_timeout_s: float = 10.0,
    wall_start: float | None = None,
) -> PublishStats:
    """Connect, publish every message in order, wait until the last is sent, disconnect.

    Pacing: message at simulated time t is sent at wall ``w0 + (t − sim_origin) / speed``
    (`sim_origin` defaults to the first message's time), where w0 is when the connection
    was made, or, with `wall_start` (unix seconds), that moment of the wall clock: then
    several publishers given one `wall_start` keep in step however long each took to
    start (one that starts late catches up at once). `on_sent` is called after each
    publish (e.g. to append to a capture file). Setting `stop` ends the run early.
    Raises `PublishError` if the broker cannot be reached or stops taking data.
    """
    if speed is not None and not speed > 0:
        raise ValueError("speed must be positive or None")
    stop = stop or threading.Event()
    connected = threading.Event()
    refused: list[str] = []

    def on_connect(_c: Any, _u: Any, _f: Any, reason: Any, _p: Any) -> None:
        if reason.is_failure:
            refused.append(str(reason))
        else:
            connected.set()

    def on_disconnect(_c: Any, _u: Any, _f: Any, _reason: Any, _p: Any) -> None:
        connected.clear()

    client = client_factory(client_id or f"watchkeep-sim-{os.getpid()}-{time.time_ns()}")
    client.on_connect = on_connect
    client.on_disconnect = on_disconnect
    try:
        client.connect(host, port, keepalive=30)
    except (OSError, ValueError) as e:
        raise PublishError(f"cannot connect to broker {host}:{port}: {e}") from None
    client.loop_start()
    w0 = clock()
    sent = dropped = 0
    last: mqtt.MQTTMessageInfo | None = None
    try:
        deadline = clock() + connect_timeout_s
        while not connected.is_set() and not refused and clock() < deadline:
            connected.wait(0.05)
        if refused:
            raise PublishError(f"broker {host}:{port} refused the connection: {refused[0]}")
        if not connected.is_set():
            raise PublishError(f"broker {host}:{port} did not answer within "
                               f"{connect_timeout_s:g} s")
        w0 = clock()
        if wall_start is not None:
            w0 += wall_start - time.time()  # wall_start in `clock`'s terms
        origin = sim_origin
        for msg in messages:
            if stop.is_set():
                break
            t, topic, payload = msg
            if origin is None:
                origin = t
            if speed is not None:
                delay = w0 + (t - origin) / speed - clock()
                if delay > 0 and stop.wait(delay):
                    break
            info = client.publish(topic, payload, qos=qos)
            if info.rc == MQTTErrorCode.MQTT_ERR_SUCCESS:
                sent += 1
                last = info
            else:
                dropped += 1
            if on_sent is not None:
                on_sent(msg)
            if last is not None and sent % _BACKLOG == 0:
                _wait_written(last, host, port)
        if last is not None:
            _wait_written(last, host, port)
    finally:
        client.disconnect()
        client.loop_stop()
    return PublishStats(sent=sent, dropped=dropped, wall_s=clock() - w0)


def _wait_written(info: mqtt.MQTTMessageInfo, host: str, port: int) -> None:
    try:
        info.wait_for_publish(_WRITE_TIMEOUT_S)
        done = info.is_published()
    except (RuntimeError, ValueError):
        return  # lost while the connection dropped; paho reconnects, later ones count
    if not done:
        raise PublishError(f"broker {host}:{port} stopped taking messages "
                           f"(nothing sent for {_WRITE_TIMEOUT_S:g} s)")
