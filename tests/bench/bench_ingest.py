"""Ingest throughput through a real Mosquitto: watchkeep's ingest beside a bare subscriber.

Two rows, each alternating rounds of watchkeep (ingest in its child process, the
default; and in a thread of the daemon) / bare on the same broker and the same
publishers:

* scalar: `json` readings of 200 assets x 8 channels; the bare subscriber only
  `json.loads` each message;
* waveform: `json-batch` blocks of 256 samples; the bare subscriber decodes each
  block into a numpy array.

The goal's reference is the bare subscriber on plain paho. watchkeep's client reads
the socket in large chunks (`agent.ingest.mqtt_client.ReadAheadClient`), so a second bare
subscriber on that client, decoding with orjson as watchkeep's decoders do, runs in the
same rounds ("bare+ra"): the ratio against it is what the rest of watchkeep's ingest
costs. (The goal's bare subscriber decodes with the standard library's `json`, whose
float parsing is slow: a 256-sample block took 60 us against orjson's 4.7 us on one
machine, so the waveform row against it mostly measures the JSON library.)

Publishers run in separate processes (one paho publisher tops out well below what a
subscriber can take), QoS 0, pre-encoded payloads. Every round counts received
against sent: Mosquitto drops QoS 0 messages silently once a subscriber's queue is
full, so a rate without a loss count means nothing. Beside the rates, the CPU the
subscribing side used per message received (this process's, which for watchkeep
includes cutting the windows every 100 ms, plus the ingest child's with
`ingest.worker: process`; publishers and broker not counted): on two busy cores it
moves less than a rate does. Run: `python -m tests.bench ingest`.
"""

from __future__ import annotations

import json
import logging
import multiprocessing as mp
import os
import resource
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion
from prometheus_client import CollectorRegistry

from agent.config.load import parse_config
from agent.ingest.buffers import Buffers, Ingest, IngestHandler, close_inboxes
from agent.ingest.mqtt_client import ReadAheadClient
from agent.ingest.parent import ProcessIngest
from agent.ingest.protocol import Data
from agent.ops.metrics import Metrics
from tests.bench.common import median, save, table
from tests.brokers import Broker

N_ASSETS, N_CHANNELS = 200, 8
ROUNDS = 3
PUBLISHERS = 3


def _topics(kind: str) -> list[str]:
    return [f"bench/{kind}/A{a:03d}/c{c}" for a in range(N_ASSETS) for c in range(N_CHANNELS)]


def _payloads(kind: str, n: int) -> list[tuple[str, bytes]]:
    topics = _topics(kind)
    out = []
    t0 = time.time()
    rng = np.random.default_rng(0)
    if kind == "scalar":
        for i in range(n):
            out.append((topics[i % len(topics)],
                        json.dumps({"ts": t0 + i * 1e-4, "value": float(rng.normal())}).encode()))
    else:
        block = [round(float(v), 5) for v in rng.normal(size=256)]
        for i in range(n):
            k = i // len(topics)
            out.append((topics[i % len(topics)],
                        json.dumps({"ts": t0 + k * 0.1, "rate_hz": 2560.0,
                                    "values": block}).encode()))
    return out


def _publisher(port: int, kind: str, n: int, seed: int, go: Any, done: Any) -> None:
    msgs = _payloads(kind, n)
    c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"bench-pub-{kind}-{seed}")
    c.max_queued_messages_set(0)
    c.connect("127.0.0.1", port)
    c.loop_start()
    go.wait()
    t0 = time.perf_counter()
    last = None
    for topic, payload in msgs:
        last = c.publish(topic, payload, qos=0)
    if last is not None:
        last.wait_for_publish(60)
    done.put(n / (time.perf_counter() - t0))
    c.disconnect()
    c.loop_stop()


class _Counter:
    def __init__(self) -> None:
        self.n = 0
        self.first = 0.0
        self.last = 0.0

    def hit(self, k: int = 1) -> None:
        now = time.perf_counter()
        if self.n == 0:
            self.first = now
        self.n += k
        self.last = now


def _bare(port: int, kind: str, counter: _Counter, read_ahead: bool = False) -> mqtt.Client:
    cls = ReadAheadClient if read_ahead else mqtt.Client
    c = cls(CallbackAPIVersion.VERSION2, client_id=f"bench-bare-{kind}")
    ready = threading.Event()
    loads = orjson.loads if read_ahead else json.loads  # bare+ra: watchkeep's JSON library

    def on_message(cl: Any, u: Any, msg: mqtt.MQTTMessage) -> None:
        doc = loads(msg.payload)
        if kind == "waveform":
            np.asarray(doc["values"], dtype=np.float64)
        counter.hit()

    c.on_message = on_message
    c.on_subscribe = lambda *a: ready.set()
    c.connect("127.0.0.1", port)
    c.subscribe(f"bench/{kind}/#", qos=0)
    c.loop_start()
    ready.wait(10)
    return c


