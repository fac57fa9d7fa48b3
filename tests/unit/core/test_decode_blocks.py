"""json-batch blocks decoded without numpy: the same verdicts, values and timestamps as
the numpy decoder the daemon had before (kept below as the reference), bit for bit."""

from __future__ import annotations

import json
import math
from array import array
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.config.load import ChannelConfig, Decoder
from agent.core.decode import (
    Block,
    Rejected,
    _loads_relaxed,
    block_timestamps,
    blocks_timestamps,
    decode,
    decode_message,
)

ARRIVAL = 1_796_119_200.0
BATCH = ChannelConfig("acc", "plant/X/acc", Decoder.JSON_BATCH, 2560.0, ("rms",))
LIMITS: dict[str, Any] = {"max_payload_bytes": 1 << 20, "max_skew_s": 1e9}


def reference(values: list[Any], ts: float, rate: float
              ) -> tuple[str, str] | tuple[np.ndarray, np.ndarray]:
    """The numpy decoder of a block's values (before the ingest child lost numpy)."""
    try:
        arr = np.asarray(values, dtype=np.float64)
    except OverflowError:
        return ("non_finite", "'values' overflows")
    if not np.all(np.isfinite(arr)):
        return ("non_finite", f"{int(np.sum(~np.isfinite(arr)))} samples")
    return ts + np.arange(arr.size, dtype=np.float64) / rate, arr


def bits(a: np.ndarray) -> list[int]:
    return np.ascontiguousarray(a, dtype=np.float64).view(np.int64).tolist()


def outcome(payload: bytes) -> tuple[str, str] | tuple[np.ndarray, np.ndarray]:
    try:
        return decode(payload, BATCH, ARRIVAL, **LIMITS)  # type: ignore[return-value]
    except Rejected as rej:
        return (rej.reason.value, rej.detail)


BIG = st.sampled_from([1.7e308, -1.7e308, 1e308, 10**308, -(10**308), 2**1023, 2**1024,
                       -(2**1024), 10**400, 2**64, 2**53 + 1, 0.1, -0.0])
ELEMENT = (st.floats(allow_nan=True, allow_infinity=True)
           | st.integers(min_value=-(10**320), max_value=10**320) | BIG)


@settings(max_examples=400, deadline=None)
@given(values=st.lists(ELEMENT, min_size=1, max_size=24),
       t0=st.floats(ARRIVAL - 1e5, ARRIVAL + 1e5), rate=st.floats(0.9 * 2560.0, 1.1 * 2560.0))
def test_block_decodes_as_the_numpy_decoder_did(values: list[Any], t0: float,
                                               rate: float) -> None:
    """Same rejection (reason and detail), or the same timestamps and values bit for bit."""
    payload = json.dumps({"ts": t0, "rate_hz": rate, "values": values}).encode()
    parsed = _loads_relaxed(payload)
    want = reference(parsed["values"], parsed["ts"], parsed["rate_hz"])
    got = outcome(payload)
    if isinstance(want[0], str):
        assert got == want
    else:
        assert isinstance(got[0], np.ndarray) and isinstance(got[1], np.ndarray)
        assert bits(got[0]) == bits(want[0]) and bits(got[1]) == bits(want[1])


def old_rule(values: list[Any]) -> tuple[str, str] | None:
    """The verdict the decoder gave before it skipped the type look for payloads with no
    `true`/`false`: every element's type first, then overflow and finiteness."""
    if not {type(v) for v in values} <= {int, float}:
        return ("wrong_type", "'values' is not a flat list of numbers")
    ref = reference(values, 0.0, 1.0)
    return ref if isinstance(ref[0], str) else None  # type: ignore[return-value]


ANY_ELEMENT = (ELEMENT | st.booleans() | st.none() | st.text(max_size=3)
               | st.lists(st.integers(-3, 3), max_size=2)
               | st.dictionaries(st.sampled_from(["v", "true"]), st.booleans(), max_size=1))


@settings(max_examples=500, deadline=None)
@given(values=st.lists(ANY_ELEMENT, min_size=1, max_size=12),
       extra=st.sampled_from([None, "true", "false", True, "a true story"]))
