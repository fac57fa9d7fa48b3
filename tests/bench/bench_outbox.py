"""Outbox write rate and replay rate after an outage, each beside a bare baseline.

Run: `.venv/bin/python -m tests.bench.bench_outbox` (or `make bench`). Writes
bench-results/outbox.json. Rounds alternate ours and the baseline so machine noise
hits both alike.

- write: `Outbox.submit` of one tick's batch + `fetch_after` + `delete` of those rows,
  against a bare sqlite3 loop doing the same inserts and deletes with the same
  pragmas (WAL, synchronous FULL for inserts and NORMAL for deletes, secure_delete FAST,
  one transaction per batch). The ticks'
  messages are built before the clock starts (building them is the pipeline's work;
  the bare loop binds one constant tuple). A round is long enough (400 ticks) for
  several WAL checkpoints on both sides: with 40 ticks one side often had none and
  the other one, which alone moved the ratio between 0.59 and 0.76.
- replay: an outbox holding N events drained by `Upstream` to a real Mosquitto
  (QoS 1, PUBACK-confirmed deletes, window 20), against a bare paho client
  publishing the same N payloads at QoS 1 with the same in-flight window and
  counting PUBACKs.
"""

from __future__ import annotations

import logging
import sqlite3
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion
from prometheus_client import CollectorRegistry

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from agent.config.load import OutboxConfig, load_config
from agent.delivery.outbox import Outbox
from agent.delivery.upstream import Upstream
from agent.ops.metrics import Metrics
from agent.pipeline.messages import Kind, OutMessage
from tests.bench.common import alternate, median, save, table
from tests.brokers import Broker, wait_for
from tests.helpers import asset_doc, write_config

BATCH = 50  # events per tick
TICKS = 400
REPLAY_N = 10_000  # ~1 s per round: connect time and the broker's last-PUBACK delay are small
WINDOW = 20
ROUNDS = 7  # fsync times vary round to round: 5 rounds gave 0.68-0.86 on one day
PAYLOAD = (b'{"specversion":"1.0","id":"0123456789abcdef","type":"io.watchkeep.anomaly.raised",'
           + b'"data":{' + b'"x":1.0,' * 70 + b'"y":0}}')
TOPIC = "watchkeep/bench/gw1/assets/P-1/events"
LOG = logging.getLogger("watchkeep.bench")
LOG.addHandler(logging.NullHandler())
LOG.propagate = False


def _batch() -> list[OutMessage]:
    return [OutMessage(TOPIC, PAYLOAD, Kind.ANOMALY) for _ in range(BATCH)]


def ours_write(d: Path) -> float:
    ob = Outbox(OutboxConfig(path=d / f"ob-{time.monotonic_ns()}.sqlite"),
                Metrics(CollectorRegistry()), LOG).open()
    batches = [_batch() for _ in range(TICKS)]
    t0 = time.perf_counter()
    for batch in batches:
        ob.submit(batch)
        ob.delete([r.id for r in ob.fetch_after(0, BATCH)])
    rate = BATCH * TICKS / (time.perf_counter() - t0)
    ob.close()
    return rate


def bare_write(d: Path) -> float:
    db = sqlite3.connect(d / f"bare-{time.monotonic_ns()}.sqlite", isolation_level=None)
    db.execute("PRAGMA journal_mode = WAL")
    db.execute("PRAGMA synchronous = FULL")
    # The same settings the outbox runs with, so the ratio compares code, not settings.
    db.execute("PRAGMA secure_delete = FAST")
    db.execute("CREATE TABLE q (id INTEGER PRIMARY KEY, topic TEXT, payload BLOB)")
    t0 = time.perf_counter()
    for _ in range(TICKS):
        db.execute("BEGIN IMMEDIATE")
        ids = [db.execute("INSERT INTO q (topic, payload) VALUES (?, ?)", (TOPIC, PAYLOAD)
                          ).lastrowid for _ in range(BATCH)]
        db.execute("COMMIT")
        # Deletes commit under NORMAL as the outbox's do (a lost delete is a duplicate).
        db.execute("PRAGMA synchronous = NORMAL")
        db.execute("BEGIN IMMEDIATE")
        db.executemany("DELETE FROM q WHERE id = ?", [(i,) for i in ids])
        db.execute("COMMIT")
        db.execute("PRAGMA synchronous = FULL")
    rate = BATCH * TICKS / (time.perf_counter() - t0)
    db.close()
    return rate


