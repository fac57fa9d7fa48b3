"""Payload decoders: bytes in, (timestamps, values) out, or a `Rejected` with its reason.

Pure: the arrival time is a parameter. Decoders follow the input contract in
DESIGN.md: `json` (one reading), `json-batch` (evenly spaced block) and `text`.

No numpy at import: the ingest child (agent/ingest/child.py) decodes with this module
and stays small. A block comes out of `decode_message` as a `Block` (first time, rate,
values in an `array('d')`); `Block.arrays` makes the numpy arrays where numpy is loaded
anyway (the daemon, thread-mode ingest, `decode`).
"""

from __future__ import annotations

import json
import math
import re
from array import array
from collections.abc import Callable, Sequence
from enum import StrEnum
from typing import TYPE_CHECKING, Any

from agent.config.schema import ChannelConfig, Decoder

if TYPE_CHECKING:
    import numpy as np

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
    # sparkplug-b (agent/core/sparkplug.py)
    NO_BIRTH = "no_birth"            # data before the birth certificate it needs
    UNKNOWN_ALIAS = "unknown_alias"  # a metric its birth certificate did not declare
    # A json-batch block whose rate is not a positive finite number within
    # `RATE_TOLERANCE` of the channel's configured `rate_hz`.
    BAD_RATE = "bad_rate"
    # A message whose newest sample is far ahead of the channel's time base (the window
    # cursor guard, agent/core/timebase.py); counted by the daemon, not by the decoder.
    AHEAD = "ahead"


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

# How far a json-batch block's own `rate_hz` may be from the channel's configured rate,
# as a fraction of it. Windows count coverage against the configured rate, so a block
# at another rate would over- or under-fill them anyway; 10 % leaves room for a
# device that reports its measured rate (crystal tolerances are ~100 ppm) or a
# rounded one (25.6 kHz reported as 25000), and refuses every absurd rate (0,
# negative, 5e-324, 1e308) that would put sample times at infinity or all on one
# instant. Common practice, no source.
RATE_TOLERANCE = 0.10


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
    except _JSON_ERRORS as exc:
        # orjson refuses the NaN/Infinity literals that some publishers send, and numbers
        # past float range; the stdlib parser reads them, so they are counted as
        # non-finite, not as malformed. Nesting past orjson's depth limit (1,024) is
        # malformed here and now: whether the stdlib parser would read it depends on the
        # interpreter's recursion limit, which other code in the process may have raised.
        if "depth limit" in str(exc):
            raise Rejected(Reason.MALFORMED, "JSON nested too deeply") from None
    try:
        return json.loads(payload)
    except (ValueError, UnicodeDecodeError) as exc:
        raise Rejected(Reason.MALFORMED, str(exc)[:120]) from None
    except RecursionError:  # nesting deeper than the stdlib parser's recursion limit
        raise Rejected(Reason.MALFORMED, "JSON nested too deeply") from None


def _timestamp(doc: dict[str, Any], ch: ChannelConfig, arrival: float,
               max_skew_s: float) -> float:
    raw = _field(doc, ch.ts_field)
    if raw is _MISSING or raw is None:
        return arrival
    ts = _number(raw, ch.ts_field)
    if abs(ts - arrival) > max_skew_s:
        raise Rejected(Reason.CLOCK_SKEW, f"ts {ts:.3f} is {ts - arrival:+.0f} s from now")
    return ts


class Block:
    """An evenly spaced block of samples: sample k at `t0 + k / rate_hz`."""

    __slots__ = ("rate_hz", "t0", "values")

    def __init__(self, t0: float, rate_hz: float, values: array[float]) -> None:
        self.t0 = t0
        self.rate_hz = rate_hz
        self.values = values  # typecode 'd', every value finite

    def __len__(self) -> int:
        return len(self.values)

    def __repr__(self) -> str:
        return f"Block(t0={self.t0!r}, rate_hz={self.rate_hz!r}, n={len(self.values)})"

    def time_of(self, k: int) -> float:
        """Sample k's time, bit for bit what `arrays` gives for it."""
        return self.t0 + float(k) / self.rate_hz

    def arrays(self) -> tuple[np.ndarray, np.ndarray]:
        """(timestamps, values) as float64 arrays; the values share the block's memory."""
        import numpy as np  # only where numpy is loaded anyway (see the module docstring)

        return (block_timestamps(self.t0, self.rate_hz, len(self.values)),
                np.frombuffer(self.values, dtype=np.float64))


def block_timestamps(t0: float, rate_hz: float, n: int) -> np.ndarray:
    """The timestamps of an n-sample block, sample k at `t0 + k / rate_hz`."""
    import numpy as np

    return t0 + np.arange(n, dtype=np.float64) / rate_hz


def blocks_timestamps(t0s: Sequence[float], rates_hz: Sequence[float],
                      sizes: Sequence[int]) -> np.ndarray:
    """`block_timestamps` of several blocks, concatenated, in one pass (the daemon, for a
    batch of blocks from the ingest child). Bit for bit the same: k is exact in float64,
    and each time is one division and one addition, as there."""
    import numpy as np

    n = np.asarray(sizes, dtype=np.int64)
    k = np.arange(int(n.sum()), dtype=np.float64) - np.repeat(np.cumsum(n) - n, n)
    return (np.repeat(np.asarray(t0s, dtype=np.float64), n)
            + k / np.repeat(np.asarray(rates_hz, dtype=np.float64), n))


