"""Fuzz target `sparkplug-b`: a sequence of messages on an edge node's and its devices'
topics through one `agent.core.sparkplug.SparkplugDecoder` (it keeps births, aliases and
sequence numbers, so a message is judged against the ones before it).

Input: records of [topic selector byte][payload length, 3 bytes big-endian][payload];
the last record takes what is left. The contract per message (sparkplug.py): samples
only for the configured channels, each finite and stamped within `max_clock_skew_s`
of arrival (an array metric's block: its first and last sample), a `Rejected` with a
`Reason` for a message of no use, notes of the documented kinds; never another
exception.
"""

from __future__ import annotations

import functools
import math
import struct
from pathlib import Path
from typing import Any

from hypothesis import strategies as st

from agent.config.load import Config, parse_config
from agent.core.decode import Block, Reason, Rejected
from agent.core.routing import channel_routes
from agent.core.sparkplug import Note, SparkplugDecoder
from tests.fuzz.common import MAX_PAYLOAD_BYTES, NOW, SKEW_S
from tests.fuzz.harness import Target, check
from tests.helpers import sparkplug_payload

G, E, D = "fernbrook-dosing", "dosing-gw", "C-301"
BASE = f"spBv1.0/{G}"
TOPICS = (f"{BASE}/NBIRTH/{E}", f"{BASE}/DBIRTH/{E}/{D}", f"{BASE}/DDATA/{E}/{D}",
          f"{BASE}/NDATA/{E}", f"{BASE}/DDEATH/{E}/{D}", f"{BASE}/NDEATH/{E}",
          f"{BASE}/DDATA/{E}/other-device", f"{BASE}/DBIRTH/{E}/other-device",
          f"{BASE}/NCMD/{E}", f"{BASE}/STATE/{E}", f"{BASE}/DDATA/other-node/{D}",
          f"{BASE}/XDATA/{E}/{D}", "spBv1.0/x", f"{BASE}/DDATA/{E}/{D}/extra")
MS = int(NOW * 1000)
# "Data Types" (spec 3.0, chapter 6)
INT8, INT16, INT32, INT64, UINT8, UINT16, UINT32, UINT64 = range(1, 9)
FLOAT, DOUBLE, BOOLEAN, STRING = 9, 10, 11, 12
INT16_ARRAY, FLOAT_ARRAY, DOUBLE_ARRAY, BOOLEAN_ARRAY = 23, 30, 31, 32
# device metrics: (name, alias, datatype, value field)
METRICS = (("Pump/Flow", 1, DOUBLE, "double_value"), ("Pump/Pressure", 2, FLOAT, "float_value"),
           ("Pump/Vib", 3, DOUBLE_ARRAY, "bytes_value"), ("Pump/Running", 4, BOOLEAN,
                                                           "boolean_value"),
           ("Pump/Count", 5, INT16, "int_value"), ("Pump/Bits", 6, BOOLEAN_ARRAY, "bytes_value"),
           ("Pump/Model", 7, STRING, "string_value"))


@functools.cache
def config() -> Config:
    """Channels on five of the device's metrics (scalars, arrays) and one node metric;
    rebirth requests on (they need an authenticated local broker)."""
    chans: dict[str, Any] = {
        "flow": {"metric": "Pump/Flow", "rate_hz": 1.0},
        "pressure": {"metric": "Pump/Pressure", "rate_hz": 1.0},
        "vib": {"metric": "Pump/Vib", "rate_hz": 100.0},
        "running": {"metric": "Pump/Running", "rate_hz": 1.0},
        "count": {"metric": "Pump/Count", "rate_hz": 1.0},
        "bits": {"metric": "Pump/Bits", "rate_hz": 10.0},
        "model": {"metric": "Pump/Model", "rate_hz": 1.0},
    }
    for c in chans.values():
        c.update(topic=TOPICS[2], decoder="sparkplug-b")
    chans["node"] = {"topic": TOPICS[3], "decoder": "sparkplug-b", "metric": "Node/Temp",
                     "rate_hz": 1.0}
    doc = {"site": "fz", "gateway": "gw", "local_broker": {"username": "gw", "password": "x"},
           "ingest": {"sparkplug": {"rebirth_requests": True, "rebirth_min_interval_s": 1}},
           "assets": [{"name": D, "channels": chans}]}
    return parse_config(doc, Path("."))


def decoder() -> SparkplugDecoder:
    cfg = config()
    return SparkplugDecoder(channel_routes(cfg.assets), max_payload_bytes=MAX_PAYLOAD_BYTES,
                            max_skew_s=SKEW_S, rebirth_interval_s=1.0)


