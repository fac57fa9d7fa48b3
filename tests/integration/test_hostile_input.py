"""One bad message must never stop detection (issue 20, findings 1 and 2): the real
messages over a real Mosquitto broker into a running daemon."""

from __future__ import annotations

import json
import logging
import math
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from agent.config.load import load_config
from agent.core.detector import Detector
from agent.daemon import Daemon
from tests.brokers import Broker, wait_for
from tests.helpers import RATE_HZ, asset_doc, publisher, readings, train_pca_bundle, write_config
from tests.integration.test_notify import NotifySocket


def vib_doc(name: str) -> dict[str, Any]:
    """An asset with one json-batch channel (10 Hz, 1 s blocks), no model."""
    return {"name": name,
            "window": {"length_s": 1.0, "lateness_s": 0.2, "timeout_s": 2.0,
                       "min_coverage": 0.8},
            "channels": {"vib": {"topic": f"plant/{name}/vib", "decoder": "json-batch",
                                 "rate_hz": RATE_HZ, "features": ["rms"]}}}


def blocks(asset: str, t0: float, n_windows: int) -> Iterator[tuple[str, bytes]]:
    for w in range(n_windows):
        yield (f"plant/{asset}/vib", json.dumps(
            {"ts": t0 + w, "rate_hz": RATE_HZ,
             "values": [0.1 * ((w + i) % 7) for i in range(int(RATE_HZ))]}).encode())


def start_daemon(tmp_path: Path, broker: Broker, upstream: Broker, worker: str = "process",
                 env: dict[str, str] | None = None) -> Daemon:
    b1 = train_pca_bundle(tmp_path / "models" / "P-1", "P-1", seed=11)
    b2 = train_pca_bundle(tmp_path / "models" / "P-2", "P-2", seed=12)
    cfg_path = write_config(tmp_path / "watchkeep.yaml", broker.port, upstream.port,
                            [asset_doc("P-1", b1), asset_doc("P-2", b2), vib_doc("V-1")],
                            ingest={"worker": worker})
    daemon = Daemon(load_config(cfg_path), logger=logging.getLogger("watchkeep.test"),
                    env=env)
    daemon.start()
    wait_for(daemon.ingest.connected.is_set, what="daemon connected to local broker")
    return daemon


@pytest.fixture
def plant(tmp_path: Path, broker: Broker, upstream_broker: Broker) -> Iterator[Any]:
    daemon = start_daemon(tmp_path, broker, upstream_broker)
    pub = publisher(broker.port)
    yield daemon, pub
    pub.disconnect()
    pub.loop_stop()
    daemon.stop()


def closed(daemon: Daemon, asset: str) -> float:
    return daemon.metrics.windows_closed.labels(asset)._value.get()


def scored(daemon: Daemon, asset: str) -> float:
    return daemon.metrics.windows_scored.labels(asset)._value.get()


def rejected(daemon: Daemon, reason: str) -> float:
    daemon.handler.flush_counts()
    return daemon.metrics.messages_rejected.labels(reason)._value.get()


def send(pub: Any, msgs: Iterator[tuple[str, bytes]] | list[tuple[str, bytes]]) -> None:
    for topic, payload in msgs:
        pub.publish(topic, payload, qos=0)


def http(daemon: Daemon, path: str) -> tuple[int, str]:
    assert daemon.http is not None
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{daemon.http.port}{path}",
                                    timeout=5) as r:
            return r.status, r.read().decode()
    except urllib.error.HTTPError as exc:
        return exc.code, exc.read().decode()


def all_three(t0: float, first: int, n: int) -> Iterator[tuple[str, bytes]]:
    """Windows `first`..`first + n` of P-1, P-2 and V-1, in time order."""
    p1 = list(readings("P-1", t0 + first, n, seed=1 + first))
    p2 = list(readings("P-2", t0 + first, n, seed=2 + first))
    v1 = list(blocks("V-1", t0 + first, n))
    per = len(p1) // n
    for w in range(n):
        yield from p1[w * per:(w + 1) * per]
        yield from p2[w * per:(w + 1) * per]
        yield v1[w]


