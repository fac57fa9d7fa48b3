"""Decoders: json (dotted fields), json-batch, text, and every rejection reason."""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from agent.config.load import ChannelConfig, Decoder
from agent.core.decode import Reason, Rejected, decode

ARRIVAL = 1_796_119_200.0  # 2026-12-01T10:00:00Z, the "now" of every test
MAX_BYTES = 4096
MAX_SKEW_S = 300.0


def channel(decoder: Decoder = Decoder.JSON, **kw: str | float) -> ChannelConfig:
    fields = {"rate_hz": 10.0, **kw}
    rate = float(fields.pop("rate_hz"))
    return ChannelConfig("ch", "plant/X/ch", decoder, rate, ("mean",), **fields)  # type: ignore[arg-type]


JSON = channel()
BATCH = channel(Decoder.JSON_BATCH, rate_hz=100.0)
TEXT = channel(Decoder.TEXT)


def run(payload: bytes, ch: ChannelConfig = JSON, arrival: float = ARRIVAL):
    return decode(payload, ch, arrival, max_payload_bytes=MAX_BYTES, max_skew_s=MAX_SKEW_S)


def reason_of(payload: bytes, ch: ChannelConfig) -> Reason:
    with pytest.raises(Rejected) as info:
        run(payload, ch)
    return info.value.reason


# --- accepted --------------------------------------------------------------------------

@pytest.mark.parametrize(("ch", "payload", "expected"), [
    (JSON, b'{"ts": 1796119199.5, "value": 23.5}', (1796119199.5, 23.5)),
    (JSON, b'{"ts": 1796119199, "value": -4}', (1796119199.0, -4.0)),
    (JSON, b'{"value": 23.5}', (ARRIVAL, 23.5)),
    (JSON, b'{"ts": null, "value": 1.0}', (ARRIVAL, 1.0)),
    (JSON, b"23.5", (ARRIVAL, 23.5)),
    (JSON, b'{"value": 1e30}', (ARRIVAL, 1e30)),
    (channel(ts_field="meta.time", value_field="reading.temp_c"),
     b'{"meta": {"time": 1796119190.25}, "reading": {"temp_c": 61.5, "unit": "C"}}',
     (1796119190.25, 61.5)),
    (channel(value_field="a.b.c"), b'{"a": {"b": {"c": 7}}}', (ARRIVAL, 7.0)),
    (TEXT, b"23.5", (ARRIVAL, 23.5)),
    (TEXT, b" -1.25e2\n", (ARRIVAL, -125.0)),
    (TEXT, b"+.5", (ARRIVAL, 0.5)),
    (TEXT, b"7", (ARRIVAL, 7.0)),
])
def test_single_readings_decode(ch: ChannelConfig, payload: bytes, expected) -> None:
    """A good single reading gives (ts, value); a missing ts means arrival time."""
    ts, v = run(payload, ch)
    assert isinstance(ts, float) and isinstance(v, float)
    assert (ts, v) == expected


def test_text_time_is_arrival_time_even_if_it_looks_like_a_timestamp() -> None:
    """The text decoder has no ts field: time is arrival time."""
    assert run(b"1796119000", TEXT, arrival=ARRIVAL + 3) == (ARRIVAL + 3, 1796119000.0)


def test_batch_timestamps_are_first_plus_i_over_rate() -> None:
    """json-batch sample i is at ts + i / rate_hz, with the payload's rate (within 10 %
    of the channel's)."""
    payload = json.dumps({"ts": ARRIVAL - 1.0, "rate_hz": 102.4,
                          "values": [0.5, -0.5, 1, 2, 3]}).encode()
    t, v = run(payload, BATCH)
    np.testing.assert_array_equal(v, [0.5, -0.5, 1.0, 2.0, 3.0])
    np.testing.assert_allclose(t, ARRIVAL - 1.0 + np.arange(5) / 102.4, rtol=0, atol=1e-9)
    assert t.dtype == np.float64 and v.dtype == np.float64


def test_batch_without_rate_uses_the_channel_rate_and_without_ts_arrival() -> None:
    """No rate in the payload: the configured rate; no ts: arrival time."""
    t, v = run(b'{"values": [1, 2, 3, 4]}', BATCH)
    np.testing.assert_allclose(t, ARRIVAL + np.arange(4) / 100.0, rtol=0, atol=1e-9)
    assert v.tolist() == [1.0, 2.0, 3.0, 4.0]


