"""`watchkeep run` as a real process: online status, clean stop on SIGTERM/SIGINT, config errors."""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.brokers import Broker, wait_for
from tests.helpers import Collector, asset_doc, train_pca_bundle, write_config

STATUS_TOPIC = "watchkeep/testworks/gw1/status"
WATCHKEEP = str(Path(sys.executable).with_name("watchkeep"))
if not os.path.exists(WATCHKEEP):  # pragma: no cover - an install without the venv layout
    WATCHKEEP = shutil.which("watchkeep") or WATCHKEEP


def _env() -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k not in ("NOTIFY_SOCKET", "WATCHDOG_USEC")}
    env["PYTHONUNBUFFERED"] = "1"
    return env


def _run(config: Path) -> subprocess.Popen[bytes]:
    return subprocess.Popen([WATCHKEEP, "run", "--config", str(config)], env=_env(),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)


def _stop(proc: subprocess.Popen[bytes]) -> None:
    """Kill our own daemon process (by its PID) if a test left it running."""
    if proc.poll() is None:
        proc.kill()
        proc.wait(10)


def _status(port: int, client_id: str) -> list[dict]:
    """The retained status a late subscriber sees."""
    c = Collector(port, STATUS_TOPIC, client_id)
    try:
        wait_for(lambda: c.json(), timeout_s=5, what="a retained status")
        return c.json()
    finally:
        c.close()


@pytest.fixture
def config(tmp_path: Path, broker: Broker, upstream_broker: Broker) -> Iterator[Path]:
    bundle = train_pca_bundle(tmp_path / "models" / "P-1", "P-1", seed=3)
    yield write_config(tmp_path / "watchkeep.yaml", broker.port, upstream_broker.port,
                       [asset_doc("P-1", bundle), asset_doc("P-2", None)])


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT], ids=["SIGTERM", "SIGINT"])
def test_runs_online_then_stops_cleanly_on_a_signal(config: Path, upstream_broker: Broker,
                                                    sig: signal.Signals) -> None:
    """Retained status online while running; the signal stops it with exit code 0 within
    10 s, and the retained status is then offline (stopped, not the Last Will)."""
    watcher = Collector(upstream_broker.port, STATUS_TOPIC, f"status-watcher-{sig.name}")
    proc = _run(config)
    try:
        wait_for(lambda: any(s["state"] == "online" for s in watcher.json()) or
                 proc.poll() is not None, timeout_s=30, what="status online upstream")
        assert proc.poll() is None, proc.stderr.read().decode() if proc.stderr else ""
        (online,) = _status(upstream_broker.port, f"late-online-{sig.name}")
        assert online["state"] == "online" and online["assets"] == ["P-1", "P-2"]
        assert online["site"] == "testworks" and online["gateway"] == "gw1"

        proc.send_signal(sig)
        try:
            code = proc.wait(10)
        except subprocess.TimeoutExpired:
            pytest.fail(f"watchkeep did not stop within 10 s of {sig.name}")
        stderr = proc.stderr.read().decode() if proc.stderr else ""
        assert code == 0, stderr
        assert "Traceback" not in stderr, stderr
        assert f"signal received signal={sig.name}" in stderr
        assert "watchkeep stopped" in stderr

        (offline,) = _status(upstream_broker.port, f"late-offline-{sig.name}")
        assert offline["state"] == "offline"
        assert offline.get("reason") == "stopped", offline
    finally:
        _stop(proc)
        watcher.close()


def test_a_killed_daemon_leaves_the_last_will_offline(config: Path,
                                                      upstream_broker: Broker) -> None:
    """SIGKILL gives no chance to publish: the broker publishes the Last Will, offline."""
    watcher = Collector(upstream_broker.port, STATUS_TOPIC, "status-watcher-kill")
    proc = _run(config)
    try:
        wait_for(lambda: any(s["state"] == "online" for s in watcher.json()) or
                 proc.poll() is not None, timeout_s=30, what="status online upstream")
        assert proc.poll() is None
        proc.kill()
        proc.wait(10)
        wait_for(lambda: watcher.json()[-1]["state"] == "offline", timeout_s=10,
                 what="the Last Will")
        (offline,) = _status(upstream_broker.port, "late-offline-kill")
        assert offline["state"] == "offline" and offline.get("reason") == "lost"
    finally:
        _stop(proc)
        watcher.close()


BROKEN = {
    "yaml_syntax": "site: testworks\ngateway: [gw1\n",
    "unknown_key": "site: testworks\ngateway: gw1\ncolour: blue\n"
                   "assets: [{name: P-1, channels: {t: {topic: a/b, rate_hz: 1}}}]\n",
    "wrong_type": "site: testworks\ngateway: gw1\n"
                  "assets: [{name: P-1, channels: {t: {topic: 12, rate_hz: 1}}}]\n",
}


@pytest.mark.parametrize("name", [*BROKEN, "missing_file"])
def test_a_broken_config_exits_2_with_one_line_and_no_traceback(tmp_path: Path,
                                                                name: str) -> None:
    """Known errors are translated at the boundary: exit code 2, one line on stderr."""
    path = tmp_path / f"{name}.yaml"
    if name != "missing_file":
        path.write_text(BROKEN[name])
    done = subprocess.run([WATCHKEEP, "run", "--config", str(path)], env=_env(),
                          capture_output=True, timeout=60)
    stderr = done.stderr.decode()
    assert done.returncode == 2, stderr
    assert "Traceback" not in stderr
    lines = stderr.strip().splitlines()
    assert len(lines) == 1, stderr
    assert lines[0].startswith("watchkeep: ") and str(path) in lines[0]
    expected = {"yaml_syntax": "valid YAML", "unknown_key": "colour",
                "wrong_type": "assets[0].channels.t.topic", "missing_file": "readable file"}
    assert expected[name] in lines[0], lines[0]
    assert done.stdout == b""
