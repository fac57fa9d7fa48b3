"""sparkplug-b against an independent Sparkplug B edge node (pysparkplug, from PyPI) over
a real Mosquitto that only knows authenticated clients, through the ingest child as the
daemon runs it: births, data by alias, a sequence gap answered with a rebirth request, a
malformed payload, the edge node killed (its NDEATH will) and restarted with new
aliases, a device death.

The edge node is tests/integration/spb_peer.py in its own interpreter (pysparkplug needs
paho-mqtt 1.x; `.venv/spb-peer`). Spec references are to Eclipse Sparkplug 3.0, chapter 6
Payloads, by the statement ids of its conformance items (tck-id-...).
"""

from __future__ import annotations

import logging
import os
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from prometheus_client import CollectorRegistry

from agent.config.load import parse_config
from agent.ingest.buffers import Buffers, IngestHandler, close_inboxes
from agent.ingest.parent import ProcessIngest
from agent.ops.metrics import Metrics
from tests.brokers import Broker, wait_for
from tests.helpers import Collector, write_config
from tests.integration.test_daemon_process import WATCHKEEP
from tests.integration.test_mqtt_commands_daemon import USERS, write_password_file

ROOT = Path(__file__).resolve().parents[2]
PEER_PATH = ROOT / ".venv" / "spb-peer"
PEER = Path(__file__).with_name("spb_peer.py")
TOPIC = "spBv1.0/fernbrook-dosing/DDATA/dosing-gw/C-301"
CHANNELS = {"flow": "Pump/Flow", "pressure": "Pump/Discharge Pressure",
            "running": "Pump/Running", "stroke": "Pump/Stroke"}
USER = next(iter(USERS))


class Peer:
    """The pysparkplug edge node process: commands on stdin, one answer line each."""

    def __init__(self, port: int, alias_base: int) -> None:
        env = dict(os.environ, PYTHONPATH=str(PEER_PATH))
        self.proc = subprocess.Popen(
            [sys.executable, "-s", str(PEER), str(port), USER, USERS[USER], str(alias_base)],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
            text=True, env=env, cwd=str(PEER.parent.parent))  # not the repo: no agent/
        self.ncmd: list[str] = []
        assert self.line() == "ready"

    def line(self) -> str:
        assert self.proc.stdout is not None
        while True:
            out = self.proc.stdout.readline()
            if not out:
                err = self.proc.stderr.read() if self.proc.stderr else ""
                raise AssertionError(f"peer exited: {err[-2000:]}")
            out = out.strip()
            if out.startswith("ncmd "):
                self.ncmd.append(out)
                continue
            return out

    def cmd(self, text: str) -> None:
        assert self.proc.stdin is not None
        self.proc.stdin.write(text + "\n")
        self.proc.stdin.flush()
        assert self.line() == "ok " + text.split()[0]

    def kill(self) -> None:
        """SIGKILL: no clean disconnect, so the broker publishes the NDEATH will."""
        if self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGKILL)
            self.proc.wait(5)


@pytest.fixture
def auth_broker(tmp_path: Path) -> Iterator[Broker]:
    pw = write_password_file(tmp_path / "passwd")
    b = Broker(tmp_path / "broker", extra=f"password_file {pw}\nallow_anonymous false\n")
    b.start()
    yield b
    b.stop()


def _config(port: int) -> Any:
    chans = {c: {"topic": TOPIC, "decoder": "sparkplug-b", "metric": m, "rate_hz": 1.0,
                 "features": ["mean"]} for c, m in CHANNELS.items()}
    doc = {"site": "fernbrook", "gateway": "gw-dosing", "state_dir": "/tmp/unused",
           "local_broker": {"port": port, "username": USER, "password": USERS[USER]},
           "ingest": {"max_clock_skew_s": 1e9,
                      "sparkplug": {"rebirth_requests": True, "rebirth_min_interval_s": 1}},
           "assets": [{"name": "C-301", "window": {"length_s": 1.0, "lateness_s": 0.0},
                       "channels": chans}]}
    return parse_config(doc, Path("."))


def _value(m: Metrics, name: str, **labels: str) -> float:
    return m.registry.get_sample_value(name, labels) or 0.0


@pytest.mark.skipif(not PEER_PATH.is_dir(), reason="the peer's packages are installed by "
                    "`make .venv/.installed` into .venv/spb-peer")