def records(data: bytes) -> list[tuple[str, bytes]]:
    """The (topic, payload) messages an input holds (module docstring)."""
    out = []
    i = 0
    while i < len(data) and len(out) < 64:
        topic = TOPICS[data[i] % len(TOPICS)]
        n = int.from_bytes(data[i + 1:i + 4], "big")
        out.append((topic, data[i + 4:i + 4 + n]))
        i += 4 + n
    return out


def pack(msgs: list[tuple[int, bytes]]) -> bytes:
    """The input for messages given as (topic index, payload)."""
    return b"".join(bytes([t]) + len(p).to_bytes(3, "big") + p for t, p in msgs)


def check_message(dec: SparkplugDecoder, topic: str, payload: bytes, arrival: float) -> None:
    """The decoder's contract for one message (module docstring)."""
    routes = {id(r) for r in dec.routes_of(G, E)}
    try:
        got = dec.decode(topic, payload, arrival)
    except Rejected as rej:
        check(isinstance(rej.reason, Reason), f"rejection without a Reason: {rej!r}")
        got = []
    for route, ts, value in got:
        check(id(route) in routes, f"a sample for a route not configured: {route}")
        check(type(ts) is float and math.isfinite(ts) and abs(ts - arrival) <= SKEW_S,
              f"sample stamped {ts!r} at arrival {arrival}")
        if isinstance(value, Block):
            n = len(value)
            check(n >= 1, "an empty block")
            check(all(math.isfinite(v) for v in value.values), "a non-finite block value")
            check(value.t0 == ts, "block t0 is not the sample time")
            last = value.time_of(n - 1)
            check(math.isfinite(last) and abs(last - arrival) <= SKEW_S,
                  f"an array metric's block of {n} samples at {route.channel.rate_hz} Hz "
                  f"ends {last - arrival:+.3g} s from arrival")
        else:
            check(type(value) is float and math.isfinite(value), f"sample value {value!r}")
    for note in dec.notes:
        kind = note[0]
        check(isinstance(kind, Note), f"note {note!r}")
        if kind is Note.REJECTED:
            check(isinstance(note[1], Reason) and isinstance(note[2], str), f"note {note!r}")
        elif kind in (Note.GAP, Note.OFFLINE, Note.ONLINE):
            check(all(id(r) in routes for r in note[1]), f"note {note!r}")
        elif kind is Note.REBIRTH:
            check(note[1] == f"{BASE}/NCMD/{E}" and isinstance(note[2], bytes), f"{note!r}")
    dec.notes.clear()


def one_input(data: bytes) -> None:
    dec = decoder()
    for k, (topic, payload) in enumerate(records(data)):
        check_message(dec, topic, payload, NOW + 0.01 * k)


def payload(seq: int | None, metrics: list[dict[str, Any]], ts: int | None = MS) -> bytes:
    return sparkplug_payload(seq, metrics, ts)


def _birth_metrics(alias: bool = True) -> list[dict[str, Any]]:
    vals: dict[str, Any] = {"double_value": 11.5, "float_value": 2.5,
                            "bytes_value": struct.pack("<4d", 0.1, 0.2, 0.3, 0.4),
                            "boolean_value": True, "int_value": 65535, "string_value": "FD-2"}
    out = []
    for name, a, dtype, field in METRICS:
        spec: dict[str, Any] = {"name": name, "datatype": dtype, "timestamp": MS}
        if alias:
            spec["alias"] = a
        spec[field] = vals[field] if name != "Pump/Bits" else (3).to_bytes(4, "little") + b"\xa0"
        out.append(spec)
    return out


def session(alias: bool = True) -> list[tuple[int, bytes]]:
    """A well-behaved edge node: births, data by alias (or name), array data, deaths."""
    by = (lambda name, a: {"alias": a}) if alias else (lambda name, a: {"name": name})
    return [
        (0, payload(0, [{"name": "bdSeq", "datatype": UINT64, "long_value": 0},
                        {"name": "Node Control/Rebirth", "datatype": BOOLEAN,
                         "boolean_value": False},
                        {"name": "Node/Temp", "alias": 100, "datatype": DOUBLE,
                         "double_value": 40.0}])),
        (1, payload(1, _birth_metrics(alias))),
        (2, payload(2, [{**by("Pump/Flow", 1), "double_value": 12.0, "timestamp": MS + 1000},
                        {**by("Pump/Pressure", 2), "float_value": 2.75}])),
        (2, payload(3, [{**by("Pump/Vib", 3), "bytes_value": struct.pack("<8d", *range(8)),
                         "timestamp": MS + 1500}])),
        (3, payload(4, [{"alias": 100, "double_value": 41.0}])),
        (4, payload(5, [])),
        (5, payload(None, [{"name": "bdSeq", "datatype": UINT64, "long_value": 0}])),
    ]


def seeds() -> list[bytes]:
    s = session()
    return [pack(s), pack(session(alias=False)), pack(s[:3]), pack(s[:2] + s[3:4])]


