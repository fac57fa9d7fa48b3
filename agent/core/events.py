"""CloudEvents 1.0 (structured JSON mode) builders for watchkeep's events. Pure.

The event `id` is a UUIDv5 of the source, type and the window (plus the channel
for sensor events), so it is stable across redelivery and a replay of the same
data gives the same ids; consumers de-duplicate by (`source`, `id`), as the
CloudEvents spec says they identify an event.
"""

from __future__ import annotations

import uuid
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from enum import StrEnum
from typing import Any

SPEC_VERSION = "1.0"
TYPE_PREFIX = "io.watchkeep."
# The MQTT content type of a structured-mode event (CloudEvents JSON format spec).
CONTENT_TYPE = "application/cloudevents+json"
_ID_NAMESPACE = uuid.UUID("6f1c9a52-4b8e-5d0e-9a77-2c1f0e5b3d41")


class EventType(StrEnum):
    ANOMALY_RAISED = "anomaly.raised"
    ANOMALY_CLEARED = "anomaly.cleared"
    # A raised asset got worse (a higher severity band) or its error moved to other
    # channels; agent/core/escalation.py.
    ANOMALY_ESCALATED = "anomaly.escalated"
    SENSOR_FAULT = "sensor.fault"
    SENSOR_RECOVERED = "sensor.recovered"
    LIMIT_EXCEEDED = "limit.exceeded"
    MODEL_UPDATED = "model.updated"
    # A rebaseline request and its outcomes other than a new model (requested, refused,
    # rejected, failed, cancelled); agent/learning/manager.py.
    MODEL_REBASELINE = "model.rebaseline"

    @property
    def full(self) -> str:
        return TYPE_PREFIX + self.value


class Severity(StrEnum):
    """Severity of an anomaly, from how far the peak score is above the threshold."""

    MINOR = "minor"
    MAJOR = "major"
    CRITICAL = "critical"


def severity_for(score: float, threshold: float) -> Severity:
    """Ratio bands of score to threshold: <2 minor, <5 major, else critical.

    Common practice, no source: the bands are ours and documented in the README.
    """
    ratio = score / threshold if threshold > 0 else float("inf")
    if ratio < 2.0:
        return Severity.MINOR
    if ratio < 5.0:
        return Severity.MAJOR
    return Severity.CRITICAL


def rfc3339(ts: float) -> str:
    """Unix seconds -> RFC 3339 UTC with milliseconds, e.g. 2026-12-01T10:00:00.000Z."""
    dt = datetime.fromtimestamp(ts, tz=UTC)
    if dt.year >= 1000:
        # The same text without strftime, which costs several times more (tens of us
        # the first time in a tick): isoformat pads the year to four digits, strftime
        # does not below 1000.
        return dt.isoformat(timespec="milliseconds")[:-6] + "Z"
    return dt.strftime("%Y-%m-%dT%H:%M:%S.") + f"{dt.microsecond // 1000:03d}Z"


@dataclass(frozen=True)
class Source:
    site: str
    gateway: str

    def for_asset(self, asset: str) -> str:
        return f"/{self.site}/{self.gateway}/{asset}"


def event_id(source: str, etype: EventType, key: str) -> str:
    return str(uuid.uuid5(_ID_NAMESPACE, f"{source}|{etype.value}|{key}"))


def make_event(etype: EventType, source: str, subject: str, time_s: float,
               data: Mapping[str, Any], id_key: str) -> dict[str, Any]:
    """A structured-mode CloudEvent as a dict, ready for JSON."""
    return {
        "specversion": SPEC_VERSION,
        "id": event_id(source, etype, id_key),
        "source": source,
        "type": etype.full,
        "time": rfc3339(time_s),
        "subject": subject,
        "datacontenttype": "application/json",
        "data": dict(data),
    }


def top_contributors(names: tuple[str, ...], sq_err: Any, k: int = 5) -> list[dict[str, Any]]:
    """The k features with the largest share of a window's squared error."""
    total = float(sq_err.sum())
    order = sq_err.argsort()[::-1][:k]
    return [{"feature": names[i],
             "share": round(float(sq_err[i]) / total, 4) if total > 0 else 0.0,
             "sq_error": round(float(sq_err[i]), 6)} for i in order]
