"""Ingest's MQTT side: the local broker loop and the per-message decode-and-dispatch.

The paho callbacks only decode, append to per-channel buffers and return; they
never touch disk or the upstream network, and every exception is caught and
counted, because one escaping exception kills paho's network thread while the
process looks alive (PITFALLS.md).

This module imports neither numpy nor prometheus_client: the ingest child
(agent/ingest/child.py) runs it with `metrics=None` and stays small. Where the samples
go is the caller's: `agent.ingest.buffers.Buffers` (the window assemblers) in the daemon, the
child's batches in the child.
"""

from __future__ import annotations

import logging
import math
import threading
import time
from collections.abc import Callable
from typing import TYPE_CHECKING, Any, Generic, Protocol, TypeVar

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

from agent.config.load import (
    SPARKPLUG_NAMESPACE,
    BrokerConfig,
    Config,
    Decoder,
    MqttProtocol,
    read_secret,
)
from agent.core.decode import Block, Reason, Rejected, decode_message
from agent.core.routing import Route, build_routes, channel_routes
from agent.ingest.mqtt_client import ReadAheadClient
from agent.ops.logs import RateLimited, kv

if TYPE_CHECKING:
    from agent.core.sparkplug import SparkplugDecoder
    from agent.ops.metrics import Metrics

Clock = Callable[[], float]


class ChannelSink(Protocol):
    """Where `IngestHandler` puts one channel's samples, with the channel's arrival
    bookkeeping: `agent.ingest.buffers.ChannelBuffer` in the daemon, the child's tap in
    the ingest child."""

    n_messages: int
    n_samples: int
    last_seq: int | None
    next_block_ts: float | None

    def append(self, ts: float, value: float, arrival: float) -> None: ...

    def append_decoded(self, block: Block, arrival: float) -> None: ...

    def set_liveness(self, death: str | None, t: float) -> None: ...


class SampleSinks(Protocol):
    """Every configured channel's `ChannelSink`, by route."""

    def get(self, route: Route) -> ChannelSink: ...


SinksT = TypeVar("SinksT", bound=SampleSinks)

# paho's own reconnect back-off for the local broker: 1 s doubling up to this cap, the
# same cap as the upstream side's (agent/delivery/upstream.py RECONNECT_MAX_S): after a local
# broker restart, samples flow again within about 10 s (with 30 s they took up to 30).
LOCAL_RECONNECT_MIN_S = 1
LOCAL_RECONNECT_MAX_S = 10


class PlainCount:
    """A counter without Prometheus, for counts another process publishes."""

    __slots__ = ("n", "sent")

    def __init__(self) -> None:
        self.n = 0
        self.sent = 0  # how much of `n` has been handed on

    def inc(self, amount: float = 1) -> None:
        self.n += int(amount)


class PlainGauge:
    """A gauge without Prometheus (the ingest child's connection state)."""

    __slots__ = ("value",)

    def __init__(self) -> None:
        self.value = 0.0

    def set(self, value: float) -> None:
        self.value = value


