"""End-to-end latency: the sample that closes a window is published -> its output arrives.

The daemon runs as a subprocess (`watchkeep run`, default config) between two real
Mosquitto brokers. Every window's retained state message (`<prefix>/assets/<asset>/
state`, QoS 1) takes the path an event takes: written to the SQLite outbox in the
tick's transaction, published at QoS 1, deleted on PUBACK; so its arrival upstream
stands for an event's. (Until December 2026 this bench turned per-window score
telemetry on and timed that; it is QoS 0 and off by default.) A publisher process
sends 8 channels per asset at 5 Hz in real time; a 1 s window with `lateness_s: 0`
closes when the first sample of the next window arrives, so latency is measured from
that sample's publish to the receipt of the window's message upstream. Beside it, in
the same run, the broker round trip of one message (publish -> receive on the local
broker). Goal: p99 <= 100 ms beyond the window's close. Run:
`python -m tests.bench latency`.
"""

from __future__ import annotations

import json
import multiprocessing as mp
import subprocess
import sys
import tempfile
import threading
import time
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
import yaml
from paho.mqtt.enums import CallbackAPIVersion

from tests.bench.common import quiet_bundle, save, table
from tests.brokers import Broker, wait_for

N_CHANNELS, RATE_HZ = 8, 5.0
FEATS = ["mean", "std", "min", "max", "rms"]
RUN_S, WARMUP_S = 20.0, 4.0


def _publisher(port: int, n_assets: int, run_s: float, q: Any) -> None:
    c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"bench-lat-pub-{n_assets}")
    c.connect("127.0.0.1", port)
    c.loop_start()
    rng = np.random.default_rng(2)
    step = 1.0 / RATE_HZ
    t = float(int(time.time()) + 2)
    t_end = t + run_s
    closing: dict[tuple[int, float], float] = {}
    while t < t_end:
        time.sleep(max(0.0, t - time.time()))
        vals = rng.normal(50, 2, (n_assets, N_CHANNELS))
        boundary = abs(t - round(t)) < 1e-6
        for a in range(n_assets):
            if boundary:
                closing[(a, round(t))] = time.time()
            for ch in range(N_CHANNELS):
                c.publish(f"lat/A{a:03d}/c{ch}",
                          json.dumps({"ts": t, "value": float(vals[a, ch])}), qos=0)
        t = round(t + step, 6)
    c.disconnect()
    c.loop_stop()
    q.put({f"{a}:{e}": w for (a, e), w in closing.items()})


def _ts(s: str) -> float:
    return datetime.fromisoformat(s.replace("Z", "+00:00")).timestamp()


