"""Journal-friendly logging: one line per event, key=value or JSON, repeats rate-limited.

Every record becomes exactly one line on stderr (newlines inside a message or a
traceback are escaped), because the journal stores each line as its own entry and
a traceback split over twenty entries cannot be filtered or rate-limited. Under
systemd (`JOURNAL_STREAM` or `INVOCATION_ID` set) the time stamp is left to the
journal.
"""

from __future__ import annotations

import json
import logging
import os
import sys
import threading
import time
from collections.abc import Callable, Mapping
from enum import StrEnum
from typing import Any

LOGGER_NAME = "watchkeep"


class LogFormat(StrEnum):
    KV = "kv"
    JSON = "json"


def _escape_lines(text: str) -> str:
    """Line breaks as `\\n`/`\\r`, so a record stays one line (backslashes are kv's job)."""
    return text.replace("\r", "\\r").replace("\n", "\\n")


class OneLineFormatter(logging.Formatter):
    """`[time ]LEVEL message[ exc="..."]` on one line; the message is usually `kv(...)`."""

    def __init__(self, with_time: bool) -> None:
        super().__init__("%(asctime)s %(levelname)s %(message)s" if with_time
                         else "%(levelname)s %(message)s")

    def format(self, record: logging.LogRecord) -> str:
        saved = record.exc_info, record.exc_text
        record.exc_info, record.exc_text = None, None
        try:
            line = _escape_lines(super().format(record))
        finally:
            record.exc_info, record.exc_text = saved
        if record.exc_info:
            line += " " + kv("", exc=self.formatException(record.exc_info))
        return line


class JsonFormatter(logging.Formatter):
    """One JSON object per line: `level`, `logger`, `msg`, optional `time` and `exc`."""

    def __init__(self, with_time: bool) -> None:
        super().__init__()
        self.with_time = with_time

    def format(self, record: logging.LogRecord) -> str:
        doc: dict[str, Any] = {}
        if self.with_time:
            doc["time"] = self.formatTime(record, "%Y-%m-%dT%H:%M:%S")
        doc.update(level=record.levelname, logger=record.name, msg=record.getMessage())
        if record.exc_info:
            doc["exc"] = self.formatException(record.exc_info)
        return json.dumps(doc, ensure_ascii=False, default=str)


def under_journal(env: Mapping[str, str]) -> bool:
    """True when systemd started us (the journal adds its own time stamps)."""
    return bool(env.get("JOURNAL_STREAM") or env.get("INVOCATION_ID"))


class _StderrHandler(logging.StreamHandler):
    """Writes to whatever `sys.stderr` is at the time of each record, so a handler set up
    once does not keep a stream that was replaced (and closed) since."""

    @property
    def stream(self) -> Any:
        return sys.stderr

    @stream.setter
    def stream(self, value: Any) -> None:
        pass


def setup_logging(level: str = "INFO", fmt: LogFormat | str = LogFormat.KV,
                  env: Mapping[str, str] | None = None) -> logging.Logger:
    """The `watchkeep` logger writing one line per record to stderr."""
    env = os.environ if env is None else env
    with_time = not under_journal(env)
    handler = _StderrHandler()
    handler.setFormatter(JsonFormatter(with_time) if LogFormat(fmt) is LogFormat.JSON
                         else OneLineFormatter(with_time))
    log = logging.getLogger(LOGGER_NAME)
    log.handlers[:] = [handler]
    log.setLevel(level)
    log.propagate = False
    return log


def kv(msg: str, **fields: Any) -> str:
    """`msg key=value ...`, quoting values with spaces, `=` or quotes; never more than one line."""
    parts = [_escape_lines(msg)] if msg else []
    for k, v in fields.items():
        s = _escape_lines(str(v).replace("\\", "\\\\"))
        if not s or any(c in s for c in ' ="\\'):
            s = '"' + s.replace('"', '\\"') + '"'
        parts.append(f"{k}={s}")
    return " ".join(parts)


class RateLimited:
    """Logs the first occurrence of a key, then at most one line per `interval_s`
    carrying how many were suppressed in between.

    Keys should come from a bounded set (reason, asset): one timestamp is kept per key.
    """

    def __init__(self, logger: logging.Logger, interval_s: float = 60.0,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self._log = logger
        self._interval = interval_s
        self._clock = clock
        self._last: dict[str, float] = {}
        self._suppressed: dict[str, int] = {}
        self._lock = threading.Lock()

    def warning(self, key: str, msg: str, **fields: Any) -> None:
        self._emit(key, msg, fields, exc_info=False)

    def exception(self, key: str, msg: str, **fields: Any) -> None:
        """An error with the traceback of the exception being handled: once per interval
        per key, like `warning` (a traceback per message would flood the log)."""
        self._emit(key, msg, fields, exc_info=True)

    def _emit(self, key: str, msg: str, fields: dict[str, Any], exc_info: bool) -> None:
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
        if exc_info:
            self._log.error(kv(msg, **fields), exc_info=True)
        else:
            self._log.warning(kv(msg, **fields))
