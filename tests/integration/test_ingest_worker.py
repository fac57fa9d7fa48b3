"""`ingest.worker: process`: the child process that runs the local MQTT client and the
decoders, over a real Mosquitto: restarted when it dies, never outliving its daemon,
its counts and samples arriving complete."""

from __future__ import annotations

import logging
import math
import os
import signal
import subprocess
import sys
import threading
import time
from array import array
from pathlib import Path

import numpy as np

from agent.config.load import load_config
from agent.core.decode import Block, Reason, blocks_timestamps
from agent.daemon import Daemon
from agent.ingest.child import MAX_BATCH, _Batch, _Generation, _Sender
from agent.ingest.protocol import Counts, Data, channel_key
from tests.brokers import Broker, wait_for
from tests.helpers import asset_doc, publisher, readings, train_pca_bundle, write_config

WATCHKEEP = Path(sys.executable).parent / "watchkeep"


def _children(pid: int) -> list[int]:
    """Direct child processes of `pid` (Linux /proc)."""
    out: list[int] = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        text = (task / "children").read_text().split()
        out += [int(c) for c in text]
    return out


def _gone(pid: int) -> bool:
    """The process has exited (no /proc entry, or only a zombie waiting to be reaped)."""
    try:
        status = Path(f"/proc/{pid}/status").read_text()
    except FileNotFoundError:
        return True
    state = next(line for line in status.splitlines() if line.startswith("State:"))
    return "Z" in state.split()[1]


def _scored(daemon: Daemon, asset: str) -> float:
    return daemon.registry.get_sample_value("watchkeep_windows_scored_total",
                                            {"asset": asset}) or 0.0


def test_killed_worker_is_restarted_and_scoring_goes_on(tmp_path: Path, broker: Broker,
                                                        upstream_broker: Broker) -> None:
    """SIGKILL of the ingest child: logged, counted, a new child connects, windows flow."""
    bundle = train_pca_bundle(tmp_path / "models" / "P-1", "P-1", seed=11)
    cfg = load_config(write_config(tmp_path / "wk.yaml", broker.port, upstream_broker.port,
                                   [asset_doc("P-1", bundle)]))
    daemon = Daemon(cfg, logger=logging.getLogger("watchkeep.test.worker"))
    daemon.start()
    pub = publisher(broker.port)
    stop = threading.Event()

    def feed() -> None:  # the plant keeps sending, 4 windows per second
        t0 = math.floor(time.time()) + 1.0
        for i, (topic, payload) in enumerate(readings("P-1", t0, 400, seed=3)):
            if stop.is_set():
                return
            pub.publish(topic, payload, qos=0)
            if i % 30 == 29:
                stop.wait(0.25)

    t = threading.Thread(target=feed, daemon=True)
    try:
        wait_for(daemon.ingest.connected.is_set, what="ingest connected")
        first = daemon.ingest.worker_pid
        assert first is not None and first in _children(os.getpid())
        t.start()
        wait_for(lambda: _scored(daemon, "P-1") >= 3, timeout_s=20, what="windows scored")
        os.kill(first, signal.SIGKILL)
        wait_for(lambda: daemon.registry.get_sample_value(
            "watchkeep_ingest_worker_restarts_total") == 1, what="restart counted")
        wait_for(lambda: daemon.ingest.worker_pid != first and daemon.ingest.connected.is_set(),
                 timeout_s=20, what="a new worker connected")
        before = _scored(daemon, "P-1")
        wait_for(lambda: _scored(daemon, "P-1") >= before + 3, timeout_s=20,
                 what="windows scored after the restart")
        assert daemon.registry.get_sample_value("watchkeep_broker_reconnects_total",
                                                {"broker": "local"}) == 1
    finally:
        stop.set()
        t.join(5) if t.is_alive() else None
        pub.disconnect()
        pub.loop_stop()
        daemon.stop()
    assert _gone(daemon.ingest.worker_pid or 0)


def test_worker_does_not_outlive_a_killed_daemon(tmp_path: Path, broker: Broker,
                                                 upstream_broker: Broker) -> None:
    """SIGKILL of `watchkeep run`: its ingest child sees the pipe close and exits."""
    cfg_path = write_config(tmp_path / "wk.yaml", broker.port, upstream_broker.port,
                            [asset_doc("P-1", None)])
    log = (tmp_path / "daemon.log").open("ab")
    proc = subprocess.Popen([str(WATCHKEEP), "run", "--config", str(cfg_path)],
                            stdout=subprocess.DEVNULL, stderr=log)
    try:
        kids = wait_for(lambda: _children(proc.pid), timeout_s=20, what="the ingest child")
        assert len(kids) == 1
        wait_for(lambda: "local broker connected" in (tmp_path / "daemon.log").read_text(),
                 timeout_s=20, what="the child connected")
        proc.kill()
        proc.wait(10)
        wait_for(lambda: _gone(kids[0]), timeout_s=10, what="the orphaned child to exit")
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
        log.close()