Reading = tuple[float, float]
Samples = tuple[float, float] | tuple["np.ndarray", "np.ndarray"]


def decode(payload: bytes, ch: ChannelConfig, arrival: float, *, max_payload_bytes: int,
           max_skew_s: float) -> Samples:
    """Decode one message of channel `ch`.

    Returns `(ts, value)` floats for a single reading, or `(ts_array, values_array)`
    for a block. Raises `Rejected` for anything unusable.
    """
    samples = decode_message(payload, ch, arrival, max_payload_bytes=max_payload_bytes,
                             max_skew_s=max_skew_s)[0]
    return samples.arrays() if isinstance(samples, Block) else samples


def sequence_number(doc: Any, ch: ChannelConfig) -> int | None:
    """The sensor's own message counter (`ch.seq_field`), when it sends a whole number."""
    if not ch.seq_field or not isinstance(doc, dict):
        return None
    v = _field(doc, ch.seq_field)
    return v if isinstance(v, int) and not isinstance(v, bool) else None


def decode_message(payload: bytes, ch: ChannelConfig, arrival: float, *,
                   max_payload_bytes: int, max_skew_s: float
                   ) -> tuple[Reading | Block, int | None]:
    """`decode`, but a block as a `Block` (no numpy), plus the message's sequence number
    when the channel names one."""
    samples, doc = _decode(payload, ch, arrival, max_payload_bytes, max_skew_s)
    return samples, sequence_number(doc, ch)


def _decode(payload: bytes, ch: ChannelConfig, arrival: float, max_payload_bytes: int,
            max_skew_s: float) -> tuple[Reading | Block, Any]:
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
    return _block(payload, doc, ch, ts, arrival, max_skew_s), doc


def _block(payload: bytes, doc: dict[str, Any], ch: ChannelConfig, ts: float, arrival: float,
           max_skew_s: float) -> Block:
    """A `json-batch` document's block: a flat list of finite numbers at the channel's
    rate (within `RATE_TOLERANCE`), its span within the clock skew of arrival."""
    values = _field(doc, ch.values_field)
    if not isinstance(values, list) or not values:
        raise Rejected(Reason.WRONG_TYPE, f"{ch.values_field!r} is not a non-empty list")
    rate_raw = _field(doc, ch.rate_field)
    rate = ch.rate_hz if rate_raw is _MISSING or rate_raw is None \
        else _number(rate_raw, ch.rate_field)
    if not abs(rate - ch.rate_hz) <= RATE_TOLERANCE * ch.rate_hz:
        raise Rejected(Reason.BAD_RATE, f"{ch.rate_field} {rate!r} is not within "
                       f"{RATE_TOLERANCE:.0%} of the channel's {ch.rate_hz:g} Hz")
    # Only numbers: array('d') refuses strings, null, lists and objects (TypeError), but
    # would take true as 1.0; a single reading that is a bool is a wrong type, so a block
    # element is one too. JSON makes a bool only from a `true` or `false` literal, so the
    # element types are looked at (4-5 us per 256 samples) only when the payload holds one.
    not_numbers = f"{ch.values_field!r} is not a flat list of numbers"
    if _may_hold_bool(payload) and not _all_numbers(values):
        raise Rejected(Reason.WRONG_TYPE, not_numbers)
    try:
        arr = array("d", values)
    except TypeError:
        raise Rejected(Reason.WRONG_TYPE, not_numbers) from None
    except OverflowError:  # an integer literal beyond float range (or a wrong type after it)
        if not _all_numbers(values):
            raise Rejected(Reason.WRONG_TYPE, not_numbers) from None
        raise Rejected(Reason.NON_FINITE, f"{ch.values_field!r} overflows") from None
    if not _sum_is_finite(values):
        # A NaN or infinity makes the sum non-finite, but so can finite values adding
        # up past the float range: only then look at each one.
        bad = sum(1 for v in arr if not math.isfinite(v))
        if bad:
            raise Rejected(Reason.NON_FINITE, f"{bad} samples")
    block = Block(ts, rate, arr)
    if len(arr) > 1:
        # The block's span is bounded like its first time: its last sample must be
        # within the clock skew of arrival too (so a block spans at most 2 x skew).
        last = block.time_of(len(arr) - 1)
        if not abs(last - arrival) <= max_skew_s:
            raise Rejected(Reason.CLOCK_SKEW, f"the block's last sample is "
                           f"{last - arrival:+.0f} s from now")
    return block


def _may_hold_bool(payload: bytes) -> bool:
    """False only when the JSON text has no `true` or `false` literal, so no bool in it."""
    if not isinstance(payload, bytes | bytearray):
        return True  # `b"true" in memoryview(...)` compares single bytes: always False
    return b"true" in payload or b"false" in payload


def _all_numbers(values: list[Any]) -> bool:
    """Every element an int or a float (not a bool, which is an int subclass)."""
    return set(map(type, values)) <= _NUMBER_TYPES


def _sum_is_finite(values: list[int | float]) -> bool:
    """True when the sum of `values` is finite, which they all are then (a sum with a NaN
    or an infinity in it never is); False may also mean the sum overflowed."""
    try:
        return math.isfinite(sum(values))
    except OverflowError:  # whole numbers adding up past the float range
        return False