class IngestHandler(Generic[SinksT]):
    """Decode-and-append for one message; free of MQTT so it can be driven directly
    (by `replay`, and by tests).

    A reading goes to its channel buffer's `append(ts, value, arrival)`, a json-batch
    block to `append_decoded(block, arrival)` (`agent.core.decode.Block`, no numpy).

    With `metrics=None` (the ingest child, agent/ingest/child.py) rejections and gaps
    are counted in `PlainCount`s that the caller hands on, and `flush_counts` does
    nothing: the daemon's own handler publishes them.
    """

    def __init__(self, cfg: Config, buffers: SinksT, metrics: Metrics | None,
                 logger: logging.Logger) -> None:
        self.cfg = cfg
        # Topic -> channel for the decoders with a topic each; sparkplug-b channels
        # share their edge node's topics and go through `self.sparkplug`.
        self.routes = build_routes(cfg.assets)
        self.channels: list[Route] = channel_routes(cfg.assets)  # every channel
        self.buffers = buffers
        self.metrics = metrics
        self.log = RateLimited(logger)
        self._rejected: dict[Reason, Any]
        self._gaps: dict[tuple[int, int], Any]  # by (asset index, channel index)
        if metrics is None:
            self._rejected = {r: PlainCount() for r in Reason}
            self._gaps = {r.key: PlainCount() for r in self.channels}
            self._received: dict[str, Any] = {}
            self._samples: dict[tuple[int, int], Any] = {}
        else:
            self._rejected = {r: metrics.messages_rejected.labels(r.value) for r in Reason}
            self._received = {a.name: metrics.messages_received.labels(a.name)
                              for a in cfg.assets}
            self._samples = {r.key: metrics.samples.labels(r.asset, r.channel.name)
                             for r in self.channels}
            self._gaps = {r.key: metrics.gaps.labels(r.asset, r.channel.name)
                          for r in self.channels}
        self._max_bytes = cfg.ingest.max_payload_bytes
        self._max_skew = cfg.ingest.max_clock_skew_s
        self._flush_rows: list[tuple[Any, Any, Any]] | None = None
        spb = [r for r in self.channels if r.channel.decoder is Decoder.SPARKPLUG_B]
        self.sparkplug: SparkplugDecoder | None = None
        if spb:
            from agent.core.sparkplug import SparkplugDecoder  # protobuf only where used

            sc = cfg.ingest.sparkplug
            self.sparkplug = SparkplugDecoder(
                spb, max_payload_bytes=self._max_bytes, max_skew_s=self._max_skew,
                rebirth_interval_s=sc.rebirth_min_interval_s if sc.rebirth_requests else None)
        # Where a rebirth request goes (the local broker's client; `Ingest` sets it).
        self.publish: Callable[[str, bytes], None] | None = None
        # Per asset, the sample time that closes its next window (set by the pipeline
        # after each tick); a sample at or past it sets `wake`.
        self.close_at: list[float] = [math.inf] * len(cfg.assets)
        self.wake: threading.Event | None = None
        self._flush_lock = threading.Lock()

    def flush_counts(self) -> None:
        """Add the messages and samples counted since the last flush to the metrics.

        Called from the pipeline thread after each tick and before each `/metrics`
        scrape; the network thread only ever increments the plain counts.
        """
        if self.metrics is None:
            return
        with self._flush_lock:  # the pipeline thread and a scrape may both flush
            self._flush_locked()

    def _flush_locked(self) -> None:
        rows = self._flush_rows
        if rows is None:  # once: (buffer, its asset's message counter, its sample counter)
            rows = self._flush_rows = [(self.buffers.get(r), self._received[r.asset],
                                        self._samples[r.key]) for r in self.channels]
        for buf, received, samples in rows:
            n, s = buf.n_messages, buf.n_samples
            if n != buf.flushed_messages:
                received.inc(n - buf.flushed_messages)
                buf.flushed_messages = n
            if s != buf.flushed_samples:
                samples.inc(s - buf.flushed_samples)
                buf.flushed_samples = s

    def handle(self, topic: str, payload: bytes, arrival: float) -> None:
        route = self.routes.get(topic)
        if route is None:
            if self.sparkplug is not None and topic.startswith(_SPB_PREFIX):
                self._handle_sparkplug(self.sparkplug, topic, payload, arrival)
                return
            self._rejected[Reason.UNKNOWN_TOPIC].inc()
            self.log.warning("unknown_topic", "message on a topic no channel uses",
                             reason="unknown_topic")
            return
        buf = self.buffers.get(route)
        buf.n_messages += 1
        ch = route.channel
        try:
            samples, seq = decode_message(payload, ch, arrival,
                                          max_payload_bytes=self._max_bytes,
                                          max_skew_s=self._max_skew)
        except Rejected as rej:
            self._rejected[rej.reason].inc()
            self.log.warning(f"{rej.reason.value}:{route.asset}", "message rejected",
                             reason=rej.reason.value, asset=route.asset, channel=ch.name,
                             detail=rej.detail)
            return
        if seq is not None:
            # A counter that does not follow on: messages lost between sensor and us (or
            # a sensor restart, which looks the same from here).
            if buf.last_seq is not None and seq != buf.last_seq + 1:
                self._gaps[route.key].inc()
            buf.last_seq = seq
        if isinstance(samples, Block):
            # Sample times as `Block.arrays` makes them, so the gap test sees what the
            # windows get.
            n = len(samples)
            t0 = samples.t0
            step = samples.time_of(1) - t0 if n > 1 else 1.0 / ch.rate_hz
            expected = buf.next_block_ts
            if expected is not None and abs(t0 - expected) > 0.5 * step:
                self._gaps[route.key].inc()
            last = samples.time_of(n - 1)
            buf.next_block_ts = last + step
            buf.append_decoded(samples, arrival)
            buf.n_samples += n
        else:
            last = float(samples[0])
            buf.append(last, float(samples[1]), arrival)
            buf.n_samples += 1
        wake = self.wake
        if wake is not None and last >= self.close_at[route.asset_index]:
            wake.set()

    def _handle_sparkplug(self, spb: SparkplugDecoder, topic: str, payload: bytes,
                          arrival: float) -> None:
        """One Sparkplug B message: samples for every channel it feeds, and what the
        decoder noted (rejections, gaps, deaths, births, rebirth requests)."""
        try:
            samples = spb.decode(topic, payload, arrival)
        except Rejected as rej:
            self._rejected[rej.reason].inc()
            self.log.warning(f"{rej.reason.value}:{topic}", "message rejected",
                             reason=rej.reason.value, topic=topic, detail=rej.detail)
            samples = []
        if spb.notes:
            self._sparkplug_notes(spb)
        if not samples:
            return
        get = self.buffers.get
        close_at = self.close_at
        due = False
        for route, ts, value in samples:
            buf = get(route)
            buf.n_messages += 1
            if isinstance(value, Block):
                buf.append_decoded(value, arrival)
                buf.n_samples += len(value)
                ts = value.time_of(len(value) - 1)
            else:
                buf.append(ts, value, arrival)
                buf.n_samples += 1
            if ts >= close_at[route.asset_index]:
                due = True
        wake = self.wake
        if due and wake is not None:
            wake.set()

    def _sparkplug_notes(self, spb: SparkplugDecoder) -> None:
        from agent.core.sparkplug import Note

        notes, spb.notes = spb.notes, []
        for note in notes:
            kind = note[0]
            if kind is Note.REJECTED:
                reason: Reason = note[1]
                self._rejected[reason].inc()
                self.log.warning(f"{reason.value}:sparkplug", "metric rejected",
                                 reason=reason.value, detail=note[2])
            elif kind is Note.GAP:
                for r in note[1]:
                    self._gaps[r.key].inc()
                self.log.warning(f"spb_gap:{note[2][:20]}", "Sparkplug messages lost",
                                 detail=note[2], channels=len(note[1]))
            elif kind is Note.OFFLINE or kind is Note.ONLINE:
                offline = kind is Note.OFFLINE
                reason_s = note[2] if offline else None
                t = note[3] if offline else note[2]
                for r in note[1]:
                    self.buffers.get(r).set_liveness(reason_s, t)
                self.log.warning(f"spb_live:{note[1][0].asset}:{offline}",
                                 "Sparkplug death certificate" if offline
                                 else "Sparkplug birth after a death",
                                 asset=note[1][0].asset, channels=len(note[1]),
                                 reason=reason_s or "birth")
            elif kind is Note.REBIRTH:
                publish = self.publish
                if publish is not None:
                    publish(note[1], note[2])
                    self.log.warning(f"spb_rebirth:{note[1]}", "rebirth requested",
                                     topic=note[1])
            elif kind is Note.LOG:
                self.log.warning(note[1], note[2], **note[3])


