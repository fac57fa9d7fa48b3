"""Shared fixtures: real brokers on free loopback ports."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

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
