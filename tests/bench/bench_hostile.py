"""The hostile flood (issue 20): 100,000 mixed bad messages at full rate during the demo's
fault scenario, and more until one window and its timeout of plant time have passed.
`python -m tests.bench hostile` (about 3 minutes; the demo's models are trained on first
use into the state dir, default /tmp/watchkeep-hostile-state).

The demo's plant (agent/cli/demo.py: Mosquitto, the simulator, the daemon on the simulated
clock) runs its scenario; when P-101's bearing fault starts, a second process publishes
bad messages as fast as paho sends them, on the plant's own topics and on unknown ones:
absurd block rates, timestamps far ahead (within and beyond the clock skew), deeply
nested JSON, non-finite numbers, wrong types, oversized payloads. Printed: windows
closed and scored per asset before, during and after the flood (every asset must keep
closing windows), whether P-101's bearing fault was raised, the daemon's peak RSS
(VmHWM) before and after the flood, and the count per rejection reason.
"""

from __future__ import annotations

import argparse
import dataclasses
import io
import json
import os
import random
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

N_DEFAULT = 100_000


def _vm(key: str) -> int:
    """This process's /proc/self/status value in KiB (VmRSS, VmHWM)."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(key + ":"):
            return int(line.split()[1])
    return 0


# -- the flooding process -----------------------------------------------------------------

def bad_messages(topics: dict[str, str], now: float, rng: random.Random
                 ) -> list[tuple[str, bytes]]:
    """One round of bad messages: (topic, payload); `topics` maps decoder -> a topic."""
    vib, js, txt = topics["json-batch"], topics["json"], topics["text"]
    big = b'{"value": 1.0, "pad": "' + b"x" * 300_000 + b'"}'
    out: list[tuple[str, bytes]] = []
    for rate in ("5e-324", "0", "-1", "1e308", "1e-300", "Infinity", "NaN", "99999"):
        out.append((vib, f'{{"ts": {now}, "rate_hz": {rate}, "values": [0.1, 0.2]}}'.encode()))
    for ahead in (280.0, 150.0, 1e6, 1e300):
        out.append((js, f'{{"ts": {now + ahead}, "value": 1.0}}'.encode()))
        out.append((vib, f'{{"ts": {now + ahead}, "values": [0.1, 0.2]}}'.encode()))
    out.append((js, b"[" * 20_000))
    out.append((vib, b'{"values": ' + b"[" * 20_000))
    out.append((js, b'{"ts": ' * 3000 + b"1" + b"}" * 3000))
    out += [(js, b'{"value": NaN}'), (js, b'{"value": Infinity}'), (txt, b"nan"),
            (vib, b'{"values": [1.0, Infinity]}'), (js, b'{"value": 1e999}'),
            (txt, b"1e999")]
    out += [(js, b'{"value": "12"}'), (js, b'{"value": true}'), (js, b'{"value": null}'),
            (vib, b'{"values": "abc"}'), (vib, b'{"values": [1, [2]]}'), (txt, b"abc"),
            (js, b'{"ts": "yesterday", "value": 1}'), (js, b"\xff\xfe"), (js, b"")]
    out += [(f"fernbrook/raw-water/P-9{rng.randrange(10)}/vib", b'{"value": 1}'),
            ("fernbrook/unknown", b"1")]
    if rng.random() < 0.05:
        out.append((js, big))
    return out


def flood(port: int, n: int, sim_now: float, wall: float, speed: float,
          topics: dict[str, str], min_sim_s: float = 0.0) -> None:
    """Publish bad messages as fast as paho sends them (the flooding process): `n` of
    them, and on until `min_sim_s` of plant time have passed."""
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"hostile-{os.getpid()}")
    c.max_queued_messages_set(0)
    c.connect("127.0.0.1", port)
    c.loop_start()
    rng = random.Random(20)
    sent = 0
    t0 = time.monotonic()
    until = sim_now + min_sim_s
    while True:
        now = sim_now + (time.time() - wall) * speed
        if sent >= n and now >= until:
            break
        for topic, payload in bad_messages(topics, now, rng):
            c.publish(topic, payload, qos=0)
            sent += 1
            if sent >= n and now >= until:
                break
        if sent % 5000 < 60:  # let paho's queue drain now and then
            while c._out_messages and len(c._out_messages) > 2000:
                time.sleep(0.001)
    deadline = time.monotonic() + 30
    while c._out_messages and time.monotonic() < deadline:
        time.sleep(0.01)
    c.disconnect()
    c.loop_stop()
    print(json.dumps({"sent": sent, "seconds": round(time.monotonic() - t0, 2)}), flush=True)


# -- the run --------------------------------------------------------------------------------

def run(duration_s: float, n: int, state_dir: Path) -> dict[str, Any]:
    from agent.cli.demo import DEMO_DIR, DemoBroker, EventLog, SimClock, demo_config, ensure_models
    from agent.daemon import Daemon
    from agent.ops.logs import setup_logging
    from simulator.plant import simulate
    from simulator.publish import publish
    from simulator.scenario import load_scenario

    state_dir.mkdir(parents=True, exist_ok=True)
    models = ensure_models(state_dir, io.StringIO())
    scenario = load_scenario(DEMO_DIR / "scenario.yaml")
    speed = max(1.0, scenario.duration_s / duration_s)
    start = float(int(time.time()))
    clock = SimClock(origin=start, speed=speed)
    log = setup_logging("ERROR")
    result: dict[str, Any] = {"speed": round(speed, 2)}
    with tempfile.TemporaryDirectory(prefix="watchkeep-hostile-") as tmp:
        broker = DemoBroker(Path(tmp), "mosquitto")
        broker.start()
        stop = threading.Event()
        cfg = demo_config(state_dir, broker.port, models)
        # Subscribe to the whole plant, so messages on unknown topics reach the daemon.
        cfg = dataclasses.replace(cfg, ingest=dataclasses.replace(
            cfg.ingest, subscriptions=("fernbrook/#",)))
        daemon = Daemon(cfg, logger=log, clock=clock)
        events = EventLog(broker.port, f"{cfg.topic_prefix}/assets/+/events")
        daemon.start()
        names = [a.name for a in cfg.assets]
        p101 = next(a for a in cfg.assets if a.name == "P-101")
        topics = {str(ch.decoder): ch.topic for ch in p101.channels}
        for a in cfg.assets:  # any text channel of the plant
            for ch in a.channels:
                topics.setdefault(str(ch.decoder), ch.topic)

        def counts() -> dict[str, list[int]]:
            m = daemon.metrics
            return {a: [int(m.windows_closed.labels(a)._value.get()),
                        int(m.windows_scored.labels(a)._value.get()),
                        int(m.late_samples.labels(a)._value.get())] for a in names}

        def skipped() -> dict[str, dict[str, int]]:
            out: dict[str, dict[str, int]] = {a: {} for a in names}
            for metric in daemon.registry.collect():
                if metric.name == "watchkeep_windows_skipped":
                    for s in metric.samples:
                        if s.name.endswith("_total") and s.value:
                            out[s.labels["asset"]][s.labels["reason"]] = int(s.value)
            return out

        sim = threading.Thread(target=lambda: publish(
            simulate(scenario, start_unix=start), host="127.0.0.1", port=broker.port,
            speed=speed, stop=stop, sim_origin=start, on_sent=lambda msg: clock.anchor(msg[0])),
            daemon=True)
        sim.start()
        try:
            fault_at = start + 95.0  # the bearing fault starts at 90 s of plant time
            while clock() < fault_at:
                time.sleep(0.1)
            before = counts()
            skip_before = skipped()
            rss_before = _vm("VmHWM")
            sim_t0 = clock()
            # At least one window and its timeout of plant time, so every asset has a
            # window due while the flood lasts (on a fast machine 100,000 messages take
            # less plant time than one window).
            cycle = max(a.window.length_s + a.window.timeout_s for a in cfg.assets)
            proc = subprocess.run(
                [sys.executable, "-m", "tests.bench.bench_hostile", "--flood",
                 json.dumps([broker.port, n, clock(), time.time(), speed, topics, cycle])],
                capture_output=True, text=True, check=True, timeout=600)
            flood_info = json.loads(proc.stdout.strip().splitlines()[-1])
            sim_t1 = clock()
            during = counts()
            skip_during = skipped()
            rss_flood = _vm("VmHWM")
            # How far P-102's sample-stamped channels trail the simulated clock after the
            # flood (P-102 gets no bad message; its pressure channel is stamped on arrival,
            # so a lag beyond lateness_s makes its other samples late).
            ai = names.index("P-102")
            lags: list[float] = []
            end = start + scenario.duration_s + 10.0
            next_probe = time.monotonic()
            while clock() < end and sim.is_alive():
                if time.monotonic() >= next_probe and clock() < start + scenario.duration_s:
                    newest = max(b.guard.newest for b, ch in zip(
                        daemon.buffers.by_asset[ai], cfg.assets[ai].channels, strict=True)
                        if str(ch.decoder) != "text")
                    lags.append(round(clock() - newest, 2))
                    next_probe += 5.0
                time.sleep(0.05)
            time.sleep(max(a.window.length_s + a.window.timeout_s
                           for a in cfg.assets) / speed + 0.5)
            after = counts()
            daemon.handler.flush_counts()
            reasons = {}
            for metric in daemon.registry.collect():
                if metric.name == "watchkeep_messages_rejected":
                    for s in metric.samples:
                        if s.name.endswith("_total") and s.value:
                            reasons[s.labels["reason"]] = int(s.value)
            errors = {}
            for metric in daemon.registry.collect():
                if metric.name == "watchkeep_asset_errors":
                    for s in metric.samples:
                        if s.name.endswith("_total") and s.value:
                            errors[f"{s.labels['asset']}/{s.labels['stage']}"] = int(s.value)
            status = daemon.status()
            healthy = daemon.healthy()
        finally:
            stop.set()
            sim.join(10)
            daemon.stop()
            got = events.take(0)
            events.close()
            broker.stop()
    raised = [e for e in got if e.get("type", "").endswith("anomaly.raised")]
    result.update({
        "flood": flood_info,
        "flood_sim_seconds": round(sim_t1 - sim_t0, 1),
        # [closed, scored, late samples] per asset at the flood's start and end, and at
        # the end of the scenario; windows skipped during the flood, by reason.
        "windows_closed_scored_late": {
            a: {"before": before[a], "after_flood": during[a], "end": after[a],
                "closed_during_flood": during[a][0] - before[a][0],
                "skipped_during_flood": {r: n - skip_before[a].get(r, 0)
                                         for r, n in skip_during[a].items()
                                         if n - skip_before[a].get(r, 0)}}
            for a in names},
        "p102_lag_s_every_5_s_after_flood": lags,
        "bearing_fault_raised": any(e.get("subject") == "P-101" for e in raised),
        "raised": [(e.get("subject"), e.get("time")) for e in raised],
        "max_rss_mib": {"before_flood": round(rss_before / 1024, 1),
                        "after_flood": round(rss_flood / 1024, 1),
                        "end": round(_vm("VmHWM") / 1024, 1)},
        "rejected": reasons,
        "asset_errors": errors,
        "healthz": healthy,
        "asset_status": {a["asset"]: {"error": a["error"], "coverage": a["coverage"]}
                         for a in status["assets"]},
    })
    return result


def main() -> int:
    p = argparse.ArgumentParser(prog="python -m tests.bench hostile", description=__doc__)
    p.add_argument("--messages", type=int, default=N_DEFAULT)
    p.add_argument("--duration", type=float, default=120.0,
                   help="wall seconds for the 240 s scenario (default 120: x2)")
    p.add_argument("--state-dir", type=Path, default=Path("/tmp/watchkeep-hostile-state"))
    p.add_argument("--flood", help=argparse.SUPPRESS)
    a = p.parse_args()
    if a.flood:
        port, n, sim_now, wall, speed, topics, min_sim_s = json.loads(a.flood)
        flood(port, n, sim_now, wall, speed, topics, min_sim_s)
        return 0
    res = run(a.duration, a.messages, a.state_dir)
    print(json.dumps(res, indent=2))
    ok = res["bearing_fault_raised"] and all(
        v["closed_during_flood"] > 0 for v in res["windows_closed_scored_late"].values())
    print("hostile flood:", "every asset kept closing windows, bearing fault raised" if ok
          else "FAILED")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