def test_pysparkplug_edge_node_through_the_ingest_child(auth_broker: Broker) -> None:
    """Births, alias data, a gap with its rebirth request, a malformed payload, a death,
    a restart with new aliases and a device death, as the daemon's ingest sees them."""
    cfg = _config(auth_broker.port)
    log = logging.getLogger("test.spb")
    metrics = Metrics(CollectorRegistry())
    buffers = Buffers(cfg)
    handler = IngestHandler(cfg, buffers, metrics, log)
    ingest = ProcessIngest(cfg, handler, metrics, log)
    inbox = buffers.by_asset[0][0].inbox
    peers: list[Peer] = []

    def samples(ch: str) -> float:
        handler.flush_counts()
        return _value(metrics, "watchkeep_samples_total", asset="C-301", channel=ch)

    def rejected(reason: str) -> float:
        return _value(metrics, "watchkeep_messages_rejected_total", reason=reason)

    ingest.start()
    try:
        assert ingest.connected.wait(10)
        # The child subscribes right after connecting; its SUBACK is not visible here,
        # so give the broker a moment (bounded) before the edge node is born.
        time.sleep(0.3)
        # 1. Birth: NBIRTH + DBIRTH carry every metric's name, alias, datatype and value
        # (tck-id-payloads-alias-birth-requirement, tck-id-payloads-metric-datatype-req):
        # the birth's values are the first samples.
        a = Peer(auth_broker.port, alias_base=10)
        peers.append(a)
        wait_for(lambda: samples("flow") == 1 and samples("stroke") == 1)
        # 2. Data by alias only (tck-id-payloads-alias-data-cmd-requirement), each metric
        # stamped with its own timestamp in ms since epoch (tck-id-payloads-name-birth-
        # data-requirement). Int16 travels as uint32 ("Datatype Details"), a negative
        # one in two's complement, Float as float (2.5 is exact in binary32), Boolean as
        # bool (true -> 1.0).
        # After the births' own timestamps, and within the time-base guard's 10 s of the
        # gateway clock (agent/core/timebase.py refuses a channel's samples further ahead).
        t0 = int(time.time() + 2) * 1000
        a.cmd(f"data {t0 + 1000} 12.75 2.5 1 -1234")
        a.cmd(f"data {t0 + 2000} 13.25 3.5 0 77")
        wait_for(lambda: samples("flow") == 3)
        assert rejected("unknown_alias") == 0 and rejected("no_birth") == 0
        # 3. A sequence gap: seq MUST follow the previous message's by one modulo 256
        # (tck-id-payloads-sequence-num-incrementing); the jump is a gap for every
        # channel of the edge node, and rebirth_requests sends the NCMD the spec gives:
        # one Boolean (datatype 11) metric 'Node Control/Rebirth' = true ("NCMD").
        a.cmd("skip")
        a.cmd(f"data {t0 + 3000} 14.0 4.0 1 5")
        wait_for(lambda: samples("flow") == 4)
        handler_gaps = {c: _value(metrics, "watchkeep_sample_gaps_total", asset="C-301",
                                  channel=c) for c in CHANNELS}
        wait_for(lambda: all(_value(metrics, "watchkeep_sample_gaps_total", asset="C-301",
                                    channel=c) == 1 for c in CHANNELS))
        assert set(handler_gaps.values()) <= {0.0, 1.0}
        # Each answer to a ping comes after what the peer printed before it.
        wait_for(lambda: (a.cmd("ping"), a.ncmd)[1], timeout_s=10, interval_s=0.1)
        assert a.ncmd[0] == "ncmd Node Control/Rebirth 11 True"
        # 4. A malformed payload: counted, nothing else changes.
        a.cmd("garbage")
        wait_for(lambda: rejected("malformed") == 1)
        assert samples("flow") == 4
        # 5. The edge node dies without a clean disconnect: the broker publishes its
        # NDEATH will (tck-id-payloads-ndeath-will-message), and every channel of the
        # node goes offline at once.
        a.kill()
        wait_for(lambda: len(inbox.liveness) == 4)
        assert sorted((ci, death) for ci, death, _ in inbox.take_liveness()) == \
            [(ci, "node_death") for ci in range(4)]
        # 6. The edge node comes back with new aliases (a new session: NBIRTH with seq
        # 0, tck-id-payloads-nbirth-seq, and a new DBIRTH): the channels come online,
        # and data by the new aliases lands on the right channels.
        b = Peer(auth_broker.port, alias_base=50)
        peers.append(b)
        wait_for(lambda: len(inbox.liveness) == 4)
        assert sorted((ci, death) for ci, death, _ in inbox.take_liveness()) == \
            [(ci, None) for ci in range(4)]
        b.cmd(f"data {t0 + 4000} 21.5 6.25 1 -3")
        wait_for(lambda: samples("flow") == 6)  # the DBIRTH's value and this one
        assert rejected("unknown_alias") == 0
        # 7. The device dies (DDEATH, which carries the next seq:
        # tck-id-payloads-ddeath-seq-inc): its channels go offline, no gap is counted.
        b.cmd("ddeath")
        wait_for(lambda: len(inbox.liveness) == 4)
        assert sorted((ci, death) for ci, death, _ in inbox.take_liveness()) == \
            [(ci, "device_death") for ci in range(4)]
        assert all(_value(metrics, "watchkeep_sample_gaps_total", asset="C-301",
                          channel=c) == 1 for c in CHANNELS)
    finally:
        for p in peers:
            p.kill()
        ingest.stop()
    # What reached the windows: the values the edge node sent, on their own timestamps.
    results, _ = close_inboxes([inbox], t0 / 1000 + 30)
    res = results[0]
    assert res is not None
    got: dict[int, list[tuple[float, float]]] = {}
    for w in res.windows:
        for ci in range(4):
            got.setdefault(ci, []).extend(zip(w.timestamps[ci].tolist(),
                                              w.values[ci].tolist(), strict=True))
    ts = [(t0 + k * 1000) / 1000 for k in (1, 2, 3, 4)]  # ms since epoch -> s, as sent
    sent = {0: [12.75, 13.25, 14.0, 21.5], 1: [2.5, 3.5, 4.0, 6.25], 2: [1.0, 0.0, 1.0, 1.0],
            3: [-1234.0, 77.0, 5.0, -3.0]}
    for ci, values in sent.items():
        # (a later rebirth's own values are stamped after ts[-1])
        assert [p for p in got[ci] if ts[0] <= p[0] <= ts[-1]] == \
            list(zip(ts, values, strict=True))
    assert np.isfinite([v for vs in got.values() for _, v in vs]).all()


