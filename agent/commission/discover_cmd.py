"""`watchkeep discover`: listen to a broker's topics for a while, then describe them.

The only I/O around `agent.commission.discover` (pure): a paho client subscribes to
the topic filters, its callback only appends ``(arrival, topic, payload)`` to a
queue, and the main thread feeds the queue to `Discovery` until the time is up.
Then it prints the table and, with ``--out``, writes the starter config by
temp-and-rename.
"""

from __future__ import annotations

import argparse
import collections
import sys
import threading
import time
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

from agent.commission.discover import Discovery, propose
from agent.commission.discover_render import render_config, render_table
from agent.config.load import _filter_ok
from agent.errors import ConfigError, ConfigProblem, WatchkeepError
from agent.fsutil import write_file_atomic

CONNECT_TIMEOUT_S = 10.0


class BrokerUnavailable(WatchkeepError):
    """The broker to listen to cannot be reached or refused the connection."""

    exit_code = 6  # as `watchkeep status` when the daemon cannot be reached


class NothingToConfigure(WatchkeepError):
    """Nothing heard could become a channel, so there is no config to write."""


def parse_broker(text: str) -> tuple[str, int]:
    """``HOST:PORT`` (or ``HOST``, port 1883) -> (host, port)."""
    host, sep, port_s = text.rpartition(":")
    if not sep:
        host, port_s = text, "1883"
    host = host.strip("[]")
    try:
        port = int(port_s)
    except ValueError:
        port = -1
    if not host or not 0 < port < 65536:
        raise ConfigError([ConfigProblem("--broker", "HOST:PORT", repr(text))])
    return host, port


def listen(host: str, port: int, filters: list[str], duration_s: float,
           disc: Discovery, *, progress: Any = None,
           clock: Any = time.monotonic, wall: Any = time.time) -> int:
    """Subscribe to `filters` and feed every message for `duration_s` to `disc`.

    Returns the number of messages seen. Arrival times are wall-clock unix seconds
    (payload timestamps are compared with them).
    """
    queue: collections.deque[tuple[float, str, bytes]] = collections.deque()
    connected = threading.Event()
    refused: list[str] = []

    def on_connect(client: mqtt.Client, _u: Any, _f: Any, rc: Any, _p: Any = None) -> None:
        if rc.is_failure:
            refused.append(str(rc))
        else:
            client.subscribe([(f, 0) for f in filters])
        connected.set()

    def on_message(_c: mqtt.Client, _u: Any, msg: mqtt.MQTTMessage) -> None:
        queue.append((float(wall()), msg.topic, bytes(msg.payload)))

    client = mqtt.Client(CallbackAPIVersion.VERSION2,
                         client_id=f"watchkeep-discover-{int(wall() * 1000) % 10**9}",
                         protocol=mqtt.MQTTv311)
    client.on_connect = on_connect
    client.on_message = on_message
    try:
        client.connect(host, port, keepalive=20)
    except OSError as exc:
        raise BrokerUnavailable(f"cannot reach the broker {host}:{port} "
                                f"({exc.strerror or exc})") from exc
    client.loop_start()
    n = 0
    try:
        if not connected.wait(CONNECT_TIMEOUT_S) or refused:
            why = refused[0] if refused else f"no answer in {CONNECT_TIMEOUT_S:g} s"
            raise BrokerUnavailable(f"the broker {host}:{port} refused: {why}")
        end = clock() + duration_s
        next_note = clock() + 10
        while True:
            now = clock()
            while queue:
                disc.add(*queue.popleft())
                n += 1
            if now >= end:
                break
            if progress is not None and now >= next_note:
                progress.write(f"discover: {n} messages on {len(disc.topics)} topics, "
                               f"{end - now:.0f} s to go\n")
                next_note = now + 10
            time.sleep(min(0.1, max(0.0, end - now)))
    finally:
        client.loop_stop()
        client.disconnect()
    while queue:  # what arrived before the loop stopped
        disc.add(*queue.popleft())
        n += 1
    return n


def add_discover_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--broker", default="127.0.0.1:1883",
                   help="HOST:PORT of the broker to listen to (default 127.0.0.1:1883)")
    p.add_argument("--duration", type=float, default=60.0,
                   help="seconds to listen (default 60)")
    p.add_argument("--topic", action="append", metavar="FILTER",
                   help="topic filter to subscribe to; may be repeated (default '#')")
    p.add_argument("--out", help="write a starter config here (YAML)")
    p.add_argument("--site", help="site name for the starter config (default: guessed)")
    p.add_argument("--gateway", help="gateway name for the starter config (default gw-01)")


def cmd_discover(args: argparse.Namespace) -> int:
    host, port = parse_broker(args.broker)
    if not args.duration > 0:
        raise ConfigError([ConfigProblem("--duration", "a number of seconds > 0",
                                         str(args.duration))])
    filters = args.topic or ["#"]
    for f in filters:
        if not _filter_ok(f):
            raise ConfigError([ConfigProblem("--topic", "an MQTT topic filter", repr(f))])
    disc = Discovery()
    print(f"discover: listening to {host}:{port} {' '.join(filters)} for "
          f"{args.duration:g} s", file=sys.stderr)
    n = listen(host, port, filters, args.duration, disc, progress=sys.stderr)
    proposals = [propose(st) for st in disc.topics.values()]
    sys.stdout.write(render_table(proposals))
    usable = sum(p.usable for p in proposals)
    print(f"discover: {n} messages on {len(proposals)} topics, {usable} usable as "
          f"channels", file=sys.stderr)
    if args.out and not usable:
        raise NothingToConfigure(
            f"no topic carried numbers watchkeep can decode in {args.duration:g} s: "
            f"{args.out} not written (listen longer, or check --topic)")
    if args.out:
        text = render_config(proposals, broker_host=host, broker_port=port,
                             duration_s=args.duration, site=args.site, gateway=args.gateway)
        write_file_atomic(Path(args.out), text.encode())
        print(f"discover: starter config written: {args.out} (check it with "
              f"`watchkeep check-config {args.out}`)", file=sys.stderr)
    return 0
