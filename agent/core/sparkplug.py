"""The `sparkplug-b` decoder: Sparkplug B 3.0 payloads on `spBv1.0/...` topics -> samples.

Pure: the arrival time is a parameter, and nothing here reads a clock, a socket or a
file. Unlike the other decoders it keeps state, per edge node and device, because a
Sparkplug data message is only readable against the birth certificate before it:

* NBIRTH / DBIRTH declare every metric with its name, alias and datatype (spec 3.0,
  chapter 6 Payloads, "Metric": tck-id-payloads-alias-birth-requirement,
  tck-id-payloads-metric-datatype-req); their values are samples too;
* NDATA / DDATA name a metric by its alias (or, where aliases are not used, its name)
  and carry its value in the protobuf field its datatype prescribes ("Datatype
  Details"); a metric's timestamp, else the payload's, is the sample time (ms since
  epoch, UTC: "Payload", "Metric"), else the arrival;
* every message of an edge node but NDEATH carries a sequence number that follows the
  previous one modulo 256, starting at 0 in the NBIRTH
  (tck-id-payloads-sequence-num-incrementing, tck-id-payloads-nbirth-seq): a jump is a
  gap (messages lost between the edge node and us);
* NDEATH (the edge node's MQTT will, with the bdSeq of the NBIRTH it ends:
  tck-id-payloads-ndeath-bdseq) and DDEATH end what their birth declared: the
  channels of that node or device go offline at once, until the next birth.

One message carries many metrics, so a topic feeds several channels (one per metric
name). `SparkplugDecoder.decode` returns the samples; anything rarer (a gap, a death, a
birth, a per-metric rejection, a rebirth request) is queued in `notes` for the caller
(`agent.ingest.mqtt.IngestHandler`) to count, log and hand on.

The protobuf schema is the specification's (`agent/sparkplug_b`, EPL-2.0); protobuf's
C parser (upb) reads the payload, and this module only walks the metrics it needs.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from enum import IntEnum
from typing import Any

from google.protobuf.message import DecodeError

from agent.config.schema import SPARKPLUG_NAMESPACE, ChannelConfig, Decoder, sparkplug_topic
from agent.core.decode import Block, Reason, Rejected
from agent.core.routing import Route
from agent.core.sparkplug_payload import (
    BDSEQ_METRIC,
    READ,
    array_values,
    converter,
    int_of,
    rebirth_request,
)
from agent.sparkplug_b.sparkplug_b_pb2 import Payload

__all__ = ["Note", "SparkplugDecoder", "is_sparkplug", "rebirth_request"]

SEQ_MODULUS = 256  # seq counts 0..255 and wraps (tck-id-payloads-sequence-num-incrementing)


class Note(IntEnum):
    """What `SparkplugDecoder.notes` holds, besides samples."""

    REJECTED = 1  # (REJECTED, reason, detail): one metric or message not used
    GAP = 2       # (GAP, routes, detail): messages of the edge node were lost
    OFFLINE = 3   # (OFFLINE, routes, reason, time): a death certificate
    ONLINE = 4    # (ONLINE, routes, time): a birth after a death
    REBIRTH = 5   # (REBIRTH, topic, payload): ask the edge node for its births again
    LOG = 6       # (LOG, key, message, fields): worth a (rate-limited) log line


@dataclass
class _Device:
    """One birth's metric table: name/alias -> (routes, field, kind, converter (None for
    an array), datatype, the route when there is one only) or None for a metric no
    channel reads."""

    by_alias: dict[int, Any]
    by_name: dict[str, Any]
    alias_first: bool = False

    def __post_init__(self) -> None:
        self.alias_first = bool(self.by_alias) and 0 not in self.by_alias


Declared = list[tuple[str, int | None, int]]  # a birth's metrics: (name, alias, datatype)


@dataclass
class _Node:
    born: bool = False
    seq: int | None = None
    bd_seq: int | None = None
    offline: bool = False
    last_rebirth: float = -math.inf
    node_metrics: _Device | None = None
    devices: dict[str, _Device] | None = None
    offline_devices: set[str] | None = None
    # What the current births declared (None: the node's own NBIRTH), so a reload can
    # bind its new channels without waiting for the next birth.
    declared: dict[str | None, Declared] | None = None


_MISSING = object()
_IGNORED = frozenset({"NCMD", "DCMD", "STATE"})
_TOPIC_CACHE = 65536  # topics of the watched edge nodes remembered (bounded)
_parse = Payload.FromString


class SparkplugDecoder:
    """Births, sequence numbers and deaths of every edge node some channel reads.

    `routes` are the sparkplug-b channels' routes; several may share a topic (one per
    metric). `rebirth_interval_s`: at most one rebirth request per edge node in that
    time (None: never request one).
    """

    def __init__(self, routes: Iterable[Route], *, max_payload_bytes: int,
                 max_skew_s: float, rebirth_interval_s: float | None = None) -> None:
        self.max_payload_bytes = max_payload_bytes
        self.max_skew_s = max_skew_s
        self.rebirth_interval_s = rebirth_interval_s
        self.notes: list[tuple[Any, ...]] = []
        # (group, node) -> device (None for the node itself) -> metric name -> routes
        self._wanted: dict[tuple[str, str], dict[str | None, dict[str, list[Route]]]] = {}
        for r in routes:
            ch = r.channel
            spb = sparkplug_topic(ch.topic)
            if ch.decoder is not Decoder.SPARKPLUG_B or spb is None or ch.metric is None:
                raise ValueError(f"{ch.name}: not a sparkplug-b channel")
            group, _, node, device = spb
            per_dev = self._wanted.setdefault((group, node), {})
            per_dev.setdefault(device, {}).setdefault(ch.metric, []).append(r)
        self._nodes = {k: _Node() for k in self._wanted}
        # topic -> (node, verb, group, edge node, device): one look-up per message
        self._topics: dict[str, tuple[_Node, str, str, str, str | None]] = {}

    # -- what to subscribe to -------------------------------------------------------------

    def filters(self) -> set[str]:
        """One MQTT filter per edge node: every message of it (births, data, deaths, and
        the data of devices no channel reads, whose sequence numbers count too)."""
        return {f"{SPARKPLUG_NAMESPACE}/{g}/+/{n}/#" for g, n in self._wanted}

    def routes_of(self, group: str, node: str) -> list[Route]:
        """The routes of an edge node: its own metrics' and all its devices'."""
        per_dev = self._wanted.get((group, node), {})
        return [r for d in per_dev.values() for rs in d.values() for r in rs]

    def device_routes(self, group: str, node: str, device: str | None) -> list[Route]:
        """The routes of one device (None: the edge node's own metrics)."""
        per_dev = self._wanted.get((group, node), {})
        return [r for rs in per_dev.get(device, {}).values() for r in rs]

    # -- decoding ----------------------------------------------------------------------------

    def decode(self, topic: str, payload: bytes, arrival: float
               ) -> list[tuple[Route, float, float | Block]]:
        """The samples of one message; raises `Rejected` for a message of no use."""
        info = self._topics.get(topic)
        if info is None:
            info = self._topic_info(topic)
        node, verb, group, node_id, device = info
        if verb in _IGNORED:  # commands to the node: not its data
            return []
        if len(payload) > self.max_payload_bytes:
            raise Rejected(Reason.TOO_LARGE, f"{len(payload)} bytes > {self.max_payload_bytes}")
        try:
            msg = _parse(payload)
        except DecodeError as exc:
            raise Rejected(Reason.MALFORMED, f"not a Sparkplug B payload: {exc}"[:120]
                           ) from None
        if verb == "DDATA" or verb == "NDATA":
            if node.born:
                table = node.node_metrics if device is None \
                    else node.devices.get(device)  # type: ignore[union-attr]
                seq = msg.seq
                if seq or msg.HasField("seq"):  # every message but NDEATH carries one
                    last = node.seq
                    node.seq = seq
                    if last is not None and seq != (last + 1) % SEQ_MODULUS:
                        self._gap(node, seq, last, group, node_id, arrival)
                if table is not None:
                    return self._samples(msg, table, arrival, group, node_id)
            if device in self._wanted[(group, node_id)]:
                self._unborn(node, group, node_id, device, arrival)
            return []
        if verb == "NBIRTH":
            return self._nbirth(node, msg, group, node_id, arrival)
        if verb == "DBIRTH" and device is not None:
            if not node.born:
                if device in self._wanted[(group, node_id)]:
                    self._unborn(node, group, node_id, device, arrival)
                return []
            if not msg.HasField("seq"):  # MUST have one (tck-id-payloads-dbirth-seq): else
                # no gap shows, and one redeclaring an alias blinds a channel for good
                raise Rejected(Reason.MALFORMED, "DBIRTH without a sequence number")
            self._check_seq(node, msg, group, node_id, arrival)
            return self._dbirth(node, msg, group, node_id, device, arrival)
        if verb == "NDEATH":
            self._ndeath(node, msg, group, node_id, arrival)
            return []
        if verb == "DDEATH" and device is not None:
            if node.born:
                self._check_seq(node, msg, group, node_id, arrival)
            self._ddeath(node, group, node_id, device, arrival)
            return []
        raise Rejected(Reason.UNKNOWN_TOPIC, f"Sparkplug message type {verb!r}")

    def _unborn(self, node: _Node, group: str, node_id: str, device: str | None,
                arrival: float) -> None:
        """Data (or a DBIRTH) before the birth it needs: lost for the channels it feeds."""
        routes = self.device_routes(group, node_id, device)
        if routes:
            self.notes.append((Note.GAP, routes, "data before its birth certificate"))
        self._ask_rebirth(node, group, node_id, arrival)
        where = f"{group}/{node_id}" + (f"/{device}" if device else "")
        raise Rejected(Reason.NO_BIRTH, f"{where}: no birth certificate seen yet")

    def _topic_info(self, topic: str) -> tuple[_Node, str, str, str, str | None]:
        parts = topic.split("/")
        if len(parts) not in (4, 5) or parts[0] != SPARKPLUG_NAMESPACE:
            raise Rejected(Reason.UNKNOWN_TOPIC, "not a Sparkplug B edge node topic")
        group, verb, node_id = parts[1], parts[2], parts[3]
        node = self._nodes.get((group, node_id))
        if node is None:
            raise Rejected(Reason.UNKNOWN_TOPIC, "an edge node no channel reads")
        info = (node, verb, group, node_id, parts[4] if len(parts) == 5 else None)
        if len(self._topics) < _TOPIC_CACHE:
            self._topics[topic] = info
        return info

    def _check_seq(self, node: _Node, msg: Any, group: str, node_id: str,
                   arrival: float) -> None:
        if not msg.HasField("seq"):
            return  # every message but NDEATH MUST carry one; nothing to compare
        seq = msg.seq
        last = node.seq
        node.seq = seq
        if last is not None and seq != (last + 1) % SEQ_MODULUS:
            self._gap(node, seq, last, group, node_id, arrival)

    def _gap(self, node: _Node, seq: int, last: int, group: str, node_id: str,
             arrival: float) -> None:
        routes = self.routes_of(group, node_id)
        self.notes.append((Note.GAP, routes, f"seq {seq} after {last}"))
        self._ask_rebirth(node, group, node_id, arrival)

    def _ask_rebirth(self, node: _Node, group: str, node_id: str, arrival: float) -> None:
        every = self.rebirth_interval_s
        if every is None or arrival - node.last_rebirth < every:
            return
        node.last_rebirth = arrival
        self.notes.append((Note.REBIRTH, f"{SPARKPLUG_NAMESPACE}/{group}/NCMD/{node_id}",
                           rebirth_request(arrival)))

    # -- births and deaths ----------------------------------------------------------------

    def adopt(self, old: SparkplugDecoder) -> None:
        """Carry the births, sequence numbers and deaths of `old` (the decoder of the
        config before a reload) over for the edge nodes both read, bound to this config's
        channels: a reload must not wait for every edge node's next birth."""
        for key, was in old._nodes.items():
            node = self._nodes.get(key)
            if node is None:
                continue
            wanted = self._wanted[key]
            node.born, node.seq, node.bd_seq = was.born, was.seq, was.bd_seq
            node.offline, node.last_rebirth = was.offline, was.last_rebirth
            node.offline_devices = set(was.offline_devices or ())
            node.declared = dict(was.declared or {})
            where = "/".join(key)
            node.node_metrics = None if None not in node.declared or not was.born \
                else self._table(node.declared[None], wanted.get(None, {}), where)
            node.devices = None if not was.born else {
                d: self._table(decl, wanted.get(d, {}), f"{where}/{d}")
                for d, decl in node.declared.items() if d is not None}

    @staticmethod
    def _declared(msg: Any) -> Declared:
        return [(m.name, m.alias if m.HasField("alias") else None, m.datatype)
                for m in msg.metrics]

    def _table(self, declared: Declared, wanted: dict[str, list[Route]], where: str
               ) -> _Device:
        """The metric table of a birth: every declared metric, the wanted ones bound."""
        by_alias: dict[int, Any] = {}
        by_name: dict[str, Any] = {}
        for name, alias, dtype in declared:
            routes = wanted.get(name)
            entry: Any = None
            if routes is not None:
                read = READ.get(dtype)
                if read is None:
                    self.notes.append((Note.REJECTED, Reason.WRONG_TYPE,
                                       f"{where} {name!r}: datatype {dtype} is not a "
                                       "number, a boolean or an array of them"))
                else:
                    field, kind, bits = read
                    entry = (routes, field, kind, converter(kind, bits), dtype,
                             routes[0] if len(routes) == 1 else None)
            by_name[name] = entry
            if alias is not None:
                by_alias[alias] = entry
        missing = sorted(set(wanted) - set(by_name))
        if missing:
            self.notes.append((Note.LOG, f"spb_missing:{where}", "metric not in the birth "
                               "certificate", {"where": where, "metrics": ",".join(missing)}))
        return _Device(by_alias, by_name)

    def _nbirth(self, node: _Node, msg: Any, group: str, node_id: str, arrival: float
                ) -> list[tuple[Route, float, float | Block]]:
        wanted = self._wanted[(group, node_id)]
        node.born = True
        node.seq = msg.seq if msg.HasField("seq") else None
        node.bd_seq = None
        for m in msg.metrics:
            if m.name == BDSEQ_METRIC:
                node.bd_seq = int_of(m)
        declared = self._declared(msg)
        table = self._table(declared, wanted.get(None, {}), f"{group}/{node_id}")
        node.node_metrics = table
        node.devices = {}  # a new NBIRTH starts a new session: DBIRTHs follow it
        node.declared = {None: declared}
        if node.offline:
            node.offline = False
            routes = self.device_routes(group, node_id, None)
            if routes:
                self.notes.append((Note.ONLINE, routes, arrival))
        return self._samples(msg, table, arrival, group, node_id)

    def _dbirth(self, node: _Node, msg: Any, group: str, node_id: str, device: str,
                arrival: float) -> list[tuple[Route, float, float | Block]]:
        wanted = self._wanted[(group, node_id)]
        declared = self._declared(msg)
        table = self._table(declared, wanted.get(device, {}), f"{group}/{node_id}/{device}")
        if node.devices is None:
            node.devices = {}
        node.devices[device] = table
        if node.declared is None:
            node.declared = {}
        node.declared[device] = declared
        off = node.offline_devices
        if off is not None and device in off:
            off.discard(device)
            routes = self.device_routes(group, node_id, device)
            if routes:
                self.notes.append((Note.ONLINE, routes, arrival))
        return self._samples(msg, table, arrival, group, node_id)

    def _ndeath(self, node: _Node, msg: Any, group: str, node_id: str, arrival: float
                ) -> None:
        bd = next((int_of(m) for m in msg.metrics if m.name == BDSEQ_METRIC), None)
        if node.born and node.bd_seq is not None and bd is not None and bd != node.bd_seq:
            # The will of an earlier session, delivered late: the edge node is alive in
            # a newer one (tck-id-payloads-ndeath-bdseq pairs a death with its birth).
            self.notes.append((Note.LOG, f"spb_stale_death:{group}/{node_id}",
                               "NDEATH of an earlier session ignored",
                               {"node": f"{group}/{node_id}", "bdSeq": bd,
                                "birth_bdSeq": node.bd_seq}))
            return
        node.born = False
        node.seq = None
        node.node_metrics = None
        node.declared = None
        devices = set(node.devices or ()) | set(self._wanted[(group, node_id)]) - {None}
        node.devices = None
        node.offline = True
        node.offline_devices = {d for d in devices if d is not None}
        routes = self.routes_of(group, node_id)
        if routes:
            self.notes.append((Note.OFFLINE, routes, "node_death", arrival))

    def _ddeath(self, node: _Node, group: str, node_id: str, device: str, arrival: float
                ) -> None:
        if node.devices is not None:
            node.devices.pop(device, None)
        if node.declared is not None:
            node.declared.pop(device, None)
        if node.offline_devices is None:
            node.offline_devices = set()
        node.offline_devices.add(device)
        routes = self.device_routes(group, node_id, device)
        if routes:
            self.notes.append((Note.OFFLINE, routes, "device_death", arrival))

    # -- values -----------------------------------------------------------------------------

    def _samples(self, msg: Any, table: _Device, arrival: float, group: str, node_id: str
                 ) -> list[tuple[Route, float, float | Block]]:
        """The samples of a message's metrics, read against its birth's `table`. Each field
        read from a parsed message costs a dict look-up or more (upb makes a Python object
        per access): as few are read as possible. By alias first where the birth declared
        aliases (then data carries only them: tck-id-payloads-alias-data-cmd-requirement);
        an unset alias reads as 0, so a birth that gave alias 0 is looked up by name."""
        out: list[tuple[Route, float, float | Block]] = []
        by_alias, by_name, alias_first = table.by_alias, table.by_name, table.alias_first
        msg_ts = -1  # the payload's timestamp, read when a metric has none
        unknown = 0
        skew, append, isfinite = self.max_skew_s, out.append, math.isfinite
        last_ms = -1  # metrics of one message mostly share a timestamp: convert it once
        ts, skewed = arrival, False
        for m in msg.metrics:
            if alias_first:
                entry = by_alias.get(m.alias, _MISSING)
                if entry is _MISSING:
                    name = m.name
                    entry = by_name.get(name, _MISSING) if name else _MISSING
            else:
                name = m.name
                entry = by_name.get(name, _MISSING) if name \
                    else by_alias.get(m.alias, _MISSING)
            if entry is None:
                continue  # declared in the birth, read by no channel
            if entry is _MISSING:
                unknown += 1
                continue
            routes, field, kind, convert, dtype, route = entry
            raw = getattr(m, field)
            if not raw and self._unset(m, field, dtype, group, node_id):
                continue
            ms = m.timestamp
            if not ms:
                ms = msg_ts = msg.timestamp if msg_ts < 0 else msg_ts
            if ms != last_ms:
                last_ms = ms
                ts = ms / 1000.0 if ms else arrival
                skewed = abs(ts - arrival) > skew
            if skewed:
                self.notes.append((Note.REJECTED, Reason.CLOCK_SKEW,
                                   f"ts {ts:.3f} is {ts - arrival:+.0f} s from now"))
                continue
            if convert is None:
                self._array(routes, ts, raw, dtype, kind, append, arrival)
                continue
            value = convert(raw)
            if not isfinite(value):  # a Float or Double only
                self.notes.append((Note.REJECTED, Reason.NON_FINITE, f"{value}"))
                continue
            if route is not None:  # the usual case: one channel reads the metric
                append((route, ts, value))
            else:
                for r in routes:
                    append((r, ts, value))
        if unknown:
            self._unknown(unknown, group, node_id, arrival)
        return out

    def _unset(self, m: Any, field: str, dtype: int, group: str, node_id: str) -> bool:
        """For a metric whose field reads as 0 / false / empty: True (skip it) when that
        field is not the member of the `value` oneof it holds. An unset member reads so
        too, so only then is the oneof asked which member it holds (a third of the cost
        of a metric): none with `is_null` is no value this time (not a fault); another
        member is the wrong type for the datatype."""
        which = m.WhichOneof("value")
        if which == field:
            return False
        if which is None and m.is_null:
            return True
        self.notes.append((Note.REJECTED, Reason.WRONG_TYPE,
                           f"{group}/{node_id} {m.name or m.alias}: {which} "
                           f"for datatype {dtype}"))
        return True

    def _array(self, routes: list[Route], ts: float, raw: bytes, dtype: int, kind: int,
               append: Callable[[tuple[Route, float, float | Block]], None],
               arrival: float) -> None:
        """An array metric: one block of its values for each route (none, with a note,
        when the array is malformed, holds a non-finite value, or ends beyond the clock
        skew of `arrival`)."""
        try:
            values = array_values(raw, dtype, kind)
        except ValueError as exc:
            self.notes.append((Note.REJECTED, Reason.MALFORMED, str(exc)))
            return
        if not values:
            return
        if not math.isfinite(math.fsum(values)) and not all(map(math.isfinite, values)):
            self.notes.append((Note.REJECTED, Reason.NON_FINITE, "array sample"))
            return
        for r in routes:
            block = Block(ts, r.channel.rate_hz, values)
            last = block.time_of(len(values) - 1)  # bounded like json-batch's (decode.py)
            if not abs(last - arrival) <= self.max_skew_s:
                self.notes.append((Note.REJECTED, Reason.CLOCK_SKEW, f"an array of "
                                   f"{len(values)} samples ends {last - arrival:+.0f} s away"))
                continue
            append((r, ts, block))

    def _unknown(self, unknown: int, group: str, node_id: str, arrival: float) -> None:
        """Metrics not in the birth: counted, and the edge node asked for a rebirth."""
        self.notes.append((Note.REJECTED, Reason.UNKNOWN_ALIAS,
                           f"{group}/{node_id}: {unknown} metrics not in the birth"))
        node = self._nodes[(group, node_id)]
        self._ask_rebirth(node, group, node_id, arrival)


def is_sparkplug(ch: ChannelConfig) -> bool:
    return ch.decoder is Decoder.SPARKPLUG_B
