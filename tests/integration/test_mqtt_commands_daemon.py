"""Rebaseline commands over MQTT, against two real Mosquitto brokers.

The upstream broker refuses anonymous clients (password_file, allow_anonymous false) and
has an ACL: the gateway `gw1` and the technician `tech` may publish on the gateway's
topics, the dashboard user `viewer` may only read them. The invented pump P-1 is
commissioned here (tests.helpers signals) and adopted into the model store.
"""

from __future__ import annotations

import base64
import hashlib
import json
import logging
import os
import shutil
import subprocess
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion

from agent.commission.dataset import DatasetWriter, read_dataset
from agent.commission.train import train_bundle
from agent.config.load import load_config
from agent.daemon import Daemon
from agent.errors import ConfigError
from agent.learning.rebaseline import reservoir
from agent.models.bundle import load_bundle
from agent.models.store import ModelStore
from tests.brokers import Broker, wait_for
from tests.helpers import (
    RATE_HZ,
    asset_doc,
    channel_signal,
    feature_names,
    window_features,
    write_config,
)

PREFIX = "watchkeep/testworks/gw1"
COMMAND = f"{PREFIX}/commands/P-1/rebaseline"
USERS = {"gw1": "gw1-secret", "tech": "tech-secret", "viewer": "viewer-secret"}
ACL = f"""\
user gw1
topic readwrite {PREFIX}/#
user tech
topic readwrite {PREFIX}/#
user viewer
topic read {PREFIX}/#
"""


def pbkdf2_line(user: str, password: str) -> str:
    """A mosquitto 2.0 password_file line (`$7$`: PBKDF2-SHA512, 101 iterations, 12-byte
    salt, as mosquitto_passwd 2.0 writes; from memory of its source, checked against
    mosquitto 2.0.11 here) for when the mosquitto_passwd CLI is not installed."""
    salt = os.urandom(12)
    digest = hashlib.pbkdf2_hmac("sha512", password.encode(), salt, 101)
    b64 = base64.b64encode
    return f"{user}:$7$101${b64(salt).decode()}${b64(digest).decode()}\n"


def write_password_file(path: Path) -> Path:
    tool = shutil.which("mosquitto_passwd")
    path.write_text("")
    for user, password in USERS.items():
        if tool:
            subprocess.run([tool, "-b", str(path), user, password], check=True,
                           capture_output=True)
        else:
            with path.open("a") as fh:
                fh.write(pbkdf2_line(user, password))
    return path


