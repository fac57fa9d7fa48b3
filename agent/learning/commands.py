"""Rebaseline requests from the upstream broker on `<prefix>/commands/<asset>/rebaseline`.

Off by default (`rebaseline.mqtt_commands`), and the loader refuses it unless the
upstream connection authenticates (a username or a TLS client certificate) and the
operator states that the broker enforces access (`rebaseline.broker_enforces_acl`). watchkeep
cannot see who published a message: it relies on the broker's access control to
restrict who may publish on the commands topic, and records the payload's
`requested_by` as an unverified name (`"via": "mqtt (unverified name)"`).

Payload: one JSON object, every field optional, no others allowed:
`{"windows": 360, "mode": "duty", "reason": "...", "requested_by": "...",
"accept_shift": false}`; `windows` from 60 to `MAX_WINDOWS` (17,280). A command is
turned away (counted by reason in `watchkeep_mqtt_commands_rejected_total`, logged
rate-limited, never acted on) when it is retained, too large, not a JSON object, has a
field of the wrong kind, or names an asset the running config does not have. A command
that passes goes to `RebaselineManager.request`, which logs it and publishes the same
`model.rebaseline` event as the admin socket does (requested or refused, with who and
why).

Threads: `offer` runs on the upstream paho network thread; it only puts the message in
a small bounded queue and returns (a full queue counts `queue_full`). The
`watchkeep-commands` thread checks each message (`parse_command`, pure) and calls the
manager, which may wait for the pipeline loop between ticks.

Delivery: subscribed at QoS 1 in the upstream `on_connect`, so the subscription comes
back after every reconnect. The session is clean, so a command published while the
gateway is offline is not acted on later. A QoS 1 redelivery of an accepted command is
refused by the manager ("already learning") and published as refused.
"""

from __future__ import annotations

import json
import logging
import queue
import threading
from collections.abc import Callable, Collection
from dataclasses import dataclass
from enum import StrEnum
from typing import Any

from prometheus_client import CollectorRegistry, Counter

from agent.config.rebaseline import MAX_WINDOWS, MIN_NEW_WINDOWS
from agent.errors import WatchkeepError
from agent.ops.logs import RateLimited, kv

VERB = "rebaseline"
VIA = "mqtt (unverified name)"
MAX_PAYLOAD_BYTES = 4096
QUEUE_SIZE = 16  # a technician sends one command; more waiting than this is a flood
MAX_NAME_CHARS = 100
MAX_REASON_CHARS = 500
MAX_MODE_CHARS = 64


class Reason(StrEnum):
    """Why a command was turned away (the bounded `reason` label)."""

    TOO_LARGE = "too_large"
    RETAINED = "retained"
    NOT_JSON = "not_json"
    NOT_OBJECT = "not_object"
    BAD_FIELD = "bad_field"
    UNKNOWN_ASSET = "unknown_asset"
    BAD_TOPIC = "bad_topic"
    QUEUE_FULL = "queue_full"
    DISABLED = "disabled"


class Outcome(StrEnum):
    ACCEPTED = "accepted"  # learning started
    REFUSED = "refused"  # the manager said no (published as model.rebaseline refused)
    REJECTED = "rejected"  # never reached the manager (see Reason)
    FAILED = "failed"  # an unexpected error while handling it (logged with a traceback)


@dataclass(frozen=True)
class Command:
    """A checked rebaseline command: `request` is what `RebaselineManager.request` takes."""

    asset: str
    request: dict[str, Any]
    requested_by: str


@dataclass(frozen=True)
class Rejected:
    reason: Reason
    detail: str


def command_filter(prefix: str) -> str:
    """The subscription: every asset's rebaseline command."""
    return f"{prefix}/commands/+/{VERB}"


def _text(doc: dict[str, Any], key: str, limit: int) -> str | None:
    v = doc.get(key)
    if v is None:
        return None
    if not isinstance(v, str) or len(v) > limit or not v.isprintable():
        raise ValueError(f"{key} must be one line of text of at most {limit} characters")
    return v


def parse_command(prefix: str, topic: str, payload: bytes, retained: bool,
                  assets: Collection[str]) -> Command | Rejected:
    """Check one message from the commands topic against the configured `assets`. Pure."""
    head = f"{prefix}/commands/"
    parts = topic[len(head):].split("/") if topic.startswith(head) else []
    if len(parts) != 2 or parts[1] != VERB or not parts[0]:
        return Rejected(Reason.BAD_TOPIC, f"not a {VERB} command topic")
    asset = parts[0]
    if asset not in assets:
        return Rejected(Reason.UNKNOWN_ASSET, f"no asset {asset!r} in the running config")
    if retained:
        # A retained command would act again at every reconnect.
        return Rejected(Reason.RETAINED, "commands must not be retained")
    if len(payload) > MAX_PAYLOAD_BYTES:
        return Rejected(Reason.TOO_LARGE, f"payload over {MAX_PAYLOAD_BYTES} bytes")
    try:
        doc = json.loads(payload)
    except (ValueError, UnicodeDecodeError):
        return Rejected(Reason.NOT_JSON, "payload is not JSON")
    except RecursionError:  # nested deeper than the parser's recursion limit
        return Rejected(Reason.NOT_JSON, "payload is JSON nested too deeply")
    if not isinstance(doc, dict):
        return Rejected(Reason.NOT_OBJECT, "payload is not a JSON object")
    known = ("windows", "mode", "reason", "requested_by", "accept_shift")
    unknown = sorted(str(k) for k in doc if k not in known)
    if unknown:
        return Rejected(Reason.BAD_FIELD, f"unknown fields {', '.join(unknown)} (known: "
                                          f"{', '.join(known)})")
    try:
        windows = doc.get("windows")
        if windows is not None and (isinstance(windows, bool) or not isinstance(windows, int)
                                    or not MIN_NEW_WINDOWS <= windows <= MAX_WINDOWS):
            raise ValueError(f"windows must be an integer from {MIN_NEW_WINDOWS} to "
                             f"{MAX_WINDOWS}")
        accept = doc.get("accept_shift")
        if accept is not None and not isinstance(accept, bool):
            raise ValueError("accept_shift must be true or false")
        mode = _text(doc, "mode", MAX_MODE_CHARS)
        reason = _text(doc, "reason", MAX_REASON_CHARS)
        by = _text(doc, "requested_by", MAX_NAME_CHARS)
    except ValueError as exc:
        return Rejected(Reason.BAD_FIELD, str(exc))
    request = {"asset": asset, "mode": mode or None, "windows": windows,
               "reason": reason or "", "accept_shift": bool(accept)}
    return Command(asset, request, by or "(not given)")


