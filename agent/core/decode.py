"""Payload decoders: bytes in, (timestamps, values) out, or a `Rejected` with its reason.

Pure: the arrival time is a parameter. Decoders follow the input contract in
DESIGN.md: `json` (one reading), `json-batch` (evenly spaced block) and `text`.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Callable
from enum import StrEnum
from typing import Any

import numpy as np

from agent.config import ChannelConfig, Decoder

try:  # orjson is several times faster at json.loads and does the same job
    import orjson

    _loads: Callable[[bytes], Any] = orjson.loads
    _JSON_ERRORS: tuple[type[Exception], ...] = (orjson.JSONDecodeError, ValueError)
except ImportError:  # pragma: no cover - orjson is a core dependency
    _loads = json.loads
    _JSON_ERRORS = (ValueError,)


class Reason(StrEnum):
    """Why a message was rejected; a bounded label set for metrics."""

    MALFORMED = "malformed"
    NON_FINITE = "non_finite"
    WRONG_TYPE = "wrong_type"
    TOO_LARGE = "too_large"
    UNKNOWN_TOPIC = "unknown_topic"
    CLOCK_SKEW = "clock_skew"
    LATE = "late"


class Rejected(Exception):
    """A message that cannot be used; `reason` is one of `Reason`."""

    def __init__(self, reason: Reason, detail: str = "") -> None:
        super().__init__(f"{reason.value}: {detail}" if detail else reason.value)
        self.reason = reason
        self.detail = detail


# A plain decimal number as publishers write it; Python's float() also takes "1_000".
_TEXT_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")
_TEXT_NON_FINITE = re.compile(r"[+-]?(?:nan|inf|infinity)", re.IGNORECASE)
_NUMBER_TYPES = frozenset({int, float})
_MISSING = object()


def _field(doc: Any, dotted: str) -> Any:
    """The value at a dotted path; `_MISSING` when any level is absent."""
    cur = doc
    for part in dotted.split("."):
        if not isinstance(cur, dict) or part not in cur:
            return _MISSING
        cur = cur[part]
    return cur


def _number(v: Any, what: str) -> float:
    if isinstance(v, bool) or not isinstance(v, int | float):
        raise Rejected(Reason.WRONG_TYPE, f"{what} is {type(v).__name__}, expected a number")
    try:
        f = float(v)
    except OverflowError:  # an integer literal beyond float range, read by the stdlib parser
        raise Rejected(Reason.NON_FINITE, f"{what} overflows a float") from None
    if not math.isfinite(f):
        raise Rejected(Reason.NON_FINITE, f"{what} is {f}")
    return f


def _loads_relaxed(payload: bytes) -> Any:
    try:
        return _loads(payload)
    except _JSON_ERRORS:
        pass
    # orjson refuses the NaN/Infinity literals that some publishers send; the stdlib
    # parser reads them, so they are counted as non-finite, not as malformed.
    try:
        return json.loads(payload)
    except (ValueError, UnicodeDecodeError) as exc:
        raise Rejected(Reason.MALFORMED, str(exc)[:120]) from None


def _timestamp(doc: dict[str, Any], ch: ChannelConfig, arrival: float,
               max_skew_s: float) -> float:
    raw = _field(doc, ch.ts_field)
    if raw is _MISSING or raw is None:
        return arrival
    ts = _number(raw, ch.ts_field)
    if abs(ts - arrival) > max_skew_s:
        raise Rejected(Reason.CLOCK_SKEW, f"ts {ts:.3f} is {ts - arrival:+.0f} s from now")
    return ts


Samples = tuple[float, float] | tuple[np.ndarray, np.ndarray]


def decode(payload: bytes, ch: ChannelConfig, arrival: float, *, max_payload_bytes: int,
           max_skew_s: float) -> Samples:
    """Decode one message of channel `ch`.

    Returns `(ts, value)` floats for a single reading, or `(ts_array, values_array)`
    for a block. Raises `Rejected` for anything unusable.
    """
    return decode_message(payload, ch, arrival, max_payload_bytes=max_payload_bytes,
                          max_skew_s=max_skew_s)[0]


def sequence_number(doc: Any, ch: ChannelConfig) -> int | None:
    """The sensor's own message counter (`ch.seq_field`), when it sends a whole number."""
    if not ch.seq_field or not isinstance(doc, dict):
        return None
    v = _field(doc, ch.seq_field)
    return v if isinstance(v, int) and not isinstance(v, bool) else None