class Client:
    """An authenticated upstream client: collects what it subscribed to, publishes QoS 1."""

    def __init__(self, port: int, user: str, client_id: str, topic: str | None = None) -> None:
        self.messages: list[tuple[str, bytes]] = []
        self.lock = threading.Lock()
        self.ready = threading.Event()
        self.subscribed = 0  # SUBACKs seen: one more after every reconnect
        self.c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id)
        self.c.username_pw_set(user, USERS[user])

        def on_connect(c: mqtt.Client, u: Any, f: Any, rc: Any, p: Any) -> None:
            assert not rc.is_failure, rc
            if topic is None:
                self.ready.set()
            else:
                c.subscribe(topic, qos=1)

        def on_message(c: mqtt.Client, u: Any, msg: mqtt.MQTTMessage) -> None:
            with self.lock:
                self.messages.append((msg.topic, msg.payload))

        self.c.on_connect = on_connect
        def on_subscribe(*a: Any) -> None:
            self.subscribed += 1
            self.ready.set()

        self.c.on_subscribe = on_subscribe
        self.c.on_message = on_message
        self.c.connect("127.0.0.1", port)
        self.c.loop_start()
        if not self.ready.wait(10):
            raise RuntimeError(f"{user} did not connect")

    def send(self, topic: str, payload: Any) -> None:
        """Publish and wait for the broker's PUBACK (the broker has routed it by then)."""
        body = payload if isinstance(payload, bytes) else json.dumps(payload).encode()
        info = self.c.publish(topic, body, qos=1)
        info.wait_for_publish(10)
        assert info.is_published()

    def events(self) -> list[dict[str, Any]]:
        with self.lock:
            return [json.loads(p) for t, p in self.messages if t.endswith("/events")]

    def close(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()


@pytest.fixture(scope="module")
def commissioned(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A model store holding P-1 v1 with its rehearsal set (trained once per module)."""
    tmp = tmp_path_factory.mktemp("commission")
    rng = np.random.default_rng(3)
    w = DatasetWriter(tmp / "dataset", asset="P-1")
    for i, ld in enumerate(rng.uniform(0.5, 1.0, 300)):
        w.add(window_features(channel_signal(rng, float(ld), int(RATE_HZ))),
              tuple(feature_names()), 1000.0 + i, 1001.0 + i, "default")
    ds = read_dataset(w.close())
    train_bundle(ds.path, tmp / "trained", asset="P-1", seed=0)
    store = ModelStore(tmp / "models", keep=5)
    names = load_bundle(tmp / "trained").meta.feature_names
    store.adopt("P-1", "default", tmp / "trained", reservoir(ds.columns(names), names, 256))
    return tmp / "models"


@pytest.fixture
def secured_upstream(tmp_path: Path) -> Iterator[Broker]:
    """An upstream broker that wants a username and password, with an ACL."""
    pw = write_password_file(tmp_path / "passwd")
    acl = tmp_path / "acl"
    acl.write_text(ACL)
    b = Broker(tmp_path / "upstream", extra=(
        "allow_anonymous false\n"  # the later line wins over Broker's default
        # (tests.brokers keeps a root-started broker root, so it can read the files)
        f"password_file {pw}\nacl_file {acl}\nlog_type subscribe\n")).start()
    yield b
    b.stop()


def _config(tmp_path: Path, local: Broker, upstream: Broker, models: Path,
            rebaseline: dict[str, Any]) -> Path:
    shutil.copytree(models, tmp_path / "state" / "models", symlinks=True)
    link = tmp_path / "state" / "models" / "P-1" / "default" / "active"
    return write_config(
        tmp_path / "watchkeep.yaml", local.port, upstream.port, [asset_doc("P-1", link)],
        upstream_broker={"host": "127.0.0.1", "port": upstream.port, "keepalive_s": 15,
                         "username": "gw1", "password": USERS["gw1"]},
        rebaseline={"windows": 60, **rebaseline})


def _daemon(tmp_path: Path, local: Broker, upstream: Broker, models: Path,
            mqtt_commands: bool) -> Daemon:
    cfg_path = _config(tmp_path, local, upstream, models,
                       {"mqtt_commands": mqtt_commands, "broker_enforces_acl": mqtt_commands})
    daemon = Daemon(load_config(cfg_path), logger=logging.getLogger("watchkeep.test"))
    daemon.start()
    wait_for(daemon.upstream.connected.is_set, what="upstream broker")
    wait_for(daemon.ingest.connected.is_set, what="local broker (ingest subscribed)")
    return daemon


def _count(daemon: Daemon, name: str, **labels: str) -> float:
    return daemon.registry.get_sample_value(name, labels) or 0.0


def _rejected(daemon: Daemon, reason: str) -> float:
    return _count(daemon, "watchkeep_mqtt_commands_rejected_total", reason=reason)


def test_commands_over_an_authenticated_upstream(tmp_path: Path, broker: Broker,
                                                 secured_upstream: Broker,
                                                 commissioned: Path) -> None:
    """With mqtt_commands on: an authenticated command starts learning and its request event
    arrives upstream with the unverified name; an unknown asset and a malformed payload are
    counted and ignored; a user the ACL does not allow never reaches the daemon; the
    subscription survives a broker restart."""
    daemon = _daemon(tmp_path, broker, secured_upstream, commissioned, mqtt_commands=True)
    tech = Client(secured_upstream.port, "tech", "test-tech", f"{PREFIX}/assets/+/events")
    viewer = Client(secured_upstream.port, "viewer", "test-viewer")
    try:
        wait_for(daemon.upstream.commands_subscribed.is_set, what="commands subscribed")
        sub_line = f"{daemon.cfg.upstream_broker.client_id} 1 {PREFIX}/commands/+/rebaseline"
        wait_for(lambda: sub_line in secured_upstream.log_text(), what="subscription logged")
        # Refused by the broker's ACL (mosquitto drops it and still acknowledges).
        viewer.send(COMMAND, {"requested_by": "viewer", "reason": "not allowed"})
        tech.send(f"{PREFIX}/commands/X-9/rebaseline", {"requested_by": "m.okafor"})
        wait_for(lambda: _rejected(daemon, "unknown_asset") == 1, what="unknown asset counted")
        tech.send(COMMAND, b"{not json")
        tech.send(COMMAND, {"windows": "sixty"})
        wait_for(lambda: _rejected(daemon, "bad_field") == 1, what="bad field counted")
        assert _rejected(daemon, "not_json") == 1
        # Nothing so far reached the manager: the viewer's command was dropped upstream.
        assert _count(daemon, "watchkeep_mqtt_commands_total", outcome="accepted") == 0
        assert daemon.status()["assets"][0]["learning"] is None
        assert tech.events() == []

        tech.send(COMMAND, {"windows": 60, "reason": "impeller trimmed, WO-4711",
                            "requested_by": "m.okafor", "accept_shift": False})
        learning = wait_for(lambda: daemon.status()["assets"][0]["learning"],
                            what="learning in status")
        assert learning["phase"] == "collecting" and learning["target"] == 60
        assert learning["requested_by"] == "m.okafor"
        ev = wait_for(lambda: [e for e in tech.events()
                               if e["type"].endswith("model.rebaseline")], what="request event")
        (req,) = ev
        assert req["data"]["phase"] == "requested"
        assert req["data"]["reason"] == "impeller trimmed, WO-4711"
        assert req["data"]["requested_by"] == {"via": "mqtt (unverified name)",
                                               "user": "m.okafor", "verified": False,
                                               "topic": COMMAND}
        assert _count(daemon, "watchkeep_mqtt_commands_total", outcome="accepted") == 1
        assert _count(daemon, "watchkeep_mqtt_commands_total", outcome="rejected") == 3
        # The subscription is made in on_connect, so it comes back after a reconnect: a
        # second command reaches the manager, which refuses it (already learning), publicly.
        secured_upstream.restart()
        wait_for(lambda: tech.subscribed >= 2, timeout_s=20, what="tech back")
        reconnects = "watchkeep_broker_reconnects_total"
        wait_for(lambda: _count(daemon, reconnects, broker="upstream") >= 1, timeout_s=20,
                 what="daemon reconnected")
        wait_for(daemon.upstream.commands_subscribed.is_set, timeout_s=20,
                 what="commands subscribed again")  # cleared at the disconnect
        tech.send(COMMAND, {"requested_by": "m.okafor", "reason": "again"})
        refused = wait_for(lambda: [e for e in tech.events()
                                    if e["data"].get("phase") == "refused"],
                           what="refused event")
        assert "already learning" in refused[0]["data"]["reasons"][0]
        assert _count(daemon, "watchkeep_mqtt_commands_total", outcome="refused") == 1
        assert _count(daemon, "watchkeep_callback_errors_total", loop="upstream") == 0
    finally:
        viewer.close()
        tech.close()
        daemon.stop()


def test_commands_off_subscribes_nothing(tmp_path: Path, broker: Broker,
                                         secured_upstream: Broker, commissioned: Path) -> None:
    """With mqtt_commands off (the default) the daemon subscribes to nothing upstream and a
    command does nothing."""
    daemon = _daemon(tmp_path, broker, secured_upstream, commissioned, mqtt_commands=False)
    tech = Client(secured_upstream.port, "tech", "test-tech", f"{PREFIX}/#")
    try:
        # The retained online status is published after the subscription would have been
        # made (both in on_connect), so once it is here the broker has seen any SUBSCRIBE.
        wait_for(lambda: any(t.endswith("/status") for t, _ in tech.messages),
                 what="online status")
        client_id = daemon.cfg.upstream_broker.client_id
        wait_for(lambda: "test-tech 1 " in secured_upstream.log_text(),
                 what="the tech's own subscription in the broker log")
        assert f"{client_id} 1 " not in secured_upstream.log_text()  # "<id> <qos> <filter>"
        tech.send(COMMAND, {"windows": 60, "requested_by": "m.okafor"})
        assert daemon.upstream.status()["commands"] is None
        assert daemon.status()["assets"][0]["learning"] is None
        assert daemon.registry.get_sample_value("watchkeep_mqtt_commands_total",
                                                {"outcome": "accepted"}) is None
        assert tech.events() == []
    finally:
        tech.close()
        daemon.stop()


def test_an_anonymous_publish_broker_needs_the_operators_statement_and_windows_are_bounded(
        tmp_path: Path, broker: Broker, upstream_broker: Broker, commissioned: Path) -> None:
    """Issue 20: against a broker that lets anyone publish, a configured username is not
    enough; the loader wants rebaseline.broker_enforces_acl. With it stated, the probe's
    anonymous {"windows": 1000000000000} is turned away (bad_field) and nothing learns."""
    cfg_path = _config(tmp_path, broker, upstream_broker, commissioned,
                       {"mqtt_commands": True})
    with pytest.raises(ConfigError) as info:
        load_config(cfg_path)
    (problem,) = info.value.problems
    assert problem.key_path == "rebaseline.mqtt_commands"
    assert "rebaseline.broker_enforces_acl is true" in problem.expected

    text = cfg_path.read_text().replace("mqtt_commands: true",
                                        "mqtt_commands: true\n  broker_enforces_acl: true")
    cfg_path.write_text(text)
    daemon = Daemon(load_config(cfg_path), logger=logging.getLogger("watchkeep.test"))
    daemon.start()
    anon = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="anonymous-prankster")
    anon.connect("127.0.0.1", upstream_broker.port)
    anon.loop_start()
    try:
        wait_for(daemon.upstream.commands_subscribed.is_set, what="commands subscribed")
        info_ = anon.publish(COMMAND, json.dumps({"windows": 1_000_000_000_000}), qos=1)
        info_.wait_for_publish(10)
        wait_for(lambda: _rejected(daemon, "bad_field") == 1, what="the command turned away")
        assert daemon.status()["assets"][0]["learning"] is None
        assert _count(daemon, "watchkeep_mqtt_commands_total", outcome="accepted") == 0
    finally:
        anon.disconnect()
        anon.loop_stop()
        daemon.stop()