def who_json(cmd: Command, topic: str) -> dict[str, Any]:
    """The `requested_by` of the events: a name nobody checked, and where it came from."""
    return {"via": VIA, "user": cmd.requested_by, "verified": False, "topic": topic}


Request = Callable[[dict[str, Any], dict[str, Any]], dict[str, Any]]


class CommandReceiver:
    """Takes command messages off the paho thread and hands them to `request`."""

    def __init__(self, prefix: str, request: Request, *, assets: Callable[[], Collection[str]],
                 enabled: Callable[[], bool], registry: CollectorRegistry,
                 logger: logging.Logger) -> None:
        self.prefix = prefix
        self.topic_filter = command_filter(prefix)
        self._request = request
        self._assets = assets
        self._enabled = enabled
        self.log = logger
        self._rl = RateLimited(logger)
        self._queue: queue.Queue[tuple[str, bytes, bool]] = queue.Queue(QUEUE_SIZE)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="watchkeep-commands",
                                        daemon=True)
        self.outcomes = Counter("watchkeep_mqtt_commands", "Commands received on the upstream "
                                "commands topic, by outcome", ["outcome"], registry=registry)
        self.rejected = Counter("watchkeep_mqtt_commands_rejected", "Commands turned away "
                                "before reaching the rebaseline manager, by reason", ["reason"],
                                registry=registry)
        for o in Outcome:
            self.outcomes.labels(o.value)
        for r in Reason:
            self.rejected.labels(r.value)

    def start(self) -> None:
        self._thread.start()

    def stop(self, timeout_s: float = 5.0) -> None:
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join(timeout_s)

    # -- the paho network thread: hand off and return ---------------------------------

    def offer(self, topic: str, payload: bytes, retained: bool) -> None:
        """Queue one message (never blocks; a full queue counts and drops it)."""
        try:
            self._queue.put_nowait((topic, bytes(payload), retained))
        except queue.Full:
            self._reject(topic, Rejected(Reason.QUEUE_FULL, f"more than {QUEUE_SIZE} "
                                         "commands waiting"))

    # -- the commands thread ------------------------------------------------------------

    def _run(self) -> None:
        while not self._stop.is_set():
            try:
                topic, payload, retained = self._queue.get(timeout=0.2)
            except queue.Empty:
                continue
            try:
                self.handle(topic, payload, retained)
            except Exception:  # one bad command must not end the thread
                self.outcomes.labels(Outcome.FAILED.value).inc()
                self.log.exception("handling an MQTT command failed")

    def handle(self, topic: str, payload: bytes, retained: bool) -> Outcome:
        """Check one message and pass it on; returns what became of it."""
        if not self._enabled():  # turned off by a reload since the subscription was made
            return self._reject(topic, Rejected(Reason.DISABLED, "rebaseline.mqtt_commands "
                                                "is off"))
        got = parse_command(self.prefix, topic, payload, retained, self._assets())
        if isinstance(got, Rejected):
            return self._reject(topic, got)
        who = who_json(got, topic)
        self.log.info(kv("mqtt command", verb=VERB, asset=got.asset, via=VIA,
                         user=got.requested_by, reason=got.request["reason"]))
        try:
            reply = self._request(got.request, who)
        except WatchkeepError as exc:  # published as model.rebaseline refused by the manager
            self.outcomes.labels(Outcome.REFUSED.value).inc()
            self.log.warning(kv("mqtt command refused", asset=got.asset, user=got.requested_by,
                                error=str(exc)))
            return Outcome.REFUSED
        self.outcomes.labels(Outcome.ACCEPTED.value).inc()
        self.log.info(kv("mqtt command accepted", asset=got.asset,
                         request=reply.get("request_id"), windows=reply.get("windows"),
                         user=got.requested_by, via=VIA))
        return Outcome.ACCEPTED

    def _reject(self, topic: str, r: Rejected) -> Outcome:
        self.outcomes.labels(Outcome.REJECTED.value).inc()
        self.rejected.labels(r.reason.value).inc()
        # The topic comes from the wire: logged, but the rate-limit key is the reason only.
        self._rl.warning(f"command:{r.reason.value}", "mqtt command ignored",
                         reason=r.reason.value, detail=r.detail, topic=topic[:200])
        return Outcome.REJECTED