def strategy() -> Any:
    """Sessions whose messages have awkward fields: any datatype with any value member,
    arrays of any length (a block's span), timestamps far off, sequence numbers that
    jump; Hypothesis builds the protobuf, which byte mutation seldom keeps valid."""
    u64 = st.one_of(st.integers(0, 2**64 - 1), st.sampled_from([0, MS, MS + 299_000, MS + 301_000,
                                                                MS - 301_000, 2**64 - 1]))
    members: dict[str, Any] = {
        "double_value": st.floats(), "float_value": st.floats(width=32),
        "int_value": st.integers(0, 2**32 - 1), "long_value": st.integers(0, 2**64 - 1),
        "boolean_value": st.booleans(), "string_value": st.text(max_size=8),
        "bytes_value": st.one_of(
            st.binary(max_size=64),
            st.lists(st.floats(), max_size=16).map(lambda v: struct.pack(f"<{len(v)}d", *v)),
            st.integers(1, 4000).map(lambda n: struct.pack("<d", 1.0) * n),
            # a BooleanArray: its count, then the bits (10 Hz: 3,001 bits span 300 s)
            st.one_of(st.integers(1, 64), st.sampled_from([2_999, 3_001, 40_000])).map(
                lambda n: n.to_bytes(4, "little") + b"\xaa" * ((n + 7) // 8)),
            st.integers(0, 2**32 - 1).map(lambda n: n.to_bytes(4, "little") + b"\xff" * 8)),
        "is_null": st.just(True)}
    value = st.sampled_from(sorted(members)).flatmap(
        lambda f: st.tuples(st.just(f), members[f]))
    names = st.one_of(st.sampled_from([m[0] for m in METRICS] + ["bdSeq", "Node/Temp"]),
                      st.text(max_size=6))

    @st.composite
    def metric(draw: Any) -> dict[str, Any]:
        spec: dict[str, Any] = {}
        if draw(st.booleans()):
            spec["name"] = draw(names)
        if draw(st.booleans()):
            spec["alias"] = draw(st.one_of(st.integers(0, 8), st.just(100), u64))
        if draw(st.booleans()):
            spec["datatype"] = draw(st.one_of(st.integers(0, 40), st.integers(0, 2**32 - 1)))
        if draw(st.booleans()):
            spec["timestamp"] = draw(u64)
        field, v = draw(value)
        spec[field] = v
        return spec

    @st.composite
    def known(draw: Any) -> dict[str, Any]:
        """A configured metric (by alias or name) with an awkward value, mostly of its own
        datatype's member."""
        name, alias, _, field = draw(st.sampled_from(METRICS))
        spec: dict[str, Any] = {"alias": alias} if draw(st.booleans()) else {"name": name}
        f, v = (field, draw(members[field])) if draw(st.integers(0, 3)) else draw(value)
        spec[f] = v
        if draw(st.booleans()):
            spec["timestamp"] = draw(u64)
        return spec

    data = st.tuples(st.just(2), st.builds(payload, st.integers(2, 255),
                                           st.lists(known(), min_size=1, max_size=4),
                                           st.one_of(st.none(), u64)))
    def long_array(args: tuple[int, int, int | None]) -> tuple[int, bytes]:
        """An array metric whose block ends about `seconds` after its first sample."""
        which, seconds, ts = args
        if which == 0:  # Pump/Bits, a BooleanArray at 10 Hz
            n = 10 * seconds + 1
            raw = n.to_bytes(4, "little") + b"\xaa" * ((n + 7) // 8)
        else:  # Pump/Vib, a DoubleArray at 100 Hz
            raw = struct.pack("<d", 0.5) * (100 * seconds + 1)
        alias = (6, 3)[which]
        return 2, payload(2, [{"alias": alias, "bytes_value": raw}], ts)

    spans = st.tuples(st.integers(0, 1), st.sampled_from([1, 299, 300, 301, 600]),
                      st.sampled_from([None, MS, MS - 200_000])).map(long_array)
    message = st.tuples(
        st.integers(0, len(TOPICS) - 1),
        st.builds(payload, st.one_of(st.none(), st.integers(0, 255), u64),
                  st.lists(metric(), max_size=6), st.one_of(st.none(), u64)))
    return st.one_of(
        spans.map(lambda m: pack([*session()[:2], m])),
        st.lists(data, min_size=1, max_size=3).map(lambda m: pack(session()[:2] + m)),
        st.lists(message, min_size=1, max_size=6).map(lambda m: pack(session()[:2] + m)),
        st.lists(message, min_size=1, max_size=6).map(pack),
        st.lists(st.sampled_from(session()) | message, max_size=10).map(pack))


TARGET = Target("sparkplug-b", one_input, seeds, strategy, examples=200, max_len=65536)
__all__ = ["TARGET", "check_message", "decoder", "pack", "payload", "session"]