def test_batch_with_renamed_dotted_fields() -> None:
    """values_field, rate_field and ts_field take dotted paths too."""
    ch = channel(Decoder.JSON_BATCH, ts_field="hdr.t0", rate_field="hdr.fs",
                 values_field="data.accel", rate_hz=2.0)
    payload = json.dumps({"hdr": {"t0": ARRIVAL, "fs": 2.0}, "data": {"accel": [1.0, 2.0]}})
    t, v = run(payload.encode(), ch)
    assert t.tolist() == [ARRIVAL, ARRIVAL + 0.5] and v.tolist() == [1.0, 2.0]


@given(st.lists(st.floats(allow_nan=False, allow_infinity=False, width=64), min_size=1,
                max_size=200),
       st.floats(min_value=90.0, max_value=110.0),
       st.floats(min_value=-MAX_SKEW_S, max_value=MAX_SKEW_S - 3.0))
def test_batch_round_trips_any_finite_block(values: list[float], rate: float,
                                            offset: float) -> None:
    """Any finite block at a rate within 10 % of the channel's 100 Hz survives the JSON
    round trip exactly, evenly spaced."""
    payload = json.dumps({"ts": ARRIVAL + offset, "rate_hz": rate, "values": values}).encode()
    t, v = decode(payload, BATCH, ARRIVAL, max_payload_bytes=1 << 20, max_skew_s=MAX_SKEW_S)
    assert v.tolist() == values
    np.testing.assert_allclose(t, ARRIVAL + offset + np.arange(len(values)) / rate,
                               rtol=0, atol=1e-6)


# --- rejected --------------------------------------------------------------------------

