"""`watchkeep demo` (what `make demo` wraps): runs, detects the fault, leaves nothing behind."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

WATCHKEEP = str(Path(sys.executable).with_name("watchkeep"))


def _children(pid: int) -> list[int]:
    out = []
    for p in Path("/proc").iterdir():
        if p.name.isdigit():
            try:
                stat = (p / "stat").read_text()
            except OSError:
                continue
            if int(stat.rsplit(")", 1)[1].split()[1]) == pid:
                out.append(int(p.name))
    return out


def _demo_brokers(under: Path) -> list[int]:
    """Processes whose command line names a file below `under` (orphans included)."""
    found = []
    for p in Path("/proc").iterdir():
        if p.name.isdigit():
            try:
                cmd = (p / "cmdline").read_bytes()
            except OSError:
                continue
            if str(under).encode() in cmd:
                found.append(int(p.name))
    return found


@pytest.fixture(scope="module")
def state_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Shared between the runs: the second one reuses the models the first trained."""
    return tmp_path_factory.mktemp("demo-state")


@pytest.mark.parametrize("broker", ["auto", "embedded"])
def test_short_demo_detects_the_bearing_fault(tmp_path: Path, state_dir: Path,
                                              broker: str) -> None:
    """`watchkeep demo --duration 20` exits 0, reports the fault detected, no child left."""
    summary = tmp_path / "summary.json"
    proc = subprocess.Popen(
        [WATCHKEEP, "demo", "--duration", "20", "--plain", "--train-minutes", "40",
         "--broker", broker,
         "--state-dir", str(state_dir), "--summary-json", str(summary)],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
        env={**os.environ, "PYTHONUNBUFFERED": "1", "TMPDIR": str(tmp_path)})
    out, _ = proc.communicate(timeout=240)
    assert proc.returncode == 0, out
    assert _children(os.getpid()) == [], "demo left processes behind"
    assert _demo_brokers(tmp_path) == [], "demo left its broker running"
    assert "summary" in out
    s = json.loads(summary.read_text())
    machine = [f for f in s["faults"] if f["class"] == "machine"]
    assert machine and all(f["detected"] for f in machine), (s, out)
    # The stuck accelerometer is reported as a sensor fault, not as a sick machine.
    sensor = [f for f in s["faults"] if f["class"] == "sensor"]
    assert sensor and all(f["by"] == "sensor.fault" for f in sensor), (s, out)
    assert "C-301" not in s["false_alarm_assets"], (s, out)
    assert "P-101" in out and "anomaly.raised" in out
    if broker == "embedded":
        assert "broker embedded" in out
