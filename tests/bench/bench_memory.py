"""Memory: the daemon's RSS in steady state, 200 assets x 8 channels, 10 s windows.

The daemon runs as a subprocess (`watchkeep run`) with a model per asset, fed by a
publisher process at 2 Hz per channel (3,200 messages/s); memory is read from /proc
every 2 s and the steady state is the median of the last half. With `ingest.worker:
process` (the default) the daemon has a child, so both are counted: RSS summed over
the two (pages of shared libraries counted twice, an upper bound) and PSS summed
(each shared page split between the processes mapping it: what the service really
adds to the machine). The same run is repeated with `ingest.worker: thread`. Beside
them: a bare Python process that imports the same libraries. Goal: <= 150 MB total.
Run: `python -m tests.bench memory`.
"""

from __future__ import annotations

import json
import multiprocessing as mp
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
import yaml
from paho.mqtt.enums import CallbackAPIVersion

from tests.bench.common import median, quiet_bundle, save, table
from tests.brokers import Broker

N_ASSETS, N_CHANNELS, RATE_HZ = 200, 8, 2.0
FEATS = ["mean", "std", "min", "max", "rms"]
RUN_S = 45.0
BARE = ("import time, numpy, onnxruntime, onnx, paho.mqtt.client, prometheus_client, yaml, "
        "orjson; time.sleep(4)")


def _proc(pid: int, name: str) -> list[str]:
    """The lines of /proc/<pid>/<name>; none once the process is gone."""
    try:
        return Path(f"/proc/{pid}/{name}").read_text().splitlines()
    except (FileNotFoundError, ProcessLookupError):
        return []


def rss_mb(pid: int) -> float:
    """RSS in MB; 0 for a process that is gone (a restarted ingest child)."""
    for line in _proc(pid, "status"):
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    return 0.0


def pss_mb(pid: int) -> float:
    """PSS in MB; 0 for a process that is gone."""
    for line in _proc(pid, "smaps_rollup"):
        if line.startswith("Pss:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def tree(pid: int) -> list[int]:
    """`pid` and its child processes (the ingest worker), from /proc."""
    kids: list[int] = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        try:
            kids += [int(c) for c in (task / "children").read_text().split()]
        except (FileNotFoundError, ProcessLookupError):  # the thread ended meanwhile
            continue
    return [pid, *kids]


def _publisher(port: int, run_s: float) -> None:
    c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="bench-mem-pub")
    c.connect("127.0.0.1", port)
    c.loop_start()
    rng = np.random.default_rng(1)
    topics = [f"mem/A{a:03d}/c{ch}" for a in range(N_ASSETS) for ch in range(N_CHANNELS)]
    t_end = time.time() + run_s
    step = 1.0 / RATE_HZ
    nxt = time.time()
    while nxt < t_end:
        vals = rng.normal(50, 2, len(topics))
        for topic, v in zip(topics, vals, strict=True):
            c.publish(topic, json.dumps({"ts": nxt, "value": float(v)}), qos=0)
        nxt += step
        time.sleep(max(0.0, nxt - time.time()))
    c.disconnect()
    c.loop_stop()


def _measure(worker: str) -> dict[str, Any]:
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        broker = Broker(tmp / "broker", extra="max_queued_messages 0\n").start()
        names = [f"c{c}.{f}" for c in range(N_CHANNELS) for f in FEATS]
        z = np.random.default_rng(0).normal(size=(400, len(names)))
        bdir, _ = quiet_bundle(tmp / "bundle", names, z, mean=50.0)
        cfg = {"site": "bench", "gateway": "mem", "state_dir": str(tmp / "state"),
               "local_broker": {"port": broker.port},
               "upstream_broker": {"port": broker.port},
               "http": {"port": 0}, "ingest": {"worker": worker},
               "assets": [{"name": f"A{a:03d}", "bundle": str(bdir),
                           "window": {"length_s": 10.0},
                           "channels": {f"c{c}": {"topic": f"mem/A{a:03d}/c{c}",
                                                  "decoder": "json", "rate_hz": RATE_HZ,
                                                  "features": FEATS}
                                        for c in range(N_CHANNELS)}}
                          for a in range(N_ASSETS)]}
        cpath = tmp / "watchkeep.yaml"
        cpath.write_text(yaml.safe_dump(cfg))
        exe = str(Path(sys.executable).with_name("watchkeep"))
        daemon = subprocess.Popen([exe, "run", "--config", str(cpath), "--log-level",
                                   "WARNING"], stdout=subprocess.DEVNULL,
                                  stderr=subprocess.DEVNULL)
        rss: list[float] = []
        pss: list[float] = []
        procs = 0
        try:
            time.sleep(5.0)  # models load
            pub = mp.get_context("spawn").Process(target=_publisher, args=(broker.port, RUN_S))
            pub.start()
            t_end = time.monotonic() + RUN_S
            while time.monotonic() < t_end:
                time.sleep(2.0)
                pids = tree(daemon.pid)
                procs = len(pids)
                rss.append(sum(rss_mb(p) for p in pids))
                pss.append(sum(pss_mb(p) for p in pids))
            pub.join(30)
        finally:
            daemon.terminate()
            daemon.wait(30)
            broker.stop()
    return {"worker": worker, "processes": procs,
            "steady_rss_mb": median(rss[len(rss) // 2:]), "peak_rss_mb": max(rss),
            "steady_pss_mb": median(pss[len(pss) // 2:]), "samples_rss_mb": rss,
            "samples_pss_mb": pss}


def main() -> int:
    runs = [_measure("process"), _measure("thread")]
    bare_p = subprocess.Popen([sys.executable, "-c", BARE])
    time.sleep(3.0)
    bare = rss_mb(bare_p.pid)
    bare_p.wait(10)
    rows = [[f"memory, ingest.worker {r['worker']} ({r['processes']} process"
             f"{'es' if r['processes'] > 1 else ''})",
             f"{r['steady_rss_mb']:.0f} (peak {r['peak_rss_mb']:.0f})",
             f"{r['steady_pss_mb']:.0f}", f"{bare:.0f}", "<= 150 MB total"] for r in runs]
    print(f"{N_ASSETS} assets x {N_CHANNELS} channels at {RATE_HZ:g} Hz, 10 s windows, "
          f"one ONNX session per asset, {RUN_S:.0f} s per run")
    print(table(rows, ["benchmark", "watchkeep RSS sum, MB", "PSS sum, MB",
                       "bare imports RSS, MB", "goal"]))
    doc: dict[str, Any] = {"runs": runs, "bare_rss_mb": bare, "goal_mb": 150}
    save("memory", doc)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
