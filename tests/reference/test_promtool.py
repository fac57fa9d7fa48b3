"""The shipped alert rules, checked and unit-tested by Prometheus's own `promtool`."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest

RULES_DIR = Path(__file__).resolve().parents[2] / "config" / "prometheus"
PROMTOOL = shutil.which("promtool")
pytestmark = pytest.mark.skipif(PROMTOOL is None,
                                reason="promtool not installed (Debian package: prometheus)")


def run(*args: str) -> subprocess.CompletedProcess[str]:
    assert PROMTOOL is not None
    return subprocess.run([PROMTOOL, *args], cwd=RULES_DIR, capture_output=True, text=True,
                          timeout=120)


def test_rules_pass_promtool_check_rules() -> None:
    """`promtool check rules` accepts the file, and it has every alert the issue asks for."""
    res = run("check", "rules", "watchkeep-alerts.yml")
    assert res.returncode == 0, res.stdout + res.stderr
    text = (RULES_DIR / "watchkeep-alerts.yml").read_text()
    for alert in ("WatchkeepDown", "WatchkeepUpstreamDisconnected", "WatchkeepOutboxFilling",
                  "WatchkeepOutboxDropping", "WatchkeepAssetAnomalous", "WatchkeepSensorStale",
                  "WatchkeepReloadFailing"):
        assert f"alert: {alert}\n" in text, alert


def test_rules_pass_their_promtool_unit_tests() -> None:
    """`promtool test rules`: each alert fires when it should and not before."""
    res = run("test", "rules", "watchkeep-alerts.test.yml")
    assert res.returncode == 0 and "SUCCESS" in res.stdout, res.stdout + res.stderr