def _config(kind: str, port: int, tmp: Path):
    decoder = "json" if kind == "scalar" else "json-batch"
    rate = 10 if kind == "scalar" else 2560
    doc = {"site": "bench", "gateway": "gw", "state_dir": str(tmp),
           "local_broker": {"port": port, "client_id": f"bench-wk-{kind}"},
           "ingest": {"max_clock_skew_s": 1e6},
           "assets": [{"name": f"A{a:03d}", "channels": {
               f"c{c}": {"topic": f"bench/{kind}/A{a:03d}/c{c}", "decoder": decoder,
                         "rate_hz": rate} for c in range(N_CHANNELS)}}
               for a in range(N_ASSETS)]}
    return parse_config(doc, tmp)


def _watchkeep(port: int, kind: str, counter: _Counter, tmp: Path, worker: str):
    cfg = _config(kind, port, tmp)
    metrics = Metrics(CollectorRegistry())
    buffers = Buffers(cfg)
    log = logging.getLogger("bench")
    handler = IngestHandler(cfg, buffers, metrics, log)
    ingest: Ingest | ProcessIngest
    if worker == "thread":
        inner = handler.handle

        def handle(topic: str, payload: bytes, arrival: float) -> None:
            inner(topic, payload, arrival)
            counter.hit()

        handler.handle = handle  # type: ignore[method-assign]
        ingest = Ingest(cfg, handler, metrics, log)
    else:
        # Counted where the samples land: in the daemon's window stores, after the
        # child decoded them and the daemon applied its batch.
        ingest = ProcessIngest(cfg, handler, metrics, log)
        apply = ingest._apply

        def apply_counted(msg: Data) -> None:
            apply(msg)
            # Messages: one per scalar sample, one per json-batch block.
            counter.hit(len(msg.keys) + (len(msg.blocks.keys) if msg.blocks else 0))

        ingest._apply = apply_counted  # type: ignore[method-assign]
    stop = threading.Event()

    def drain() -> None:  # the pipeline's share of the buffers: close windows every 100 ms
        while not stop.wait(0.1):
            close_inboxes([chans[0].inbox for chans in buffers.by_asset], time.time())

    th = threading.Thread(target=drain, daemon=True)
    th.start()
    ingest.start()
    ingest.connected.wait(10)
    time.sleep(0.5)  # subscriptions are sent in on_connect; give the SUBACK time
    return ingest, stop, metrics


def _cpu_s(pid: int | None = None) -> float:
    """CPU seconds (user + system) of this process, or of process `pid` (Linux)."""
    if pid is None:
        r = resource.getrusage(resource.RUSAGE_SELF)
        return r.ru_utime + r.ru_stime
    try:
        with open(f"/proc/{pid}/stat") as f:
            fields = f.read().rsplit(")", 1)[1].split()
    except OSError:
        return 0.0
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def _round(port: int, kind: str, which: str, n_per_pub: int, tmp: Path) -> dict[str, float]:
    counter = _Counter()
    child: int | None = None
    if which in ("bare", "bare-readahead"):
        sub = _bare(port, kind, counter, read_ahead=which == "bare-readahead")
        closer = lambda: (sub.disconnect(), sub.loop_stop())  # noqa: E731
        rejected = lambda: 0.0  # noqa: E731
    else:
        ingest, stop, metrics = _watchkeep(port, kind, counter, tmp, which.split("-")[1])

        def closer() -> None:
            stop.set()
            ingest.stop()

        def rejected() -> float:
            return sum(s.value for f in metrics.registry.collect()
                       if f.name == "watchkeep_messages_rejected" for s in f.samples
                       if s.name.endswith("_total"))

        child = getattr(ingest, "worker_pid", None)
    ctx = mp.get_context("spawn")
    go, done = ctx.Event(), ctx.Queue()
    procs = [ctx.Process(target=_publisher, args=(port, kind, n_per_pub, i, go, done))
             for i in range(PUBLISHERS)]
    for p in procs:
        p.start()
    time.sleep(2.0 if kind == "scalar" else 3.0)  # publishers build their payloads
    cpu0 = _cpu_s() + (_cpu_s(child) if child else 0.0)
    go.set()
    pub_rates = [done.get(timeout=300) for _ in procs]
    for p in procs:
        p.join(60)
    sent = n_per_pub * PUBLISHERS
    deadline = time.monotonic() + 30
    prev = -1
    while counter.n < sent and time.monotonic() < deadline:
        if counter.n == prev and time.perf_counter() - counter.last > 2.0:
            break  # nothing more is coming: the rest was dropped
        prev = counter.n
        time.sleep(0.2)
    cpu = _cpu_s() + (_cpu_s(child) if child else 0.0) - cpu0
    closer()
    span = max(1e-9, counter.last - counter.first)
    return {"rate": counter.n / span, "received": counter.n, "sent": sent,
            "lost": sent - counter.n, "rejected": rejected(),
            "publishers_rate": sum(pub_rates),
            "cpu_us_per_msg": 1e6 * cpu / max(1, counter.n)}