def test_sigterm_drains_through_the_worker(tmp_path: Path, broker: Broker,
                                           upstream_broker: Broker) -> None:
    """SIGTERM to daemon and child together (as systemd's control group does): exit 0."""
    cfg_path = write_config(tmp_path / "wk.yaml", broker.port, upstream_broker.port,
                            [asset_doc("P-1", None)])
    log_path = tmp_path / "daemon.log"
    with log_path.open("ab") as log:
        proc = subprocess.Popen([str(WATCHKEEP), "run", "--config", str(cfg_path)],
                                stdout=subprocess.DEVNULL, stderr=log)
    try:
        kids = wait_for(lambda: _children(proc.pid), timeout_s=20, what="the ingest child")
        wait_for(lambda: "local broker connected" in log_path.read_text(), timeout_s=20,
                 what="the child connected")
        os.kill(kids[0], signal.SIGTERM)  # ignored: the daemon decides when ingest stops
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(20) == 0
        assert _gone(kids[0])
        text = log_path.read_text()
        assert "watchkeep stopped" in text and "ingest worker exited" not in text
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)


# -- the child's batching and counting, driven directly over a real pipe ---------------


def _pair() -> tuple[_Sender, object]:
    import multiprocessing as mp

    parent, child = mp.Pipe(duplex=True)
    return _Sender(child), parent


def test_batch_is_sent_when_full_and_on_flush() -> None:
    """A batch goes out at MAX_BATCH samples, the rest on flush; nothing lost or doubled."""
    sender, parent = _pair()
    wake = threading.Event()
    batch = _Batch(7, sender, wake)
    key = channel_key(3, 2)
    for i in range(MAX_BATCH + 5):
        batch.add(key, float(i), float(-i), 100.0 + i)
    assert wake.is_set()
    first = parent.recv()  # type: ignore[attr-defined]
    assert isinstance(first, Data) and first.gen == 7 and len(first.keys) == MAX_BATCH
    batch.add_block(key, Block(0.0, 1.0, array("d", [1.0] * 3)), 200.0)
    batch.add_block(key + 1, Block(3.0, 2.0, array("d", [0.0] * 2)), 201.0)
    batch.flush()
    second = parent.recv()  # type: ignore[attr-defined]
    assert second.ts == [float(i) for i in range(MAX_BATCH, MAX_BATCH + 5)]
    keys, t0s, rates, sizes, arrivals, raw = second.blocks
    assert (keys, t0s, rates, sizes, arrivals) == ((key, key + 1), (0.0, 3.0), (1.0, 2.0),
                                                   (3, 2), (200.0, 201.0))
    assert np.frombuffer(raw).tolist() == [1, 1, 1, 0, 0]
    assert blocks_timestamps(t0s, rates, sizes).tolist() == [0.0, 1.0, 2.0, 3.0, 3.5]
    batch.flush()  # empty: sends nothing
    assert not parent.poll(0.05)  # type: ignore[attr-defined]


def test_counts_are_deltas(tmp_path: Path) -> None:
    """Counts go out once as differences; unchanged counts send nothing."""
    cfg = load_config(write_config(tmp_path / "wk.yaml", 1883, 1883, [asset_doc("P-1", None)]))
    sender, _parent = _pair()
    g = _Generation(0, cfg, sender, threading.Event(), logging.getLogger("watchkeep.test"))
    assert g.counts() is None
    g.handler.handle("plant/P-1/temp", b'{"value": 1.5}', time.time())
    g.handler.handle("plant/P-1/temp", b"{not json", time.time())
    g.handler.handle("plant/nowhere", b"1", time.time())
    counts = g.counts()
    assert isinstance(counts, Counts)
    gen, per_key, rejected = counts
    key = next(k for t, k in g.key_of.items() if t == "plant/P-1/temp")
    assert gen == 0
    assert per_key == {key: (2, 1, 0)}
    assert rejected == {Reason.MALFORMED.value: 1, Reason.UNKNOWN_TOPIC.value: 1}
    assert g.counts() is None


