"""Upstream broker side: drains the outbox in id order at QoS 1, with status and Last Will.

Two threads, so no SQLite work ever runs on the MQTT network thread:

- the **network** thread owns the paho client and runs its loop by hand
  (`client.loop()`), so it owns reconnection too: exponential backoff with
  jitter, capped at `RECONNECT_MAX_S`, and every failure explained in one line
  (a wrong CA, a refused client certificate, a refused CONNECT). Between loop
  passes it publishes rows from an in-memory hand-over queue while fewer than
  `outbox.inflight` are unacknowledged. paho callbacks only append the
  acknowledged message ids to a list; they never block.
- the **store** thread (`upstream_feed.OutboxFeed`) fetches the next rows from the
  outbox into the hand-over queue (at most max(PREFETCH_ROWS, 2 x inflight) ahead; at
  once when rows are waiting, so a backlog starts going out without a wait), and
  deletes acknowledged rows in batches, one transaction per batch. A row is deleted
  only after its PUBACK (`on_publish` for its mid with a reason code that is not `.is_failure`).

After a reconnect paho itself resends the messages that were in flight, with
the DUP flag and their old message ids, before anything newer: delivery resumes
from the oldest unacknowledged row, in order. After a restart the outbox
starts again from its oldest row. Either way, duplicates can only be messages
that were in flight at the cut; event ids are stable, so consumers de-duplicate.

**Endpoints** (`upstream_broker.endpoints`, the nodes of a clustered broker): every
failed attempt and every lost connection moves on to the next endpoint in the list
(round robin), after the same capped, jittered backoff, so a dead node costs one
backoff step. paho's in-flight messages are kept across the switch
(`connect_async` only changes the address), so the new node gets the oldest
unacknowledged rows first, with the DUP flag, then the rest in order. The endpoint
in use stays until its connection is lost (no fail-back). It is in `status()`, the
`watchkeep_upstream_endpoint{endpoint}` gauge and the connect log line; TLS settings,
credentials and the client id are the same for every endpoint, and each endpoint's
certificate is checked against its own host name.
"""

from __future__ import annotations

import contextlib
import json
import logging
import random
import ssl
import threading
import time
from collections.abc import Callable
from typing import Any

import paho.mqtt.client as mqtt

from agent import __version__
from agent.config.load import BrokerConfig, Config, Endpoint
from agent.delivery.outbox import Outbox
from agent.delivery.outbox_file import Row
from agent.delivery.upstream_feed import OutboxFeed
from agent.errors import ConfigError, ConfigProblem
from agent.ingest.buffers import make_client
from agent.ops.logs import RateLimited, kv
from agent.ops.metrics import Metrics

RECONNECT_MIN_S = 0.5
# Capped low: a gateway talks to one broker on a plant network, and after an outage
# events should flow again within seconds; the jitter spreads a fleet's reconnects.
RECONNECT_MAX_S = 10.0
LOOP_TIMEOUT_S = 0.05
BUSY_LOOP_TIMEOUT_S = 0.002
STOP_DRAIN_S = 3.0


def backoff_delay(attempt: int, u: float, min_s: float = RECONNECT_MIN_S,
                  max_s: float = RECONNECT_MAX_S) -> float:
    """Seconds to wait before reconnect attempt `attempt` (1, 2, ...).

    `min_s * 2**(attempt-1)` capped at `max_s`, scaled by a jitter factor in
    [0.5, 1.0) from `u` in [0, 1) ("equal jitter"): never 0, never above the cap.
    """
    base = min(max_s, min_s * 2.0 ** min(max(attempt, 1) - 1, 30))
    return base * (0.5 + 0.5 * u)


def describe_connect_error(exc: BaseException, broker: BrokerConfig,
                           endpoint: Endpoint | None = None) -> str:
    """One line that says what failed and what to check."""
    ep = endpoint or Endpoint(broker.host, broker.port)
    where = str(ep)
    if isinstance(exc, ssl.SSLCertVerificationError):
        return (f"TLS certificate verification failed for {where}: {exc.verify_message} "
                f"(check upstream_broker.tls.ca_file and that the broker's certificate "
                f"names {ep.host})")
    if isinstance(exc, ssl.SSLError):
        return f"TLS handshake with {where} failed: {exc.reason or exc}"
    if isinstance(exc, ConnectionRefusedError):
        return f"connection to {where} refused (is the broker running and listening?)"
    if isinstance(exc, TimeoutError):
        return f"connection to {where} timed out"
    if isinstance(exc, OSError):
        return f"cannot connect to {where}: {exc.strerror or exc}"
    return f"cannot connect to {where}: {type(exc).__name__}: {exc}"


