"""The sparkplug-b decoder (agent/core/sparkplug.py): births, data by alias or name,
datatypes, timestamps, sequence numbers, deaths, rebirth requests; and the pipeline
turning a death certificate into a `sensor.fault` at once.

Payloads are built here with the vendored schema (agent/sparkplug_b); the test against an
independent encoder is tests/integration/test_sparkplug_peer.py. Spec references: Eclipse
Sparkplug 3.0, chapter 6 Payloads, by section title and conformance statement id.
"""

from __future__ import annotations

import json
import logging
import math
import struct
from pathlib import Path
from typing import Any

import pytest
from prometheus_client import CollectorRegistry

from agent.config.load import Config, parse_config
from agent.core.decode import Block, Reason, Rejected
from agent.core.routing import channel_routes
from agent.core.sparkplug import Note, SparkplugDecoder, rebirth_request
from agent.ingest.buffers import Buffers, IngestHandler
from agent.ops.metrics import Metrics
from agent.pipeline.runtime import AssetRuntime
from agent.pipeline.tick import Pipeline
from agent.sparkplug_b.sparkplug_b_pb2 import Payload
from tests.helpers import sparkplug_payload

G, E, D = "fernbrook-dosing", "dosing-gw", "C-301"
BASE = f"spBv1.0/{G}"
DDATA, DBIRTH, DDEATH = f"{BASE}/DDATA/{E}/{D}", f"{BASE}/DBIRTH/{E}/{D}", f"{BASE}/DDEATH/{E}/{D}"
NBIRTH, NDATA, NDEATH = f"{BASE}/NBIRTH/{E}", f"{BASE}/NDATA/{E}", f"{BASE}/NDEATH/{E}"
NOW = 1_796_119_200.0  # 2026-12-01T09:20:00Z, the arrival time of every message
MS = int(NOW * 1000)
# "Data Types" enum values (spec 3.0, chapter 6, "Data Types")
INT8, INT16, INT32, INT64, UINT8, UINT16, UINT32, UINT64 = 1, 2, 3, 4, 5, 6, 7, 8
FLOAT, DOUBLE, BOOLEAN, STRING = 9, 10, 11, 12
INT16_ARRAY, DOUBLE_ARRAY, BOOLEAN_ARRAY = 23, 31, 32


def _config(metrics: dict[str, str], *, node_metric: str | None = None,
            rebirth: bool = False) -> Config:
    chans: dict[str, Any] = {c: {"topic": DDATA, "decoder": "sparkplug-b", "metric": m,
                                 "rate_hz": 1.0} for c, m in metrics.items()}
    if node_metric is not None:
        chans["node"] = {"topic": NDATA, "decoder": "sparkplug-b", "metric": node_metric,
                         "rate_hz": 1.0}
    local: dict[str, Any] = {"username": "gw", "password": "x"} if rebirth else {}
    doc = {"site": "fernbrook", "gateway": "gw", "state_dir": "/tmp/unused",
           "local_broker": local,
           "ingest": {"sparkplug": {"rebirth_requests": rebirth,
                                    "rebirth_min_interval_s": 5}},
           "assets": [{"name": D, "channels": chans}]}
    return parse_config(doc, Path("."))


def _decoder(cfg: Config) -> SparkplugDecoder:
    sc = cfg.ingest.sparkplug
    return SparkplugDecoder(channel_routes(cfg.assets), max_payload_bytes=1 << 16,
                            max_skew_s=300.0,
                            rebirth_interval_s=sc.rebirth_min_interval_s
                            if sc.rebirth_requests else None)


def _payload(seq: int | None, metrics: list[dict[str, Any]], ts: int | None = MS) -> bytes:
    return sparkplug_payload(seq, metrics, ts)


def _born(dec: SparkplugDecoder, device_metrics: list[dict[str, Any]], *,
          bd_seq: int = 0) -> None:
    """NBIRTH (seq 0, bdSeq) and DBIRTH (seq 1) of the edge node and device."""
    dec.decode(NBIRTH, _payload(0, [{"name": "bdSeq", "datatype": UINT64,
                                     "long_value": bd_seq},
                                    {"name": "Node Control/Rebirth", "datatype": BOOLEAN,
                                     "boolean_value": False}]), NOW)
    dec.decode(DBIRTH, _payload(1, device_metrics), NOW)