# Issue 20, finding 1: rates that put sample times at infinity or on one instant.
ABSURD_RATES = ["5e-324", "0", "-10", "1e308", "1e-300"]


@pytest.mark.parametrize("rate", ABSURD_RATES)
def test_absurd_block_rate_is_rejected_and_every_asset_keeps_closing_windows(
        plant: Any, rate: str) -> None:
    """A json-batch with an absurd rate_hz is `bad_rate`; every asset keeps closing windows."""
    daemon, pub = plant
    t0 = math.floor(time.time()) + 1.0
    send(pub, all_three(t0, 0, 4))
    wait_for(lambda: all(closed(daemon, a) >= 2 for a in ("P-1", "P-2", "V-1")),
             timeout_s=20, what="first windows closed")
    pub.publish("plant/V-1/vib", f'{{"ts": {t0 + 4}, "rate_hz": {rate}, '
                                 f'"values": [0.1, 0.1]}}'.encode(), qos=0)
    send(pub, all_three(t0, 4, 8))
    wait_for(lambda: all(closed(daemon, a) >= 10 for a in ("P-1", "P-2", "V-1")),
             timeout_s=20, what="every asset closing windows after the bad block")
    # A window is counted closed at the cut and scored later in the same tick: wait for
    # the tick that closed the tenth to have scored it too.
    wait_for(lambda: scored(daemon, "P-1") >= 10 and scored(daemon, "P-2") >= 10,
             timeout_s=10, what="P-1 and P-2 scoring after the bad block")
    wait_for(lambda: rejected(daemon, "bad_rate") == 1, what="bad_rate counted")
    assert daemon.metrics.asset_errors.labels("V-1", "windows")._value.get() == 0
    assert http(daemon, "/healthz")[0] == 200 and http(daemon, "/readyz")[0] == 200


def test_an_asset_whose_windows_raise_fails_alone_and_recovers(plant: Any) -> None:
    """An exception in one asset's window cut fails that asset only, counted and reported;
    its windows start afresh and the others keep scoring."""
    daemon, pub = plant
    t0 = math.floor(time.time()) + 1.0
    send(pub, all_three(t0, 0, 3))
    wait_for(lambda: closed(daemon, "P-2") >= 1, timeout_s=20, what="first windows")
    # What the old decoder let through (a sample at +inf, finding 1) put straight into
    # P-1's windows: its window cut raises OverflowError.
    inbox = daemon.buffers.by_asset[0][0].inbox
    with inbox.lock:
        inbox.assembler.add_one(0, math.inf, 1.0, time.time())
    wait_for(lambda: daemon.metrics.asset_errors.labels("P-1", "windows")._value.get() >= 1,
             what="P-1's error counted")
    before = scored(daemon, "P-2")
    send(pub, all_three(t0, 3, 8))
    wait_for(lambda: scored(daemon, "P-2") >= before + 6, timeout_s=20,
             what="P-2 scoring on")
    wait_for(lambda: scored(daemon, "P-1") >= 6, timeout_s=20, what="P-1 scoring again")
    status = json.loads(http(daemon, "/status")[1])
    p1 = next(a for a in status["assets"] if a["asset"] == "P-1")
    assert p1["errors"] >= 1 and p1["error"] is None  # recovered
    assert http(daemon, "/healthz")[0] == 200


class _Broken(Detector):
    """A detector raising at every window, by either of its ways in (`step`, and `quiet`
    for a window that cannot raise)."""

    def step(self, *a: Any, **k: Any) -> Any:
        raise RuntimeError("detector broken for the test")

    def quiet(self) -> None:
        raise RuntimeError("detector broken for the test")


