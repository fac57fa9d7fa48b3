"""MQTT rebaseline commands: the payload check (pure), the receiver's hand-off, the config rule."""

from __future__ import annotations

import json
import logging
from pathlib import Path
from typing import Any

import pytest
from prometheus_client import CollectorRegistry

from agent.config.load import parse_config
from agent.errors import ConfigError
from agent.learning.commands import (
    QUEUE_SIZE,
    VIA,
    Command,
    CommandReceiver,
    Outcome,
    Reason,
    Rejected,
    command_filter,
    parse_command,
)
from agent.learning.rebaseline import RebaselineError
from tests.unit.config.config_cases import base_doc

PREFIX = "watchkeep/fernbrook/gw1"
TOPIC = f"{PREFIX}/commands/P-101/rebaseline"
ASSETS = ("P-101", "B-201")


def test_filter() -> None:
    assert command_filter(PREFIX) == f"{PREFIX}/commands/+/rebaseline"


def test_full_command() -> None:
    """Every field is carried into the manager's request; who is kept apart."""
    payload = json.dumps({"windows": 120, "mode": "duty", "reason": "impeller trimmed",
                          "requested_by": "m.okafor", "accept_shift": True}).encode()
    got = parse_command(PREFIX, TOPIC, payload, False, ASSETS)
    assert got == Command("P-101", {"asset": "P-101", "mode": "duty", "windows": 120,
                                    "reason": "impeller trimmed", "accept_shift": True},
                          "m.okafor")


def test_empty_object_takes_the_defaults() -> None:
    got = parse_command(PREFIX, TOPIC, b"{}", False, ASSETS)
    assert isinstance(got, Command)
    assert got.request == {"asset": "P-101", "mode": None, "windows": None, "reason": "",
                           "accept_shift": False}
    assert got.requested_by == "(not given)"


@pytest.mark.parametrize(("topic", "payload", "retained", "reason"), [
    (f"{PREFIX}/commands/X-9/rebaseline", b"{}", False, Reason.UNKNOWN_ASSET),
    (f"{PREFIX}/commands/P-101/rollback", b"{}", False, Reason.BAD_TOPIC),
    (f"{PREFIX}/commands/P-101/rebaseline/x", b"{}", False, Reason.BAD_TOPIC),
    ("elsewhere/commands/P-101/rebaseline", b"{}", False, Reason.BAD_TOPIC),
    (TOPIC, b"{}", True, Reason.RETAINED),
    (TOPIC, b"{" + b" " * 5000 + b"}", False, Reason.TOO_LARGE),
    (TOPIC, b"rebaseline please", False, Reason.NOT_JSON),
    (TOPIC, b"\xff\xfe", False, Reason.NOT_JSON),
    (TOPIC, b"", False, Reason.NOT_JSON),
    (TOPIC, b"[1, 2]", False, Reason.NOT_OBJECT),
    (TOPIC, b'"rebaseline"', False, Reason.NOT_OBJECT),
    (TOPIC, b'{"windows": "many"}', False, Reason.BAD_FIELD),
    (TOPIC, b'{"windows": true}', False, Reason.BAD_FIELD),
    (TOPIC, b'{"windows": 60.5}', False, Reason.BAD_FIELD),
    (TOPIC, b'{"windows": 1000000000000}', False, Reason.BAD_FIELD),  # issue 20's probe
    (TOPIC, b'{"windows": 17281}', False, Reason.BAD_FIELD),  # MAX_WINDOWS + 1
    (TOPIC, b'{"windows": 59}', False, Reason.BAD_FIELD),
    (TOPIC, b'{"windows": -1}', False, Reason.BAD_FIELD),
    (TOPIC, b'{"accept_shift": "yes"}', False, Reason.BAD_FIELD),
    (TOPIC, b'{"mode": 3}', False, Reason.BAD_FIELD),
    (TOPIC, b'{"requested_by": "a\\nb"}', False, Reason.BAD_FIELD),
    (TOPIC, json.dumps({"requested_by": "x" * 101}).encode(), False, Reason.BAD_FIELD),
    (TOPIC, json.dumps({"reason": "x" * 501}).encode(), False, Reason.BAD_FIELD),
    (TOPIC, b'{"asset": "B-201"}', False, Reason.BAD_FIELD),
    # found by the mqtt-commands fuzz target: a RecursionError escaped parse_command, the
    # commands thread logged a traceback per message and counted `failed`
    (TOPIC, b"[" * 1500 + b"]" * 1500, False, Reason.NOT_JSON),
    (TOPIC, b'{"reason": ' + b"[" * 2000 + b"]" * 2000 + b"}", False, Reason.NOT_JSON),
])
def test_rejected(topic: str, payload: bytes, retained: bool, reason: Reason) -> None:
    """Each malformed or misdirected command is turned away with its bounded reason."""
    got = parse_command(PREFIX, topic, payload, retained, ASSETS)
    assert isinstance(got, Rejected) and got.reason is reason, got


class FakeManager:
    """Stands in for RebaselineManager.request: records calls, refuses when told to."""

    def __init__(self, refuse: str = "") -> None:
        self.calls: list[tuple[dict[str, Any], dict[str, Any]]] = []
        self.refuse = refuse

    def request(self, req: dict[str, Any], who: dict[str, Any]) -> dict[str, Any]:
        self.calls.append((req, who))
        if self.refuse:
            raise RebaselineError(self.refuse)
        return {"ok": True, "request_id": "r1", "windows": 60}


