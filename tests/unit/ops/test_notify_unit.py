"""sd_notify addresses, watchdog interval and datagrams to a real Unix socket."""

from __future__ import annotations

import socket
from pathlib import Path

import pytest

from agent.ops.notify import MAX_WATCHDOG_INTERVAL_S, Notifier, notify_address, watchdog_interval


@pytest.mark.parametrize(("value", "expected"), [
    ("", None),
    ("/run/systemd/notify", "/run/systemd/notify"),
    ("@abstract-name", "\0abstract-name"),  # sd_notify(3): leading @ = abstract namespace
])
def test_notify_address(value: str, expected: str | None) -> None:
    """`@` becomes a NUL byte; empty means no socket."""
    assert notify_address(value) == expected


@pytest.mark.parametrize(("env", "pid", "expected"), [
    ({}, 1, None),
    ({"WATCHDOG_USEC": "0"}, 1, None),
    ({"WATCHDOG_USEC": "junk"}, 1, None),
    ({"WATCHDOG_USEC": "30000000"}, 1, MAX_WATCHDOG_INTERVAL_S),  # half of 30 s, capped
    ({"WATCHDOG_USEC": "400000"}, 1, 0.2),  # half the period (sd_watchdog_enabled(3))
    ({"WATCHDOG_USEC": "400000", "WATCHDOG_PID": "7"}, 7, 0.2),
    ({"WATCHDOG_USEC": "400000", "WATCHDOG_PID": "7"}, 8, None),  # meant for another pid
])
def test_watchdog_interval(env: dict[str, str], pid: int, expected: float | None) -> None:
    """Half of WATCHDOG_USEC, at most 1 s; None when not asked or asked of another pid."""
    assert watchdog_interval(env, pid) == expected


def test_without_notify_socket_everything_is_a_no_op() -> None:
    """No NOTIFY_SOCKET: not enabled, and every call returns False without raising."""
    n = Notifier({})
    assert not n.enabled
    assert not n.ready("x") and not n.watchdog() and not n.stopping() and not n.reloading()


def test_a_missing_socket_returns_false(tmp_path: Path) -> None:
    """A socket path nobody listens on: False, no exception."""
    assert Notifier({"NOTIFY_SOCKET": str(tmp_path / "gone.sock")}).watchdog() is False


@pytest.mark.parametrize("abstract", [False, True])
def test_datagrams_arrive(tmp_path: Path, abstract: bool) -> None:
    """READY with a one-line STATUS, RELOADING with MONOTONIC_USEC, WATCHDOG, STOPPING."""
    with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as s:
        if abstract:
            name = f"wk-unit-{id(s)}"
            s.bind("\0" + name)
            env = {"NOTIFY_SOCKET": "@" + name}
        else:
            s.bind(str(tmp_path / "n.sock"))
            env = {"NOTIFY_SOCKET": str(tmp_path / "n.sock")}
        s.settimeout(5)
        n = Notifier(env)
        assert n.ready("2 assets,\nall fine")
        assert s.recv(4096) == b"READY=1\nSTATUS=2 assets, all fine"
        assert n.reloading()
        lines = s.recv(4096).decode().split("\n")
        assert lines[0] == "RELOADING=1" and lines[1].startswith("MONOTONIC_USEC=")
        assert int(lines[1].split("=")[1]) > 0
        assert n.watchdog() and s.recv(4096) == b"WATCHDOG=1"
        assert n.stopping() and s.recv(4096) == b"STOPPING=1"
