"""sparkplug-b decode rate beside bare protobuf parsing of the same DDATA messages.

Run: `.venv/bin/python -m tests.bench sparkplug`. Writes bench-results/sparkplug.json.
Rounds alternate watchkeep's decoder and the baselines so machine noise hits all alike;
each is timed in CPU seconds of this process.

The messages: one device of an edge node with 8 metrics (4 Double, 2 Float, 1 Int16, 1
Boolean, a typical pump's set), each DDATA carrying all 8 by alias with their own
timestamps, sequence numbers following on (no gaps); 4 of the 8 metrics are read by a
channel, as on a plant where a gateway watches part of what a device publishes.

- decode: `SparkplugDecoder.decode(topic, payload, arrival)`: topic split, edge node
  look-up, protobuf parse (upb), sequence check, per metric the alias look-up, value
  field check, datatype conversion, timestamp and skew check, the samples list.
- bare: `Payload.FromString` and, per metric, its alias, timestamp and value (the least
  a consumer does to get the numbers out). The goal: decode >= 0.8 of bare.
- bare, wanted only: the same, but the timestamp and value only of the metrics whose
  alias is in a set of the 4 read (what the decoder needs; printed beside).
- parse only: `Payload.FromString` alone (printed for scale; no consumer stops there).
- handler: `IngestHandler.handle` as the ingest child runs it (routing, the decoder, the
  per-channel counts and the samples into the child's batch), for the whole ingest cost.
"""

from __future__ import annotations

import logging
import sys
import threading
import time
from pathlib import Path
from typing import Any

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from agent.config.load import parse_config
from agent.core.routing import channel_routes
from agent.core.sparkplug import SparkplugDecoder
from agent.ingest.child import _Generation
from agent.sparkplug_b.sparkplug_b_pb2 import Payload
from tests.bench.common import alternate, median, save, table

TOPIC = "spBv1.0/fernbrook-dosing/DDATA/dosing-gw/C-301"
N_MSG = 5_000
ROUNDS = 15
# CPU time of this process, not wall time: the reference machine is shared, and a round
# preempted by another process would count that process's time (the ingest bench reads
# CPU time for the same reason; DEVELOPERS.md, Performance work).
_cpu = time.process_time
METRICS = [("Pump/Flow", 10), ("Pump/Discharge Pressure", 9), ("Pump/Suction Pressure", 9),
           ("Motor/Current", 10), ("Motor/Winding Temp", 10), ("Motor/Speed", 10),
           ("Pump/Stroke", 2), ("Pump/Running", 11)]
READ = ("Pump/Flow", "Pump/Discharge Pressure", "Motor/Current", "Pump/Running")


def _config() -> Any:
    chans = {f"c{i}": {"topic": TOPIC, "decoder": "sparkplug-b", "metric": m, "rate_hz": 1}
             for i, m in enumerate(READ)}
    doc = {"site": "fernbrook", "gateway": "gw", "state_dir": "/tmp/unused",
           "ingest": {"max_clock_skew_s": 1e9},
           "assets": [{"name": "C-301", "channels": chans}]}
    return parse_config(doc, Path("."))


def _metric(p: Any, alias: int, dtype: int, ts: int, k: int) -> Any:
    m = p.metrics.add()
    m.alias = alias
    m.timestamp = ts
    if dtype == 10:
        m.double_value = 10.0 + 0.01 * k + alias
    elif dtype == 9:
        m.float_value = 2.5 + alias
    elif dtype == 2:
        m.int_value = (-k) & 0xFFFFFFFF if k % 2 else k
    else:
        m.boolean_value = bool(k % 2)
    return m


def _birth(t_ms: int) -> bytes:
    p = Payload(timestamp=t_ms, seq=1)
    for alias, (name, dtype) in enumerate(METRICS, start=1):
        m = _metric(p, alias, dtype, t_ms, 0)
        m.name = name
        m.datatype = dtype
    return p.SerializeToString()


def _messages(t0_ms: int) -> list[bytes]:
    out = []
    for k in range(N_MSG):
        p = Payload(timestamp=t0_ms + k, seq=(k + 2) % 256)
        for alias, (_, dtype) in enumerate(METRICS, start=1):
            _metric(p, alias, dtype, t0_ms + k, k)
        out.append(p.SerializeToString())
    return out


def _nbirth(t_ms: int) -> bytes:
    p = Payload(timestamp=t_ms, seq=0)
    m = p.metrics.add()
    m.name, m.datatype, m.long_value = "bdSeq", 8, 0
    return p.SerializeToString()