_SPB_PREFIX = SPARKPLUG_NAMESPACE + "/"


def make_client(broker: BrokerConfig, env: dict[str, str] | None = None) -> mqtt.Client:
    """A paho client for a configured broker: VERSION2 callbacks, credentials, TLS,
    socket reads in large chunks (`agent.ingest.mqtt_client`)."""
    import os
    import ssl

    proto = mqtt.MQTTv5 if broker.protocol is MqttProtocol.V5 else mqtt.MQTTv311
    client = ReadAheadClient(CallbackAPIVersion.VERSION2, client_id=broker.client_id,
                             protocol=proto, clean_session=None if proto == mqtt.MQTTv5 else True)
    if broker.username:
        client.username_pw_set(broker.username, read_secret(broker, env or dict(os.environ)))
    if broker.tls is not None:
        t = broker.tls
        ctx = ssl.create_default_context(cafile=str(t.ca_file) if t.ca_file else None)
        if t.cert_file and t.key_file:
            ctx.load_cert_chain(str(t.cert_file), str(t.key_file))
        if not t.verify:
            ctx.check_hostname = False
            ctx.verify_mode = ssl.CERT_NONE
        client.tls_set_context(ctx)
    client.reconnect_delay_set(min_delay=LOCAL_RECONNECT_MIN_S, max_delay=LOCAL_RECONNECT_MAX_S)
    return client