REJECTIONS = [
    # malformed: not JSON, not a number, no value field
    (JSON, b"{not json", Reason.MALFORMED),
    (JSON, b"", Reason.MALFORMED),
    (JSON, b"\xff\xfe\x00", Reason.MALFORMED),
    (JSON, b'{"val": 1.0}', Reason.MALFORMED),
    (channel(value_field="reading.temp_c"), b'{"reading": {"temp": 1.0}}', Reason.MALFORMED),
    (TEXT, b"hot", Reason.MALFORMED),
    (TEXT, b"1_000", Reason.MALFORMED),  # Python's float() would take it; publishers don't
    (TEXT, b"0x1A", Reason.MALFORMED),
    (TEXT, b"23.5 C", Reason.MALFORMED),
    (TEXT, b"23,5", Reason.MALFORMED),
    (TEXT, "٣".encode(), Reason.MALFORMED),  # an Arabic-Indic digit: not ASCII
    (TEXT, b"", Reason.MALFORMED),
    # wrong_type: a number was expected
    (JSON, b'{"value": "hot"}', Reason.WRONG_TYPE),
    (JSON, b'{"value": "23.5"}', Reason.WRONG_TYPE),
    (JSON, b'{"value": true}', Reason.WRONG_TYPE),
    (JSON, b'{"value": null}', Reason.WRONG_TYPE),
    (JSON, b'{"value": [1, 2]}', Reason.WRONG_TYPE),
    (JSON, b'{"value": {"v": 1}}', Reason.WRONG_TYPE),
    (JSON, b'{"ts": "2026-12-01T10:00:00Z", "value": 1}', Reason.WRONG_TYPE),
    (JSON, b'{"ts": true, "value": 1}', Reason.WRONG_TYPE),
    (JSON, b'"23.5"', Reason.WRONG_TYPE),
    (JSON, b"[1, 2]", Reason.WRONG_TYPE),
    (JSON, b"true", Reason.WRONG_TYPE),
    (JSON, b"null", Reason.WRONG_TYPE),
    (BATCH, b'{"values": []}', Reason.WRONG_TYPE),
    (BATCH, b'{"values": 3.0}', Reason.WRONG_TYPE),
    (BATCH, b'{"samples": [1, 2]}', Reason.WRONG_TYPE),
    (BATCH, b'{"values": [1, "2"]}', Reason.WRONG_TYPE),
    (BATCH, b'{"values": ["1.5", "2.5"]}', Reason.WRONG_TYPE),
    (BATCH, b'{"values": [1.5, true]}', Reason.WRONG_TYPE),
    (BATCH, b'{"values": [1.0, null]}', Reason.WRONG_TYPE),
    (BATCH, b'{"values": [[1, 2], [3, 4]]}', Reason.WRONG_TYPE),
    (BATCH, b'{"values": [[1], [2, 3]]}', Reason.WRONG_TYPE),
    (BATCH, b'{"values": [{"v": 1}]}', Reason.WRONG_TYPE),
    (BATCH, b'{"values": [1, 2], "rate_hz": 0}', Reason.BAD_RATE),
    (BATCH, b'{"values": [1, 2], "rate_hz": -10}', Reason.BAD_RATE),
    (BATCH, b'{"values": [1, 2], "rate_hz": "fast"}', Reason.WRONG_TYPE),
    # bad_rate: not within 10 % of the channel's 100 Hz (issue 20, finding 1: 5e-324
    # put the second sample at +infinity and stopped every asset)
    (BATCH, b'{"values": [1, 2], "rate_hz": 5e-324}', Reason.BAD_RATE),
    (BATCH, b'{"values": [1, 2], "rate_hz": 1e-300}', Reason.BAD_RATE),
    (BATCH, b'{"values": [1, 2], "rate_hz": 1e308}', Reason.BAD_RATE),
    (BATCH, b'{"values": [1, 2], "rate_hz": 89.9}', Reason.BAD_RATE),
    (BATCH, b'{"values": [1, 2], "rate_hz": 110.1}', Reason.BAD_RATE),
    (BATCH, b'{"values": [1, 2], "rate_hz": -0.0}', Reason.BAD_RATE),
    # malformed: nesting past the parsers' depth (was a RecursionError, issue 20)
    (JSON, b"[" * 4000, Reason.MALFORMED),
    (BATCH, b'{"values": ' + b"[" * 4000, Reason.MALFORMED),
    (BATCH, b"[1, 2, 3]", Reason.WRONG_TYPE),
    (BATCH, b"5", Reason.WRONG_TYPE),
    # non_finite: the NaN/Infinity literals some publishers send, and overflow
    (JSON, b'{"value": NaN}', Reason.NON_FINITE),
    (JSON, b'{"value": Infinity}', Reason.NON_FINITE),
    (JSON, b'{"value": -Infinity}', Reason.NON_FINITE),
    (JSON, b'{"value": 1e400}', Reason.NON_FINITE),
    (JSON, b'{"value": 1' + b"0" * 400 + b"}", Reason.NON_FINITE),
    (JSON, b"NaN", Reason.NON_FINITE),
    (JSON, b'{"ts": NaN, "value": 1.0}', Reason.NON_FINITE),
    (BATCH, b'{"values": [1.0, NaN, 2.0]}', Reason.NON_FINITE),
    (BATCH, b'{"values": [Infinity]}', Reason.NON_FINITE),
    (BATCH, b'{"values": [-1e999]}', Reason.NON_FINITE),
    (BATCH, b'{"values": [1' + b"0" * 400 + b"]}", Reason.NON_FINITE),
    (BATCH, b'{"values": [1, 2], "rate_hz": Infinity}', Reason.NON_FINITE),
    (TEXT, b"NaN", Reason.NON_FINITE),
    (TEXT, b"nan", Reason.NON_FINITE),
    (TEXT, b"Infinity", Reason.NON_FINITE),
    (TEXT, b"-inf", Reason.NON_FINITE),
    (TEXT, b"1e400", Reason.NON_FINITE),
    # clock_skew: a timestamp too far from arrival, either way; a block's last sample too
    (channel(Decoder.JSON_BATCH, rate_hz=1.0),
     f'{{"ts": {ARRIVAL - 10}, "values": {[0] * 1000}}}'.encode(), Reason.CLOCK_SKEW),
    # clock_skew: a timestamp too far from arrival, either way
    (JSON, f'{{"ts": {ARRIVAL + MAX_SKEW_S + 1}, "value": 1}}'.encode(), Reason.CLOCK_SKEW),
    (JSON, f'{{"ts": {ARRIVAL - MAX_SKEW_S - 1}, "value": 1}}'.encode(), Reason.CLOCK_SKEW),
    (JSON, b'{"ts": 4102444800, "value": 40.0}', Reason.CLOCK_SKEW),  # the year 2100
    (JSON, b'{"ts": 1796119200000, "value": 40.0}', Reason.CLOCK_SKEW),  # milliseconds
    (JSON, b'{"ts": 0, "value": 40.0}', Reason.CLOCK_SKEW),
    (BATCH, f'{{"ts": {ARRIVAL + 3600}, "values": [1]}}'.encode(), Reason.CLOCK_SKEW),
]


