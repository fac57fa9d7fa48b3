"""sd_notify: one datagram to `$NOTIFY_SOCKET`; a no-op when it is not set.

A leading `@` names an abstract socket (replaced by a NUL byte), as systemd's
sd_notify(3) describes.
"""

from __future__ import annotations

import os
import socket
from collections.abc import Mapping


class Notifier:
    def __init__(self, env: Mapping[str, str] | None = None) -> None:
        env = os.environ if env is None else env
        addr = env.get("NOTIFY_SOCKET", "")
        self._addr: str | None = None
        if addr.startswith("@"):
            addr = "\0" + addr[1:]
        if addr:
            self._addr = addr
        usec = env.get("WATCHDOG_USEC", "")
        self.watchdog_interval_s: float | None = (int(usec) / 1e6 / 2) if usec.isdigit() \
            else None

    @property
    def enabled(self) -> bool:
        return self._addr is not None

    def send(self, *lines: str) -> bool:
        """Send `KEY=value` lines in one datagram; False (never an exception) on failure."""
        if self._addr is None:
            return False
        try:
            with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC) as s:
                s.connect(self._addr)
                s.sendall("\n".join(lines).encode())
            return True
        except OSError:
            return False

    def ready(self, status: str = "") -> bool:
        return self.send("READY=1", *([f"STATUS={status}"] if status else []))

    def watchdog(self) -> bool:
        return self.send("WATCHDOG=1")

    def status(self, text: str) -> bool:
        return self.send(f"STATUS={text}")

    def stopping(self) -> bool:
        return self.send("STOPPING=1")