class Ingest:
    """The local-broker side: connects, (re)subscribes on every connect, feeds the handler."""

    def __init__(self, cfg: Config, handler: IngestHandler[Any], metrics: Metrics | None,
                 logger: logging.Logger, *, clock: Clock = time.time,
                 client_factory: Callable[[BrokerConfig], mqtt.Client] = make_client) -> None:
        self.cfg = cfg
        self.handler = handler
        self.metrics = metrics
        self.log = logger
        self.clock = clock
        self._client = client_factory(cfg.local_broker)
        self._client.on_connect = self._on_connect
        self._client.on_disconnect = self._on_disconnect
        self._client.on_message = self._on_message
        handler.publish = self._publish
        self._connects = 0
        self.connected = threading.Event()
        # Without metrics (the ingest child) the counts stay plain; the child hands
        # the callback errors on and the daemon keeps the connection metrics itself.
        self._errors: Any = PlainCount() if metrics is None \
            else metrics.callback_errors.labels("ingest")
        self._gauge: Any = PlainGauge() if metrics is None \
            else metrics.connected.labels("local")
        self.disconnected_since: float | None = None
        self._stopping = False
        self._cb_log = RateLimited(logger)

    def start(self) -> None:
        b = self.cfg.local_broker
        self._client.connect_async(b.host, b.port, keepalive=b.keepalive_s)
        self._client.loop_start()

    def stop(self) -> None:
        """Stop taking messages: unsubscribe-free disconnect, then end the loop thread."""
        self._stopping = True
        try:
            self._client.disconnect()
        finally:
            self._client.loop_stop()

    def topics(self) -> set[str]:
        """What the client subscribes to for the current config."""
        spb = self.handler.sparkplug
        return set(self.cfg.ingest.subscriptions) or (
            set(self.handler.routes) | (spb.filters() if spb is not None else set()))

    def reconfigure(self, cfg: Config, handler: IngestHandler[Any]) -> None:
        """Route with `handler` from now on (reload) and follow the subscriptions."""
        old = self.topics()
        handler.publish = self._publish
        if handler.sparkplug is not None and self.handler.sparkplug is not None:
            # Births seen so far stay good; the paho thread may still be in the old
            # handler, so a message it reads meanwhile is in the old state only (the
            # next sequence number then looks like a gap, no worse).
            handler.sparkplug.adopt(self.handler.sparkplug)
        self.handler = handler  # one attribute store: the paho thread sees old or new
        self.cfg = cfg  # later reconnects subscribe for the new config
        self.resubscribe(old, self.topics())

    def resubscribe(self, old: set[str], new: set[str]) -> None:
        """Subscribe to topics in `new` only, unsubscribe from those in `old` only.

        paho's subscribe is thread-safe; when the client is not connected, the next
        on_connect subscribes from the current config anyway.
        """
        if not self.connected.is_set():
            return
        add, drop = sorted(new - old), sorted(old - new)
        if add:
            self._client.subscribe([(t, 0) for t in add])
        if drop:
            self._client.unsubscribe(drop)

    def _publish(self, topic: str, payload: bytes) -> None:
        """A Sparkplug rebirth request: QoS 0, not retained (spec 3.0, chapter 6,
        "NCMD": tck-id-payloads-ncmd-qos, tck-id-payloads-ncmd-retain)."""
        self._client.publish(topic, payload, qos=0, retain=False)

    def _on_connect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: Any,
                    props: Any) -> None:
        try:
            if reason.is_failure:
                self.log.warning(kv("local broker refused the connection", reason=str(reason)))
                return
            self._connects += 1
            if self._connects > 1 and self.metrics is not None:
                self.metrics.reconnects.labels("local").inc()
            topics = sorted(self.topics())
            if topics:
                client.subscribe([(t, 0) for t in topics])
            self.connected.set()
            self._gauge.set(1)
            self.disconnected_since = None
            self.log.info(kv("local broker connected", host=self.cfg.local_broker.host,
                             port=self.cfg.local_broker.port, topics=len(topics)))
        except Exception:
            self._errors.inc()
            self.log.exception("error in local on_connect")

    def _on_disconnect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: Any,
                       props: Any) -> None:
        try:
            if self.connected.is_set() and not self._stopping:
                self.log.warning(kv("local broker connection lost", reason=str(reason)))
            self.connected.clear()
            self._gauge.set(0)
            self.disconnected_since = self.clock()
        except Exception:
            self._errors.inc()

    def _on_message(self, client: mqtt.Client, userdata: Any, msg: mqtt.MQTTMessage) -> None:
        try:
            self.handler.handle(msg.topic, bytes(msg.payload), self.clock())
        except Exception:
            self._errors.inc()
            # Rate-limited: a message that makes the handler raise tends to come again.
            self._cb_log.exception("on_message", "error in local on_message")