def decode_message(payload: bytes, ch: ChannelConfig, arrival: float, *,
                   max_payload_bytes: int, max_skew_s: float) -> tuple[Samples, int | None]:
    """`decode`, plus the message's sequence number when the channel names one."""
    samples, doc = _decode(payload, ch, arrival, max_payload_bytes, max_skew_s)
    return samples, sequence_number(doc, ch)


def _decode(payload: bytes, ch: ChannelConfig, arrival: float, max_payload_bytes: int,
            max_skew_s: float) -> tuple[Samples, Any]:
    """The samples and the decoded JSON document (None for `text`)."""
    if len(payload) > max_payload_bytes:
        raise Rejected(Reason.TOO_LARGE, f"{len(payload)} bytes > {max_payload_bytes}")
    if ch.decoder is Decoder.TEXT:
        try:
            text = payload.decode("ascii").strip()
        except UnicodeDecodeError:
            raise Rejected(Reason.MALFORMED, "not an ASCII number") from None
        if _TEXT_NON_FINITE.fullmatch(text):
            raise Rejected(Reason.NON_FINITE, text)
        if not _TEXT_NUMBER.fullmatch(text):
            raise Rejected(Reason.MALFORMED, "not an ASCII number")
        v = float(text)
        if not math.isfinite(v):  # e.g. 1e400
            raise Rejected(Reason.NON_FINITE, text)
        return (arrival, v), None
    doc = _loads_relaxed(payload)
    if not isinstance(doc, dict):
        if ch.decoder is Decoder.JSON and isinstance(doc, int | float) \
                and not isinstance(doc, bool):
            return (arrival, _number(doc, "payload")), None
        raise Rejected(Reason.WRONG_TYPE, f"payload is a JSON {type(doc).__name__}")
    ts = _timestamp(doc, ch, arrival, max_skew_s)
    if ch.decoder is Decoder.JSON:
        raw = _field(doc, ch.value_field)
        if raw is _MISSING:
            raise Rejected(Reason.MALFORMED, f"no {ch.value_field!r} field")
        return (ts, _number(raw, ch.value_field)), doc
    values = _field(doc, ch.values_field)
    if not isinstance(values, list) or not values:
        raise Rejected(Reason.WRONG_TYPE, f"{ch.values_field!r} is not a non-empty list")
    rate_raw = _field(doc, ch.rate_field)
    rate = ch.rate_hz if rate_raw is _MISSING or rate_raw is None \
        else _number(rate_raw, ch.rate_field)
    if rate <= 0:
        raise Rejected(Reason.WRONG_TYPE, f"{ch.rate_field} must be > 0")
    # numpy would quietly turn true, "1.5" and null into numbers (or NaN); a single
    # reading with those is a wrong type, so a block element is one too.
    if not set(map(type, values)) <= _NUMBER_TYPES:
        raise Rejected(Reason.WRONG_TYPE,
                       f"{ch.values_field!r} is not a flat list of numbers")
    try:
        arr = np.asarray(values, dtype=np.float64)
    except OverflowError:  # an integer literal beyond float range
        raise Rejected(Reason.NON_FINITE, f"{ch.values_field!r} overflows") from None
    if not np.all(np.isfinite(arr)):
        raise Rejected(Reason.NON_FINITE, f"{int(np.sum(~np.isfinite(arr)))} samples")
    t = ts + np.arange(arr.size, dtype=np.float64) / rate
    return (t, arr), doc