@pytest.mark.skipif(not PEER_PATH.is_dir(), reason="the peer's packages are installed by "
                    "`make .venv/.installed` into .venv/spb-peer")
def test_daemon_raises_sensor_fault_when_the_edge_node_dies(tmp_path: Path,
                                                            auth_broker: Broker,
                                                            upstream_broker: Broker) -> None:
    """`watchkeep run` (ingest child, pipeline, outbox, upstream): the edge node killed ->
    its NDEATH will -> one sensor.fault per channel upstream (reason node_death); born
    again and sending -> sensor.recovered. No anomaly either way (no model)."""
    chans = {c: {"topic": TOPIC, "decoder": "sparkplug-b", "metric": m, "rate_hz": 4.0,
                 "features": ["mean"]} for c, m in CHANNELS.items()}
    asset = {"name": "C-301", "channels": chans,
             "window": {"length_s": 1.0, "lateness_s": 0.2, "timeout_s": 2.0,
                        "min_coverage": 0.5}}
    config = write_config(tmp_path / "watchkeep.yaml", auth_broker.port, upstream_broker.port,
                          [asset], local_broker={"host": "127.0.0.1", "port": auth_broker.port,
                                                 "username": USER, "password": USERS[USER]})
    events = Collector(upstream_broker.port, "watchkeep/testworks/gw1/assets/+/events",
                       "spb-events")
    status = Collector(upstream_broker.port, "watchkeep/testworks/gw1/status", "spb-status")
    env = {k: v for k, v in os.environ.items() if k not in ("NOTIFY_SOCKET", "WATCHDOG_USEC")}
    proc = subprocess.Popen([WATCHKEEP, "run", "--config", str(config)], env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    peers: list[Peer] = []

    def send(peer: Peer, seconds: float) -> None:
        """Readings 4 per second, stamped now, for `seconds`."""
        end = time.time() + seconds
        k = 0
        while time.time() < end:
            k += 1
            peer.cmd(f"data {int(time.time() * 1000)} {10 + k % 3} {2 + k % 2} 1 {k % 5}")
            time.sleep(0.25)

    def sensor_events(kind: str) -> list[dict[str, Any]]:
        return [e for e in events.events() if e["type"] == f"io.watchkeep.sensor.{kind}"]

    try:
        wait_for(lambda: any(s.get("state") == "online" for s in status.json())
                 or proc.poll() is not None, timeout_s=30, what="the daemon online")
        assert proc.poll() is None, proc.stderr.read().decode() if proc.stderr else ""
        time.sleep(0.5)  # the ingest child subscribes just after it connects
        a = Peer(auth_broker.port, alias_base=10)
        peers.append(a)
        send(a, 2.0)
        assert sensor_events("fault") == []
        killed = time.monotonic()
        a.kill()
        wait_for(lambda: len(sensor_events("fault")) == 4, timeout_s=10,
                 what="a sensor.fault per channel")
        took = time.monotonic() - killed
        faults = sensor_events("fault")
        assert sorted(e["data"]["channel"] for e in faults) == sorted(CHANNELS)
        assert all(e["data"]["reasons"] == ["node_death"] for e in faults)
        print(f"NDEATH -> sensor.fault upstream in {took:.2f} s")
        b = Peer(auth_broker.port, alias_base=50)
        peers.append(b)
        send(b, 4.0)
        wait_for(lambda: len(sensor_events("recovered")) == 4, timeout_s=10,
                 what="a sensor.recovered per channel")
        assert not [e for e in events.events() if "anomaly" in e["type"]]
    finally:
        for p in peers:
            p.kill()
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(15)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(10)
        events.close()
        status.close()