def _run(n_assets: int, tmp: Path, worker: str = "process") -> dict[str, Any]:
    tmp = tmp / f"{worker}{n_assets}"
    local = Broker(tmp / "local", extra="max_queued_messages 0\n").start()
    up = Broker(tmp / "up", extra="max_queued_messages 0\n").start()
    names = [f"c{c}.{f}" for c in range(N_CHANNELS) for f in FEATS]
    z = np.random.default_rng(0).normal(size=(400, len(names)))
    bdir, _ = quiet_bundle(tmp / "bundle", names, z, mean=50.0)
    cfg = {"site": "bench", "gateway": "lat", "state_dir": str(tmp / "state"),
           "local_broker": {"port": local.port}, "upstream_broker": {"port": up.port},
           "http": {"port": 0}, "ingest": {"worker": worker},
           "assets": [{"name": f"A{a:03d}", "bundle": str(bdir),
                       "window": {"length_s": 1.0, "lateness_s": 0.0, "timeout_s": 2.0},
                       "channels": {f"c{c}": {"topic": f"lat/A{a:03d}/c{c}", "decoder": "json",
                                              "rate_hz": RATE_HZ, "features": FEATS}
                                    for c in range(N_CHANNELS)}}
                      for a in range(n_assets)]}
    cpath = tmp / "lat.yaml"
    cpath.write_text(yaml.safe_dump(cfg))
    received: dict[str, float] = {}
    lock = threading.Lock()
    sub = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"bench-lat-sub-{n_assets}")

    def on_message(cl: Any, u: Any, msg: mqtt.MQTTMessage) -> None:
        now = time.time()
        if msg.topic.endswith("/state"):
            d = json.loads(msg.payload)
            key = f"{int(d['asset'][1:])}:{round(_ts(d['window_end']))}"
            with lock:
                received.setdefault(key, now)

    sub.on_message = on_message
    sub.connect("127.0.0.1", up.port)
    sub.subscribe("watchkeep/bench/lat/assets/+/state", qos=1)
    sub.loop_start()
    rtt: list[float] = []
    ping = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"bench-lat-ping-{n_assets}")
    got = threading.Event()
    ping.on_message = lambda c, u, m: got.set()
    ping.connect("127.0.0.1", local.port)
    ping.subscribe("lat-ping", qos=0)
    ping.loop_start()
    exe = str(Path(sys.executable).with_name("watchkeep"))
    daemon = subprocess.Popen([exe, "run", "--config", str(cpath), "--log-level", "WARNING"],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        time.sleep(3.0 + n_assets * 0.01)
        q = mp.get_context("spawn").Queue()
        pub = mp.get_context("spawn").Process(target=_publisher,
                                              args=(local.port, n_assets, RUN_S, q))
        pub.start()
        t_end = time.monotonic() + RUN_S + 3
        while time.monotonic() < t_end:
            got.clear()
            t0 = time.perf_counter()
            ping.publish("lat-ping", b"x", qos=0)
            if got.wait(2.0):
                rtt.append(time.perf_counter() - t0)
            time.sleep(0.05)
        closing = q.get(timeout=60)
        pub.join(30)
        wait_for(lambda: len(received) >= 0.9 * len(closing), timeout_s=15,
                 what="window outputs upstream")
        time.sleep(1.0)
    finally:
        daemon.terminate()
        daemon.wait(30)
        for c in (sub, ping):
            c.disconnect()
            c.loop_stop()
        local.stop()
        up.stop()
    first = min(int(k.split(":")[1]) for k in closing) + WARMUP_S
    lat = [received[k] - w for k, w in closing.items()
           if k in received and int(k.split(":")[1]) >= first]
    missing = sum(1 for k in closing if k not in received and int(k.split(":")[1]) >= first)
    # By the asset's place in the publisher's burst (first tenth ... last tenth): the
    # publisher itself needs tens of milliseconds to send one instant's 1,600 samples.
    tenth = max(1, n_assets // 10)
    by_tenth = [[received[k] - w for k, w in closing.items()
                 if k in received and int(k.split(":")[1]) >= first
                 and int(k.split(":")[0]) // tenth == d] for d in range(10)]
    arr = np.asarray(lat) * 1000
    rt = np.asarray(rtt) * 1000
    return {"assets": n_assets, "windows": len(lat), "missing": missing,
            "p50_ms": float(np.percentile(arr, 50)), "p99_ms": float(np.percentile(arr, 99)),
            "rtt_p50_ms": float(np.percentile(rt, 50)), "rtt_p99_ms": float(np.percentile(rt, 99)),
            "p50_by_tenth_ms": [round(float(np.percentile(np.asarray(b) * 1000, 50)), 1)
                                for b in by_tenth if b]}


def main() -> int:
    results = []
    with tempfile.TemporaryDirectory() as d:
        # The default (ingest in a child process) at both sizes; beside it, ingest in a
        # thread of the daemon (`ingest.worker: thread`) at 200 assets.
        for n, worker in ((50, "process"), (200, "process"), (200, "thread")):
            results.append({**_run(n, Path(d), worker), "worker": worker})
    rows = [[f"end-to-end latency, {r['assets']} assets, ingest {r['worker']}",
             f"{r['p50_ms']:.0f} / {r['p99_ms']:.0f}",
             f"{r['rtt_p50_ms']:.1f} / {r['rtt_p99_ms']:.1f}", f"{r['windows']} ({r['missing']})",
             "p99 <= 100 ms beyond close"] for r in results]
    print(f"{N_CHANNELS} channels per asset at {RATE_HZ:g} Hz, 1 s windows, daemon tick 0.1 s, "
          f"{RUN_S:.0f} s per run")
    print(table(rows, ["benchmark", "watchkeep p50 / p99 ms", "broker round trip p50 / p99 ms",
                       "windows (missing)", "goal"]))
    save("latency", {"runs": results, "goal_p99_ms": 100})
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
