"""What a Sparkplug B 3.0 metric holds and how watchkeep reads it (pure): the datatypes,
the protobuf field of the `value` oneof each one travels in and how it becomes a float
sample (spec 3.0, chapter 6 Payloads, "Datatype Details"), the packed array encodings,
and the NCMD payload that asks an edge node for its births again.

The decoder that keeps births, sequence numbers and deaths is `agent.core.sparkplug`.
"""

from __future__ import annotations

import sys
from array import array
from collections.abc import Callable
from enum import IntEnum
from typing import Any

from agent.sparkplug_b.sparkplug_b_pb2 import Payload

REBIRTH_METRIC = "Node Control/Rebirth"  # "NCMD" / "NBIRTH" (tck-id-payloads-nbirth-rebirth-req)
BDSEQ_METRIC = "bdSeq"  # tck-id-payloads-nbirth-bdseq, tck-id-payloads-ndeath-bdseq


class DataType(IntEnum):
    """The Sparkplug B datatypes watchkeep reads (spec 3.0, "Data Types")."""

    INT8 = 1
    INT16 = 2
    INT32 = 3
    INT64 = 4
    UINT8 = 5
    UINT16 = 6
    UINT32 = 7
    UINT64 = 8
    FLOAT = 9
    DOUBLE = 10
    BOOLEAN = 11
    INT8_ARRAY = 22
    INT16_ARRAY = 23
    INT32_ARRAY = 24
    INT64_ARRAY = 25
    UINT8_ARRAY = 26
    UINT16_ARRAY = 27
    UINT32_ARRAY = 28
    UINT64_ARRAY = 29
    FLOAT_ARRAY = 30
    DOUBLE_ARRAY = 31
    BOOLEAN_ARRAY = 32


# How a datatype's value is read: (protobuf field of the `value` oneof, kind, bits).
# "Datatype Details": Int8..Int32 and UInt8..UInt32 travel as uint32, Int64/UInt64 as
# uint64, Float as float, Double as double, Boolean as bool, the arrays as bytes.
SCALAR, SIGNED, BOOL, ARRAY, BOOL_ARRAY = range(5)
READ: dict[int, tuple[str, int, int]] = {
    DataType.INT8: ("int_value", SIGNED, 8),
    DataType.INT16: ("int_value", SIGNED, 16),
    DataType.INT32: ("int_value", SIGNED, 32),
    DataType.INT64: ("long_value", SIGNED, 64),
    DataType.UINT8: ("int_value", SCALAR, 8),
    DataType.UINT16: ("int_value", SCALAR, 16),
    DataType.UINT32: ("int_value", SCALAR, 32),
    DataType.UINT64: ("long_value", SCALAR, 64),
    DataType.FLOAT: ("float_value", SCALAR, 32),
    DataType.DOUBLE: ("double_value", SCALAR, 64),
    DataType.BOOLEAN: ("boolean_value", BOOL, 1),
    DataType.INT8_ARRAY: ("bytes_value", ARRAY, 8),
    DataType.INT16_ARRAY: ("bytes_value", ARRAY, 16),
    DataType.INT32_ARRAY: ("bytes_value", ARRAY, 32),
    DataType.INT64_ARRAY: ("bytes_value", ARRAY, 64),
    DataType.UINT8_ARRAY: ("bytes_value", ARRAY, 8),
    DataType.UINT16_ARRAY: ("bytes_value", ARRAY, 16),
    DataType.UINT32_ARRAY: ("bytes_value", ARRAY, 32),
    DataType.UINT64_ARRAY: ("bytes_value", ARRAY, 64),
    DataType.FLOAT_ARRAY: ("bytes_value", ARRAY, 32),
    DataType.DOUBLE_ARRAY: ("bytes_value", ARRAY, 64),
    DataType.BOOLEAN_ARRAY: ("bytes_value", BOOL_ARRAY, 1),
}
# "Array types ... packed little endian" values: the array typecode of each element type.
ARRAY_CODE: dict[int, str] = {
    DataType.INT8_ARRAY: "b", DataType.INT16_ARRAY: "h", DataType.INT32_ARRAY: "i",
    DataType.INT64_ARRAY: "q", DataType.UINT8_ARRAY: "B", DataType.UINT16_ARRAY: "H",
    DataType.UINT32_ARRAY: "I", DataType.UINT64_ARRAY: "Q", DataType.FLOAT_ARRAY: "f",
    DataType.DOUBLE_ARRAY: "d",
}
_BIG_ENDIAN = sys.byteorder == "big"
for _code in ARRAY_CODE.values():  # the sizes the wire format assumes
    assert array(_code).itemsize in (1, 2, 4, 8)


def signed_converter(bits: int) -> Callable[[int], float]:
    """A signed integer of `bits` bits from the unsigned field it travels in."""
    mask, full, top = (1 << bits) - 1, 1 << bits, bits - 1

    def convert(raw: int) -> float:
        v = raw & mask  # also reads a sign-extended uint32 for Int8/16
        return float(v - full if v >> top else v)

    return convert


def converter(kind: int, bits: int) -> Callable[[Any], float] | None:
    """How a scalar metric's field value becomes a float sample (a boolean: 1.0 or 0.0);
    None for an array, which becomes a block (`array_values`)."""
    if kind == SIGNED:
        return signed_converter(bits)
    if kind in (SCALAR, BOOL):
        return float
    return None


def int_of(m: Any) -> int | None:
    which = m.WhichOneof("value")
    if which in ("int_value", "long_value"):
        return int(getattr(m, which))
    return None


def array_values(raw: bytes, dtype: int, kind: int) -> array[float]:
    """The elements of an array metric as float64 ('Datatype Details', array types)."""
    if kind == BOOL_ARRAY:
        # A 4-byte little-endian count, then the bits, the first element in the most
        # significant bit of the first byte: Eclipse Tahu's and pysparkplug's encoding;
        # the spec text only says "packed little endian boolean/bit bytes".
        if len(raw) < 4:
            raise ValueError("BooleanArray shorter than its 4-byte count")
        n = int.from_bytes(raw[:4], "little")
        if (n + 7) // 8 > len(raw) - 4:
            raise ValueError(f"BooleanArray of {n} values in {len(raw) - 4} bytes")
        bits = raw[4:]
        return array("d", [float((bits[i >> 3] >> (7 - (i & 7))) & 1) for i in range(n)])
    elems: array[Any] = array(ARRAY_CODE[dtype])
    if len(raw) % elems.itemsize:
        raise ValueError(f"{len(raw)} bytes is not a whole number of "
                         f"{elems.itemsize}-byte elements")
    elems.frombytes(raw)
    if _BIG_ENDIAN:
        elems.byteswap()
    return elems if elems.typecode == "d" else array("d", elems)


def rebirth_request(now: float) -> bytes:
    """The NCMD payload that asks an edge node for its birth certificates again: one
    Boolean metric `Node Control/Rebirth` = true, a payload timestamp, no seq (spec 3.0,
    chapter 6, "NCMD": tck-id-payloads-ncmd-timestamp, tck-id-payloads-ncmd-seq)."""
    ms = int(now * 1000)
    p = Payload(timestamp=ms)
    m = p.metrics.add()
    m.name = REBIRTH_METRIC
    m.timestamp = ms
    m.datatype = DataType.BOOLEAN
    m.boolean_value = True
    return p.SerializeToString()