FLOW = {"name": "Pump/Flow", "alias": 1, "datatype": DOUBLE, "double_value": 11.5,
        "timestamp": MS}
PRESSURE = {"name": "Pump/Discharge Pressure", "alias": 2, "datatype": FLOAT,
            "float_value": 2.5, "timestamp": MS}
MODEL = {"name": "Properties/Model", "alias": 3, "datatype": STRING, "string_value": "FD-2",
         "timestamp": MS}


def _values(samples: list[Any]) -> dict[str, Any]:
    return {r.channel.name: (ts, v) for r, ts, v in samples}


def test_birth_then_data_by_alias() -> None:
    """A birth's values are samples; DDATA by alias only lands on the named channels,
    stamped with each metric's own timestamp (ms since epoch, UTC: 'Metric')."""
    dec = _decoder(_config({"flow": "Pump/Flow", "pressure": "Pump/Discharge Pressure"}))
    _born(dec, [FLOW, PRESSURE, MODEL])
    assert not [n for n in dec.notes if n[0] is not Note.LOG]
    got = dec.decode(DDATA, _payload(2, [
        {"alias": 2, "float_value": 3.25, "timestamp": MS + 1500},
        {"alias": 3, "string_value": "FD-3", "timestamp": MS + 1500},
        {"alias": 1, "double_value": -0.125, "timestamp": MS + 1000}]), NOW)
    assert _values(got) == {"pressure": ((MS + 1500) / 1000, 3.25),
                            "flow": ((MS + 1000) / 1000, -0.125)}
    assert dec.notes == []


def test_data_by_name_and_payload_timestamp() -> None:
    """Without aliases, data names its metrics ('name ... MUST be included with every
    metric unless aliases are being used'); a metric without a timestamp takes the
    payload's, and a payload without one the arrival time."""
    dec = _decoder(_config({"flow": "Pump/Flow"}))
    flow = {k: v for k, v in FLOW.items() if k != "alias"}
    _born(dec, [flow])
    got = dec.decode(DDATA, _payload(2, [{"name": "Pump/Flow", "double_value": 7.0}],
                                     ts=MS + 250), NOW)
    assert _values(got) == {"flow": ((MS + 250) / 1000, 7.0)}
    got = dec.decode(DDATA, _payload(3, [{"name": "Pump/Flow", "double_value": 8.0}],
                                     ts=None), NOW)
    assert _values(got) == {"flow": (NOW, 8.0)}


# (datatype, the protobuf field and value on the wire, the sample). "Datatype Details":
# Int8/16/32 and UInt8/16/32 travel as uint32, Int64/UInt64 as uint64; a negative value
# as its two's complement, in the type's width (pysparkplug) or sign-extended to 32 bits.
DATATYPES = [
    (INT8, "int_value", 0xFF, -1.0),
    (INT8, "int_value", 0xFFFFFFFF, -1.0),
    (INT8, "int_value", 127, 127.0),
    (INT16, "int_value", 0x8000, -32768.0),
    (INT16, "int_value", (-1234) & 0xFFFFFFFF, -1234.0),
    (INT32, "int_value", 0x80000000, -2147483648.0),
    (INT32, "int_value", 42, 42.0),
    (INT64, "long_value", (-7) & 0xFFFFFFFFFFFFFFFF, -7.0),
    (UINT8, "int_value", 255, 255.0),
    (UINT16, "int_value", 65535, 65535.0),
    (UINT32, "int_value", 0xFFFFFFFF, 4294967295.0),
    (UINT64, "long_value", 2**53, 9007199254740992.0),
    (FLOAT, "float_value", 0.1, float(struct.unpack("<f", struct.pack("<f", 0.1))[0])),
    (DOUBLE, "double_value", -1e300, -1e300),
    (BOOLEAN, "boolean_value", True, 1.0),
    (BOOLEAN, "boolean_value", False, 0.0),
    (DOUBLE, "double_value", 0.0, 0.0),
]


