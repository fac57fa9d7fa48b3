"""sd_notify from the real process: READY=1, repeated WATCHDOG=1, silence when wedged."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import urllib.error
import urllib.request
import uuid
from pathlib import Path

import pytest

from agent.ops.run import TEST_WEDGE_ENV
from tests.brokers import Broker, free_port, wait_for
from tests.helpers import asset_doc, train_pca_bundle, write_config

ROOT = Path(__file__).resolve().parents[2]


class NotifySocket:
    """A datagram socket playing systemd's notify socket (path or abstract `@name`)."""

    def __init__(self, tmp_path: Path, abstract: bool) -> None:
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        if abstract:
            name = f"watchkeep-test-{uuid.uuid4().hex}"
            self.sock.bind("\0" + name)
            self.env_value = "@" + name
        else:
            path = tmp_path / "notify.sock"
            self.sock.bind(str(path))
            self.env_value = str(path)
        self.sock.setblocking(False)
        self.messages: list[str] = []

    def drain(self) -> list[str]:
        while True:
            try:
                self.messages.append(self.sock.recv(4096).decode())
            except BlockingIOError:
                return self.messages

    def count(self, line: str) -> int:
        return sum(1 for m in self.drain() for ln in m.split("\n") if ln == line)

    def close(self) -> None:
        self.sock.close()


def healthz(port: int) -> tuple[int, str]:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/healthz", timeout=5) as r:
            return r.status, r.read().decode()
    except urllib.error.HTTPError as exc:
        return exc.code, exc.read().decode()
    except OSError:
        return 0, ""


def start(tmp_path: Path, broker: Broker, upstream: Broker, notify: NotifySocket,
          **extra_env: str) -> tuple[subprocess.Popen[bytes], int]:
    b1 = train_pca_bundle(tmp_path / "models" / "P-1", "P-1", seed=11)
    port = free_port()
    cfg = write_config(tmp_path / "watchkeep.yaml", broker.port, upstream.port,
                       [asset_doc("P-1", b1)], http={"port": port})
    env = {**os.environ, "NOTIFY_SOCKET": notify.env_value,
           "WATCHDOG_USEC": "400000", **extra_env}  # 0.4 s: WATCHDOG=1 every 0.2 s
    env.pop("WATCHDOG_PID", None)
    proc = subprocess.Popen([sys.executable, "-m", "agent.cli.main", "run", "-c", str(cfg)],
                            cwd=ROOT, env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    return proc, port


@pytest.mark.parametrize("abstract", [False, True], ids=["path", "abstract"])
def test_ready_then_watchdog_then_stopping(tmp_path: Path, broker: Broker,
                                           upstream_broker: Broker, abstract: bool) -> None:
    """READY=1 (with STATUS=) comes once, WATCHDOG=1 repeats, SIGTERM sends STOPPING=1."""
    notify = NotifySocket(tmp_path, abstract)
    proc, _ = start(tmp_path, broker, upstream_broker, notify)
    try:
        wait_for(lambda: notify.count("READY=1") == 1, timeout_s=60, what="READY=1")
        ready = next(m for m in notify.drain() if "READY=1" in m)
        assert "STATUS=1 assets, 1 models loaded" in ready
        wait_for(lambda: notify.count("WATCHDOG=1") >= 3, what="three WATCHDOG=1")
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=30) == 0
        assert notify.count("STOPPING=1") == 1
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
        notify.close()


def test_a_wedged_pipeline_stops_the_watchdog(tmp_path: Path, broker: Broker,
                                              upstream_broker: Broker) -> None:
    """With the test hook wedging the pipeline loop, WATCHDOG=1 stops while /healthz fails."""
    notify = NotifySocket(tmp_path, abstract=False)
    proc, port = start(tmp_path, broker, upstream_broker, notify, **{TEST_WEDGE_ENV: "1.5"})
    try:
        wait_for(lambda: notify.count("READY=1") == 1, timeout_s=60, what="READY=1")
        wait_for(lambda: notify.count("WATCHDOG=1") >= 2, what="watchdog while ticking")
        # /healthz fails once the loop has not ticked for 5 s: it is wedged by then.
        wait_for(lambda: healthz(port)[0] == 503, timeout_s=30, what="/healthz 503")
        first = healthz(port)[1]
        n = notify.count("WATCHDOG=1")

        def longer_silence() -> bool:
            code, body = healthz(port)
            return code == 503 and _seconds(body) >= _seconds(first) + 1.0

        wait_for(longer_silence, timeout_s=30, interval_s=0.1, what="another second wedged")
        assert notify.count("WATCHDOG=1") == n  # not one WATCHDOG=1 while wedged
        assert proc.poll() is None  # alive but wedged: systemd's watchdog would restart it
    finally:
        proc.kill()
        proc.wait(10)
        notify.close()


def _seconds(body: str) -> float:
    """`pipeline has not ticked for 5.3 s` -> 5.3"""
    return float(body.split("for ", 1)[1].split(" ", 1)[0])
