"""Soak: the demo plant scaled to 200 assets, for 30 minutes, on a crowded gateway.

On the same machine, all started and stopped here by PID: one Mosquitto broker (local
and upstream, as in the demo), the simulator (`watchkeep-sim run`, real time, as four
processes of 50 machines sharing one start time) publishing
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
1). Beside it the feed lag: how late the simulator's own samples reach a subscriber of
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
COPIES = 50  # x 4 demo machines = 200 assets
# The simulator in processes of a quarter of the plant each (one Python process cannot
# format and publish 200 machines' 2,560 Hz vibration in real time beside the hog).
SIM_SHARDS = 4
INTERVAL_S = 10.0
WARMUP_S = 60.0
HOG = "import time\nwhile True:\n    pass\n"
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


def scaled_scenario(minutes: float, shard: int = 0, shards: int = 1) -> dict[str, Any]:
    """normal.yaml's machines, each cloned COPIES times with its own speed changes; the
    clones k with k % shards == shard."""
    doc = yaml.safe_load((DEMO / "normal.yaml").read_text())
    span = minutes * 60 + 120
    assets, timeline = [], []
    for k in range(shard, COPIES, shards):
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


def scaled_config(state: Path, port: int, http_port: int, models: dict[str, dict[str, Path]]
                  ) -> dict[str, Any]:
    """config/demo/watchkeep.yaml with every asset cloned, topics and models to match."""
    doc = yaml.safe_load((DEMO / "watchkeep.yaml").read_text())
    doc.update(state_dir=str(state), http={"host": "127.0.0.1", "port": http_port},
               local_broker={"host": "127.0.0.1", "port": port},
               upstream_broker={"host": "127.0.0.1", "port": port})
    assets = []
    for k in range(COPIES):
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


class Upstream:
    """Receives the windows' state messages (latency) and the broker's $SYS drops."""

    def __init__(self, port: int, lateness: dict[str, float]) -> None:
        self.lock = threading.Lock()
        self.lat: list[tuple[float, float]] = []  # (receipt, seconds beyond close)
        self.feed: list[tuple[float, float]] = []  # (receipt, sample age)
        self.sys: dict[str, float] = {}
        self.lateness = lateness
        self.c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="bench-soak-up")
        self.c.on_message = self._on
        self.c.connect("127.0.0.1", port)
        self.c.subscribe("watchkeep/+/+/assets/+/state", qos=1)
        self.c.subscribe("$SYS/broker/publish/messages/dropped", qos=0)
        self.c.subscribe("$SYS/broker/store/messages/count", qos=0)
        # One clone's flow sensor stands for the feed (JSON, ts in simulated time).
        self.c.subscribe("fernbrook/raw-water/P-101-00/current", qos=0)
        self.c.loop_start()

    def _on(self, c: Any, u: Any, msg: mqtt.MQTTMessage) -> None:
        now = time.time()
        if msg.topic.startswith("$SYS"):
            with self.lock:
                self.sys[msg.topic.rsplit("/", 1)[-1]] = float(msg.payload)
            return
        if msg.retain:  # a retained state from before we subscribed
            return
        d = json.loads(msg.payload)
        if msg.topic.endswith("/state"):
            end = datetime.fromisoformat(str(d["window_end"]).replace("Z", "+00:00")).timestamp() \
                if isinstance(d["window_end"], str) else float(d["window_end"])
            late = self.lateness.get(d["asset"], 0.0)
            with self.lock:
                self.lat.append((now, now - end - late))
        else:
            with self.lock:
                self.feed.append((now, now - float(d["ts"])))

    def take(self) -> tuple[list[float], list[float]]:
        with self.lock:
            lat, self.lat = [x for _, x in self.lat], []
            feed, self.feed = [x for _, x in self.feed], []
        return lat, feed

    def close(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()


def p(xs: list[float], q: float) -> float:
    return float(np.percentile(xs, q)) if xs else float("nan")


def run(minutes: float, out_dir: Path) -> dict[str, Any]:
    from agent.cli.demo import ensure_models

    t_setup = time.monotonic()
    models = ensure_models(ROOT / ".demo", sys.stdout)
    tmp = Path(tempfile.mkdtemp(prefix="watchkeep-soak-"))
    broker = Broker(tmp / "broker", extra="sys_interval 10\n").start()
    http_port = free_port()
    cfg = scaled_config(tmp / "state", broker.port, http_port, models)
    lateness = {a["name"]: float(a.get("window", {}).get("lateness_s", 1.0))
                for a in cfg["assets"]}
    (tmp / "watchkeep.yaml").write_text(yaml.safe_dump(cfg, sort_keys=False))
    for i in range(SIM_SHARDS):
        (tmp / f"scenario-{i}.yaml").write_text(
            yaml.safe_dump(scaled_scenario(minutes, i, SIM_SHARDS), sort_keys=False))
    bin_dir = Path(sys.executable).parent
    procs: dict[str, subprocess.Popen[bytes]] = {}
    up = Upstream(broker.port, lateness)
    series: list[dict[str, Any]] = []
    try:
        with open(tmp / "daemon.log", "wb") as err:
            procs["daemon"] = subprocess.Popen(
                [str(bin_dir / "watchkeep"), "run", "--config", str(tmp / "watchkeep.yaml"),
                 "--log-level", "WARNING"], stdout=subprocess.DEVNULL, stderr=err)
        wait_for(lambda: _scrape(http_port), timeout_s=180, interval_s=0.5,
                 what="the daemon's /metrics")
        procs["hog"] = subprocess.Popen([sys.executable, "-c", HOG])
        start = f"{time.time() + 2:.3f}"  # the shards share one simulated clock
        for i in range(SIM_SHARDS):
            with open(tmp / f"sim-{i}.log", "wb") as err:
                procs[f"sim{i}"] = subprocess.Popen(
                    [str(bin_dir / "watchkeep-sim"), "run", "--scenario",
                     str(tmp / f"scenario-{i}.yaml"), "--broker", f"127.0.0.1:{broker.port}",
                     "--duration", str(minutes * 60 + 30), "--start", start],
                    stdout=subprocess.DEVNULL, stderr=err)
        setup_s = time.monotonic() - t_setup
        print(f"soak: {len(cfg['assets'])} assets, {minutes:g} min, setup {setup_s:.0f} s "
              f"(daemon up), hog pid {procs['hog'].pid}", flush=True)
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
            lat, feed = up.take()
            el = time.monotonic() - t0
            if base is None and el >= WARMUP_S:
                base = {**loss_series(cur), "broker_dropped": up.sys.get("dropped", 0.0)}
            dt_n = family(cur, "watchkeep_pipeline_tick_seconds_count") - \
                family(prev, "watchkeep_pipeline_tick_seconds_count")
            dt_s = family(cur, "watchkeep_pipeline_tick_seconds_sum") - \
                family(prev, "watchkeep_pipeline_tick_seconds_sum")
            row = {
                "t_s": round(el, 1),
                "rss_mb": round(sum(rss_mb(q) for q in pids), 1),
                "pss_mb": round(sum(pss_mb(q) for q in pids), 1),
                "tick_mean_ms": round(1000 * dt_s / dt_n, 2) if dt_n else None,
                "tick_p99_ms": round(1000 * hist_p99(prev, cur,
                                                     "watchkeep_pipeline_tick_seconds"), 1),
                "tick_lag_ms": round(1000 * family(cur, "watchkeep_pipeline_tick_lag_seconds"), 1),
                "latency_p50_ms": round(1000 * p(lat, 50), 1),
                "latency_p99_ms": round(1000 * p(lat, 99), 1),
                "windows": len(lat),
                "feed_lag_p99_ms": round(1000 * p(feed, 99), 1),
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
                  f"(p99<= {row['tick_p99_ms']})  latency p99 {row['latency_p99_ms']} ms "
                  f"({row['windows']} windows)  feed p99 {row['feed_lag_p99_ms']} ms  "
                  f"outbox {row['outbox_rows']:.0f}  losses {sum(row['losses'].values()):.0f}",
                  flush=True)
        sim_rc = 0
        for i in range(SIM_SHARDS):
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
                      for i in range(SIM_SHARDS))
    res = summarize(series, base or {}, minutes, sim_log, sim_rc, tmp, out_dir)
    res["interrupted"] = interrupted
    return res


def _scrape(port: int) -> dict[str, float] | None:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
            return parse_metrics(r.read().decode())
    except OSError:
        return None


def summarize(series: list[dict[str, Any]], base: dict[str, float], minutes: float,
              sim_log: str, sim_rc: int | None, tmp: Path, out_dir: Path) -> dict[str, Any]:
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
        "assets": 4 * COPIES, "minutes": minutes, "interval_s": INTERVAL_S,
        "warmup_s": WARMUP_S, "hog_cores": 1,
        "latency_p99_ms_median": float(np.median(lat99)) if lat99 else None,
        "latency_p99_ms_worst": max(lat99) if lat99 else None,
        "feed_lag_p99_ms_median": float(np.median([r["feed_lag_p99_ms"] for r in steady]))
        if steady else None,
        "tick_mean_ms_median": float(np.median([r["tick_mean_ms"] or 0 for r in steady]))
        if steady else None,
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
    fig, ax = plt.subplots(3, 2, figsize=(12, 10), sharex=True)
    panels = [
        (ax[0, 0], "memory (MB)", [("rss_mb", "RSS daemon + ingest"), ("pss_mb", "PSS")]),
        (ax[0, 1], "tick (ms)", [("tick_mean_ms", "mean"), ("tick_p99_ms", "p99 bucket bound"),
                                 ("tick_lag_ms", "lag (gauge)")]),
        (ax[1, 0], "latency beyond window close (ms)",
         [("latency_p99_ms", "p99"), ("latency_p50_ms", "p50"),
          ("feed_lag_p99_ms", "feed lag p99 (simulator -> broker -> subscriber)")]),
        (ax[1, 1], "outbox depth (rows)", [("outbox_rows", "rows")]),
    ]
    for a, title, keys in panels:
        for k, label in keys:
            a.plot(t, [np.nan if r[k] is None or (a is ax[1, 0] and r[k] <= 0) else r[k]
                       for r in series], label=label)
        a.set_title(title)
        a.legend(fontsize=7)
        a.grid(alpha=0.3)
    ax[1, 0].axhline(100, color="red", lw=0.8, ls="--")  # the goal: 100 ms beyond close
    ax[1, 0].set_yscale("log")
    fams = sorted({k.split("{")[0] for r in series for k in r["losses"]})
    for fam in fams:  # each family summed over its labels (assets, channels, reasons)
        ax[2, 0].plot(t, [sum(v for k, v in r["losses"].items() if k.split("{")[0] == fam)
                          for r in series], label=fam.replace("watchkeep_", ""))
    ax[2, 0].plot(t, [r["broker_dropped"] for r in series], label="broker dropped ($SYS)")
    ax[2, 0].set_title("loss counters (cumulative)")
    ax[2, 0].legend(fontsize=6)
    ax[2, 0].grid(alpha=0.3)
    ax[2, 0].axvline(WARMUP_S / 60, color="grey", lw=0.8, ls=":")
    ax[2, 1].plot(t, [r["windows"] for r in series], label="windows delivered / 10 s")
    ax[2, 1].set_title("windows delivered upstream per interval")
    ax[2, 1].grid(alpha=0.3)
    for a in ax[2]:
        a.set_xlabel("minutes")
    lost = sum(res["losses_after_warmup"].values()) if res["losses_after_warmup"] else 0
    fig.suptitle(f"soak: {res['assets']} assets + simulator + broker + 1-core hog, "
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
    args = ap.parse_args(sys.argv[1:] if argv is None else argv)
    # SIGTERM (a timeout, a CI stop) unwinds like Ctrl-C, so `finally` stops what we started.
    signal.signal(signal.SIGTERM, _terminate)
    res = run(args.minutes, RESULTS)
    rows = [[k, str(res[k])[:100]] for k in (
        "assets", "minutes", "latency_p99_ms_median", "latency_p99_ms_worst",
        "feed_lag_p99_ms_median", "tick_mean_ms_median", "rss_mb_first", "rss_mb_last",
        "rss_mb_max", "pss_mb_last", "outbox_rows_max", "windows_received",
        "losses_after_warmup", "feed_kept_up")]
    print(table(rows, ["soak", "value"]))
    print(f"soak: series in {res['json']}, plot {res['plot']}")
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
