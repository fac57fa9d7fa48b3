"""What the topics on a broker carry, and a starter config for them (pure).

`watchkeep discover` listens for a while and hands every message here as
``(arrival, topic, payload)``; this module keeps a small summary per topic
(`TopicStats`: counts per payload shape, numeric fields, timestamps, a few sample
payloads), then proposes a channel per topic (`propose`); `discover_render` prints
the table and the starter YAML. No sockets, files or clock reads: arrival times are parameters.

Payload shapes, and the decoder each maps to (the decoders of agent/core/decode.py):

* ``json scalar``: a JSON object with at least one numeric field -> ``json``
* ``json block``: a JSON object with a list of numbers -> ``json-batch``
* ``plain number``: an ASCII number (a bare JSON number is one too) -> ``text``
* ``other``: anything else (not configured; listed as a comment)

Every proposal is checked by decoding the kept sample payloads with the real
decoder and the proposed channel settings; rejections are written as a comment.
"""

from __future__ import annotations

import itertools
import json
import math
import re
from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

from agent.config.load import ChannelConfig, Decoder
from agent.core.decode import Rejected, decode_message

try:
    import orjson

    def _loads(b: bytes) -> Any:
        return orjson.loads(b)
except ImportError:  # pragma: no cover - orjson is a core dependency
    def _loads(b: bytes) -> Any:
        return json.loads(b)

# Timestamps are unix seconds (DESIGN.md's input contract); fields with these names are
# taken as the message time when their values are plausible (common practice, no source).
TS_NAMES = ("ts", "t", "time", "timestamp", "epoch", "unix_time")
SEQ_NAMES = ("seq", "sequence", "counter", "msg_id", "n")
RATE_NAMES = ("rate_hz", "rate", "fs", "sample_rate", "sampling_rate_hz", "hz")
SPARKPLUG_NAMESPACE = "spBv1.0/"  # Sparkplug B 3.0 topic namespace (protobuf payloads)
MAX_SKEW_S = 300.0  # the decoder's default `ingest.max_clock_skew_s`
MAX_PAYLOAD_BYTES = 262144  # the decoder's default `ingest.max_payload_bytes`
SAMPLES_KEPT = 4  # sample payloads kept from the start and from the end of a topic
MAX_DEPTH = 4  # levels of nested JSON objects searched for fields
_TEXT_NUMBER = re.compile(rb"\s*[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?\s*")



class Shape(StrEnum):
    JSON_SCALAR = "json scalar"
    JSON_BLOCK = "json block"
    PLAIN_NUMBER = "plain number"
    OTHER = "other"


DECODER_OF = {Shape.JSON_SCALAR: Decoder.JSON, Shape.JSON_BLOCK: Decoder.JSON_BATCH,
              Shape.PLAIN_NUMBER: Decoder.TEXT}


@dataclass(frozen=True)
class Parsed:
    """One payload, looked at: its shape, numeric fields (dotted paths) and number lists."""

    shape: Shape
    numbers: dict[str, float] = field(default_factory=dict)
    lists: dict[str, int] = field(default_factory=dict)  # field -> length
    first: float | None = None
    last: float | None = None


def _is_number(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v)


def _walk(doc: dict[str, Any], prefix: str, depth: int, numbers: dict[str, float],
          lists: dict[str, list[Any]]) -> None:
    for k, v in doc.items():
        path = f"{prefix}{k}"
        if _is_number(v):
            numbers[path] = float(v)
        elif isinstance(v, list) and v and all(_is_number(x) for x in v):
            lists[path] = v
        elif isinstance(v, dict) and depth < MAX_DEPTH:
            _walk(v, f"{path}.", depth + 1, numbers, lists)


def parse_payload(payload: bytes) -> Parsed:
    """The shape of one payload and what it holds."""
    if _TEXT_NUMBER.fullmatch(payload):
        v = float(payload)
        if math.isfinite(v):
            return Parsed(Shape.PLAIN_NUMBER, first=v, last=v)
        return Parsed(Shape.OTHER)
    try:
        doc = _loads(payload)
    except ValueError:
        return Parsed(Shape.OTHER)
    if not isinstance(doc, dict):
        return Parsed(Shape.OTHER)
    numbers: dict[str, float] = {}
    lists: dict[str, list[Any]] = {}
    _walk(doc, "", 0, numbers, lists)
    if lists:
        # The longest list holds the samples (a block may also carry short lists).
        key = max(lists, key=lambda k: len(lists[k]))
        vals = lists[key]
        return Parsed(Shape.JSON_BLOCK, numbers, {k: len(v) for k, v in lists.items()},
                      float(vals[0]), float(vals[-1]))
    if numbers:
        return Parsed(Shape.JSON_SCALAR, numbers)
    return Parsed(Shape.OTHER)


