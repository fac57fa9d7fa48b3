"""Soak: the demo plant scaled to 200 assets, for 30 minutes, on a crowded gateway.

On the same machine, all started and stopped here by PID: one Mosquitto broker (local
and upstream, as in the demo), the simulator (the plant of `watchkeep-sim run`, real
time, as four processes of 50 machines held to one wall-clock start by
tests/bench/soak_shard.py) publishing
config/demo/normal.yaml's four machines cloned 50 times (`P-101-00` ... `C-301-49`, each
clone with its original's speed changes, so modes and settling come and go), the daemon
(`watchkeep run`, config/demo/watchkeep.yaml's assets cloned the same way, each with
its original's demo model, trained once by `watchkeep demo`'s own code into `.demo/`),
and a synthetic CPU hog spinning one core.

Every 10 s: RSS and PSS of the daemon and its ingest child (/proc), the tick duration
(mean and the p99 bucket bound of `watchkeep_pipeline_tick_seconds` over the interval),
the tick lag, outbox depth, and every counter of dropped or rejected data from the
daemon's real /metrics, the broker's own dropped-message count ($SYS), and the latency
p99 of the interval's windows: the retained state message of each window, which takes
an event's path (outbox, QoS 1, PUBACK), as it arrives on the upstream side, measured
from the window's close (`window_end + lateness_s`, simulated time = wall time at speed
1), and beyond the arrival of the data due at the close (the shard's feed sample stamped
`window_end + lateness_s`: the simulator's own lag taken out, window by window). Beside
it the feed lag: how late the simulator's own samples reach a subscriber of
the local broker (a simulator that falls behind makes every window late).

The run fails on any unexplained loss after the warm-up (first 60 s): a rejected or late
sample, a gap, an incomplete or empty window, an outbox drop or write error, a callback
error, an ingest worker restart, a broker drop, or a simulator publish dropped. The
series are written to bench-results/soak.json and plotted to bench-results/soak.png
(matplotlib, the `plot` extra). Run: `python -m tests.bench soak` (30 min), or
`python -m tests.bench.bench_soak --minutes 10`; WATCHKEEP_SOAK_MINUTES works too.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import re
import signal
import subprocess
import sys
import tempfile
import threading
import time
import urllib.request
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
import yaml
from paho.mqtt.enums import CallbackAPIVersion

from tests.bench.bench_memory import pss_mb, rss_mb, tree
from tests.bench.common import RESULTS, save, table
from tests.brokers import Broker, free_port, wait_for

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "config" / "demo"
COPIES = 50  # x 4 demo machines = 200 assets (the gateway; --assets to profile)
# The simulator in processes of a quarter of the plant each (one Python process cannot
# format and publish 200 machines' 2,560 Hz vibration in real time beside the hog).
SIM_SHARDS = 4
INTERVAL_S = 10.0
WARMUP_S = 60.0
HOG = "import time\nwhile True:\n    pass\n"
# Other work on the machine (median, % of one core) above which the run is not the
# crowded gateway the issue describes but a busier machine.
OTHERS_QUIET_PCT = 25.0
# Counters whose growth after the warm-up is a loss (labels are kept apart per series).
LOSS = ("watchkeep_messages_rejected_total", "watchkeep_late_samples_total",
        "watchkeep_sample_gaps_total", "watchkeep_outbox_dropped_total",
        "watchkeep_outbox_write_errors_total", "watchkeep_callback_errors_total",
        "watchkeep_ingest_worker_restarts_total", "watchkeep_outbox_corrupt_resets_total")
# Windows skipped for these reasons lost data; the others (settling after a speed change,
# a mode without a model, a faulty sensor) are the plant's doing.
LOSS_SKIPS = ("incomplete", "no_data")


def clone_name(name: str, k: int) -> str:
    return f"{name}-{k:02d}"


def clone_index(name: str) -> int:
    """k of `clone_name(_, k)`."""
    return int(name.rsplit("-", 1)[1])


def scaled_scenario(minutes: float, shard: int = 0, shards: int = 1,
                    copies: int = COPIES) -> dict[str, Any]:
    """normal.yaml's machines, each cloned `copies` times with its own speed changes; the
    clones k with k % shards == shard."""
    doc = yaml.safe_load((DEMO / "normal.yaml").read_text())
    span = minutes * 60 + 120
    assets, timeline = [], []
    for k in range(shard, copies, shards):
        for a in doc["assets"]:
            assets.append({**a, "name": clone_name(a["name"], k)})
        for ev in doc["timeline"]:
            # Each clone shifts its speed changes a little, so they do not all coincide;
            # the hour-long timeline is squeezed into the run.
            at = (ev["at_s"] / doc["duration_s"]) * span + k * 3.7
            if at < span:
                timeline.append({**ev, "asset": clone_name(ev["asset"], k), "at_s": round(at, 1)})
    doc.update(name="soak", assets=assets, timeline=sorted(timeline, key=lambda e: e["at_s"]),
               duration_s=span, seed=11 + shard)
    return doc


def scaled_config(state: Path, port: int, http_port: int, models: dict[str, dict[str, Path]],
                  copies: int = COPIES) -> dict[str, Any]:
    """config/demo/watchkeep.yaml with every asset cloned, topics and models to match."""
    doc = yaml.safe_load((DEMO / "watchkeep.yaml").read_text())
    doc.update(state_dir=str(state), http={"host": "127.0.0.1", "port": http_port},
               local_broker={"host": "127.0.0.1", "port": port},
               upstream_broker={"host": "127.0.0.1", "port": port})
    assets = []
    for k in range(copies):
        for a in doc["assets"]:
            name = clone_name(a["name"], k)
            text = yaml.safe_dump(a).replace(f"/{a['name']}/", f"/{name}/")
            b = yaml.safe_load(text)
            b["name"] = name
            for mode, path in models[a["name"]].items():
                if "modes" in b:
                    b["modes"]["states"][mode]["bundle"] = str(path.resolve())
                else:
                    b["bundle"] = str(path.resolve())
            assets.append(b)
    doc["assets"] = assets
    return doc


def parse_metrics(text: str) -> dict[str, float]:
    out: dict[str, float] = {}
    for ln in text.splitlines():
        if ln and not ln.startswith("#"):
            k, _, v = ln.rpartition(" ")
            try:
                out[k] = float(v)
            except ValueError:
                continue
    return out


def family(m: dict[str, float], name: str, **labels: str) -> float:
    """Sum of a metric's series, optionally those with the given label values."""
    tot = 0.0
    for k, v in m.items():
        if (k == name or k.startswith(name + "{")) and all(
                f'{lk}="{lv}"' in k for lk, lv in labels.items()):
            tot += v
    return tot


