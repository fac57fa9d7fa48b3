"""End to end over two real Mosquitto brokers: readings in, explained events out."""

from __future__ import annotations

import logging
import math
import time
from pathlib import Path
from typing import Any

import pytest

from agent.config.load import load_config
from agent.daemon import Daemon
from tests.brokers import Broker, wait_for
from tests.helpers import Collector, asset_doc, publisher, readings, train_pca_bundle, write_config

# CloudEvents 1.0 spec, "Required Attributes": id, source, specversion, type; ids are
# non-empty strings; specversion is "1.0". `time` is RFC 3339.
CE_REQUIRED = ("id", "source", "specversion", "type")


def check_cloudevent(ev: dict[str, Any]) -> None:
    for key in CE_REQUIRED:
        assert isinstance(ev.get(key), str) and ev[key], f"{key} missing: {ev}"
    assert ev["specversion"] == "1.0"
    assert ev["datacontenttype"] == "application/json"
    assert ev["time"].endswith("Z") and "T" in ev["time"]
    assert ev["source"].startswith("/testworks/gw1/")
    assert ev["type"].startswith("io.watchkeep.")


@pytest.fixture(params=["process", "thread"])
def plant(request: pytest.FixtureRequest, tmp_path: Path, broker: Broker,
          upstream_broker: Broker):
    """The daemon with ingest in a child process (the default) and in a thread."""
    b1 = train_pca_bundle(tmp_path / "models" / "P-1", "P-1", seed=11)
    b2 = train_pca_bundle(tmp_path / "models" / "P-2", "P-2", seed=12)
    cfg_path = write_config(tmp_path / "watchkeep.yaml", broker.port, upstream_broker.port,
                            [asset_doc("P-1", b1), asset_doc("P-2", b2)],
                            ingest={"subscriptions": ["plant/#"], "worker": request.param})
    cfg = load_config(cfg_path)
    daemon = Daemon(cfg, logger=logging.getLogger("watchkeep.test"))
    collector = Collector(upstream_broker.port, "watchkeep/testworks/gw1/#")
    daemon.start()
    wait_for(daemon.ingest.connected.is_set, what="daemon connected to local broker")
    wait_for(daemon.upstream.connected.is_set, what="daemon connected upstream")
    pub = publisher(broker.port)
    yield daemon, collector, pub
    pub.disconnect()
    pub.loop_stop()
    daemon.stop()
    collector.close()


def _publish(pub, msgs) -> int:
    n = 0
    for topic, payload in msgs:
        pub.publish(topic, payload, qos=0)
        n += 1
    return n


def _interleave(*gens):
    iters = [iter(g) for g in gens]
    while iters:
        for it in list(iters):
            try:
                yield next(it)
            except StopIteration:
                iters.remove(it)


def _scored(daemon: Daemon, asset: str) -> float:
    return daemon.metrics.windows_scored.labels(asset)._value.get()


def test_fault_raises_and_clears_with_the_faulty_channel_on_top(plant) -> None:
    """Normal -> nothing; a current fault on P-1 -> raised within 2 windows; normal -> cleared."""
    daemon, collector, pub = plant
    t0 = math.floor(time.time()) + 1.0
    fault = range(20, 30)
    _publish(pub, _interleave(readings("P-1", t0, 50, seed=1, fault_windows=fault),
                              readings("P-2", t0, 50, seed=2)))
    wait_for(lambda: _scored(daemon, "P-1") >= 49 and _scored(daemon, "P-2") >= 49,
             timeout_s=30, what="all windows scored")
    wait_for(lambda: len(collector.events()) >= 2, timeout_s=10, what="two events upstream")
    time.sleep(0.5)  # let any unexpected extra event arrive too
    events = collector.events()
    for ev in events:
        check_cloudevent(ev)
    assert [e["subject"] for e in events] == ["P-1", "P-1"], events
    raised, cleared = events
    assert raised["type"] == "io.watchkeep.anomaly.raised"
    assert cleared["type"] == "io.watchkeep.anomaly.cleared"
    d = raised["data"]
    for key in ("asset", "mode", "window", "score", "threshold", "severity", "contributors",
                "model", "sequence"):
        assert key in d, key
    assert d["score"] > d["threshold"]
    assert d["contributors"][0]["feature"].startswith("current."), d["contributors"]
    assert sum(c["share"] for c in d["contributors"]) <= 1.0001
    # Raised within two windows of the onset (window 20 starts at t0 + 20).
    from datetime import datetime

    start = datetime.fromisoformat(d["window"]["start"].replace("Z", "+00:00")).timestamp()
    assert t0 + 20 <= start < t0 + 22, (start - t0)
    cstart = datetime.fromisoformat(
        cleared["data"]["window"]["start"].replace("Z", "+00:00")).timestamp()
    assert t0 + 30 <= cstart < t0 + 36
    assert cleared["data"]["sequence"] == d["sequence"] + 1
    assert raised["id"] != cleared["id"]
    # Retained state and online status are there for a late subscriber.
    late = Collector(collector.client._port, "watchkeep/testworks/gw1/#", "late-subscriber")
    try:
        wait_for(lambda: len(late.json("/state")) >= 2 and late.json("/status"),
                 what="retained state and status")
        assert all(retain for _, _, retain in late.messages)
        assert late.json("/status")[0]["state"] == "online"
        states = {s["asset"]: s for s in late.json("/state")}
        assert states["P-1"]["state"] == "normal"
    finally:
        late.close()


def test_bad_input_is_counted_and_changes_nothing(plant) -> None:
    """Malformed, wrong type, NaN, Infinity, huge, unknown topic, future ts: counted, skipped."""
    daemon, collector, pub = plant
    t0 = math.floor(time.time()) + 1.0
    bad = [
        ("plant/P-2/temp", b"{not json"),
        ("plant/P-2/temp", b'{"value": "hot"}'),
        ("plant/P-2/temp", b'{"value": NaN}'),
        ("plant/P-2/current", b'{"value": Infinity}'),
        ("plant/P-2/pressure", b"x" * (10 * 1024 * 1024)),
        ("plant/P-9/temp", b'{"value": 1.0}'),
        ("plant/P-2/temp", b'{"ts": 4102444800, "value": 40.0}'),
    ]
    good = list(_interleave(readings("P-1", t0, 30, seed=1, fault_windows=range(10, 20)),
                            readings("P-2", t0, 30, seed=2)))
    step = len(good) // (len(bad) + 1)
    stream = []
    for i, msg in enumerate(good):
        stream.append(msg)
        if i % step == step - 1 and bad:
            stream.append(bad.pop(0))
    stream.extend(bad)
    _publish(pub, stream)
    wait_for(lambda: _scored(daemon, "P-1") >= 29 and _scored(daemon, "P-2") >= 29,
             timeout_s=30, what="all windows scored")
    wait_for(lambda: len(collector.events()) >= 2, timeout_s=10, what="events upstream")
    rej = daemon.metrics.messages_rejected
    want = {"malformed": 1, "wrong_type": 1, "non_finite": 2, "too_large": 1,
            "unknown_topic": 1, "clock_skew": 1}

    def counts() -> dict[str, float]:
        return {r: rej.labels(r)._value.get() for r in want}

    # With `ingest.worker: process` the child sends its counts every 0.25 s.
    wait_for(lambda: counts() == want, timeout_s=5, what="every rejection counted")
    events = collector.events()
    assert [(e["subject"], e["type"].rsplit(".", 2)[-1]) for e in events] == [
        ("P-1", "raised"), ("P-1", "cleared")]
    assert daemon.metrics.callback_errors.labels("ingest")._value.get() == 0
