"""Raw capture files: the messages a broker carried, one JSON object per line.

Shared by ``watchkeep-sim run --out``, ``watchkeep record --raw`` and ``watchkeep replay``.
Each line is ``{"t": <publish time, unix seconds>, "topic": "<topic>", "payload": "<text>"}``
with the payload as UTF-8 text, lines in time order. Pure standard library.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterable, Iterator
from pathlib import Path
from types import TracebackType
from typing import IO, Any, BinaryIO

from agent.errors import DatasetError
from agent.fsutil import write_file_atomic


class CaptureError(DatasetError):
    """A capture file that cannot be read or a message that cannot be written."""

    def __init__(self, path: str, reason: str, line: int | None = None) -> None:
        self.path = path
        self.reason = reason
        self.line = line
        where = f"{path}:{line}" if line is not None else path
        super().__init__(f"capture {where}: {reason}")


def _line(path: str, t: float, topic: str, payload: bytes) -> str:
    if isinstance(t, bool) or not isinstance(t, int | float) or not math.isfinite(t):
        raise CaptureError(path, f"time must be a finite number, got {t!r}")
    if not isinstance(topic, str) or not topic:
        raise CaptureError(path, f"topic must be a non-empty string, got {topic!r}")
    try:
        text = bytes(payload).decode("utf-8")
    except UnicodeDecodeError:
        raise CaptureError(path, f"payload on {topic} is not UTF-8 text") from None
    return json.dumps({"t": float(t), "topic": topic, "payload": text},
                      ensure_ascii=False, separators=(",", ":")) + "\n"


def write_capture(
    path: str | os.PathLike[str], messages: Iterable[tuple[float, str, bytes]]
) -> int:
    """Write all `messages` to `path` by temp-and-rename; return how many were written.

    The file appears complete or not at all; an error removes the temporary file.
    """
    p = Path(path)
    count = [0]

    def write(fh: BinaryIO) -> None:
        for t, topic, payload in messages:
            fh.write(_line(str(p), t, topic, payload).encode("utf-8"))
            count[0] += 1

    write_file_atomic(p, write)
    return count[0]


class CaptureWriter:
    """Appends messages to a capture file as they happen, flushing every line.

    Use as a context manager or call `close()`. By default an existing file keeps its
    lines (``append=False`` starts it afresh). A reader of a file still being written
    sees the lines flushed so far (a torn last line is reported by `read_capture` with
    its line number).
    """

    def __init__(self, path: str | os.PathLike[str], *, append: bool = True) -> None:
        self.path = str(path)
        self.count = 0
        try:
            self._f: IO[str] | None = open(  # noqa: SIM115 - closed in close()
                self.path, "a" if append else "w", encoding="utf-8", newline="\n"
            )
        except OSError as e:
            raise CaptureError(self.path, f"cannot open for writing: {e.strerror}") from None

    def append(self, t: float, topic: str, payload: bytes) -> None:
        if self._f is None:
            raise CaptureError(self.path, "writer is closed")
        self._f.write(_line(self.path, t, topic, payload))
        self._f.flush()
        self.count += 1

    def close(self) -> None:
        if self._f is not None:
            self._f.close()
            self._f = None

    def __enter__(self) -> CaptureWriter:
        return self

    def __exit__(
        self, exc_type: type[BaseException] | None, exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()


def _parse(path: str, lineno: int, line: str) -> tuple[float, str, bytes]:
    try:
        obj: Any = json.loads(line)
    except json.JSONDecodeError as e:
        raise CaptureError(path, f"not JSON ({e.msg})", lineno) from None
    if not isinstance(obj, dict):
        raise CaptureError(path, "expected a JSON object", lineno)
    missing = [k for k in ("t", "topic", "payload") if k not in obj]
    if missing:
        raise CaptureError(path, f"missing {', '.join(missing)}", lineno)
    t, topic, payload = obj["t"], obj["topic"], obj["payload"]
    if isinstance(t, bool) or not isinstance(t, int | float) or not math.isfinite(t):
        raise CaptureError(path, f"'t' must be a finite number, got {t!r}", lineno)
    if not isinstance(topic, str) or not topic:
        raise CaptureError(path, f"'topic' must be a non-empty string, got {topic!r}", lineno)
    if not isinstance(payload, str):
        raise CaptureError(path, f"'payload' must be a string, got {type(payload).__name__}",
                           lineno)
    return float(t), topic, payload.encode("utf-8")


def read_capture(
    path: str | os.PathLike[str], *, require_order: bool = True
) -> Iterator[tuple[float, str, bytes]]:
    """Yield ``(t, topic, payload)`` from a capture file, lazily, line by line.

    Blank lines are skipped. A malformed line raises `CaptureError` naming the file
    and line number; so does a time earlier than the line before when
    `require_order` (a recording made against a wall clock that stepped back may
    need ``require_order=False``).
    """
    p = str(path)
    try:
        f = open(p, encoding="utf-8", newline="\n")  # noqa: SIM115 - closed below
    except OSError as e:
        raise CaptureError(p, f"cannot open: {e.strerror}") from None
    with f:
        last = -math.inf
        lineno = 0
        while True:
            try:
                line = f.readline()
            except UnicodeDecodeError:
                raise CaptureError(p, "not UTF-8 text", lineno + 1) from None
            if not line:
                return
            lineno += 1
            if not line.strip():
                continue
            msg = _parse(p, lineno, line)
            if require_order and msg[0] < last:
                raise CaptureError(p, f"time {msg[0]!r} is earlier than the line before "
                                   f"({last!r})", lineno)
            last = msg[0]
            yield msg