def _born(dec: Any, now: float) -> None:
    """An edge node and its device just born (NBIRTH seq 0, DBIRTH seq 1)."""
    t_ms = int(now * 1000)
    dec("spBv1.0/fernbrook-dosing/NBIRTH/dosing-gw", _nbirth(t_ms), now)
    dec("spBv1.0/fernbrook-dosing/DBIRTH/dosing-gw/C-301", _birth(t_ms), now)


def main() -> int:
    cfg = _config()
    now = time.time()
    msgs = _messages(int(now * 1000))
    parse = Payload.FromString

    def bare() -> float:
        t0 = _cpu()
        for raw in msgs:
            for m in parse(raw).metrics:
                m.alias  # noqa: B018 - the reads are the work measured
                m.timestamp  # noqa: B018
                getattr(m, m.WhichOneof("value"))
        return len(msgs) / (_cpu() - t0)

    wanted = {alias for alias, (name, _) in enumerate(METRICS, start=1) if name in READ}

    def bare_wanted() -> float:
        t0 = _cpu()
        for raw in msgs:
            for m in parse(raw).metrics:
                if m.alias in wanted:
                    m.timestamp  # noqa: B018
                    getattr(m, m.WhichOneof("value"))
        return len(msgs) / (_cpu() - t0)

    def parse_only() -> float:
        t0 = _cpu()
        for raw in msgs:
            parse(raw)
        return len(msgs) / (_cpu() - t0)

    def decode() -> float:
        d = SparkplugDecoder([r for r in channel_routes(cfg.assets)], max_payload_bytes=1 << 20,
                             max_skew_s=1e9)
        _born(d.decode, now)
        dec = d.decode
        t0 = _cpu()
        n = 0
        for raw in msgs:
            n += len(dec(TOPIC, raw, now))
        rate = len(msgs) / (_cpu() - t0)
        assert n == len(msgs) * len(READ) and not [x for x in d.notes if x[0] != 6]
        return rate

    def handler() -> float:
        # The child's handler with its taps; a batch that is never sent (no pipe).
        g = _Generation(0, cfg, _NullSender(), threading.Event(), logging.getLogger("b"))
        g.batch._after_add = lambda: None  # type: ignore[method-assign]
        h = g.handler
        _born(h.handle, now)
        handle = h.handle
        t0 = _cpu()
        for raw in msgs:
            handle(TOPIC, raw, now)
        rate = len(msgs) / (_cpu() - t0)
        assert len(g.batch.values) == (len(msgs) + 1) * len(READ)
        return rate

    res = alternate({"bare": bare, "bare_wanted": bare_wanted, "decode": decode,
                     "parse_only": parse_only, "handler": handler}, ROUNDS)
    ratio = [d / b for d, b in zip(res["decode"], res["bare"], strict=True)]
    ratio_wanted = [d / b for d, b in zip(res["decode"], res["bare_wanted"], strict=True)]
    ratio_parse = [d / b for d, b in zip(res["decode"], res["parse_only"], strict=True)]
    ratio_handler = [d / b for d, b in zip(res["handler"], res["bare"], strict=True)]
    rows = [[k, f"{median(v):,.0f}", f"{1e6 / median(v):.2f}"] for k, v in res.items()]
    print(f"{N_MSG} DDATA messages of {len(METRICS)} metrics by alias, {len(READ)} read; "
          f"{ROUNDS} alternating rounds")
    print(table(rows, ["", "messages/s", "us/message"]))
    print(f"decode / bare (goal >= 0.8): median {median(ratio):.3f} "
          f"(rounds {min(ratio):.3f}-{max(ratio):.3f})")
    print(f"decode / bare reading only the {len(READ)} wanted metrics: median "
          f"{median(ratio_wanted):.3f} (rounds {min(ratio_wanted):.3f}-{max(ratio_wanted):.3f})")
    print(f"decode / parse only: median {median(ratio_parse):.3f}")
    print(f"handler (whole ingest child path) / bare: median {median(ratio_handler):.3f}")
    path = save("sparkplug", {
        "messages": N_MSG, "metrics_per_message": len(METRICS), "metrics_read": len(READ),
        "rounds": ROUNDS, "rates": res,
        "ratio_decode_over_bare": {"median": median(ratio), "min": min(ratio),
                                   "max": max(ratio)},
        "ratio_decode_over_bare_wanted": {"median": median(ratio_wanted),
                                          "min": min(ratio_wanted), "max": max(ratio_wanted)},
        "ratio_decode_over_parse_only": median(ratio_parse),
        "ratio_handler_over_bare": median(ratio_handler), "goal": 0.8})
    print(f"saved {path}")
    return 0


class _NullSender:
    def send(self, msg: Any) -> None:
        pass


if __name__ == "__main__":
    sys.exit(main())
