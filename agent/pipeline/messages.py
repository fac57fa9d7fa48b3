"""What the pipeline hands to the upstream side: topic, payload, and how to treat it."""

from __future__ import annotations

from dataclasses import dataclass
from enum import IntEnum

from agent.core.events import EventType


class Kind(IntEnum):
    """Message kinds, in the order they are dropped when the outbox is full (lowest first)."""

    SCORE = 0  # per-window score telemetry
    STATE = 1  # retained asset state; a newer one supersedes it
    EVENT = 2  # sensor, limit and model events
    ANOMALY = 3  # anomaly.raised / anomaly.cleared: dropped last

    @property
    def label(self) -> str:
        return self.name.lower()


@dataclass(slots=True)
class OutMessage:
    """One message for the upstream broker; treat it as immutable (it is not frozen
    only because a frozen dataclass costs twice as much to make, and the pipeline makes
    two per window).

    `key` names what a newer message of the same key supersedes (the state topic);
    `None` for messages that must each be delivered.

    What the payload says, typed, for the stages in front of the outbox (re-learning's
    `HoldingSink` holds and marks messages by them, never by parsing topic or JSON):
    `asset` the asset it is about (None: none); for events `event` and `event_id`; for
    state messages and anomaly events the window's `score` and the `threshold` it was
    judged against, as in the payload. Not stored: the outbox keeps topic and payload.
    """

    topic: str
    payload: bytes
    kind: Kind
    qos: int = 1
    retain: bool = False
    key: str | None = None
    asset: str | None = None
    event: EventType | None = None
    event_id: str | None = None
    score: float | None = None
    threshold: float | None = None
