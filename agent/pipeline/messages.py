"""What the pipeline hands to the upstream side: topic, payload, and how to treat it."""

from __future__ import annotations

import math
from collections.abc import Sequence
from enum import IntEnum
from typing import Any, NamedTuple

import numpy as np
import orjson

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


class OutMessage(NamedTuple):
    """One message for the upstream broker (immutable: a named tuple, the cheapest
    immutable record to make; the pipeline makes one or two per window).

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


_POW10 = {3: 1e3, 6: 1e6}
# Below 2**52 every integer and every integer plus one is a float exactly.
_EXACT_BELOW = 4.5e15
# More than the error of x * 10**n in units of itself (half an ulp: 2**-53), with room.
_REL_ERR = 2.3e-16


def round_to(x: float, ndigits: int) -> float:
    """`round(x, ndigits)` for ndigits 3 or 6, the same float, without the decimal
    string Python's `round` goes through (several times dearer; twice per window).

    Python rounds the exact binary value of `x` half to even at `ndigits` decimals and
    returns the float nearest that decimal. Here: y = x * 10**n, off the exact product
    by at most half an ulp; when y is further than that from every half-integer, the
    nearest integer r to y is the one to the exact product, and r / 10**n (r and 10**n
    exact, the division correctly rounded) is the float nearest the decimal. Anything
    else (near a half-integer, not positive, too large) takes `round` itself."""
    scale = _POW10[ndigits]
    y = x * scale
    if 0.0 < y < _EXACT_BELOW:
        f = math.floor(y)
        d = (y - f) - 0.5
        err = y * _REL_ERR
        if d > err:
            return (f + 1) / scale
        if d < -err:
            return f / scale
    return round(x, ndigits)


def round_many(x: np.ndarray, ndigits: int | np.ndarray) -> list[float]:
    """`[round_to(v, n) ...]` (so `round(v, n)`) for each float64 `v` of `x` and `n` of
    `ndigits` (3 or 6: one for all, or one per element), the sure cases in array
    operations (IEEE arithmetic, the same as Python's floats)."""
    nd = np.broadcast_to(np.asarray(ndigits, dtype=np.int64), x.shape)
    if not ((nd == 6) | (nd == 3)).all():
        raise ValueError("ndigits must be 3 or 6")
    return round_scaled(x, np.where(nd == 6, 1e6, 1e3))


def round_scaled(x: np.ndarray, scale: np.ndarray) -> list[float]:
    """`round_many` with each element's 10**ndigits given, 1e6 or 1e3 (nothing else),
    by a caller that rounds to the same digits every time."""
    with np.errstate(all="ignore"):  # NaN and infinities go to `round` below
        y = x * scale
        f = np.floor(y)
        d = (y - f) - 0.5
        err = y * _REL_ERR
        out = (np.where(d > err, f + 1.0, f) / scale).tolist()
        # Sure: y positive and exact, and further than its error from a half-integer.
        sure = (np.abs(d) > err) & (y > 0.0) & (y < _EXACT_BELOW)
    if not sure.all():
        for i in np.flatnonzero(~sure).tolist():
            out[i] = round(float(x[i]), 6 if scale[i] == 1e6 else 3)
    return out


def dumps_each(values: Sequence[float]) -> list[bytes]:
    """`[orjson.dumps(v) for v in values]` for floats (and None), in one call: orjson
    writes a float in a list as it writes it alone, and none has a comma."""
    if not values:
        return []
    return orjson.dumps(values)[1:-1].split(b",")


SCORE_RATIO = b',"score_ratio":'  # what `StatePayload` writes between score and ratio


def ratio(score: float, threshold: float) -> float | None:
    """The score relative to the threshold, as people read it (1.0 = at the threshold)."""
    return round(score / threshold, 3) if threshold > 0 else None


class StatePayload:
    """The retained state message of one asset as bytes, for one set of what changes
    rarely (name, state, mode, threshold, model, last event): the JSON around the
    score, the ratio and the window's end, rendered once into one bytes format (`fmt`,
    one object to read per window) into which a window puts those (`render`). The bytes
    are those of `orjson.dumps` of the state document (keys in the same order):
    orjson writes a dict as `{"key":value,...}`, each value as it writes it alone.

    `ok` is False when orjson cannot write one of the fixed parts (the document then
    goes through the json module, and so must the whole of it)."""

    __slots__ = ("fmt", "last_event", "mode", "model", "ok", "state", "threshold")

    def __init__(self, name: str, state: str, mode: str, threshold: float,
                 model: dict[str, Any], last_event: dict[str, Any] | None) -> None:
        self.state = state
        self.mode = mode
        self.threshold = threshold
        self.model = model
        self.last_event = last_event
        try:
            dumps = orjson.dumps
            head = (b'{"asset":' + dumps(name) + b',"state":' + dumps(state)
                    + b',"mode":' + dumps(mode) + b',"score":')
            mid = b',"threshold":' + dumps(threshold) + b',"window_end":'
            tail = b',"model":' + dumps(model) + b',"last_event":' + dumps(last_event) + b"}"
            self.fmt = b"%b".join(part.replace(b"%", b"%%")
                                  for part in (head, SCORE_RATIO, mid, tail))
            self.ok = True
        except TypeError:
            self.fmt = b""
            self.ok = False

    def fits(self, state: str, mode: str, threshold: float, model: dict[str, Any],
             last_event: dict[str, Any] | None) -> bool:
        """Whether this is the payload for these. The model and last event are replaced
        whole, never changed in place, so identity says it; the threshold too (equal
        numbers can print apart: 1 and 1.0, 0.0 and -0.0)."""
        return (state is self.state and threshold is self.threshold
                and model is self.model and last_event is self.last_event
                and (mode is self.mode or mode == self.mode))

    def render(self, score: bytes, ratio: bytes, window_end: bytes) -> bytes:
        """The payload for a window: its rounded score, ratio and end, each as JSON."""
        return self.fmt % (score, ratio, window_end)