@pytest.mark.parametrize(("ch", "payload", "reason"), REJECTIONS)
def test_rejections_name_their_reason(ch: ChannelConfig, payload: bytes, reason: Reason) -> None:
    """Each unusable payload is rejected with the reason the metrics count it under."""
    assert reason_of(payload, ch) is reason


def test_every_decoder_reason_is_covered() -> None:
    """The table exercises every reason the decoders themselves can give."""
    # routing, windows, the time-base guard, and the sparkplug-b decoder's own
    # (test_sparkplug.py)
    decoder_reasons = set(Reason) - {Reason.UNKNOWN_TOPIC, Reason.LATE, Reason.AHEAD,
                                     Reason.NO_BIRTH, Reason.UNKNOWN_ALIAS}
    covered = {r for _, _, r in REJECTIONS} | {Reason.TOO_LARGE}
    assert covered == decoder_reasons


@pytest.mark.parametrize("ch", [JSON, BATCH, TEXT])
def test_too_large_is_checked_before_parsing(ch: ChannelConfig) -> None:
    """A payload over the limit is too_large whatever it holds; at the limit it is read."""
    assert reason_of(b"x" * (MAX_BYTES + 1), ch) is Reason.TOO_LARGE
    assert reason_of(b" " * MAX_BYTES + b"{", ch) is Reason.TOO_LARGE
    at_limit = {JSON: b'{"value": 1}', BATCH: b'{"values": [1]}', TEXT: b"1"}[ch]
    run(at_limit.ljust(MAX_BYTES), ch)


def test_skew_boundary_is_inclusive() -> None:
    """A timestamp exactly max_skew_s away is still accepted."""
    for ts in (ARRIVAL + MAX_SKEW_S, ARRIVAL - MAX_SKEW_S):
        assert run(json.dumps({"ts": ts, "value": 1}).encode())[0] == ts


def test_rejected_carries_reason_and_detail() -> None:
    """The exception's text starts with the reason and names the field."""
    with pytest.raises(Rejected) as info:
        run(b'{"value": "hot"}')
    assert str(info.value).startswith("wrong_type: ")
    assert "value" in info.value.detail


@given(st.binary(max_size=300))
@pytest.mark.parametrize("ch", [JSON, BATCH, TEXT])
def test_arbitrary_bytes_never_raise_anything_but_rejected(ch: ChannelConfig,
                                                           payload: bytes) -> None:
    """Whatever arrives, a decoder returns finite samples or raises Rejected."""
    try:
        ts, v = run(payload, ch)
    except Rejected:
        return
    assert np.all(np.isfinite(np.asarray(v))) and np.all(np.isfinite(np.asarray(ts)))


@given(st.recursive(st.none() | st.booleans() | st.floats() | st.integers() | st.text(max_size=5),
                    lambda kids: st.lists(kids, max_size=4)
                    | st.dictionaries(st.sampled_from(["ts", "value", "values", "rate_hz"]),
                                      kids, max_size=4),
                    max_leaves=12))
@pytest.mark.parametrize("ch", [JSON, BATCH])
def test_arbitrary_json_never_raises_anything_but_rejected(ch: ChannelConfig, doc) -> None:
    """Any JSON document (NaN literals included) decodes to finite samples or is Rejected."""
    payload = json.dumps(doc).encode()
    try:
        ts, v = decode(payload, ch, ARRIVAL, max_payload_bytes=1 << 20, max_skew_s=1e12)
    except Rejected:
        return
    assert np.all(np.isfinite(np.asarray(v))) and np.all(np.isfinite(np.asarray(ts)))


@pytest.mark.parametrize("ch", [JSON, BATCH])
def test_deep_nesting_is_malformed_whatever_the_recursion_limit(ch: ChannelConfig) -> None:
    """JSON nested past orjson's depth limit is malformed even when something in the
    process has raised the interpreter's recursion limit (the stdlib parser would then
    read it, and the payload would count as a wrong type instead)."""
    import sys

    deep = b'{"ts": ' * 1500 + b"1" + b"}" * 1500  # past orjson's 1,024 levels
    was = sys.getrecursionlimit()
    sys.setrecursionlimit(50_000)
    try:
        with pytest.raises(Rejected) as info:
            decode(deep, ch, ARRIVAL, max_payload_bytes=1 << 20, max_skew_s=MAX_SKEW_S)
        assert info.value.reason is Reason.MALFORMED
    finally:
        sys.setrecursionlimit(was)