def loss_series(m: dict[str, float]) -> dict[str, float]:
    """Every loss counter series by its full name, and the data-losing skips."""
    out = {k: v for k, v in m.items()
           if any(k == n or k.startswith(n + "{") for n in LOSS)}
    for k, v in m.items():
        if k.startswith("watchkeep_windows_skipped_total{") and any(
                f'reason="{r}"' in k for r in LOSS_SKIPS):
            out[k] = v
    return out


def hist_p99(prev: dict[str, float], cur: dict[str, float], name: str) -> float:
    """The p99 bucket bound of a histogram over the interval (inf if past the last)."""
    buckets = []
    for k, v in cur.items():
        mm = re.match(rf'{name}_bucket\{{le="([^"]+)"\}}', k)
        if mm:
            buckets.append((float(mm.group(1)), v - prev.get(k, 0.0)))
    buckets.sort()
    if not buckets or buckets[-1][1] <= 0:
        return float("nan")
    total = buckets[-1][1]
    for le, n in buckets:
        if n >= 0.99 * total:
            return le
    return float("inf")


PROBE_TOPIC = "bench/soak/probe"
PROBE_EVERY_S = 0.25


class Upstream:
    """Receives the windows' state messages (latency), the broker's $SYS drops, one
    current sensor of each simulator shard (the feed) and its own probe.

    The probe is a message this client publishes to the broker and receives back,
    stamped with its send time: its delay is the broker's and this subscriber's own
    (on a crowded machine, this process waits for a core too). A feed sample's delay
    is the simulator's lag on top of that: the simulator stamps a scalar with the time
    it was due to be sampled and publishes it then, so feed lag minus probe delay is
    how far behind its own schedule the simulator runs."""

    def __init__(self, port: int, lateness: dict[str, float], shards: int = SIM_SHARDS
                 ) -> None:
        self.lock = threading.Lock()
        self.lat: list[tuple[float, float]] = []  # (receipt, seconds beyond close)
        # Seconds beyond the arrival of the data due at the close: the arrival of the
        # shard's feed sample stamped `end + lateness_s` (the same instant of the same
        # simulator process as the window's own closing samples), by (shard, time).
        self.lat_data: list[float] = []
        self.data_at: dict[tuple[int, float], float] = {}
        self.shards = shards
        self.feed: list[tuple[float, float]] = []  # (receipt, sample age)
        self.probe: list[float] = []  # round trip through the broker, seconds
        self.sys: dict[str, float] = {}
        self.lateness = lateness
        self._stop = threading.Event()
        self.c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="bench-soak-up")
        self.c.on_message = self._on
        self.c.connect("127.0.0.1", port)
        self.c.subscribe("watchkeep/+/+/assets/+/state", qos=1)
        self.c.subscribe("$SYS/broker/publish/messages/dropped", qos=0)
        self.c.subscribe("$SYS/broker/store/messages/count", qos=0)
        # One current sensor per simulator shard (clone k is in shard k % shards).
        for k in range(shards):
            self.c.subscribe(f"fernbrook/raw-water/{clone_name('P-101', k)}/current", qos=0)
        self.c.subscribe(PROBE_TOPIC, qos=0)
        self.c.loop_start()
        self._prober = threading.Thread(target=self._probe, daemon=True)
        self._prober.start()

    def _probe(self) -> None:
        while not self._stop.wait(PROBE_EVERY_S):
            self.c.publish(PROBE_TOPIC, repr(time.time()), qos=0)

    def _on(self, c: Any, u: Any, msg: mqtt.MQTTMessage) -> None:
        now = time.time()
        if msg.topic.startswith("$SYS"):
            with self.lock:
                self.sys[msg.topic.rsplit("/", 1)[-1]] = float(msg.payload)
            return
        if msg.topic == PROBE_TOPIC:
            with self.lock:
                self.probe.append(now - float(msg.payload))
            return
        if msg.retain:  # a retained state from before we subscribed
            return
        d = json.loads(msg.payload)
        if msg.topic.endswith("/state"):
            end = datetime.fromisoformat(str(d["window_end"]).replace("Z", "+00:00")).timestamp() \
                if isinstance(d["window_end"], str) else float(d["window_end"])
            late = self.lateness.get(d["asset"], 0.0)
            shard = clone_index(d["asset"]) % self.shards
            with self.lock:
                self.lat.append((now, now - end - late))
                came = self.data_at.get((shard, round(end + late, 1)))
                if came is not None:
                    self.lat_data.append(now - came)
        else:
            ts = float(d["ts"])
            shard = clone_index(msg.topic.split("/")[-2]) % self.shards
            with self.lock:
                self.feed.append((now, now - ts))
                self.data_at[(shard, round(ts, 1))] = now
                if len(self.data_at) > 4 * 600 * self.shards:  # keep the last minutes
                    for key in sorted(self.data_at, key=lambda k: k[1])[:len(self.data_at) // 2]:
                        del self.data_at[key]

    def take(self) -> tuple[list[float], list[float], list[float], list[float]]:
        with self.lock:
            lat, self.lat = [x for _, x in self.lat], []
            lat_data, self.lat_data = self.lat_data, []
            feed, self.feed = [x for _, x in self.feed], []
            probe, self.probe = self.probe, []
        return lat, lat_data, feed, probe

    def close(self) -> None:
        self._stop.set()
        self._prober.join(5)
        self.c.disconnect()
        self.c.loop_stop()


CLK_TCK = os.sysconf("SC_CLK_TCK")


def proc_cpu_s(pid: int) -> float:
    """CPU seconds (user + system) `pid` has used; 0 once it is gone."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return 0.0
    f = stat[stat.rindex(")") + 2:].split()  # the fields after the command name
    return (int(f[11]) + int(f[12])) / CLK_TCK


def machine_cpu_s() -> tuple[float, float, float]:
    """(total, busy, steal) CPU seconds of the whole machine, all cores (/proc/stat);
    busy leaves out idle, iowait and steal (time the hypervisor gave to someone else)."""
    f = [int(x) for x in Path("/proc/stat").read_text().split("\n", 1)[0].split()[1:9]]
    user, nice, system, _idle, _iowait, irq, softirq, steal = f
    return sum(f) / CLK_TCK, (user + nice + system + irq + softirq) / CLK_TCK, steal / CLK_TCK


class CpuShare:
    """Who used the machine's cores over each interval, in % of one core (the 2-core
    machine has 200 %): each process group of the soak, the whole machine, and what is
    left, the other work on the machine (other sessions' tests and builds)."""

    def __init__(self, groups: dict[str, list[int]]) -> None:
        self.groups = groups
        self.last = self._read()

    def _read(self) -> tuple[float, dict[str, float], tuple[float, float, float]]:
        return (time.monotonic(),
                {g: sum(proc_cpu_s(q) for q in pids) for g, pids in self.groups.items()},
                machine_cpu_s())

    def take(self) -> dict[str, float]:
        t, per, mach = self._read()
        t0, per0, mach0 = self.last
        self.last = (t, per, mach)
        dt = max(t - t0, 1e-6)
        out = {g: round(100 * (per[g] - per0.get(g, 0.0)) / dt, 1) for g in per}
        busy = 100 * (mach[1] - mach0[1]) / dt
        out["machine"] = round(busy, 1)
        out["steal"] = round(100 * (mach[2] - mach0[2]) / dt, 1)
        out["others"] = round(max(0.0, busy - sum(v for g, v in out.items()
                                                  if g in per)), 1)
        return out


def load1() -> float:
    return float(Path("/proc/loadavg").read_text().split()[0])


def p(xs: list[float], q: float) -> float:
    return float(np.percentile(xs, q)) if xs else float("nan")


def run(minutes: float, out_dir: Path, copies: int = COPIES, hog: bool = True
        ) -> dict[str, Any]:
    from agent.cli.demo import ensure_models

    t_setup = time.monotonic()
    models = ensure_models(ROOT / ".demo", sys.stdout)
    tmp = Path(tempfile.mkdtemp(prefix="watchkeep-soak-"))
    broker = Broker(tmp / "broker", extra="sys_interval 10\n").start()
    http_port = free_port()
    cfg = scaled_config(tmp / "state", broker.port, http_port, models, copies)
    shards = min(SIM_SHARDS, copies)
    lateness = {a["name"]: float(a.get("window", {}).get("lateness_s", 1.0))
                for a in cfg["assets"]}
    (tmp / "watchkeep.yaml").write_text(yaml.safe_dump(cfg, sort_keys=False))
    for i in range(shards):
        (tmp / f"scenario-{i}.yaml").write_text(
            yaml.safe_dump(scaled_scenario(minutes, i, shards, copies), sort_keys=False))
    bin_dir = Path(sys.executable).parent
    procs: dict[str, subprocess.Popen[bytes]] = {}
    up = Upstream(broker.port, lateness, shards)
    series: list[dict[str, Any]] = []
    try:
        with open(tmp / "daemon.log", "wb") as err:
            procs["daemon"] = subprocess.Popen(
                [str(bin_dir / "watchkeep"), "run", "--config", str(tmp / "watchkeep.yaml"),
                 "--log-level", "WARNING"], stdout=subprocess.DEVNULL, stderr=err)
        wait_for(lambda: _scrape(http_port), timeout_s=180, interval_s=0.5,
                 what="the daemon's /metrics")
        if hog:
            procs["hog"] = subprocess.Popen([sys.executable, "-c", HOG])
        # The shards share one simulated clock, held to the wall clock from `start`
        # (tests/bench/soak_shard.py): a few seconds ahead, time for them to start. On a
        # whole second, so that the samples are on the windows' grid and the sample that
        # closes a window is due at its `end + lateness_s`, from which latency is
        # measured; off the grid, every window waited for the next sample as well (up to
        # one sample period, 0.1 s at the demo's 10 Hz), the same for all assets.
        start = f"{math.ceil(time.time() + 5)}"
        for i in range(shards):
            with open(tmp / f"sim-{i}.log", "wb") as err:
                procs[f"sim{i}"] = subprocess.Popen(
                    [sys.executable, "-m", "tests.bench.soak_shard", "--scenario",
                     str(tmp / f"scenario-{i}.yaml"), "--port", str(broker.port),
                     "--duration", str(minutes * 60 + 30), "--start", start],
                    stdout=subprocess.DEVNULL, stderr=err, cwd=ROOT)
        cpu = CpuShare({
            "daemon": [procs["daemon"].pid], "ingest_child": [],
            "simulator": [procs[f"sim{i}"].pid for i in range(shards)],
            "broker": [broker.proc.pid] if broker.proc is not None else [],
            "hog": [procs["hog"].pid] if hog else [], "bench": [os.getpid()]})
        setup_s = time.monotonic() - t_setup
        print(f"soak: {len(cfg['assets'])} assets, {minutes:g} min, setup {setup_s:.0f} s "
              f"(daemon up), hog {procs['hog'].pid if hog else 'none'}", flush=True)
        t0 = time.monotonic()
        prev = _scrape(http_port) or {}
        base: dict[str, float] | None = None
        nxt = t0 + INTERVAL_S
        interrupted = False
        while nxt <= t0 + minutes * 60 + 1e-6:
            try:
                time.sleep(max(0.0, nxt - time.monotonic()))
            except (KeyboardInterrupt, SystemExit):  # stopped early: keep what was measured
                interrupted = True
                break
            nxt += INTERVAL_S
            for name, pr in procs.items():
                if pr.poll() is not None:
                    raise RuntimeError(f"{name} exited ({pr.returncode}) during the soak; "
                                       f"logs in {tmp}")
            cur = _scrape(http_port) or prev
            pids = tree(procs["daemon"].pid)
            cpu.groups["ingest_child"] = pids[1:]  # (re)started children too
            lat, lat_data, feed, probe = up.take()
            share = cpu.take()
            el = time.monotonic() - t0
            if base is None and el >= WARMUP_S:
                base = {**loss_series(cur), "broker_dropped": up.sys.get("dropped", 0.0)}
            dt_n = family(cur, "watchkeep_pipeline_tick_seconds_count") - \
                family(prev, "watchkeep_pipeline_tick_seconds_count")
            dt_s = family(cur, "watchkeep_pipeline_tick_seconds_sum") - \
                family(prev, "watchkeep_pipeline_tick_seconds_sum")
            row: dict[str, Any] = {
                "t_s": round(el, 1),
                "rss_mb": round(sum(rss_mb(q) for q in pids), 1),
                "pss_mb": round(sum(pss_mb(q) for q in pids), 1),
                "tick_mean_ms": round(1000 * dt_s / dt_n, 2) if dt_n else None,
                "tick_p99_ms": round(1000 * hist_p99(prev, cur,
                                                     "watchkeep_pipeline_tick_seconds"), 1),
                "tick_lag_ms": round(1000 * family(cur, "watchkeep_pipeline_tick_lag_seconds"), 1),
                "latency_p50_ms": round(1000 * p(lat, 50), 1),
                "latency_p99_ms": round(1000 * p(lat, 99), 1),
                "latency_data_p50_ms": round(1000 * p(lat_data, 50), 1),
                "latency_data_p99_ms": round(1000 * p(lat_data, 99), 1),
                "windows_data": len(lat_data),
                "windows": len(lat),
                "feed_lag_p99_ms": round(1000 * p(feed, 99), 1),
                "probe_lag_p99_ms": round(1000 * p(probe, 99), 1),
                # the simulator's own lag: its samples' delay beyond the probe's
                "sim_lag_p99_ms": round(max(0.0, 1000 * (p(feed, 99) - p(probe, 50))), 1)
                if feed and probe else None,
                "load1": load1(),
                "cpu_pct": share,
                "tick_busy_pct": round(100 * dt_s / INTERVAL_S, 1),
                "outbox_rows": family(cur, "watchkeep_outbox_rows"),
                "received": family(cur, "watchkeep_messages_received_total"),
                "losses": {k: v for k, v in loss_series(cur).items() if v},
                "broker_dropped": up.sys.get("dropped", 0.0),
                "events": {k.split('"')[1]: v for k, v in cur.items()
                           if k.startswith("watchkeep_events_total{")},
            }
            series.append(row)
            prev = cur
            print(f"  {el:6.0f} s  rss {row['rss_mb']:6.1f} MB  tick {row['tick_mean_ms']} ms "
                  f"(p99<= {row['tick_p99_ms']}, busy {row['tick_busy_pct']}%)  latency p99 "
                  f"{row['latency_p99_ms']} ms ({row['windows']} windows; beyond the data "
                  f"{row['latency_data_p99_ms']})  sim lag p99 "
                  f"{row['sim_lag_p99_ms']} ms  probe p99 {row['probe_lag_p99_ms']} ms  "
                  f"outbox {row['outbox_rows']:.0f}  losses {sum(row['losses'].values()):.0f}"
                  f"  load {row['load1']}  cpu% " + " ".join(f"{k} {v:.0f}"
                                                             for k, v in share.items()),
                  flush=True)
        sim_rc = 0
        for i in range(shards):
            procs[f"sim{i}"].terminate()
            sim_rc = max(sim_rc, abs(procs[f"sim{i}"].wait(60)))
    finally:
        for pr in procs.values():
            if pr.poll() is None:
                pr.terminate()
                try:
                    pr.wait(30)
                except subprocess.TimeoutExpired:
                    pr.kill()
                    pr.wait(10)
        up.close()
        broker.stop()
    sim_log = "".join((tmp / f"sim-{i}.log").read_text(errors="replace")
                      for i in range(shards))
    res = summarize(series, base or {}, minutes, sim_log, sim_rc, tmp, out_dir,
                    assets=len(cfg["assets"]), hog_cores=int(hog))
    res["interrupted"] = interrupted
    return res


def _scrape(port: int) -> dict[str, float] | None:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
            return parse_metrics(r.read().decode())
    except OSError:
        return None


def _median(xs: Any) -> float | None:
    v = [x for x in xs if x is not None and x == x]
    return round(float(np.median(v)), 1) if v else None


def summarize(series: list[dict[str, Any]], base: dict[str, float], minutes: float,
              sim_log: str, sim_rc: int | None, tmp: Path, out_dir: Path, *,
              assets: int = 4 * COPIES, hog_cores: int = 1) -> dict[str, Any]:
    if not series:
        raise RuntimeError(f"the soak stopped before its first sample; logs in {tmp}")
    last = series[-1]
    final = {**last["losses"], "broker_dropped": last["broker_dropped"]}
    grown = {k: v - base.get(k, 0.0) for k, v in final.items() if v - base.get(k, 0.0) > 0}
    sim_dropped = sum(int(x) for x in re.findall(r"\((\d+) dropped while disconnected\)",
                                                 sim_log))
    if sim_dropped:
        grown["simulator_dropped"] = float(sim_dropped)
    steady = [r for r in series if r["t_s"] >= WARMUP_S]
    lat99 = [r["latency_p99_ms"] for r in steady if r["windows"]]
    res = {
        "assets": assets, "minutes": minutes, "interval_s": INTERVAL_S,
        "warmup_s": WARMUP_S, "hog_cores": hog_cores,
        "latency_p99_ms_median": float(np.median(lat99)) if lat99 else None,
        "latency_p99_ms_worst": max(lat99) if lat99 else None,
        # beyond the arrival of the data due at the close (Upstream.lat_data)
        "latency_data_p99_ms_median": _median(r.get("latency_data_p99_ms") for r in steady),
        "latency_data_p50_ms_median": _median(r.get("latency_data_p50_ms") for r in steady),
        "feed_lag_p99_ms_median": float(np.median([r["feed_lag_p99_ms"] for r in steady]))
        if steady else None,
        "tick_mean_ms_median": float(np.median([r["tick_mean_ms"] or 0 for r in steady]))
        if steady else None,
        "sim_lag_p99_ms_median": _median(r["sim_lag_p99_ms"] for r in steady),
        "probe_lag_p99_ms_median": _median(r["probe_lag_p99_ms"] for r in steady),
        "load1_median": _median(r["load1"] for r in steady),
        # % of one core, median over the intervals after the warm-up
        "cpu_pct_median": {k: _median(r["cpu_pct"].get(k) for r in steady)
                           for k in (steady[0]["cpu_pct"] if steady else {})},
        "rss_mb_first": steady[0]["rss_mb"] if steady else None,
        "rss_mb_last": last["rss_mb"], "rss_mb_max": max(r["rss_mb"] for r in series),
        "pss_mb_last": last["pss_mb"],
        "outbox_rows_max": max(r["outbox_rows"] for r in series),
        "windows_received": sum(r["windows"] for r in series),
        "losses_after_warmup": grown, "simulator_rc": sim_rc,
        # A feed later than a window's timeout makes the daemon close windows before their
        # samples come: the losses are then the machine's, and the run says nothing.
        "feed_kept_up": all(r["feed_lag_p99_ms"] < 3000 for r in steady),
        "unexplained_loss": bool(grown), "logs": str(tmp), "series": series,
    }
    doc_path = save("soak", res)
    res["json"] = str(doc_path)
    res["plot"] = plot(series, out_dir / "soak.png", res)
    return res


def plot(series: list[dict[str, Any]], path: Path, res: dict[str, Any]) -> str | None:
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        print("soak: matplotlib missing (pip install -e '.[plot]'); no plot", file=sys.stderr)
        return None
    t = [r["t_s"] / 60 for r in series]
    fig, ax = plt.subplots(4, 2, figsize=(12, 13), sharex=True)
    panels = [
        (ax[0, 0], "memory (MB)", [("rss_mb", "RSS daemon + ingest"), ("pss_mb", "PSS")]),
        (ax[0, 1], "tick (ms)", [("tick_mean_ms", "mean"), ("tick_p99_ms", "p99 bucket bound"),
                                 ("tick_lag_ms", "lag (gauge)")]),
        (ax[1, 0], "latency beyond window close (ms)",
         [("latency_p99_ms", "p99"), ("latency_p50_ms", "p50"),
          ("latency_data_p99_ms", "p99 beyond the arrival of the data due at the close"),
          ("sim_lag_p99_ms", "simulator's own lag p99 (feed less probe)"),
          ("probe_lag_p99_ms", "probe p99 (broker + this bench's subscriber)")]),
        (ax[1, 1], "outbox depth (rows)", [("outbox_rows", "rows")]),
    ]
    for a, title, keys in panels:
        for k, label in keys:
            a.plot(t, [np.nan if r.get(k) is None or (a is ax[1, 0] and r[k] <= 0) else r[k]
                       for r in series], label=label)
        a.set_title(title)
        a.legend(fontsize=7)
        a.grid(alpha=0.3)
    ax[1, 0].axhline(100, color="red", lw=0.8, ls="--")  # the goal: 100 ms beyond close
    ax[1, 0].set_yscale("log")
    # Who had the cores: the soak's own processes, and the rest of the machine.
    groups = [("watchkeep", ("daemon", "ingest_child")), ("simulator", ("simulator",)),
              ("broker", ("broker",)), ("hog", ("hog",)), ("bench", ("bench",)),
              ("other work on the machine", ("others",)), ("steal (hypervisor)", ("steal",))]
    shares = [[sum(r.get("cpu_pct", {}).get(k, 0.0) for k in keys) for r in series]
              for _, keys in groups]
    ax[2, 0].stackplot(t, shares, labels=[g for g, _ in groups], alpha=0.8)
    ax[2, 0].axhline(100 * (os.cpu_count() or 1), color="black", lw=0.8, ls="--")
    ax[2, 0].set_title("CPU, % of one core (dashed: all cores)")
    ax[2, 0].legend(fontsize=6, loc="upper left")
    ax[2, 0].grid(alpha=0.3)
    ax[2, 1].plot(t, [r.get("load1") for r in series], label="load average (1 min)")
    ax[2, 1].plot(t, [r.get("tick_busy_pct", np.nan) / 10 for r in series],
                  label="pipeline busy ticking (% / 10)")
    ax[2, 1].axhline(os.cpu_count() or 1, color="black", lw=0.8, ls="--")
    ax[2, 1].set_title("machine load (dashed: cores)")
    ax[2, 1].legend(fontsize=7)
    ax[2, 1].grid(alpha=0.3)
    fams = sorted({k.split("{")[0] for r in series for k in r["losses"]})
    for fam in fams:  # each family summed over its labels (assets, channels, reasons)
        ax[3, 0].plot(t, [sum(v for k, v in r["losses"].items() if k.split("{")[0] == fam)
                          for r in series], label=fam.replace("watchkeep_", ""))
    ax[3, 0].plot(t, [r["broker_dropped"] for r in series], label="broker dropped ($SYS)")
    ax[3, 0].set_title("loss counters (cumulative)")
    ax[3, 0].legend(fontsize=6)
    ax[3, 0].grid(alpha=0.3)
    ax[3, 0].axvline(WARMUP_S / 60, color="grey", lw=0.8, ls=":")
    ax[3, 1].plot(t, [r["windows"] for r in series], label="windows delivered / 10 s")
    ax[3, 1].set_title("windows delivered upstream per interval")
    ax[3, 1].grid(alpha=0.3)
    for a in ax[3]:
        a.set_xlabel("minutes")
    lost = sum(res["losses_after_warmup"].values()) if res["losses_after_warmup"] else 0
    fig.suptitle(f"soak: {res['assets']} assets + simulator + broker + "
                 f"{res['hog_cores']}-core hog, "
                 f"{res['minutes']:g} min; latency p99 (median of 10 s intervals) "
                 f"{res['latency_p99_ms_median']} ms; lost after warm-up {lost:.0f}",
                 fontsize=9)
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return str(path)


def _terminate(signum: int, frame: object) -> None:
    raise SystemExit(128 + signum)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tests.bench.bench_soak")
    ap.add_argument("--minutes", type=float,
                    default=float(os.environ.get("WATCHKEEP_SOAK_MINUTES", "30")))
    ap.add_argument("--assets", type=int, default=4 * COPIES,
                    help="the issue's gateway has 200; fewer to profile (a multiple of 4)")
    ap.add_argument("--no-hog", action="store_true",
                    help="without the one-core CPU hog (to profile)")
    args = ap.parse_args(sys.argv[1:] if argv is None else argv)
    # SIGTERM (a timeout, a CI stop) unwinds like Ctrl-C, so `finally` stops what we started.
    signal.signal(signal.SIGTERM, _terminate)
    if args.assets % 4 or not 4 <= args.assets <= 4 * COPIES:
        ap.error(f"--assets: a multiple of 4 from 4 to {4 * COPIES}")
    res = run(args.minutes, RESULTS, args.assets // 4, hog=not args.no_hog)
    rows = [[k, str(res[k])[:160]] for k in (
        "assets", "minutes", "latency_p99_ms_median", "latency_p99_ms_worst",
        "latency_data_p99_ms_median", "latency_data_p50_ms_median",
        "feed_lag_p99_ms_median", "sim_lag_p99_ms_median", "probe_lag_p99_ms_median",
        "load1_median", "cpu_pct_median", "tick_mean_ms_median", "rss_mb_first", "rss_mb_last",
        "rss_mb_max", "pss_mb_last", "outbox_rows_max", "windows_received",
        "losses_after_warmup", "feed_kept_up")]
    print(table(rows, ["soak", "value"]))
    print(f"soak: series in {res['json']}, plot {res['plot']}")
    share = res["cpu_pct_median"]
    if share:
        print(f"soak: the cores (median % of one core of {os.cpu_count()}): watchkeep "
              f"{(share['daemon'] or 0) + (share['ingest_child'] or 0):.0f} (daemon "
              f"{share['daemon']}, ingest child {share['ingest_child']}), simulator "
              f"{share['simulator']}, broker {share['broker']}, hog {share['hog']}, other "
              f"work on the machine {share['others']}, steal {share['steal']}; load "
              f"average {res['load1_median']}")
        if (share["others"] or 0) > OTHERS_QUIET_PCT:
            print(f"soak: NOTE: other work on the machine took {share['others']} % of a "
                  f"core (more than {OTHERS_QUIET_PCT} %): the latency figures are the "
                  "machine's as much as the daemon's; run it at a quiet moment")
    if not res["feed_kept_up"]:
        print("soak: INCONCLUSIVE: the simulator could not keep real time on this machine "
              "(feed lag p99 above 3 s), so windows closed before their samples arrived")
        return 1
    if res["unexplained_loss"]:
        print(f"soak: FAILED: data lost after the warm-up: {res['losses_after_warmup']}")
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
