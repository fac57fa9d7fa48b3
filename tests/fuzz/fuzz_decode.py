"""Fuzz targets `decode-json`, `decode-json-batch`, `decode-text`: one payload through
`agent.core.decode.decode_message` with a channel config of that decoder.

Input: the first byte picks the channel config (the demo plant's channels of that
decoder, then variants with dotted field paths and a sequence field), the rest is
the payload. The contract (DESIGN.md "Input", decode.py): a payload gives finite
samples stamped within `max_clock_skew_s` of arrival (a block: its first and last
sample, a rate within the channel's tolerance, times in order), or a `Rejected` with a
`Reason`; never another exception.
"""

from __future__ import annotations

import functools
import math
from pathlib import Path
from typing import Any

import numpy as np
from hypothesis import strategies as st

from agent.config.load import ChannelConfig, Decoder, parse_config
from agent.core.decode import RATE_TOLERANCE, Block, Reason, Rejected, decode_message
from tests.fuzz.common import (
    MAX_PAYLOAD_BYTES,
    NOW,
    SKEW_S,
    awkward_numbers,
    demo_config,
    first_per_topic,
    json_bytes,
    json_values,
    times,
)
from tests.fuzz.harness import Finding, Target, check

# Channel variants beside the demo's: every configurable field name, dotted paths.
_VARIANTS: dict[Decoder, list[dict[str, Any]]] = {
    Decoder.JSON: [
        {"rate_hz": 10, "ts_field": "meta.t", "value_field": "data.v", "seq_field": "meta.n"},
        {"rate_hz": 0.2, "seq_field": "seq"},
    ],
    Decoder.JSON_BATCH: [
        {"rate_hz": 10, "values_field": "data.values", "rate_field": "meta.fs",
         "ts_field": "meta.t0", "seq_field": "meta.n"},
        {"rate_hz": 25600},
    ],
    Decoder.TEXT: [{"rate_hz": 50}],
}


@functools.cache
def channels(decoder: Decoder) -> tuple[ChannelConfig, ...]:
    """The demo plant's channels of `decoder`, then the variants (through the loader)."""
    demo = [c for a in demo_config().assets for c in a.channels if c.decoder is decoder]
    chans = {f"v{i}": {"topic": f"fuzz/v{i}", "decoder": decoder.value, "features": ["mean"],
                       **doc} for i, doc in enumerate(_VARIANTS[decoder])}
    cfg = parse_config({"site": "fz", "gateway": "gw",
                        "assets": [{"name": "A", "channels": chans}]}, Path("."))
    return (*demo, *cfg.assets[0].channels)


def check_decoded(payload: bytes, ch: ChannelConfig, arrival: float = NOW) -> None:
    """The decoder's contract for one payload of channel `ch` (module docstring)."""
    try:
        samples, seq = decode_message(payload, ch, arrival, max_payload_bytes=MAX_PAYLOAD_BYTES,
                                      max_skew_s=SKEW_S)
    except Rejected as rej:
        check(isinstance(rej.reason, Reason), f"rejection without a Reason: {rej!r}")
        return
    check(seq is None or type(seq) is int, f"sequence number {seq!r}")
    if isinstance(samples, Block):
        check(ch.decoder is Decoder.JSON_BATCH, f"a block from a {ch.decoder} channel")
        n = len(samples)
        check(n >= 1, "an empty block")
        rate = samples.rate_hz
        check(type(rate) is float and math.isfinite(rate) and rate > 0
              and abs(rate - ch.rate_hz) <= RATE_TOLERANCE * ch.rate_hz * (1 + 1e-12),
              f"block rate {rate!r} for a {ch.rate_hz} Hz channel")
        ts, values = samples.arrays()
        check(bool(np.all(np.isfinite(values))), "a non-finite sample value")
        check(bool(np.all(np.isfinite(ts))), "a non-finite sample time")
        check(abs(ts[0] - arrival) <= SKEW_S and abs(ts[-1] - arrival) <= SKEW_S,
              f"block spans {ts[0] - arrival:+.3g}..{ts[-1] - arrival:+.3g} s from arrival")
        check(bool(np.all(np.diff(ts) >= 0)), "block times out of order")
        check(samples.time_of(n - 1) == ts[-1], "Block.time_of disagrees with arrays()")
        return
    ts, value = samples
    check(type(ts) is float and math.isfinite(ts) and abs(ts - arrival) <= SKEW_S,
          f"reading stamped {ts!r}")
    check(type(value) is float and math.isfinite(value), f"reading value {value!r}")