def _receiver(manager: FakeManager, registry: CollectorRegistry,
              enabled: bool = True) -> CommandReceiver:
    return CommandReceiver(PREFIX, manager.request, assets=lambda: ASSETS,
                           enabled=lambda: enabled, registry=registry,
                           logger=logging.getLogger("watchkeep.test"))


def _count(reg: CollectorRegistry, name: str, **labels: str) -> float | None:
    return reg.get_sample_value(name, labels)


def test_receiver_outcomes() -> None:
    """Accepted, refused and rejected commands are counted by outcome (and reason); who is
    the payload's name, marked unverified."""
    reg = CollectorRegistry()
    mgr = FakeManager()
    rx = _receiver(mgr, reg)
    ok = json.dumps({"requested_by": "m.okafor", "reason": "new coupling"}).encode()
    assert rx.handle(TOPIC, ok, False) is Outcome.ACCEPTED
    ((req, who),) = mgr.calls
    assert req["reason"] == "new coupling"
    assert who == {"via": VIA, "user": "m.okafor", "verified": False, "topic": TOPIC}
    assert rx.handle(f"{PREFIX}/commands/X-9/rebaseline", ok, False) is Outcome.REJECTED
    assert rx.handle(TOPIC, b"nope", False) is Outcome.REJECTED
    mgr.refuse = "asset P-101 is already learning"
    assert rx.handle(TOPIC, ok, False) is Outcome.REFUSED
    assert len(mgr.calls) == 2
    total = "watchkeep_mqtt_commands_total"
    assert _count(reg, total, outcome="accepted") == 1
    assert _count(reg, total, outcome="refused") == 1
    assert _count(reg, total, outcome="rejected") == 2
    rejected = "watchkeep_mqtt_commands_rejected_total"
    assert _count(reg, rejected, reason="unknown_asset") == 1
    assert _count(reg, rejected, reason="not_json") == 1
    assert _count(reg, rejected, reason="bad_field") == 0  # every reason is present at 0


def test_disabled_by_reload_is_not_acted_on() -> None:
    reg = CollectorRegistry()
    mgr = FakeManager()
    assert _receiver(mgr, reg, enabled=False).handle(TOPIC, b"{}", False) is Outcome.REJECTED
    assert mgr.calls == []
    assert _count(reg, "watchkeep_mqtt_commands_rejected_total", reason="disabled") == 1


def test_offer_never_blocks() -> None:
    """The paho-thread side only queues; a full queue drops and counts (thread not started)."""
    reg = CollectorRegistry()
    rx = _receiver(FakeManager(), reg)
    for _ in range(QUEUE_SIZE + 3):
        rx.offer(TOPIC, b"{}", False)
    assert _count(reg, "watchkeep_mqtt_commands_rejected_total", reason="queue_full") == 3


def _doc(upstream: dict[str, Any] | None, acl: bool = True) -> dict[str, Any]:
    doc = base_doc()
    doc["rebaseline"] = {"mqtt_commands": True, "broker_enforces_acl": acl}
    if upstream is not None:
        doc["upstream_broker"] = upstream
    return doc


def test_config_refuses_commands_without_authentication(tmp_path: Path) -> None:
    """mqtt_commands over an anonymous upstream connection is an error at its key path."""
    with pytest.raises(ConfigError) as info:
        parse_config(_doc({"host": "127.0.0.1", "port": 1883}), tmp_path)
    (p,) = info.value.problems
    assert p.key_path == "rebaseline.mqtt_commands"
    assert "username or tls.cert_file" in p.expected and "ACL" in p.expected
    with pytest.raises(ConfigError):  # TLS without a client certificate is not enough
        parse_config(_doc({"tls": {"ca_file": None}}), tmp_path)


def test_config_accepts_commands_with_authentication(tmp_path: Path) -> None:
    """A username, or a TLS client certificate, makes mqtt_commands acceptable."""
    cfg = parse_config(_doc({"username": "gw1", "password": "s3cret"}), tmp_path)
    assert cfg.rebaseline is not None and cfg.rebaseline.mqtt_commands
    for name in ("gw1.pem", "gw1.key"):
        (tmp_path / name).write_text("an invented certificate file")
    tls = {"tls": {"cert_file": str(tmp_path / "gw1.pem"), "key_file": str(tmp_path / "gw1.key")}}
    cfg = parse_config(_doc(tls), tmp_path)
    assert cfg.rebaseline is not None and cfg.rebaseline.mqtt_commands


def test_config_refuses_commands_unless_the_broker_is_stated_to_enforce_access(
        tmp_path: Path) -> None:
    """A username alone is not enough: broker_enforces_acl must say the broker's ACL
    keeps others off the commands topic (the error is at rebaseline.mqtt_commands)."""
    with pytest.raises(ConfigError) as info:
        parse_config(_doc({"username": "gw1", "password": "s3cret"}, acl=False), tmp_path)
    (p,) = info.value.problems
    assert p.key_path == "rebaseline.mqtt_commands"
    assert "rebaseline.broker_enforces_acl is true" in p.expected


def test_the_windows_bound_is_named_at_its_key_path(tmp_path: Path) -> None:
    """rebaseline.windows past MAX_WINDOWS is a config error at that key."""
    doc = base_doc()
    doc["rebaseline"] = {"windows": 17_281}
    with pytest.raises(ConfigError) as info:
        parse_config(doc, tmp_path)
    (p,) = info.value.problems
    assert p.key_path == "rebaseline.windows" and "from 60 to 17280" in p.expected


def test_commands_are_off_by_default(tmp_path: Path) -> None:
    cfg = parse_config(base_doc(), tmp_path)
    assert cfg.rebaseline is not None and cfg.rebaseline.mqtt_commands is False
