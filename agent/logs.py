"""Journal-friendly logging: one key=value line per event, repeats rate-limited."""

from __future__ import annotations

import logging
import sys
import threading
import time
from collections.abc import Callable
from typing import Any

LOGGER_NAME = "watchkeep"


def setup_logging(level: str = "INFO") -> logging.Logger:
    """Log lines to stderr without timestamps under systemd (the journal adds them)."""
    import os

    under_journal = bool(os.environ.get("JOURNAL_STREAM") or os.environ.get("INVOCATION_ID"))
    fmt = "%(levelname)s %(message)s" if under_journal else \
        "%(asctime)s %(levelname)s %(message)s"
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter(fmt))
    log = logging.getLogger(LOGGER_NAME)
    log.handlers[:] = [handler]
    log.setLevel(level)
    log.propagate = False
    return log


def kv(msg: str, **fields: Any) -> str:
    """`msg key=value ...`, quoting values with spaces."""
    parts = [msg]
    for k, v in fields.items():
        s = str(v)
        if not s or any(c in s for c in ' ="'):
            s = '"' + s.replace('"', '\\"') + '"'
        parts.append(f"{k}={s}")
    return " ".join(parts)


class RateLimited:
    """Logs the first occurrence of a key, then at most one line per `interval_s`
    carrying how many were suppressed in between."""

    def __init__(self, logger: logging.Logger, interval_s: float = 60.0,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self._log = logger
        self._interval = interval_s
        self._clock = clock
        self._last: dict[str, float] = {}
        self._suppressed: dict[str, int] = {}
        self._lock = threading.Lock()

    def warning(self, key: str, msg: str, **fields: Any) -> None:
        now = self._clock()
        with self._lock:
            last = self._last.get(key)
            if last is not None and now - last < self._interval:
                self._suppressed[key] = self._suppressed.get(key, 0) + 1
                return
            self._last[key] = now
            n = self._suppressed.pop(key, 0)
        if n:
            fields["suppressed"] = n
        self._log.warning(kv(msg, **fields))