def ours_replay(d: Path, port: int) -> float:
    sub = d / f"r-{time.monotonic_ns()}"
    sub.mkdir()
    cfg = load_config(write_config(sub / "wk.yaml", port, port, [asset_doc("P-1", None)],
                                   outbox={"path": str(sub / "outbox.sqlite"),
                                           "inflight": WINDOW}))
    metrics = Metrics(CollectorRegistry())
    ob = Outbox(cfg.outbox, metrics, LOG).open()
    for _ in range(REPLAY_N // BATCH):
        ob.submit(_batch())  # stored while "upstream is down"
    up = Upstream(cfg, ob, metrics, LOG)
    t0 = time.perf_counter()
    up.start()
    wait_for(lambda: ob.counts()[0] == 0, timeout_s=120, interval_s=0.002, what="replay")
    rate = REPLAY_N / (time.perf_counter() - t0)
    up.stop()
    ob.close()
    return rate


def bare_replay(port: int) -> float:
    acked = threading.Semaphore(0)
    c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"bare-{time.monotonic_ns()}")
    c.max_inflight_messages_set(WINDOW)

    def on_publish(cl: Any, u: Any, mid: int, rc: Any, p: Any) -> None:
        acked.release()

    c.on_publish = on_publish
    t0 = time.perf_counter()
    c.connect("127.0.0.1", port)
    c.loop_start()
    for _ in range(REPLAY_N):
        c.publish(TOPIC, PAYLOAD, qos=1)
    for _ in range(REPLAY_N):
        if not acked.acquire(timeout=60):
            raise RuntimeError("bare publisher: PUBACKs missing")
    rate = REPLAY_N / (time.perf_counter() - t0)
    c.disconnect()
    c.loop_stop()
    return rate


def main() -> int:
    with tempfile.TemporaryDirectory(prefix="wk-bench-outbox-") as tmp:
        d = Path(tmp)
        broker = Broker(d / "broker").start()
        try:
            writes = alternate({"outbox": lambda: ours_write(d),
                                "bare_sqlite": lambda: bare_write(d)}, ROUNDS)
            replays = alternate({"outbox": lambda: ours_replay(d, broker.port),
                                 "bare_paho": lambda: bare_replay(broker.port)}, ROUNDS)
        finally:
            broker.stop()
    w_ours, w_bare = median(writes["outbox"]), median(writes["bare_sqlite"])
    r_ours, r_bare = median(replays["outbox"]), median(replays["bare_paho"])
    rows = [
        ["write (submit+delete, 50/tick, FULL)", f"{w_ours:,.0f}", "bare sqlite3",
         f"{w_bare:,.0f}", f"{w_ours / w_bare:.2f}"],
        ["replay after outage (QoS 1, PUBACK)", f"{r_ours:,.0f}", "bare paho",
         f"{r_bare:,.0f}", f"{r_ours / r_bare:.2f}"],
    ]
    print(table(rows, ["measure", "ours ev/s", "baseline", "baseline ev/s", "ratio"]))
    p = save("outbox", {
        "params": {"batch": BATCH, "ticks": TICKS, "replay_n": REPLAY_N, "window": WINDOW,
                   "rounds": ROUNDS, "payload_bytes": len(PAYLOAD)},
        "write_events_per_s": {"outbox": writes["outbox"], "bare_sqlite": writes["bare_sqlite"],
                               "median_ratio": w_ours / w_bare},
        "replay_events_per_s": {"outbox": replays["outbox"], "bare_paho": replays["bare_paho"],
                                "median_ratio": r_ours / r_bare},
    })
    print(f"results: {p}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