def test_failing_assets_are_reported_and_a_tick_failing_for_all_stops_the_watchdog(
        tmp_path: Path, broker: Broker, upstream_broker: Broker) -> None:
    """One asset failing: /readyz 503 naming it, /status shows it, /healthz 200 and the
    watchdog fed; every asset failing: /healthz 503 and no WATCHDOG=1."""
    notify = NotifySocket(tmp_path, abstract=True)
    env = {"NOTIFY_SOCKET": notify.env_value, "WATCHDOG_USEC": "1000000"}
    daemon = start_daemon(tmp_path, broker, upstream_broker, env=env)
    pub = publisher(broker.port)
    stop = threading.Event()
    reader = threading.Thread(target=lambda: [notify.drain() for _ in iter(
        lambda: stop.wait(0.05), True)], daemon=True)  # systemd reads all the time
    reader.start()
    try:
        rts = {rt.cfg.name: rt for rt in daemon.pipeline.runtimes}
        with daemon.loop.paused():
            rts["P-1"].detector = _Broken(rts["P-1"].cfg.detector)
        t0 = math.floor(time.time()) + 1.0
        send(pub, all_three(t0, 0, 4))
        wait_for(lambda: scored(daemon, "P-2") >= 2, timeout_s=20, what="P-2 scoring")
        wait_for(lambda: "P-1 (detector)" in http(daemon, "/readyz")[1], what="readyz")
        assert http(daemon, "/readyz")[0] == 503
        code, body = http(daemon, "/healthz")
        assert code == 200 and "P-1 (detector)" in body, body
        status = json.loads(http(daemon, "/status")[1])
        p1 = next(a for a in status["assets"] if a["asset"] == "P-1")
        assert p1["error"]["stage"] == "detector" and "broken" in p1["error"]["detail"]
        assert daemon.metrics.asset_failing.labels("P-1")._value.get() == 1
        wait_for(lambda: notify.count("WATCHDOG=1") >= 2, what="watchdog fed")
        # Now every asset with work fails: P-2's detector too, and V-1's windows once
        # (it gets no more data, so it stays failed).
        with daemon.loop.paused():
            rts["P-2"].detector = _Broken(rts["P-2"].cfg.detector)
            rts["V-1"].assembler.add_one(0, math.inf, 1.0, time.time())  # windows raise
        pumps = [m for m in all_three(t0, 4, 8) if "/V-1/" not in m[0]]
        send(pub, pumps[:len(pumps) // 2])
        wait_for(lambda: http(daemon, "/healthz")[0] == 503, timeout_s=20,
                 what="healthz failing")
        assert "every asset" in http(daemon, "/healthz")[1]
        assert daemon.loop.tick_ok is False
        n = notify.count("WATCHDOG=1")
        send(pub, pumps[len(pumps) // 2:])  # ticks go on failing for 3 s more
        time.sleep(3.0)
        assert http(daemon, "/healthz")[0] == 503
        assert notify.count("WATCHDOG=1") - n <= 1  # at most one sent before the switch
    finally:
        pub.disconnect()
        pub.loop_stop()
        daemon.stop()
        stop.set()
        reader.join(5)
        notify.close()


# Issue 20, finding 2: one message far ahead moved the asset's newest-sample time.
AHEAD = [
    ("reading", "plant/P-1/temp", '{{"ts": {t}, "value": 41.0}}', 280.0),
    ("block", "plant/V-1/vib", '{{"ts": {t}, "values": [' + ", ".join(["0.1"] * 2800) + "]}}",
     0.0),
]


@pytest.mark.parametrize("worker", ["process", "thread"])
@pytest.mark.parametrize(("kind", "topic", "payload", "ahead_s"), AHEAD,
                         ids=[a[0] for a in AHEAD])
def test_one_message_far_ahead_is_rejected_and_does_not_blind_the_asset(
        tmp_path: Path, broker: Broker, upstream_broker: Broker, worker: str, kind: str,
        topic: str, payload: str, ahead_s: float) -> None:
    """A reading at +280 s, or a legal block whose 280 s span runs ahead, is `ahead`; the
    asset keeps closing full windows and counts no late samples."""
    daemon = start_daemon(tmp_path, broker, upstream_broker, worker)
    pub = publisher(broker.port)
    try:
        t0 = math.floor(time.time()) + 1.0
        send(pub, all_three(t0, 0, 3))
        wait_for(lambda: closed(daemon, "P-1") >= 1 and closed(daemon, "V-1") >= 1,
                 timeout_s=20, what="first windows")
        pub.publish(topic, payload.format(t=time.time() + ahead_s).encode(), qos=0)
        send(pub, all_three(t0, 3, 8))
        asset = topic.split("/")[1]
        wait_for(lambda: closed(daemon, asset) >= 9, timeout_s=20,
                 what="windows closing after the message")
        wait_for(lambda: rejected(daemon, "ahead") == 1, what="ahead counted")
        assert daemon.metrics.late_samples.labels(asset)._value.get() == 0
        # (the windows after the last data close empty, one a second: a few at most)
        skipped = daemon.metrics.windows_skipped.labels(asset, "no_data")._value.get()
        assert skipped < 5, skipped
        if asset == "P-1":  # scored later in the tick that closed it (see above)
            wait_for(lambda: scored(daemon, "P-1") >= 9, what="P-1 scoring")
    finally:
        pub.disconnect()
        pub.loop_stop()
        daemon.stop()


def live(pub: Any, t0: float, n_windows: int, offset_s: float, w0: int = 0,
         channels: tuple[str, ...] = ("temp",)) -> None:
    """P-1's readings in real time: window w at t0 + w, sent when its second has passed
    (a live sensor); the clock of `channels` `offset_s` off."""
    for w in range(w0, w0 + n_windows):
        wait = t0 + w + 1.0 - time.time()
        if wait > 0:
            time.sleep(wait)
        for topic, payload in readings("P-1", t0 + w, 1, seed=w):
            if topic.rsplit("/", 1)[1] in channels and offset_s:
                doc = json.loads(payload)
                doc["ts"] = round(doc["ts"] + offset_s, 4)
                payload = json.dumps(doc).encode()
            pub.publish(topic, payload, qos=0)


def test_a_sensor_clock_that_steps_forward_is_followed(plant: Any,
                                                       caplog: pytest.LogCaptureFixture
                                                       ) -> None:
    """P-1's sensor steps its clock +100 s and stays there: after a few refused messages
    the new time base is accepted (log, metric), and P-1 scores full windows again."""
    daemon, pub = plant
    caplog.set_level(logging.WARNING, logger="watchkeep.test")
    t0 = math.floor(time.time()) - 1.0
    live(pub, t0, 3, 0.0)
    wait_for(lambda: scored(daemon, "P-1") >= 1, timeout_s=10, what="first window scored")
    live(pub, t0, 3, 100.0, w0=3, channels=("temp", "current", "pressure"))
    wait_for(lambda: all(daemon.metrics.clock_steps.labels("P-1", c)._value.get() == 1
                         for c in ("temp", "current", "pressure")),
             timeout_s=10, what="the clock step accepted on every channel")
    before = scored(daemon, "P-1")
    live(pub, t0, 4, 100.0, w0=6, channels=("temp", "current", "pressure"))
    wait_for(lambda: scored(daemon, "P-1") >= before + 3, timeout_s=10,
             what="P-1 scoring again after the step")
    assert any("time base jumped ahead" in r.getMessage() for r in caplog.records)
    assert rejected(daemon, "ahead") == 3 * 2  # CONFIRM_MESSAGES - 1 per channel
    assert daemon.metrics.late_samples.labels("P-1")._value.get() == 0


def test_an_asset_closing_only_empty_windows_shows_zero_coverage(plant: Any) -> None:
    """Data arriving that lands in no window (every sample late) shows as coverage 0."""
    daemon, pub = plant
    t0 = math.floor(time.time()) + 1.0
    send(pub, all_three(t0, 0, 6))
    wait_for(lambda: closed(daemon, "P-2") >= 4, timeout_s=20, what="windows")
    cov = daemon.metrics.coverage.labels("P-2")
    assert cov._value.get() == pytest.approx(1.0)
    # P-2's sensors now send samples 60 s old: all late, windows close empty by timeout.
    send(pub, readings("P-2", t0 - 60, 3, seed=5))
    wait_for(lambda: cov._value.get() == 0.0, timeout_s=20, what="coverage 0")
    status = json.loads(http(daemon, "/status")[1])
    p2 = next(a for a in status["assets"] if a["asset"] == "P-2")
    assert p2["coverage"] == 0.0 and p2["empty_windows"] >= 1