def main() -> int:
    rows, doc = [], {}
    broken: list[str] = []  # rows that counted nothing
    variants = ("wk-process", "wk-thread", "bare", "bare-readahead")
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        broker = Broker(tmp / "broker", extra="max_queued_messages 0\n"
                        "max_queued_bytes 0\n").start()
        try:
            for kind, n_per_pub in (("scalar", 60_000), ("waveform", 6_000)):
                res: dict[str, list[dict[str, float]]] = {v: [] for v in variants}
                for _ in range(ROUNDS):
                    for which in variants:
                        res[which].append(_round(broker.port, kind, which, n_per_pub, tmp))
                br = median([r["rate"] for r in res["bare"]])
                br_cpu = median([r["cpu_us_per_msg"] for r in res["bare"]])
                lost_br = sum(r["lost"] for r in res["bare"]) + \
                    sum(r["lost"] for r in res["bare-readahead"])
                ra = median([r["rate"] for r in res["bare-readahead"]])
                ra_cpu = median([r["cpu_us_per_msg"] for r in res["bare-readahead"]])
                pub = median([r["publishers_rate"] for v in variants for r in res[v]])
                unit = "msg/s" if kind == "scalar" else "samples/s"
                mult = 1 if kind == "scalar" else 256
                doc[kind] = {"bare_per_s": br * mult, "goal": 0.8, "rounds": res,
                             "publishers_msg_per_s": pub, "bare_cpu_us_per_msg": br_cpu,
                             "bare_readahead_per_s": ra * mult,
                             "bare_readahead_cpu_us_per_msg": ra_cpu}
                for v in ("wk-process", "wk-thread"):
                    wk = median([r["rate"] for r in res[v]])
                    wk_cpu = median([r["cpu_us_per_msg"] for r in res[v]])
                    lost_wk = sum(r["lost"] for r in res[v])
                    limited = "subscriber" if pub > 1.2 * max(wk, br) else "publishers"
                    mode = v.split("-")[1]
                    rows.append([f"{kind} ingest ({unit}), ingest {mode}", f"{wk * mult:,.0f}",
                                 f"{br * mult:,.0f}", f"{wk / br:.2f}", ">= 0.8",
                                 f"{wk / ra:.2f}", f"{wk_cpu:.1f} / {br_cpu:.1f} / {ra_cpu:.1f}",
                                 f"{lost_wk}/{lost_br}", f"{pub:,.0f} msg/s", limited])
                    if not wk:
                        broken.append(f"{kind}, ingest {mode}")
                    doc[kind][mode] = {"watchkeep_per_s": wk * mult, "ratio": wk / br,
                                       "ratio_to_bare_readahead": wk / ra,
                                       "limited_by": limited, "lost": lost_wk,
                                       "cpu_us_per_msg": wk_cpu}
        finally:
            broker.stop()
    print(f"{N_ASSETS} assets x {N_CHANNELS} channels, {PUBLISHERS} publisher processes, "
          f"{ROUNDS} alternating rounds, QoS 0")
    print(table(rows, ["benchmark", "watchkeep", "bare", "ratio", "goal", "vs bare+ra",
                       "CPU us/msg wk/bare/bare+ra", "lost wk/bare", "publishers",
                       "limited by"]))
    print("bare: plain paho and json.loads, as the goal defines it; bare+ra: the same "
          "subscriber on watchkeep's read-ahead paho client (agent/ingest/mqtt_client.py) with "
          "orjson, watchkeep's JSON library, for what the rest of watchkeep's ingest costs")
    save("ingest", doc)
    if broken:  # nothing counted: the bench's hook into ingest broke, not a slow machine
        print("ingest bench measured nothing for:", "; ".join(broken))
        return 1
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