def test_waveform_blocks_arrive_whole_and_gaps_are_counted(tmp_path: Path, broker: Broker,
                                                           upstream_broker: Broker) -> None:
    """json-batch blocks through the child: every sample counted, windows cut, one gap seen."""
    import json

    doc = {"name": "F-1", "window": {"length_s": 1.0, "lateness_s": 0.0, "timeout_s": 2.0},
           "channels": {"acc": {"topic": "plant/F-1/acc", "decoder": "json-batch",
                                "rate_hz": 200.0, "features": ["rms", "std"]}}}
    cfg = load_config(write_config(tmp_path / "wk.yaml", broker.port, upstream_broker.port,
                                   [doc]))
    daemon = Daemon(cfg, logger=logging.getLogger("watchkeep.test.waveform"))
    daemon.start()
    pub = publisher(broker.port)
    try:
        wait_for(daemon.ingest.connected.is_set, what="ingest subscribed")
        t0 = math.floor(time.time()) + 1.0
        rng = np.random.default_rng(4)
        sent = 0
        for b in range(12):  # 0.5 s blocks of 100 samples; block 7 is never sent
            if b == 7:
                continue
            vals = rng.normal(size=100).round(5).tolist()
            pub.publish("plant/F-1/acc", json.dumps(
                {"ts": t0 + 0.5 * b, "rate_hz": 200.0, "values": vals}), qos=0)
            sent += 100

        def sample(name: str) -> float:
            return daemon.registry.get_sample_value(name, {"asset": "F-1", "channel": "acc"}) \
                or 0.0

        wait_for(lambda: sample("watchkeep_samples_total") == sent, timeout_s=10,
                 what="every sample counted")
        assert sample("watchkeep_sample_gaps_total") == 1
        wait_for(lambda: (daemon.registry.get_sample_value(
            "watchkeep_windows_closed_total", {"asset": "F-1"}) or 0) >= 5, timeout_s=10,
            what="windows cut from the blocks")
    finally:
        pub.disconnect()
        pub.loop_stop()
        daemon.stop()


class _Lines(logging.Handler):
    def __init__(self) -> None:
        super().__init__(logging.DEBUG)
        self.lines: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.lines.append(record.getMessage())


def test_running_child_holds_no_numpy_prometheus_or_onnx(tmp_path: Path, broker: Broker,
                                                         upstream_broker: Broker) -> None:
    """After real scalar and block traffic the child has mapped no numpy or onnxruntime
    library, and the module list it reports at exit names none of the heavy packages."""
    import json

    bundle = train_pca_bundle(tmp_path / "models" / "P-1", "P-1", seed=5)
    wave = {"name": "F-1", "window": {"length_s": 1.0, "lateness_s": 0.0, "timeout_s": 2.0},
            "channels": {"acc": {"topic": "plant/F-1/acc", "decoder": "json-batch",
                                 "rate_hz": 200.0, "features": ["rms"]}}}
    cfg = load_config(write_config(tmp_path / "wk.yaml", broker.port, upstream_broker.port,
                                   [asset_doc("P-1", bundle), wave]))
    log = logging.getLogger("watchkeep.test.child-modules")
    log.setLevel(logging.DEBUG)
    lines = _Lines()
    log.addHandler(lines)
    daemon = Daemon(cfg, logger=log)
    daemon.start()
    pub = publisher(broker.port)
    try:
        wait_for(daemon.ingest.connected.is_set, what="ingest subscribed")
        t0 = math.floor(time.time()) + 1.0
        for topic, payload in readings("P-1", t0, 3, seed=2):
            pub.publish(topic, payload, qos=0)
        for b in range(4):
            pub.publish("plant/F-1/acc", json.dumps(
                {"ts": t0 + 0.5 * b, "values": [0.25 * i for i in range(100)]}), qos=0)
        wait_for(lambda: (daemon.registry.get_sample_value(
            "watchkeep_samples_total", {"asset": "F-1", "channel": "acc"}) or 0) == 400,
            timeout_s=10, what="the blocks applied")
        pid = daemon.ingest.worker_pid
        assert pid is not None
        maps = Path(f"/proc/{pid}/maps").read_text()
        for lib in ("_multiarray_umath", "openblas", "onnxruntime"):
            assert lib not in maps, f"the ingest child has {lib} mapped"
    finally:
        pub.disconnect()
        pub.loop_stop()
        daemon.stop()
        log.removeHandler(lines)
    report = [ln for ln in lines.lines if ln.startswith("ingest worker modules")]
    assert len(report) == 1
    packages = set(report[0].split("packages=", 1)[1].strip('"').split(","))
    assert {"paho", "orjson", "agent"} <= packages
    assert not {"numpy", "prometheus_client", "onnxruntime", "onnx"} & packages
