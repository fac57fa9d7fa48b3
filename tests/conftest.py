"""Shared fixtures: real brokers on free loopback ports."""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from tests.brokers import Broker


@pytest.fixture
def broker(tmp_path: Path) -> Iterator[Broker]:
    """A fresh Mosquitto broker for one test."""
    b = Broker(tmp_path / "broker").start()
    yield b
    b.stop()


@pytest.fixture
def upstream_broker(tmp_path: Path) -> Iterator[Broker]:
    """A second broker playing the upstream (maintenance side) broker."""
    b = Broker(tmp_path / "upstream").start()
    yield b
    b.stop()


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_makereport(item: pytest.Item, call: pytest.CallInfo[None]) -> Iterator[Any]:
    """With WATCHKEEP_CI=1 (set by .ci/run) a skipped test fails: CI installs every tool
    the suite needs (.ci/test-deps), so a skip there means a check silently not made."""
    outcome = yield
    rep = outcome.get_result()
    if rep.skipped and os.environ.get("WATCHKEEP_CI") == "1" and not hasattr(rep, "wasxfail"):
        reason = rep.longrepr[2] if isinstance(rep.longrepr, tuple) else str(rep.longrepr)
        rep.outcome = "failed"
        rep.longrepr = f"skipped, and WATCHKEEP_CI=1 allows no skip: {reason}"
