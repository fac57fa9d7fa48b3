"""Upstream broker side: status with Last Will, and publishing of outgoing messages.

This first version publishes what the pipeline submits straight away at QoS 1;
the durable outbox takes the submit side over (issue 4).
"""

from __future__ import annotations

import json
import logging
import threading
import time
from collections.abc import Callable, Sequence
from typing import Any

import paho.mqtt.client as mqtt

from agent import __version__
from agent.config import BrokerConfig, Config
from agent.ingest import make_client
from agent.logs import kv
from agent.messages import OutMessage
from agent.metrics import Metrics


def status_payload(cfg: Config, state: str, started: float, **extra: Any) -> bytes:
    doc = {"state": state, "version": __version__, "site": cfg.site, "gateway": cfg.gateway,
           "started": started, "assets": [a.name for a in cfg.assets], **extra}
    return json.dumps(doc, separators=(",", ":")).encode()


class Upstream:
    """Connects to the upstream broker and publishes submitted messages."""

    def __init__(self, cfg: Config, metrics: Metrics, logger: logging.Logger, *,
                 clock: Callable[[], float] = time.time,
                 client_factory: Callable[[BrokerConfig], mqtt.Client] = make_client) -> None:
        self.cfg = cfg
        self.metrics = metrics
        self.log = logger
        self.clock = clock
        self.started = clock()
        self.status_topic = f"{cfg.topic_prefix}/status"
        self._client = client_factory(cfg.upstream_broker)
        self._client.will_set(self.status_topic,
                              status_payload(cfg, "offline", self.started, reason="lost"),
                              qos=1, retain=True)
        self._client.on_connect = self._on_connect
        self._client.on_disconnect = self._on_disconnect
        self._client.on_publish = self._on_publish
        self.connected = threading.Event()
        self._gauge = metrics.connected.labels("upstream")
        self._errors = metrics.callback_errors.labels("upstream")
        self._connects = 0
        self.last_ack: float | None = None

    def start(self) -> None:
        b = self.cfg.upstream_broker
        self._client.connect_async(b.host, b.port, keepalive=b.keepalive_s)
        self._client.loop_start()

    def submit(self, msgs: Sequence[OutMessage]) -> None:
        for m in msgs:
            self._client.publish(m.topic, m.payload, qos=m.qos, retain=m.retain)

    def stop(self, timeout_s: float = 5.0) -> None:
        """Publish offline status, give it time to be acknowledged, disconnect."""
        try:
            if self.connected.is_set():
                info = self._client.publish(
                    self.status_topic,
                    status_payload(self.cfg, "offline", self.started, reason="stopped"),
                    qos=1, retain=True)
                info.wait_for_publish(timeout_s)
            self._client.disconnect()
        finally:
            self._client.loop_stop()

    def _on_connect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: Any,
                    props: Any) -> None:
        try:
            if reason.is_failure:
                self.log.warning(kv("upstream broker refused the connection",
                                    reason=str(reason)))
                return
            self._connects += 1
            if self._connects > 1:
                self.metrics.reconnects.labels("upstream").inc()
            client.publish(self.status_topic,
                           status_payload(self.cfg, "online", self.started), qos=1, retain=True)
            self.connected.set()
            self._gauge.set(1)
            self.log.info(kv("upstream broker connected", host=self.cfg.upstream_broker.host,
                             port=self.cfg.upstream_broker.port))
        except Exception:
            self._errors.inc()
            self.log.exception("error in upstream on_connect")

    def _on_disconnect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: Any,
                       props: Any) -> None:
        try:
            if self.connected.is_set():
                self.log.warning(kv("upstream broker connection lost", reason=str(reason)))
            self.connected.clear()
            self._gauge.set(0)
        except Exception:
            self._errors.inc()

    def _on_publish(self, client: mqtt.Client, userdata: Any, mid: int, reason: Any,
                    props: Any) -> None:
        try:
            self.last_ack = self.clock()
        except Exception:
            self._errors.inc()