@dataclass
class TopicStats:
    """What has been seen on one topic so far."""

    topic: str
    count: int = 0
    shapes: Counter[Shape] = field(default_factory=Counter)
    fields: Counter[str] = field(default_factory=Counter)  # numeric fields, per message
    list_fields: Counter[str] = field(default_factory=Counter)
    values: dict[str, list[float]] = field(default_factory=dict)  # numeric field -> values
    seen_at: dict[str, list[float]] = field(default_factory=dict)  # ... and their arrivals
    list_lengths: dict[str, list[int]] = field(default_factory=dict)
    arrivals: list[float] = field(default_factory=list)
    first_value: float | None = None
    last_value: float | None = None
    head: list[tuple[float, bytes]] = field(default_factory=list)
    tail: list[tuple[float, bytes]] = field(default_factory=list)

    def add(self, arrival: float, payload: bytes) -> None:
        p = parse_payload(payload)
        self.count += 1
        self.shapes[p.shape] += 1
        self.arrivals.append(arrival)
        for k, v in p.numbers.items():
            self.fields[k] += 1
            self.values.setdefault(k, []).append(v)
            self.seen_at.setdefault(k, []).append(arrival)
        for k, n in p.lists.items():
            self.list_fields[k] += 1
            self.list_lengths.setdefault(k, []).append(n)
        if p.first is not None:  # scalars' values: in `propose`, once the field is known
            if self.first_value is None:
                self.first_value = p.first
            self.last_value = p.last
        if len(self.head) < SAMPLES_KEPT:
            self.head.append((arrival, payload))
        else:
            self.tail.append((arrival, payload))
            if len(self.tail) > SAMPLES_KEPT:
                del self.tail[0]

    @property
    def shape(self) -> Shape:
        """The most common shape (ties: the order of `Shape`)."""
        if not self.shapes:
            return Shape.OTHER
        top = max(self.shapes.values())
        return next(s for s in Shape if self.shapes[s] == top)


class Discovery:
    """Every topic's `TopicStats`, fed message by message."""

    def __init__(self) -> None:
        self.topics: dict[str, TopicStats] = {}

    def add(self, arrival: float, topic: str, payload: bytes) -> None:
        st = self.topics.get(topic)
        if st is None:
            st = self.topics[topic] = TopicStats(topic)
        st.add(arrival, payload)

    def add_all(self, messages: Iterable[tuple[float, str, bytes]]) -> None:
        for arrival, topic, payload in messages:
            self.add(arrival, topic, payload)


def per_second(times: Sequence[float]) -> float | None:
    """Events per second from their times: (n - 1) intervals over the span."""
    if len(times) < 2:
        return None
    span = max(times) - min(times)
    return (len(times) - 1) / span if span > 0 else None