@pytest.mark.parametrize(("dtype", "field", "wire", "sample"), DATATYPES)
def test_numeric_and_boolean_datatypes(dtype: int, field: str, wire: Any, sample: float
                                       ) -> None:
    """Every scalar numeric and boolean datatype becomes a float sample."""
    dec = _decoder(_config({"x": "X"}))
    _born(dec, [{"name": "X", "alias": 9, "datatype": dtype, field: wire,
                 "timestamp": MS}])
    got = dec.decode(DDATA, _payload(2, [{"alias": 9, field: wire, "timestamp": MS}]), NOW)
    assert _values(got) == {"x": (MS / 1000, sample)}


# "Datatype Details", array types: packed little-endian elements in bytes_value. The
# BooleanArray layout (a 4-byte little-endian count, then the bits, first element in the
# most significant bit) is Eclipse Tahu's and pysparkplug's; the spec text says only
# "packed little endian boolean/bit bytes".
ARRAYS = [
    (DOUBLE_ARRAY, struct.pack("<3d", 1.5, -2.0, 0.25), [1.5, -2.0, 0.25]),
    (INT16_ARRAY, struct.pack("<3h", -1, 300, 7), [-1.0, 300.0, 7.0]),
    (BOOLEAN_ARRAY, (10).to_bytes(4, "little") + bytes([0b10110000, 0b01000000]),
     [1.0, 0.0, 1.0, 1.0, 0.0, 0.0, 0.0, 0.0, 0.0, 1.0]),
]


@pytest.mark.parametrize(("dtype", "raw", "values"), ARRAYS)
def test_arrays_are_blocks(dtype: int, raw: bytes, values: list[float]) -> None:
    """An array metric is a block at the channel's rate, its first sample at the metric's
    timestamp."""
    dec = _decoder(_config({"wave": "Vib/Wave"}))
    _born(dec, [{"name": "Vib/Wave", "alias": 4, "datatype": dtype, "bytes_value": raw,
                 "timestamp": MS}])
    got = dec.decode(DDATA, _payload(2, [{"alias": 4, "bytes_value": raw,
                                          "timestamp": MS + 10}]), NOW)
    (_, _, block), = got
    assert isinstance(block, Block)
    assert (block.t0, block.rate_hz, list(block.values)) == ((MS + 10) / 1000, 1.0, values)