def status_payload(cfg: Config, state: str, started: float, **extra: Any) -> bytes:
    doc = {"state": state, "version": __version__, "site": cfg.site, "gateway": cfg.gateway,
           "started": started, "assets": [a.name for a in cfg.assets], **extra}
    return json.dumps(doc, separators=(",", ":")).encode()


class Upstream:
    """Connects to the upstream broker and delivers the outbox's rows."""

    def __init__(self, cfg: Config, outbox: Outbox, metrics: Metrics, logger: logging.Logger,
                 *, clock: Callable[[], float] = time.time,
                 client_factory: Callable[[BrokerConfig], mqtt.Client] = make_client,
                 rand: Callable[[], float] = random.random) -> None:
        self.cfg = cfg
        self.broker = cfg.upstream_broker
        self.endpoints = self.broker.targets()
        # The endpoint being tried or in use (network thread writes, anyone reads), and
        # the one the last connection went to (None before the first).
        self.endpoint = self.endpoints[0]
        self._ep_index = 0
        self._last_connected: Endpoint | None = None
        self.outbox = outbox
        self.metrics = metrics
        self.log = logger
        self.clock = clock
        self.rand = rand
        self.window = cfg.outbox.inflight
        self.started = clock()
        self.status_topic = f"{cfg.topic_prefix}/status"
        self._client = self._make_client(client_factory)
        # Inbound commands (agent/learning/commands.py): off unless `accept_commands` is called.
        self._command_filter: str | None = None
        self._on_command: Callable[[str, bytes, bool], None] | None = None
        self.commands_subscribed = threading.Event()
        self.connected = threading.Event()
        self.last_error: str | None = None
        self._paho_error: str | None = None
        self._connack_seen = False
        self._gauge = metrics.connected.labels("upstream")
        # Every endpoint's series exists from the start, at 0; 1 on the one in use.
        self._ep_gauges = {e: metrics.upstream_endpoint.labels(str(e)) for e in self.endpoints}
        self._errors = metrics.callback_errors.labels("upstream")
        self._rl = RateLimited(logger)
        self._connects = 0
        self._last_ack_mono = time.monotonic()
        # Network thread only:
        self._inflight: dict[int, Row] = {}
        self._acked: list[tuple[int, bool, str]] = []
        # The store thread, and the hand-over queues between it and the network thread.
        self._feed = OutboxFeed(outbox, metrics, self.window, self._rl,
                                wake_network=self._wake_network,
                                seconds_since_ack=self.seconds_since_ack)
        self._stop_net = threading.Event()
        self._net = threading.Thread(target=self._net_run, name="watchkeep-upstream",
                                     daemon=True)

    def _make_client(self, client_factory: Callable[[BrokerConfig], mqtt.Client]
                     ) -> mqtt.Client:
        """The paho client, with its will (status offline, reason lost) and callbacks."""
        try:
            client = client_factory(self.broker)
        except (ssl.SSLError, OSError) as exc:
            raise ConfigError([ConfigProblem(
                "upstream_broker.tls", "a readable CA file, and a certificate and key that "
                "belong together", str(exc))]) from exc
        # Room for the status messages beside the window of rows.
        client.max_inflight_messages_set(self.window + 4)
        client.will_set(self.status_topic,
                        status_payload(self.cfg, "offline", self.started, reason="lost"),
                        qos=1, retain=True)
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        client.on_publish = self._on_publish
        client.on_log = self._on_log
        client.on_message = self._on_message
        client.on_subscribe = self._on_subscribe
        return client

    # -- life cycle ----------------------------------------------------------------

    def start(self) -> None:
        b = self.broker
        if b.tls is not None and not b.tls.verify:
            self.log.warning(kv("TLS VERIFICATION IS OFF for the upstream broker "
                                "(upstream_broker.tls.allow_insecure): anyone on the path "
                                "can read and forge events", host=b.host, port=b.port))
        if not 15 <= b.keepalive_s <= 30:
            self.log.warning(kv("upstream keepalive outside 15-30 s: a half-open "
                                "connection is noticed late or pings are frequent",
                                keepalive_s=b.keepalive_s))
        self._client.connect_async(self.endpoint.host, self.endpoint.port,
                                   keepalive=b.keepalive_s)
        self._feed.start()
        self._net.start()

    def accept_commands(self, topic_filter: str,
                        handler: Callable[[str, bytes, bool], None]) -> None:
        """Subscribe to `topic_filter` at every connect and pass each message to
        `handler(topic, payload, retained)` on the network thread (it must only hand
        off). Call before `start`."""
        self._command_filter = topic_filter
        self._on_command = handler

    def stop(self, timeout_s: float = 5.0) -> None:
        """Give waiting rows a moment to go out, publish offline status, disconnect."""
        deadline = time.monotonic() + min(timeout_s, STOP_DRAIN_S)
        while (self.connected.is_set() and self.outbox.counts()[0] > 0
               and time.monotonic() < deadline):
            time.sleep(0.02)
        self._stop_net.set()
        self._net.join(timeout_s)
        self._feed.stop(timeout_s)

    def seconds_since_ack(self) -> float:
        return time.monotonic() - self._last_ack_mono

    def status(self) -> dict[str, Any]:
        return {"connected": self.connected.is_set(), "last_error": self.last_error,
                "endpoint": str(self.endpoint),
                "endpoints": [str(e) for e in self.endpoints],
                "inflight": len(self._inflight),
                "seconds_since_ack": round(self.seconds_since_ack(), 3),
                "protocol": self.broker.protocol.value, "tls": self.broker.tls is not None,
                "commands": (None if self._command_filter is None
                             else self.commands_subscribed.is_set())}

    # -- the network thread --------------------------------------------------------

    def _net_run(self) -> None:
        attempt = 0
        while not self._stop_net.is_set():
            try:
                self._client.reconnect()
            except Exception as exc:  # every way a connect can fail: explained, retried
                self._note_error(describe_connect_error(exc, self.broker, self.endpoint))
                attempt += 1
                self._stop_net.wait(backoff_delay(attempt, self.rand()))
                self._next_endpoint()
                continue
            self._paho_error = None
            self._connack_seen = False
            while not self._stop_net.is_set():
                try:
                    rc = self._client.loop(timeout=self._loop_timeout())
                except Exception as exc:
                    self._note_error(describe_connect_error(exc, self.broker, self.endpoint))
                    rc = mqtt.MQTT_ERR_CONN_LOST
                if self.connected.is_set():
                    attempt = 0
                self._pump()
                if rc != mqtt.MQTT_ERR_SUCCESS:
                    break
            if self._stop_net.is_set():
                break
            if not self._connack_seen:
                self._note_error(self._closed_early_message())
            elif self._paho_error:
                self._note_error(f"connection to {self.endpoint} lost: {self._paho_error}")
            self._set_disconnected()
            attempt += 1
            self._stop_net.wait(backoff_delay(attempt, self.rand()))
            self._next_endpoint()
        self._shutdown()

    def _next_endpoint(self) -> None:
        """Point the client at the next endpoint (round robin); paho keeps its in-flight
        messages across `connect_async`, which only changes the address."""
        if len(self.endpoints) < 2 or self._stop_net.is_set():
            return
        self._ep_index = (self._ep_index + 1) % len(self.endpoints)
        self.endpoint = self.endpoints[self._ep_index]
        self._client.connect_async(self.endpoint.host, self.endpoint.port,
                                   keepalive=self.broker.keepalive_s)

    def _loop_timeout(self) -> float:
        """Short while rows wait in the outbox: the store thread's hand-over cannot wake
        paho's select(), so poll briskly while draining and slowly when idle."""
        if self._feed.ready or self._inflight or self.outbox.counts()[0] > 0:
            return BUSY_LOOP_TIMEOUT_S
        return LOOP_TIMEOUT_S

    def _pump(self) -> None:
        """Hand acknowledgements to the store thread; publish while the window has room."""
        acked, self._acked = self._acked, []
        for mid, failed, reason in acked:
            row = self._inflight.pop(mid, None)
            if row is None:
                continue  # a status message
            if failed:
                self._rl.warning(f"refused:{reason}", "upstream broker refused a message; "
                                 "it stays in the outbox and is retried", reason=reason)
            else:
                self._last_ack_mono = time.monotonic()
            self._feed.acks.put((row, not failed))
        ready = self._feed.ready
        while self.connected.is_set() and len(self._inflight) < self.window and ready:
            row = ready.popleft()
            info = self._client.publish(row.topic, row.payload, qos=row.qos, retain=row.retain)
            if info.rc not in (mqtt.MQTT_ERR_SUCCESS, mqtt.MQTT_ERR_NO_CONN):
                ready.appendleft(row)  # paho did not take it; try again next pass
                break
            # paho keeps a QoS 1 message it took, even when the link just dropped, and
            # sends it after the reconnect: track its mid either way.
            self._inflight[info.mid] = row

    def _shutdown(self) -> None:
        try:
            if self.connected.is_set():
                info = self._client.publish(
                    self.status_topic,
                    status_payload(self.cfg, "offline", self.started, reason="stopped"),
                    qos=1, retain=True)
                deadline = time.monotonic() + 2.0
                while not info.is_published() and time.monotonic() < deadline:
                    if self._client.loop(timeout=LOOP_TIMEOUT_S) != mqtt.MQTT_ERR_SUCCESS:
                        break
                self._pump()
            self._client.disconnect()
            self._client.loop(timeout=LOOP_TIMEOUT_S)
        except Exception:
            self.log.exception("error while disconnecting from the upstream broker")
        finally:
            self._set_disconnected(log=False)

    def _closed_early_message(self) -> str:
        b = self.broker
        msg = f"connection to {self.endpoint} closed before the broker accepted it"
        if self._paho_error:
            msg += f" ({self._paho_error})"
        if b.tls is not None:
            msg += ("; over TLS this is how a broker turns away a missing or untrusted client "
                    "certificate: check upstream_broker.tls.cert_file and key_file")
        return msg

    def _note_error(self, msg: str) -> None:
        self.last_error = msg
        self._rl.warning(f"connect:{msg}", "upstream broker: " + msg)

    def _set_disconnected(self, log: bool = True) -> None:
        if self.connected.is_set() and log:
            self.log.warning(kv("upstream broker connection lost", error=self.last_error or "",
                                inflight=len(self._inflight)))
        self.connected.clear()
        self.commands_subscribed.clear()
        self._gauge.set(0)
        for g in self._ep_gauges.values():
            g.set(0)

    # -- paho callbacks (network thread; never block, never raise) ----------------

    def _on_connect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: Any,
                    props: Any) -> None:
        try:
            self._connack_seen = True
            if reason.is_failure:
                self._note_error(f"upstream broker refused the connection: {reason}")
                return
            self._connects += 1
            if self._connects > 1:
                self.metrics.reconnects.labels("upstream").inc()
            if self._command_filter is not None:
                # Here, so the subscription comes back after every reconnect (clean session).
                client.subscribe(self._command_filter, qos=1)
            client.publish(self.status_topic,
                           status_payload(self.cfg, "online", self.started,
                                          outbox=self.outbox.status()),
                           qos=1, retain=True)
            self.last_error = None
            ep, before = self.endpoint, self._last_connected
            self._last_connected = ep
            self.connected.set()
            self._gauge.set(1)
            self._ep_gauges[ep].set(1)
            self.log.info(kv("upstream broker connected", host=ep.host, port=ep.port,
                             endpoint=f"{self._ep_index + 1}/{len(self.endpoints)}",
                             protocol=self.broker.protocol.value,
                             tls=self.broker.tls is not None, resending=len(self._inflight)))
            if before is not None and before != ep:
                self.log.warning(kv("upstream broker failover: now connected to another "
                                    "endpoint", endpoint=str(ep), previous=str(before),
                                    resending=len(self._inflight)))
        except Exception:
            self._errors.inc()
            self.log.exception("error in upstream on_connect")

    def _on_disconnect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: Any,
                       props: Any) -> None:
        try:
            if getattr(reason, "is_failure", False) and self.last_error is None:
                self.last_error = f"disconnected: {reason}"
            self._set_disconnected(log=not self._stop_net.is_set())  # our own stop: quiet
        except Exception:
            self._errors.inc()

    def _on_publish(self, client: mqtt.Client, userdata: Any, mid: int, reason: Any,
                    props: Any) -> None:
        try:
            failed = bool(getattr(reason, "is_failure", False))
            self._acked.append((mid, failed, str(reason) if failed else ""))
        except Exception:
            self._errors.inc()

    def _on_message(self, client: mqtt.Client, userdata: Any, msg: mqtt.MQTTMessage) -> None:
        try:
            if self._on_command is not None:
                self._on_command(msg.topic, bytes(msg.payload), bool(msg.retain))
        except Exception:
            self._errors.inc()
            self.log.exception("error in upstream on_message")

    def _on_subscribe(self, client: mqtt.Client, userdata: Any, mid: int, reasons: Any,
                      props: Any) -> None:
        try:
            if any(getattr(r, "is_failure", False) for r in reasons):
                self._rl.warning("subscribe", "upstream broker refused the commands "
                                 "subscription (check its ACL)", topic=self._command_filter,
                                 reason=str(reasons[0]))
            else:
                self.commands_subscribed.set()
                self.log.info(kv("upstream commands subscribed", topic=self._command_filter))
        except Exception:
            self._errors.inc()

    def _on_log(self, client: mqtt.Client, userdata: Any, level: int, buf: str) -> None:
        # paho reports socket and TLS errors met inside loop() only here; the first one
        # of a connection is the cause, later ones are consequences.
        if level == mqtt.MQTT_LOG_ERR and self._paho_error is None:
            self._paho_error = buf

    # -- for the store thread ---------------------------------------------------

    def _wake_network(self) -> None:
        """Break the network thread out of paho's select() so handed rows go out now.

        paho wakes its own loop this way when `publish` is called from another thread
        (a byte on its internal socket pair); the attribute is private, so without it
        the network thread still finds the rows at its next (short) poll.
        """
        sock = getattr(self._client, "_sockpairW", None)
        if sock is not None:
            with contextlib.suppress(OSError):
                sock.send(b"\0")