def test_element_types_give_the_verdict_they_always_did(values: list[Any],
                                                        extra: Any) -> None:
    """Strings, null, bools, lists and objects among the samples are a wrong type, and
    it is found whether or not the type look is skipped (a `true` literal elsewhere in
    the payload, or none at all); overflow and NaN keep their own reasons."""
    doc: dict[str, Any] = {"values": values}
    if extra is not None:
        doc["note"] = extra
    got = outcome(json.dumps(doc).encode())
    want = old_rule(_loads_relaxed(json.dumps(values).encode()))
    if want is None:
        assert isinstance(got[0], np.ndarray)
    else:
        assert got == want


@pytest.mark.parametrize(("values", "detail"), [
    ([1.0, float("nan"), 2.0], "1 samples"),
    ([float("inf"), float("-inf")], "2 samples"),
    ([10**400], "'values' overflows"),
    ([1.0, 10**400, float("nan")], "'values' overflows"),
])
def test_non_finite_blocks_are_rejected_with_their_detail(values: list[Any],
                                                          detail: str) -> None:
    """NaN/inf samples are counted; an integer beyond float range overflows."""
    assert outcome(json.dumps({"values": values}).encode()) == ("non_finite", detail)


@pytest.mark.parametrize("values", [
    [1.7e308, 1.7e308],                 # finite floats whose sum overflows
    [10**308, 10**308, 0.5],            # whole numbers whose exact sum is beyond float
    [-1.7e308, -1.7e308, 1.0],
])
def test_finite_values_whose_sum_overflows_are_accepted(values: list[Any]) -> None:
    """Only the per-sample look decides: a sum past the float range is not a bad sample."""
    samples, _ = decode_message(json.dumps({"values": values}).encode(), BATCH, ARRIVAL,
                                **LIMITS)
    assert isinstance(samples, Block)
    assert samples.values.tolist() == [float(v) for v in values]


def test_block_keeps_values_in_an_array_of_doubles() -> None:
    """decode_message gives a Block: first time, the payload's rate, array('d') values."""
    payload = b'{"ts": 1796119199.5, "rate_hz": 2500, "values": [1, 2.5, -3]}'
    samples, seq = decode_message(payload, BATCH, ARRIVAL, **LIMITS)
    assert isinstance(samples, Block) and seq is None
    assert (samples.t0, samples.rate_hz, len(samples)) == (1796119199.5, 2500.0, 3)
    assert samples.values == array("d", [1.0, 2.5, -3.0])


@settings(max_examples=300, deadline=None)
@given(t0=st.floats(-1e10, 1e10), rate=st.floats(1e-6, 1e7), n=st.integers(1, 3000))
def test_time_of_is_the_arrays_timestamp(t0: float, rate: float, n: int) -> None:
    """Block.time_of(k) (the handler's gap check) equals what the windows get."""
    b = Block(t0, rate, array("d", bytes(8 * n)))
    ts, _ = b.arrays()
    for k in {0, 1 % n, n // 2, n - 1}:
        assert bits(np.array([b.time_of(k)])) == bits(ts[k:k + 1])


@settings(max_examples=300, deadline=None)
@given(blocks=st.lists(st.tuples(st.floats(-1e10, 1e10), st.floats(1e-6, 1e7),
                                 st.integers(1, 700)), min_size=1, max_size=12))
def test_batch_timestamps_are_each_blocks_own(blocks: list[tuple[float, float, int]]) -> None:
    """The daemon's one-pass timestamps of a batch are each block's, bit for bit."""
    t0s, rates, sizes = zip(*blocks, strict=True)
    together = blocks_timestamps(t0s, rates, sizes)
    one_by_one = np.concatenate([block_timestamps(t, r, n) for t, r, n in blocks])
    assert bits(together) == bits(one_by_one)
    assert all(math.isfinite(t) for t in together)


def test_a_bool_in_a_memoryview_payload_is_still_a_wrong_type() -> None:
    """The no-literal shortcut is only taken for bytes: `in` on a memoryview compares
    single bytes and would never find `true`."""
    with pytest.raises(Rejected) as rej:
        decode_message(memoryview(b'{"values": [1.5, true]}'), BATCH, ARRIVAL,  # type: ignore[arg-type]
                       **LIMITS)
    assert rej.value.reason.value == "wrong_type"
