"""Upstream failover between two real Mosquittos: the first killed by PID, events go on
through the second, none lost, order kept, duplicates only with the same id."""

from __future__ import annotations

import json
import logging
import math
import signal
import threading
import time
import urllib.request
from pathlib import Path
from typing import Any

from agent.config.load import load_config
from agent.daemon import Daemon
from tests.brokers import Broker, wait_for
from tests.helpers import (
    StampedCollector,
    asset_doc,
    publisher,
    readings,
    train_pca_bundle,
    write_config,
)
from tests.integration.test_outbox_outage import _publish_paced, fault_cycles

EVENTS = "watchkeep/testworks/gw1/assets/+/events"


class _Lines(logging.Handler):
    def __init__(self) -> None:
        super().__init__(logging.INFO)
        self.lines: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.lines.append(record.getMessage())


def _events_made(daemon: Daemon) -> int:
    """Every event the daemon made, of any type: they share the asset's sequence."""
    return int(sum(s.value for m in daemon.registry.collect() if m.name == "watchkeep_events"
                   for s in m.samples if s.name == "watchkeep_events_total"))


def _metrics(port: int) -> str:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
        return str(r.read().decode())


def _status(port: int) -> dict[str, Any]:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/status", timeout=5) as r:
        return dict(json.loads(r.read()))


def test_first_endpoint_killed_events_continue_through_the_second(tmp_path: Path,
                                                                  broker: Broker) -> None:
    """Endpoint A is SIGKILLed mid-stream: the daemon fails over to B, every event arrives
    (A before the kill, B after), first arrivals in sequence order; /status, /metrics and
    the log name the endpoint in use."""
    a = Broker(tmp_path / "a").start()
    b = Broker(tmp_path / "b").start()
    ep_a, ep_b = f"127.0.0.1:{a.port}", f"127.0.0.1:{b.port}"
    bundle = train_pca_bundle(tmp_path / "models" / "P-1", "P-1", seed=11)
    cfg = load_config(write_config(
        tmp_path / "wk.yaml", broker.port, 0, [asset_doc("P-1", bundle)],
        ingest={"subscriptions": ["plant/#"]},
        upstream_broker={"endpoints": [{"host": "127.0.0.1", "port": a.port},
                                       {"host": "127.0.0.1", "port": b.port}],
                         "keepalive_s": 15}))
    log = logging.getLogger("watchkeep.test.failover")
    log.setLevel(logging.INFO)
    lines = _Lines()
    log.addHandler(lines)
    daemon = Daemon(cfg, logger=log)
    on_a = StampedCollector(a.port, EVENTS, "maint-a")
    on_b = StampedCollector(b.port, EVENTS, "maint-b")
    stop = threading.Event()
    pub = publisher(broker.port)
    daemon.start()
    try:
        assert daemon.http is not None
        http = daemon.http.port
        wait_for(daemon.upstream.connected.is_set, what="upstream connected")
        assert _status(http)["upstream"]["endpoint"] == ep_a
        assert f'watchkeep_upstream_endpoint{{endpoint="{ep_a}"}} 1.0' in _metrics(http)
        wait_for(daemon.ingest.connected.is_set, what="ingest subscribed")
        n_windows = 100
        t0 = math.floor(time.time()) + 1.0
        feed = threading.Thread(target=_publish_paced, daemon=True, args=(
            pub, readings("P-1", t0, n_windows, seed=3, fault_windows=fault_cycles(n_windows)),
            0.15, stop))
        feed.start()
        wait_for(lambda: len(on_a.events()) >= 4, timeout_s=30, what="events through A")
        assert a.proc is not None
        a.proc.send_signal(signal.SIGKILL)  # by PID: a node lost, no goodbye
        a.proc.wait(5)
        killed_at = time.monotonic()
        wait_for(lambda: [t for t, _ in on_b.events() if t > killed_at], timeout_s=30,
                 what="an event through B after the kill")
        first_b = min(t for t, _ in on_b.events() if t > killed_at)
        st = _status(http)["upstream"]
        assert (st["connected"], st["endpoint"], st["endpoints"]) == (True, ep_b, [ep_a, ep_b])
        text = _metrics(http)
        assert f'watchkeep_upstream_endpoint{{endpoint="{ep_b}"}} 1.0' in text
        assert f'watchkeep_upstream_endpoint{{endpoint="{ep_a}"}} 0.0' in text
        assert any(ln.startswith("upstream broker failover") and ep_b in ln and ep_a in ln
                   for ln in lines.lines), lines.lines
        feed.join(60)
        assert not feed.is_alive()
        seen: list[int] = []

        def quiet() -> bool:
            seen.append(_events_made(daemon))
            return len(seen) > 15 and seen[-1] == seen[-15]

        wait_for(quiet, timeout_s=40, interval_s=0.2, what="no new anomaly events")
        expected = _events_made(daemon)
        wait_for(lambda: daemon.outbox.counts()[0] == 0, timeout_s=20, what="outbox drained")
        got = sorted(on_a.events() + on_b.events(), key=lambda e: e[0])
        first: dict[str, dict[str, Any]] = {}
        for _, ev in got:
            first.setdefault(ev["id"], ev)
        seqs = [ev["data"]["sequence"] for ev in first.values()]
        assert seqs == list(range(1, expected + 1)), seqs  # none lost, first arrivals in order
        dups = len(got) - len(first)
        assert dups <= cfg.outbox.inflight  # only what was in flight at the kill
        same_id = {ev["id"]: ev["data"]["sequence"] for _, ev in got}
        assert all(first[i]["data"]["sequence"] == s for i, s in same_id.items())
        print(f"failover A->B: {first_b - killed_at:.2f} s from the kill to the first event "
              f"through B; {expected} events, 0 lost, {dups} duplicate(s)")
        assert expected >= 10
    finally:
        stop.set()
        pub.disconnect()
        pub.loop_stop()
        daemon.stop()
        on_a.close()
        on_b.close()
        a.stop()
        b.stop()
        log.removeHandler(lines)
        log.setLevel(logging.NOTSET)


def test_first_endpoint_down_at_start_connects_to_the_second(tmp_path: Path,
                                                             broker: Broker) -> None:
    """Nothing listens on the first endpoint: the daemon connects to the second."""
    b = Broker(tmp_path / "b").start()
    dead = Broker(tmp_path / "dead")  # a free port, never started
    cfg = load_config(write_config(
        tmp_path / "wk.yaml", broker.port, 0, [asset_doc("P-1", None)],
        upstream_broker={"endpoints": [{"host": "127.0.0.1", "port": dead.port},
                                       {"host": "127.0.0.1", "port": b.port}]}))
    daemon = Daemon(cfg, logger=logging.getLogger("watchkeep.test.failover2"))
    daemon.start()
    try:
        wait_for(daemon.upstream.connected.is_set, timeout_s=15, what="upstream connected")
        assert daemon.status()["upstream"]["endpoint"] == f"127.0.0.1:{b.port}"
    finally:
        daemon.stop()
        b.stop()
