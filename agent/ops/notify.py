"""sd_notify: one datagram to `$NOTIFY_SOCKET`; a no-op when it is not set.

A leading `@` names an abstract socket (replaced by a NUL byte), as systemd's
sd_notify(3) describes. `WATCHDOG_USEC` (and `WATCHDOG_PID`, when set, must be
this process) says how often systemd expects `WATCHDOG=1`; the pipeline loop
sends it at least twice per period, and only while it is ticking, so a wedged
pipeline is restarted by systemd.
"""

from __future__ import annotations

import os
import socket
import time
from collections.abc import Mapping

# Send WATCHDOG=1 at least this often even when systemd allows longer: cheap, and a
# restarted daemon under a shorter WatchdogSec= never starts out late.
MAX_WATCHDOG_INTERVAL_S = 1.0


def notify_address(value: str) -> str | None:
    """`$NOTIFY_SOCKET` -> the address to connect to (`@name` -> `\\0name`), or None."""
    if not value:
        return None
    if value.startswith("@"):
        return "\0" + value[1:]
    return value


def watchdog_interval(env: Mapping[str, str], pid: int) -> float | None:
    """Seconds between WATCHDOG=1 messages: half of `WATCHDOG_USEC`, capped at
    MAX_WATCHDOG_INTERVAL_S; None when systemd asked for no watchdog (or asked another pid)."""
    usec = env.get("WATCHDOG_USEC", "")
    wpid = env.get("WATCHDOG_PID", "")
    if not usec.isdigit() or int(usec) == 0:
        return None
    if wpid and (not wpid.isdigit() or int(wpid) != pid):
        return None
    return min(MAX_WATCHDOG_INTERVAL_S, int(usec) / 1e6 / 2)


class Notifier:
    """Sends sd_notify messages; every method returns False (never raises) when it cannot."""

    def __init__(self, env: Mapping[str, str] | None = None, pid: int | None = None) -> None:
        env = os.environ if env is None else env
        self._addr = notify_address(env.get("NOTIFY_SOCKET", ""))
        self.watchdog_interval_s = watchdog_interval(env, os.getpid() if pid is None else pid)

    @property
    def enabled(self) -> bool:
        return self._addr is not None

    def send(self, *lines: str) -> bool:
        """Send `KEY=value` lines in one datagram; False (never an exception) on failure."""
        if self._addr is None:
            return False
        try:
            # Non-blocking: a notify socket whose queue is full (a reader that stopped
            # reading) must not wedge the pipeline thread that sends WATCHDOG=1.
            with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC
                               | socket.SOCK_NONBLOCK) as s:
                s.connect(self._addr)
                s.sendall("\n".join(lines).encode())
            return True
        except OSError:
            return False

    def ready(self, status: str = "") -> bool:
        return self.send("READY=1", *([f"STATUS={_one_line(status)}"] if status else []))

    def reloading(self) -> bool:
        """Start of a reload; `ready()` ends it. MONOTONIC_USEC is what systemd >= 253 wants
        with Type=notify-reload, and harmless before."""
        usec = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
        return self.send("RELOADING=1", f"MONOTONIC_USEC={usec}")

    def watchdog(self) -> bool:
        return self.send("WATCHDOG=1")

    def status(self, text: str) -> bool:
        return self.send(f"STATUS={_one_line(text)}")

    def stopping(self) -> bool:
        return self.send("STOPPING=1")


def _one_line(text: str) -> str:
    """STATUS= is one line: newlines would start a new, bogus KEY=value assignment."""
    return " ".join(text.split())