def median_rate(times: Sequence[float]) -> float | None:
    """1 / the median interval between consecutive times (robust to a few lost ones)."""
    ts = sorted(times)
    gaps = sorted(b - a for a, b in itertools.pairwise(ts) if b > a)
    if not gaps:
        return None
    return 1.0 / gaps[len(gaps) // 2]


def nice_rate(r: float) -> float:
    """A measured rate rounded to what a sensor is likely set to: a whole number of Hz
    (or of seconds per sample, below 1 Hz) when within 2%, else 3 significant digits
    (common practice, no source)."""
    if r >= 1:
        n = round(r)
        if abs(r - n) <= 0.02 * r:
            return float(n)
    else:
        p = round(1 / r)
        if p >= 1 and abs(1 / r - p) <= 0.02 / r:
            return 1.0 / p
    return float(f"{r:.3g}")


@dataclass(frozen=True)
class Proposal:
    """A channel for one topic, and what had to be guessed (YAML comments)."""

    topic: str
    shape: Shape
    count: int
    msg_rate_hz: float | None
    sample_rate_hz: float | None  # samples per second (blocks: from the rate field or ts)
    decoder: Decoder | None
    settings: dict[str, Any]  # value_field, ts_field, ... (only for configurable topics)
    numeric_fields: tuple[str, ...]
    first_value: float | None
    last_value: float | None
    notes: tuple[str, ...]

    @property
    def usable(self) -> bool:
        return self.decoder is not None and self.sample_rate_hz is not None


def _ts_field(st: TopicStats) -> str | None:
    """A numeric field that holds unix seconds close to the arrival times, in at least
    half of the messages (the rest may be of another shape)."""
    names = sorted(st.fields, key=lambda k: (k.rsplit(".", 1)[-1] not in TS_NAMES, k))
    for k in names:
        vals = st.values[k]
        if 2 * len(vals) < st.count:
            continue
        if all(abs(v - a) <= MAX_SKEW_S for v, a in zip(vals, st.seen_at[k], strict=True)):
            return k
    return None


def _seq_field(st: TopicStats, exclude: set[str]) -> str | None:
    for k in st.fields:
        if k in exclude or k.rsplit(".", 1)[-1] not in SEQ_NAMES:
            continue
        vals = st.values[k]
        if len(vals) >= 2 and all(v.is_integer() for v in vals) and all(
                b > a for a, b in itertools.pairwise(vals)):
            return k
    return None


def fmt(v: float | None) -> str:
    return "-" if v is None else f"{v:.6g}"


def propose(st: TopicStats) -> Proposal:
    """The channel settings for one topic, with a note for everything guessed."""
    notes: list[str] = []
    shape = st.shape
    if len(st.shapes) > 1:
        mix = ", ".join(f"{n} {s.value}" for s, n in st.shapes.most_common())
        notes.append(f"mixed payloads ({mix}); configured for the most common")
    msg_rate = per_second(st.arrivals)
    numeric = tuple(sorted(st.fields))
    decoder = DECODER_OF.get(shape)
    settings: dict[str, Any] = {}
    first, last = st.first_value, st.last_value
    sample_rate: float | None = None
    if decoder is None:
        why = ("a Sparkplug B topic: configure it by hand with decoder sparkplug-b, one "
               "channel per metric of the birth certificate" if st.topic.startswith(
                   SPARKPLUG_NAMESPACE) else "payloads are not numbers watchkeep can decode")
        return Proposal(st.topic, shape, st.count, msg_rate, None, None, {}, numeric,
                        first, last, (why,))
    ts = _timestamp(st, settings, notes)
    times = st.values[ts] if ts else st.arrivals
    if shape is Shape.JSON_BLOCK:
        sample_rate, block_rate = _block_settings(st, ts, times, settings, notes)
        if block_rate is not None:
            msg_rate = block_rate
    else:
        if shape is Shape.JSON_SCALAR:
            picked = _value_field(st, ts, numeric, settings, notes)
            if picked is None:
                return Proposal(st.topic, shape, st.count, msg_rate, None, None, {}, numeric,
                                None, None, (f"no numeric field besides the timestamp {ts!r}",))
            first, last = picked
        r = per_second(times)
        if r is not None:
            msg_rate = r
            sample_rate = nice_rate(r)
    notes.extend(_rate_notes(st, ts, times, msg_rate, sample_rate, settings))
    notes.extend(_check_decoding(st, decoder, sample_rate, settings))
    return Proposal(st.topic, shape, st.count, msg_rate, sample_rate, decoder, settings,
                    numeric, first, last, tuple(notes))


def _timestamp(st: TopicStats, settings: dict[str, Any], notes: list[str]) -> str | None:
    """The payload field the timestamps come from (None: arrival time); its setting."""
    if st.shape is Shape.PLAIN_NUMBER:
        return None
    ts = _ts_field(st)
    if ts is None:
        notes.append("no timestamp field within 300 s of arrival: arrival time is used")
        if "ts" in st.fields:  # the decoder would read it: name a field never sent
            settings["ts_field"] = "arrival_time"
    else:
        if ts.rsplit(".", 1)[-1] not in TS_NAMES:
            notes.append(f"guessed {ts!r} as the timestamp (unix seconds near arrival)")
        settings["ts_field"] = ts
    return ts


def _block_settings(st: TopicStats, ts: str | None, times: Sequence[float],
                    settings: dict[str, Any], notes: list[str]
                    ) -> tuple[float | None, float | None]:
    """A block topic's values field and sample rate (a rate field, else samples over
    time); returns the sample rate and the block rate (None when not measurable)."""
    values_field = max(st.list_fields, key=lambda k: (st.list_fields[k],
                                                      max(st.list_lengths[k])))
    if len(st.list_fields) > 1:
        notes.append(f"several number lists ({', '.join(sorted(st.list_fields))}); "
                     f"took the longest, {values_field!r}")
    settings["values_field"] = values_field
    lengths = st.list_lengths[values_field]
    rate_keys = [k for k in st.fields if k != ts
                 and k.rsplit(".", 1)[-1] in RATE_NAMES and st.fields[k] == st.count]
    msg_rate_t = per_second(times)
    sample_rate: float | None = None
    if rate_keys:
        rk = rate_keys[0]
        rates = Counter(st.values[rk])
        sample_rate = rates.most_common(1)[0][0]
        settings["rate_field"] = rk
        if len(rates) > 1:
            notes.append(f"{rk!r} varies ({', '.join(fmt(r) for r in sorted(rates))}); "
                         "took the most common")
    elif msg_rate_t is not None and len(lengths) >= 2:
        # Samples of every block but the last, over the time from the first block's
        # start to the last block's start.
        span = max(times) - min(times)
        sample_rate = nice_rate(sum(lengths[:-1]) / span) if span > 0 else None
        notes.append("no sample-rate field in the blocks")
    if len(set(lengths)) > 1:
        notes.append(f"block lengths vary ({min(lengths)}-{max(lengths)} samples)")
    return sample_rate, msg_rate_t


def _value_field(st: TopicStats, ts: str | None, numeric: tuple[str, ...],
                 settings: dict[str, Any], notes: list[str]
                 ) -> tuple[float | None, float | None] | None:
    """A scalar topic's value field (and sequence field, if any); returns the first and
    last values seen, or None when no numeric field is left besides the timestamp."""
    candidates = [k for k in numeric if k != ts and st.fields[k] == st.count]
    if not candidates:
        candidates = [k for k in numeric if k != ts]
    if not candidates:
        return None
    seq = _seq_field(st, {ts} if ts else set())
    if seq is not None:
        settings["seq_field"] = seq
        candidates = [k for k in candidates if k != seq] or candidates
    value_field = "value" if "value" in candidates else (
        candidates[0] if candidates else "value")
    if value_field != "value" or len(candidates) > 1:
        others = [k for k in candidates if k != value_field]
        notes.append(f"guessed {value_field!r} as the value"
                     + (f"; other numeric fields: {', '.join(others)}"
                        if others else ""))
    settings["value_field"] = value_field
    vals = st.values.get(value_field, [])
    return (vals[0], vals[-1]) if vals else (None, None)


def _rate_notes(st: TopicStats, ts: str | None, times: Sequence[float],
                msg_rate: float | None, sample_rate: float | None,
                settings: dict[str, Any]) -> list[str]:
    """How the rate was found, or that it was not; irregular arrivals."""
    notes: list[str] = []
    shape = st.shape
    if sample_rate is None:
        notes.append(f"too few messages ({st.count}) to estimate a rate: listen longer")
    elif not (shape is Shape.JSON_BLOCK and settings.get("rate_field") in st.fields):
        span = max(times) - min(times)
        what = "blocks" if shape is Shape.JSON_BLOCK else "messages"
        notes.append(f"rate_hz measured: {len(times)} {what} over {span:.1f} s of "
                     f"{'timestamps' if ts else 'arrival times'} "
                     f"({fmt(msg_rate if shape is not Shape.JSON_BLOCK else sample_rate)} Hz)")
    med = median_rate(times)
    if med is not None and msg_rate is not None and abs(med - msg_rate) > 0.1 * med:
        notes.append(f"irregular: the median interval gives {fmt(med)} messages/s, the "
                     f"span {fmt(msg_rate)}; messages lost or sent in bursts?")
    return notes


def channel_config(name: str, topic: str, decoder: Decoder, rate_hz: float,
                   settings: dict[str, Any]) -> ChannelConfig:
    return ChannelConfig(name=name, topic=topic, decoder=decoder, rate_hz=rate_hz,
                         features=("mean",), **settings)


def _check_decoding(st: TopicStats, decoder: Decoder, rate: float | None,
                    settings: dict[str, Any]) -> list[str]:
    """Decode the kept sample payloads with the proposed settings, as the daemon would."""
    ch = channel_config("probe", st.topic, decoder, rate or 1.0, settings)
    reasons: Counter[str] = Counter()
    samples = st.head + st.tail
    for arrival, payload in samples:
        try:
            decode_message(payload, ch, arrival, max_payload_bytes=MAX_PAYLOAD_BYTES,
                           max_skew_s=MAX_SKEW_S)
        except Rejected as exc:
            reasons[exc.reason.value] += 1
    if not reasons:
        return []
    why = ", ".join(f"{n} {r}" for r, n in reasons.most_common())
    return [f"WARNING: {sum(reasons.values())} of {len(samples)} sample messages were "
            f"rejected with these settings ({why})"]