def _one_input(decoder: Decoder) -> Any:
    def one_input(data: bytes) -> None:
        if not data:
            return
        chans = channels(decoder)
        check_decoded(data[1:], chans[data[0] % len(chans)])
    return one_input


def _seeds(decoder: Decoder) -> Any:
    def seeds() -> list[bytes]:
        chans = channels(decoder)
        by_topic = {c.topic: i for i, c in enumerate(chans)}
        out = [bytes([by_topic[t]]) + p for t, p in first_per_topic() if t in by_topic]
        # the variants' shapes, and the documented examples (DESIGN.md "Input")
        for i, c in enumerate(chans):
            if c.topic.startswith("fuzz/"):
                out.append(bytes([i]) + _doc_for(c, NOW, 1.5, [0.1, 0.2, 0.3]))
        out.append(bytes([0]) + b"23.5")
        return out
    return seeds


def _put(doc: dict[str, Any], dotted: str, value: Any) -> None:
    *head, last = dotted.split(".")
    for part in head:
        doc = doc.setdefault(part, {})
    doc[last] = value


def _doc_for(ch: ChannelConfig, ts: Any, value: Any, values: Any, rate: Any = None,
             seq: Any = 7) -> bytes:
    """A payload of channel `ch`'s shape (its field names)."""
    if ch.decoder is Decoder.TEXT:
        return str(value).encode()
    doc: dict[str, Any] = {}
    if ts is not ...:
        _put(doc, ch.ts_field, ts)
    if ch.decoder is Decoder.JSON:
        _put(doc, ch.value_field, value)
    else:
        _put(doc, ch.values_field, values)
        _put(doc, ch.rate_field, ch.rate_hz if rate is None else rate)
    if ch.seq_field:
        _put(doc, ch.seq_field, seq)
    return json_bytes(doc)


def _strategy(decoder: Decoder) -> Any:
    """Payloads of the channel's own shape with awkward values in every field, and
    arbitrary JSON and text: what byte mutation seldom makes (5e-324 as a rate)."""
    chans = channels(decoder)
    pick = st.integers(min_value=0, max_value=len(chans) - 1)
    values = st.one_of(
        st.lists(st.floats(min_value=-1e3, max_value=1e3), min_size=1, max_size=300),
        st.lists(awkward_numbers, max_size=8),
        st.integers(min_value=1, max_value=4000).map(lambda n: [0.5] * n),
        json_values)
    rates = st.one_of(st.none(), awkward_numbers,
                      st.floats(min_value=0.5, max_value=1.5))  # a fraction of the channel's

    @st.composite
    def shaped(draw: Any) -> bytes:
        i = draw(pick)
        ch = chans[i]
        rate = draw(rates)
        if isinstance(rate, float) and 0.5 <= rate <= 1.5:
            rate *= ch.rate_hz
        if ch.decoder is Decoder.TEXT:
            text = draw(st.one_of(
                awkward_numbers.map(str),
                st.text(alphabet="0123456789.eE+-_ \t\nnaifINFNA", max_size=12)))
            return bytes([i]) + text.encode("utf-8", "replace")
        return bytes([i]) + _doc_for(ch, draw(st.one_of(times, st.just(...))),
                                     draw(awkward_numbers), draw(values), rate,
                                     draw(st.one_of(st.integers(), awkward_numbers)))

    raw = st.tuples(pick, st.one_of(json_values.map(json_bytes), st.binary(max_size=64))
                    ).map(lambda t: bytes([t[0]]) + t[1])
    return st.one_of(shaped(), raw)


def _target(name: str, decoder: Decoder, examples: int) -> Target:
    return Target(name, _one_input(decoder), _seeds(decoder), lambda: _strategy(decoder),
                  examples=examples, max_len=32768)


TARGETS = {
    "decode-json": _target("decode-json", Decoder.JSON, 300),
    "decode-json-batch": _target("decode-json-batch", Decoder.JSON_BATCH, 300),
    "decode-text": _target("decode-text", Decoder.TEXT, 200),
}
__all__ = ["TARGETS", "Finding", "channels", "check_decoded"]