@pytest.mark.parametrize(("count", "kept"), [(301, True), (302, False), (3001, False)])
def test_array_span_is_bounded_like_its_first_time(count: int, kept: bool) -> None:
    """An array whose last sample lies beyond max_clock_skew_s of arrival is refused
    (clock_skew), as a json-batch block is: found by the sparkplug-b fuzz target (a
    3,011-sample BooleanArray at 10 Hz ended 301 s ahead; on the 1 Hz channel here,
    302 samples end 301 s ahead). The time-base guard refused it later, as `ahead`;
    the decoder now says why."""
    dec = _decoder(_config({"wave": "Vib/Wave"}))
    raw = count.to_bytes(4, "little") + b"\xaa" * ((count + 7) // 8)
    _born(dec, [{"name": "Vib/Wave", "alias": 4, "datatype": BOOLEAN_ARRAY,
                 "bytes_value": (1).to_bytes(4, "little") + b"\x80", "timestamp": MS}])
    dec.notes.clear()
    got = dec.decode(DDATA, _payload(2, [{"alias": 4, "bytes_value": raw}], ts=MS), NOW)
    if kept:
        (_, _, block), = got
        assert len(block) == count and dec.notes == []
    else:
        assert got == []
        assert [(n[0], n[1]) for n in dec.notes] == [(Note.REJECTED, Reason.CLOCK_SKEW)]


def test_dbirth_without_a_sequence_number_is_refused() -> None:
    """A DBIRTH without seq (which every DBIRTH MUST carry) is malformed and changes
    nothing. Found by the ingest-tick fuzz target: one such DBIRTH naming 'PumP/Flow'
    behind the flow metric's alias replaced the device's table, so every later DDATA by
    that alias was skipped as a metric no channel reads; with no sequence number no gap
    showed, no rebirth was asked for, and the channel had no data for good."""
    dec = _decoder(_config({"flow": "Pump/Flow"}))
    _born(dec, [FLOW])
    dec.notes.clear()
    with pytest.raises(Rejected) as info:
        dec.decode(DBIRTH, _payload(None, [dict(FLOW, name="PumP/Flow")]), NOW)
    assert info.value.reason is Reason.MALFORMED
    got = dec.decode(DDATA, _payload(2, [{"alias": 1, "double_value": 4.0}]), NOW)
    assert _values(got) == {"flow": (MS / 1000, 4.0)}
    assert dec.notes == []


def test_sequence_gap_and_wrap() -> None:
    """seq follows by one modulo 256 (tck-id-payloads-sequence-num-incrementing): 255 -> 0
    is no gap, a jump is one for every channel of the edge node."""
    dec = _decoder(_config({"flow": "Pump/Flow"}, node_metric="Supply Voltage"))
    dec.decode(NBIRTH, _payload(0, [{"name": "bdSeq", "datatype": UINT64, "long_value": 0},
                                    {"name": "Supply Voltage", "alias": 7, "datatype": FLOAT,
                                     "float_value": 24.0, "timestamp": MS}]), NOW)
    dec.decode(DBIRTH, _payload(1, [FLOW]), NOW)
    for seq in range(2, 256):
        dec.decode(DDATA, _payload(seq, [{"alias": 1, "double_value": 1.0}]), NOW)
    dec.decode(NDATA, _payload(0, [{"alias": 7, "float_value": 24.5}]), NOW)
    assert dec.notes == []
    got = dec.decode(DDATA, _payload(3, [{"alias": 1, "double_value": 2.0}]), NOW)
    assert _values(got) == {"flow": (MS / 1000, 2.0)}  # the data itself is good
    (kind, routes, detail), = dec.notes
    assert kind is Note.GAP and detail == "seq 3 after 0"
    assert sorted(r.channel.name for r in routes) == ["flow", "node"]


def test_data_before_birth_is_rejected_and_rebirth_requested() -> None:
    """Data without its birth is lost for its channels: rejected (no_birth), a gap, and,
    with rebirth_requests on, one NCMD per interval to that edge node."""
    dec = _decoder(_config({"flow": "Pump/Flow"}, rebirth=True))
    for k in range(3):
        with pytest.raises(Rejected) as info:
            dec.decode(DDATA, _payload(5 + k, [{"alias": 1, "double_value": 1.0}]), NOW + k)
        assert info.value.reason is Reason.NO_BIRTH
    kinds = [n[0] for n in dec.notes]
    assert kinds == [Note.GAP, Note.REBIRTH, Note.GAP, Note.GAP]  # 5 s apart at most
    assert dec.notes[1][1] == f"{BASE}/NCMD/{E}"


def test_no_rebirth_request_unless_enabled() -> None:
    """Off by default: the same data before a birth asks nothing of the edge node."""
    dec = _decoder(_config({"flow": "Pump/Flow"}))
    with pytest.raises(Rejected):
        dec.decode(DDATA, _payload(5, [{"alias": 1, "double_value": 1.0}]), NOW)
    assert [n[0] for n in dec.notes] == [Note.GAP]


def test_rebirth_request_is_the_specs_ncmd() -> None:
    """'NCMD': one metric 'Node Control/Rebirth', Boolean (11) true, a payload timestamp
    (tck-id-payloads-ncmd-timestamp) and no seq (tck-id-payloads-ncmd-seq)."""
    p = Payload.FromString(rebirth_request(NOW))
    assert p.timestamp == MS and not p.HasField("seq")
    (m,) = p.metrics
    assert (m.name, m.datatype, m.WhichOneof("value"), m.boolean_value) == \
        ("Node Control/Rebirth", BOOLEAN, "boolean_value", True)


def test_unknown_alias_is_counted() -> None:
    """An alias the birth did not declare is rejected (unknown_alias); the rest is read."""
    dec = _decoder(_config({"flow": "Pump/Flow"}, rebirth=True))
    _born(dec, [FLOW])
    got = dec.decode(DDATA, _payload(2, [{"alias": 99, "double_value": 5.0},
                                         {"alias": 1, "double_value": 6.0}]), NOW)
    assert _values(got) == {"flow": (MS / 1000, 6.0)}
    assert [(n[0], n[1]) for n in dec.notes if n[0] is Note.REJECTED] == \
        [(Note.REJECTED, Reason.UNKNOWN_ALIAS)]
    assert any(n[0] is Note.REBIRTH for n in dec.notes)


@pytest.mark.parametrize(("metric", "reason"), [
    ({"alias": 1, "double_value": math.nan}, Reason.NON_FINITE),
    ({"alias": 1, "double_value": math.inf}, Reason.NON_FINITE),
    ({"alias": 1, "float_value": 1.0}, Reason.WRONG_TYPE),  # not the datatype's field
    ({"alias": 1, "double_value": 1.0, "timestamp": MS + 3_600_000}, Reason.CLOCK_SKEW),
])
def test_bad_metrics_are_rejected_by_reason(metric: dict[str, Any], reason: Reason) -> None:
    """A metric that cannot be a sample is counted under its reason and skipped."""
    dec = _decoder(_config({"flow": "Pump/Flow"}))
    _born(dec, [FLOW])
    assert dec.decode(DDATA, _payload(2, [metric]), NOW) == []
    assert [(n[0], n[1]) for n in dec.notes] == [(Note.REJECTED, reason)]


def test_null_and_malformed() -> None:
    """is_null is no value (nothing counted); bytes that are no protobuf are malformed."""
    dec = _decoder(_config({"flow": "Pump/Flow"}))
    _born(dec, [FLOW])
    assert dec.decode(DDATA, _payload(2, [{"alias": 1, "is_null": True}]), NOW) == []
    assert dec.notes == []
    with pytest.raises(Rejected) as info:
        dec.decode(DDATA, b"\x12\xff\xff\xff\xff\x0f", NOW)
    assert info.value.reason is Reason.MALFORMED


def test_non_numeric_metric_bound_to_a_channel() -> None:
    """A channel naming a String metric: the birth says so once (wrong_type)."""
    dec = _decoder(_config({"model": "Properties/Model"}))
    _born(dec, [MODEL])
    assert [(n[0], n[1]) for n in dec.notes] == [(Note.REJECTED, Reason.WRONG_TYPE)]


def test_deaths_and_rebirth_with_new_aliases() -> None:
    """NDEATH (with the NBIRTH's bdSeq: tck-id-payloads-ndeath-bdseq) takes every channel
    of the node offline; a late NDEATH of an earlier session is ignored; a new birth with
    other aliases brings them back and its aliases count; DDEATH takes the device's."""
    cfg = _config({"flow": "Pump/Flow", "pressure": "Pump/Discharge Pressure"})
    dec = _decoder(cfg)
    _born(dec, [FLOW, PRESSURE], bd_seq=4)
    death = _payload(None, [{"name": "bdSeq", "datatype": UINT64, "long_value": 3}])
    assert dec.decode(NDEATH, death, NOW) == []
    assert [n[0] for n in dec.notes] == [Note.LOG]  # bdSeq 3: an earlier session's will
    dec.notes.clear()
    death = _payload(None, [{"name": "bdSeq", "datatype": UINT64, "long_value": 4}])
    dec.decode(NDEATH, death, NOW + 1)
    (kind, routes, why, t), = dec.notes
    assert (kind, why, t) == (Note.OFFLINE, "node_death", NOW + 1)
    assert sorted(r.channel.name for r in routes) == ["flow", "pressure"]
    dec.notes.clear()
    with pytest.raises(Rejected):  # the aliases died with the session
        dec.decode(DDATA, _payload(2, [{"alias": 1, "double_value": 1.0}]), NOW + 2)
    dec.notes.clear()
    _born(dec, [dict(FLOW, alias=21), dict(PRESSURE, alias=22)], bd_seq=5)
    assert [(n[0], sorted(r.channel.name for r in n[1])) for n in dec.notes] == \
        [(Note.ONLINE, ["flow", "pressure"])]
    dec.notes.clear()
    got = dec.decode(DDATA, _payload(2, [{"alias": 22, "float_value": 9.5},
                                         {"alias": 21, "double_value": 8.5}]), NOW + 3)
    assert _values(got) == {"pressure": (MS / 1000, 9.5), "flow": (MS / 1000, 8.5)}
    dec.decode(DDEATH, _payload(3, []), NOW + 4)
    (kind, routes, why, t), = dec.notes
    assert (kind, why) == (Note.OFFLINE, "device_death") and len(routes) == 2


class _Sink:
    def __init__(self) -> None:
        self.msgs: list[Any] = []

    def submit(self, msgs: Any, **_: Any) -> None:
        self.msgs.extend(msgs)


def test_death_certificate_raises_sensor_fault_at_once(tmp_path: Path) -> None:
    """Through the ingest handler and a pipeline tick: NDEATH -> one sensor.fault per
    channel (reason node_death), in the very next tick, with no window closed; a birth
    and clean windows after it -> sensor.recovered."""
    cfg = _config({"flow": "Pump/Flow", "pressure": "Pump/Discharge Pressure"})
    metrics = Metrics(CollectorRegistry())
    buffers = Buffers(cfg)
    handler = IngestHandler(cfg, buffers, metrics, logging.getLogger("test"))
    sink = _Sink()
    pipe = Pipeline(cfg, buffers, sink, metrics, logging.getLogger("test"),
                    [AssetRuntime.build(a, None, None) for a in cfg.assets])
    pipe.tick(NOW)
    handler.handle(NBIRTH, _payload(0, [{"name": "bdSeq", "datatype": UINT64,
                                         "long_value": 0}]), NOW)
    handler.handle(DBIRTH, _payload(1, [FLOW, PRESSURE]), NOW)
    handler.handle(NDEATH, _payload(None, [{"name": "bdSeq", "datatype": UINT64,
                                            "long_value": 0}]), NOW + 0.5)
    pipe.tick(NOW + 0.6)
    events = [json.loads(m.payload) for m in sink.msgs if b"sensor." in m.payload]
    assert [(e["type"], e["data"]["channel"], e["data"]["reasons"]) for e in events] == [
        ("io.watchkeep.sensor.fault", "flow", ["node_death"]),
        ("io.watchkeep.sensor.fault", "pressure", ["node_death"])]
    sink.msgs.clear()
    handler.handle(NBIRTH, _payload(0, [{"name": "bdSeq", "datatype": UINT64,
                                         "long_value": 1}]), NOW + 20)
    handler.handle(DBIRTH, _payload(1, [dict(FLOW, timestamp=MS + 20_000),
                                        dict(PRESSURE, timestamp=MS + 20_000)]), NOW + 20)
    for k in range(1, 40):
        ms = MS + 20_000 + 1000 * k
        handler.handle(DDATA, _payload((k + 1) % 256, [
            {"alias": 1, "double_value": 11.0 + k % 3, "timestamp": ms},
            {"alias": 2, "float_value": 2.0 + k % 2, "timestamp": ms}]), ms / 1000)
        pipe.tick(ms / 1000 + 0.01)
    events = [json.loads(m.payload) for m in sink.msgs if b"sensor." in m.payload]
    assert sorted((e["type"], e["data"]["channel"]) for e in events) == [
        ("io.watchkeep.sensor.recovered", "flow"),
        ("io.watchkeep.sensor.recovered", "pressure")]


def test_reload_keeps_births() -> None:
    """After a reload the new config's channels read the edge node at once (births, aliases
    and sequence carried over), even a channel the old config did not have."""
    old = _decoder(_config({"flow": "Pump/Flow"}))
    _born(old, [FLOW, PRESSURE])
    new = _decoder(_config({"pressure": "Pump/Discharge Pressure", "flow": "Pump/Flow"}))
    new.adopt(old)
    got = new.decode(DDATA, _payload(2, [{"alias": 1, "double_value": 4.0},
                                         {"alias": 2, "float_value": 5.0}]), NOW)
    assert _values(got) == {"flow": (MS / 1000, 4.0), "pressure": (MS / 1000, 5.0)}
    assert [r.channel_index for r, _, _ in got] == [1, 0]  # the new config's layout
    assert new.notes == []
