"""`watchkeep demo`: the invented Fernbrook plant, the daemon, a live view and a summary.

Parts, all started and stopped here (no process is left behind):

* a broker: the `mosquitto` binary on a free loopback port when it is installed,
  otherwise the embedded pure-Python broker (`simulator.broker`);
* demo models: trained on first run from simulated normal operation
  (`config/demo/normal.yaml`) through the daemon's own pipeline (`Replayer`) and
  `train_bundle`, kept in the state directory;
* the simulator publishing `config/demo/scenario.yaml`, time-compressed so the whole
  scenario fits `--duration` seconds;
* the daemon itself, in-process, on the simulated clock (so arrival-time channels
  and window timeouts follow the compressed time);
* a plain subscriber on the events topic, as the maintenance system would run one.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import logging
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO

from agent.config.load import Config, parse_config, yaml_load
from agent.core.events import rfc3339
from agent.ops.logs import setup_logging

if TYPE_CHECKING:
    from simulator.scenario import Scenario

DEMO_DIR = Path(__file__).resolve().parents[2] / "config" / "demo"
TRAIN_NORMAL_S = 3600.0


class SimClock:
    """Simulated time running `speed` times faster than the wall clock.

    `anchor(t)` (called once, as the simulator sends its first message) pins simulated
    time `t` to that wall-clock instant, so arrival-time channels (`text`) are stamped in
    step with the simulator's own timestamps; until then it runs from `origin`.
    """

    def __init__(self, origin: float, speed: float) -> None:
        self.speed = speed
        self._base = (origin, time.monotonic())  # replaced whole: readers see one pair
        self._anchored = False

    def anchor(self, sim_t: float) -> None:
        if not self._anchored:
            self._base = (sim_t, time.monotonic())
            self._anchored = True

    def __call__(self) -> float:
        origin, w0 = self._base
        return origin + (time.monotonic() - w0) * self.speed


# -- broker -------------------------------------------------------------------------

class DemoBroker:
    """Mosquitto when installed, else the embedded broker; loopback, a free port."""

    def __init__(self, workdir: Path, prefer: str = "auto") -> None:
        self.workdir = workdir
        self.prefer = prefer
        self.kind = ""
        self.port = 0
        self._proc: subprocess.Popen[bytes] | None = None
        self._embedded: Any = None

    def start(self) -> None:
        exe = shutil.which("mosquitto") or ("/usr/sbin/mosquitto"
                                            if os.access("/usr/sbin/mosquitto", os.X_OK)
                                            else None)
        if self.prefer == "embedded":
            exe = None
        elif self.prefer == "mosquitto" and not exe:
            raise RuntimeError("--broker mosquitto: the mosquitto binary is not installed")
        if exe:
            import socket

            with socket.socket() as s:
                s.bind(("127.0.0.1", 0))
                self.port = s.getsockname()[1]
            conf = self.workdir / "mosquitto.conf"
            conf.write_text(f"listener {self.port} 127.0.0.1\nallow_anonymous true\n"
                            "persistence false\nmax_queued_messages 100000\n"
                            f"log_dest file {self.workdir / 'mosquitto.log'}\n")
            self._proc = subprocess.Popen([exe, "-c", str(conf)], stdout=subprocess.DEVNULL,
                                          stderr=subprocess.DEVNULL)
            self.kind = "mosquitto"
            deadline = time.monotonic() + 10
            while True:
                try:
                    with socket.create_connection(("127.0.0.1", self.port), timeout=0.2):
                        break
                except OSError:
                    if self._proc.poll() is not None or time.monotonic() > deadline:
                        raise RuntimeError("mosquitto did not start") from None
                    time.sleep(0.05)
        else:
            from simulator.broker import EmbeddedBroker

            self._embedded = EmbeddedBroker(port=0)
            self._embedded.start()
            self.port = self._embedded.port
            self.kind = "embedded"

    def stop(self) -> None:
        if self._proc is not None:
            self._proc.terminate()
            try:
                self._proc.wait(5)
            except subprocess.TimeoutExpired:
                self._proc.kill()
                self._proc.wait(5)
            self._proc = None
        if self._embedded is not None:
            self._embedded.stop()
            self._embedded = None


# -- models ---------------------------------------------------------------------------

Models = dict[str, dict[str, Path]]  # asset -> mode -> bundle directory


def demo_config(state_dir: Path, port: int, models: Models | None = None) -> Config:
    """`config/demo/watchkeep.yaml` with the demo's broker port, state dir and bundles
    (the asset's `bundle`, or each mode's own for assets with operating modes)."""
    doc = yaml_load((DEMO_DIR / "watchkeep.yaml").read_text(encoding="utf-8"))
    # parse_config resolves relative paths against config/demo/: hand it absolute ones.
    doc["state_dir"] = str(state_dir.resolve())
    doc["local_broker"] = {**doc.get("local_broker", {}), "port": port}
    doc["upstream_broker"] = {**doc.get("upstream_broker", {}), "port": port}
    doc["http"] = {**doc.get("http", {}), "port": 0}
    for a in doc["assets"]:
        for mode, path in (models or {}).get(a["name"], {}).items():
            if "modes" in a:
                a["modes"]["states"][mode]["bundle"] = str(path.resolve())
            else:
                a["bundle"] = str(path.resolve())
    return parse_config(doc, DEMO_DIR, DEMO_DIR / "watchkeep.yaml")


def _modes_of(a: Any) -> list[str]:
    return [m.name for m in a.modes.states] if a.modes is not None else ["default"]


def _fingerprint(train_s: float) -> str:
    h = hashlib.sha256(f"{train_s:.0f}".encode())
    for name in ("watchkeep.yaml", "normal.yaml"):
        h.update((DEMO_DIR / name).read_bytes())
    return h.hexdigest()[:16]


def ensure_models(state_dir: Path, out: TextIO, normal_s: float = TRAIN_NORMAL_S) -> Models:
    """Train demo models (per asset, and per mode where the asset has modes) from
    simulated normal running, unless this config already has them."""
    from agent.commission.dataset import DatasetWriter
    from agent.commission.replay import Replayer
    from agent.commission.train import train_bundle
    from simulator.plant import simulate
    from simulator.scenario import load_scenario, with_overrides

    models_dir = state_dir / "models"
    stamp = models_dir / "fingerprint"
    cfg = demo_config(state_dir, 1883)
    paths: Models = {a.name: {m: models_dir / a.name / m for m in _modes_of(a)}
                     for a in cfg.assets}
    if stamp.is_file() and stamp.read_text().strip() == _fingerprint(normal_s) and all(
            (p / "model.json").is_file() for per in paths.values() for p in per.values()):
        return paths
    t0 = time.monotonic()
    print(f"first run: training demo models from {normal_s / 60:.0f} minutes of simulated "
          "normal running ...", file=out, flush=True)
    normal = with_overrides(load_scenario(DEMO_DIR / "normal.yaml"), duration_s=normal_s)
    writers = {a.name: DatasetWriter(state_dir / "datasets" / a.name, asset=a.name,
                                     overwrite=True) for a in cfg.assets}

    def observe(asset: str, mode: str, w: Any, row: Any, names: tuple[str, ...]) -> None:
        writers[asset].add(row, names, w.start, w.end, mode)

    rep = Replayer.build(cfg, logging.getLogger("watchkeep.demo"), observer=observe)
    for t, topic, payload in simulate(normal, start_unix=1_767_225_600.0):
        rep.feed(t, topic, payload)
    rep.finish()
    for name, w in writers.items():
        ds = w.close()
        for mode, path in paths[name].items():
            rep_ = train_bundle(ds, path, asset=name, mode=mode, seed=0)
            print(f"  {name} {mode}: {rep_.n_windows} windows, threshold "
                  f"{rep_.threshold:.3g}", file=out, flush=True)
    models_dir.mkdir(parents=True, exist_ok=True)
    stamp.write_text(_fingerprint(normal_s) + "\n")
    print(f"  trained in {time.monotonic() - t0:.0f} s", file=out, flush=True)
    return paths


# -- live view ------------------------------------------------------------------------

class EventLog:
    """Events as the maintenance side receives them (a plain paho subscriber)."""

    def __init__(self, port: int, topic: str) -> None:
        import paho.mqtt.client as mqtt
        from paho.mqtt.enums import CallbackAPIVersion

        self.events: list[dict[str, Any]] = []
        self.lock = threading.Lock()
        self.ready = threading.Event()
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2,
                                  client_id=f"watchkeep-demo-maintenance-{os.getpid()}")

        def on_connect(c: Any, u: Any, f: Any, rc: Any, p: Any) -> None:
            c.subscribe(topic, qos=1)

        def on_subscribe(c: Any, u: Any, mid: Any, rc: Any, p: Any) -> None:
            self.ready.set()

        def on_message(c: Any, u: Any, msg: Any) -> None:
            try:
                ev = json.loads(msg.payload)
            except ValueError:
                return
            with self.lock:
                self.events.append(ev)

        self.client.on_connect = on_connect
        self.client.on_subscribe = on_subscribe
        self.client.on_message = on_message
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()
        self.ready.wait(10)

    def take(self, since: int) -> list[dict[str, Any]]:
        with self.lock:
            return self.events[since:]

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def event_line(ev: dict[str, Any]) -> str:
    d = ev.get("data", {})
    kind = ev.get("type", "").removeprefix("io.watchkeep.")
    t = ev.get("time", "")[11:19]
    extra = ""
    if kind == "anomaly.raised":
        top = d.get("contributors", [{}])[0]
        extra = (f" severity={d.get('severity')} score={d.get('score', 0):.3g}"
                 f"/{d.get('threshold', 0):.3g} top={top.get('feature')} "
                 f"({100 * top.get('share', 0):.0f}%)")
    elif kind == "anomaly.cleared":
        extra = f" after {d.get('duration_s', 0):.0f} s (peak {d.get('peak_score', 0):.3g})"
    elif kind in ("sensor.fault", "sensor.recovered"):
        extra = f" channel={d.get('channel')} {','.join(d.get('reasons', []))}"
    elif kind == "limit.exceeded":
        extra = f" {d.get('feature', '')} zone={d.get('zone', '')} value={d.get('value', '')}"
    return f"  {t} {ev.get('subject', '?'):<6} {kind}{extra}  id={ev.get('id', '')[:8]}"


def render(status: dict[str, Any], sim_now: float, left_s: float, speed: float,
           recent: list[str], broker: str) -> str:
    lines = [f"watchkeep demo - Fernbrook water treatment works (invented plant)   "
             f"sim {rfc3339(sim_now)[11:19]}  x{speed:.1f}  {left_s:4.0f} s left  "
             f"broker: {broker}",
             "",
             f"  {'asset':<7}{'mode':<9}{'state':<11}{'score / threshold':<33}last event"]
    for a in status["assets"]:
        score, thr = a.get("score"), a.get("threshold")
        if score is None or thr is None:
            bar = "waiting for windows" if a.get("model") else "no model"
        else:
            ratio = score / thr
            n = min(10, round(ratio * 5))
            bar = f"{score:7.3g} / {thr:<6.3g} " + "#" * n + "." * max(0, 10 - n)
            bar = bar + ("!" if ratio > 1 else " ")
        last = a.get("last_event") or {}
        last_s = (f"{last.get('type', '').removeprefix('io.watchkeep.')} "
                  f"{last.get('time', '')[11:19]}") if last else "-"
        state = a["state"].upper() if a["state"] != "normal" else "normal"
        lines.append(f"  {a['asset']:<7}{a['mode']:<9}{state:<11}{bar:<33}{last_s}")
    lines += ["", "  events received by the maintenance system:"]
    lines += recent[-8:] or ["  (none yet)"]
    return "\n".join(lines)


# -- summary --------------------------------------------------------------------------

def summarise(events: list[dict[str, Any]], labels: list[Any]) -> dict[str, Any]:
    """Match events to the scenario's faults: a machine fault is detected by an
    `anomaly.raised`, a sensor fault by a `sensor.fault` on its channel; a raise that
    matches no machine fault is a false alarm (whether or not a sensor fault is under it)."""
    from datetime import datetime

    def ts(s: str) -> float:
        return datetime.fromisoformat(s.replace("Z", "+00:00")).timestamp()

    def when(e: dict[str, Any]) -> float:
        win = e.get("data", {}).get("window")
        return ts(win["end"]) if win else ts(e["time"])

    raised = [e for e in events if e.get("type", "").endswith("anomaly.raised")]
    sensor = [e for e in events if e.get("type", "").endswith("sensor.fault")]
    used: set[int] = set()
    faults = []
    for lb in labels:
        end = lb.end if lb.end is not None else float("inf")
        machine = str(lb.fault_class) == "machine"
        pool = raised if machine else sensor
        hit = next((i for i, e in enumerate(pool) if e["subject"] == lb.asset
                    and (machine or e["data"].get("channel") == lb.channel)
                    and lb.start <= when(e) <= end + 30
                    and (not machine or i not in used)), None)
        if hit is not None and machine:
            used.add(hit)
        delay = when(pool[hit]) - lb.start if hit is not None else None
        faults.append({"asset": lb.asset, "kind": lb.kind, "class": str(lb.fault_class),
                       "channel": lb.channel, "detected": hit is not None,
                       "delay_s": round(delay, 1) if delay is not None else None,
                       "by": ("anomaly.raised" if machine else "sensor.fault")
                       if hit is not None else None})
    false_alarms = [e["subject"] for i, e in enumerate(raised) if i not in used]
    return {"events": len(events), "raised": len(raised), "sensor_faults": len(sensor),
            "faults": faults, "false_alarms": len(false_alarms),
            "false_alarm_assets": false_alarms}


def format_summary(s: dict[str, Any]) -> str:
    lines = ["", "summary",
             f"  events received: {s['events']} ({s['raised']} anomaly.raised, "
             f"{s['sensor_faults']} sensor.fault)"]
    for f in s["faults"]:
        what = (f"detected by {f['by']} after {f['delay_s']:.0f} s" if f["detected"]
                else "not detected")
        where = f" ({f['channel']})" if f.get("channel") else ""
        lines.append(f"  {f['class']} fault {f['kind']} on {f['asset']}{where}: {what}")
    lines.append(f"  false alarms: {s['false_alarms']}"
                 + (f" ({', '.join(s['false_alarm_assets'])})" if s["false_alarms"] else ""))
    return "\n".join(lines)


# -- the command ----------------------------------------------------------------------

def run_demo(duration_s: float, state_dir: Path, out: TextIO, *,
             interactive: bool | None = None, summary_json: Path | None = None,
             train_s: float = TRAIN_NORMAL_S, broker_kind: str = "auto") -> int:
    from agent.daemon import Daemon
    from simulator.scenario import labels, load_scenario

    # The demo config resolves relative paths against config/demo/, not the working
    # directory: every path handed to it must be absolute.
    state_dir = state_dir.expanduser().resolve()
    state_dir.mkdir(parents=True, exist_ok=True)
    interactive = out.isatty() if interactive is None else interactive
    models = ensure_models(state_dir, out, train_s)
    scenario = load_scenario(DEMO_DIR / "scenario.yaml")
    speed = max(1.0, scenario.duration_s / duration_s)
    start = float(int(time.time()))
    clock = SimClock(origin=start, speed=speed)
    truth = labels(scenario, start_unix=start)
    log = setup_logging("WARNING")
    with tempfile.TemporaryDirectory(prefix="watchkeep-demo-") as tmp:
        broker = DemoBroker(Path(tmp), broker_kind)
        broker.start()
        daemon = None
        events = None
        stop = threading.Event()
        sim_thread = None
        try:
            cfg = demo_config(state_dir, broker.port, models)
            daemon = Daemon(cfg, logger=log, clock=clock)
            events = EventLog(broker.port, f"{cfg.topic_prefix}/assets/+/events")
            daemon.start()
            sim_thread, sim_err = _start_simulator(scenario, start, broker.port, speed, stop,
                                                   clock)
            print(f"demo: {len(cfg.assets)} assets, scenario {scenario.duration_s:.0f} s "
                  f"of plant time in {duration_s:.0f} s (x{speed:.1f}), broker {broker.kind} "
                  f"on 127.0.0.1:{broker.port}", file=out, flush=True)
            _watch(daemon, events, clock, duration_s, speed, out, interactive, broker.kind,
                   sim_thread)
            if sim_err:
                print(f"demo: the simulator stopped: {sim_err[0]}", file=out)
        finally:
            stop.set()
            if sim_thread is not None:
                sim_thread.join(10)
            if daemon is not None:
                daemon.stop()
            time.sleep(0.2)
            got = events.take(0) if events is not None else []
            if events is not None:
                events.close()
            broker.stop()
    summary = summarise(got, truth)
    print(format_summary(summary), file=out, flush=True)
    if summary_json is not None:
        summary_json.write_text(json.dumps(summary, indent=2))
    return 0


def _start_simulator(scenario: Scenario, start: float, port: int, speed: float,
                     stop: threading.Event, clock: SimClock
                     ) -> tuple[threading.Thread, list[BaseException]]:
    """The plant simulator publishing `scenario` to the demo broker on a thread of its
    own; the list receives what stopped it, if anything (reported after the run)."""
    from simulator.plant import simulate
    from simulator.publish import publish

    sim_err: list[BaseException] = []

    def _sim() -> None:
        try:
            publish(simulate(scenario, start_unix=start), host="127.0.0.1",
                    port=port, speed=speed, stop=stop, sim_origin=start,
                    on_sent=lambda msg: clock.anchor(msg[0]))
        except BaseException as exc:  # reported after the run
            sim_err.append(exc)

    thread = threading.Thread(target=_sim, name="demo-simulator", daemon=True)
    thread.start()
    return thread, sim_err


def _watch(daemon: Any, events: EventLog, clock: Callable[[], float], duration_s: float,
           speed: float, out: TextIO, interactive: bool, broker: str,
           sim_thread: threading.Thread) -> None:
    # After the scenario ends, wait for the last windows to close (length + timeout).
    tail_s = max(a.window.length_s + a.window.timeout_s for a in daemon.cfg.assets) / speed
    end = time.monotonic() + duration_s
    seen = 0
    recent: list[str] = []
    last_plain = 0.0
    while True:
        now = time.monotonic()
        if not sim_thread.is_alive() and now >= end + tail_s:
            break
        new = events.take(seen)
        seen += len(new)
        for ev in new:
            line = event_line(ev)
            recent.append(line)
            if not interactive:
                print(line, file=out, flush=True)
        if interactive:
            out.write("\x1b[H\x1b[2J" + render(daemon.status(), clock(), max(0, end - now),
                                               speed, recent, broker) + "\n")
            out.flush()
        elif now - last_plain >= 10:
            last_plain = now
            st = daemon.status()
            parts = [f"{a['asset']}={a['state']}" + (f"({a['score']:.3g})" if a["score"]
                                                     is not None else "")
                     for a in st["assets"]]
            print(f"  [{max(0, end - now):4.0f} s left] " + " ".join(parts), file=out,
                  flush=True)
        if now > end + tail_s + 30:
            break  # the simulator is stuck: do not hang the demo
        time.sleep(0.5 if interactive else 0.2)


def add_demo_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--duration", type=float, default=180.0,
                   help="seconds of wall time for the whole scenario (default 180)")
    p.add_argument("--state-dir", default=".demo",
                   help="where demo models and the outbox live (default ./.demo)")
    p.add_argument("--summary-json", help="also write the summary as JSON to this file")
    p.add_argument("--plain", action="store_true", help="no full-screen view, log lines only")
    p.add_argument("--broker", choices=["auto", "mosquitto", "embedded"], default="auto",
                   help="auto: mosquitto when installed, else the embedded Python broker")
    p.add_argument("--train-minutes", type=float, default=TRAIN_NORMAL_S / 60,
                   help="minutes of simulated normal running to train on at first run "
                        f"(default {TRAIN_NORMAL_S / 60:.0f})")


def cmd_demo(args: argparse.Namespace) -> int:
    if args.duration < 5:
        raise SystemExit("watchkeep demo: --duration must be at least 5 seconds")
    return run_demo(args.duration, Path(args.state_dir), sys.stdout,
                    interactive=False if args.plain else None,
                    summary_json=Path(args.summary_json) if args.summary_json else None,
                    train_s=60 * args.train_minutes, broker_kind=args.broker)
