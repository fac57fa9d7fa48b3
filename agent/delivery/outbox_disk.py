"""The outbox on a full or nearly full disk (issue 20): the reserve file, the free-space
watch, checkpoints that give the WAL's space back, and the size of a *tight* batch.

`DiskGuard` holds the tight flag and the reserve; the outbox asks it whether to write
in batches, how many rows a batch takes, whether a batch fits, and to checkpoint or
give space back after a commit or a delete. The policy is in the module docstring of
`agent.delivery.outbox`.
"""

from __future__ import annotations

import contextlib
import errno
import logging
import os
import sqlite3
from collections.abc import Sequence
from pathlib import Path

from agent.delivery.outbox_file import error_reason, message_size
from agent.ops.logs import RateLimited, kv
from agent.ops.metrics import Metrics
from agent.pipeline.messages import OutMessage

# Tight mode (a full or nearly full disk; module docstring). Common practice, no source:
# a batch of 64 rows / 64 KiB makes a few dozen 4 KiB pages of WAL, so a few hundred KiB
# of free space let a batch through; the reserve covers the database file growing by one
# batch at a checkpoint plus a delete's WAL frames several times over; tight starts with
# two WAL auto-checkpoints' worth (SQLite: 1000 pages each) of space left.
BATCH_ROWS = 64
BATCH_BYTES = 64 * 1024
RESERVE_BYTES = 512 * 1024
LOW_SPACE_BYTES = 8 * 1024 * 1024
# Tight ends with this much more than LOW_SPACE_BYTES free (so it does not flap).
LEAVE_TIGHT_MARGIN = 4 * 1024 * 1024
# A batch is tried with twice its bytes free (its WAL frames, then the file's growth at
# the checkpoint) plus this for the pages around the rows (indexes, pointer maps).
BATCH_HEADROOM = 64 * 1024


def batch_len(pending: Sequence[tuple[OutMessage, float]]) -> tuple[int, int]:
    """How many of the oldest waiting rows make one tight batch (at least one), and
    their bytes."""
    n = size = 0
    for m, _ in pending:
        k = message_size(m)
        if n and (n >= BATCH_ROWS or size + k > BATCH_BYTES):
            break
        n += 1
        size += k
    return n, size


class DiskGuard:
    """The reserve file next to the outbox and the tight flag; not thread-safe (the
    outbox calls it with its lock held)."""

    def __init__(self, path: Path, metrics: Metrics, logger: logging.Logger,
                 rl: RateLimited) -> None:
        self.path = path
        self.metrics = metrics
        self.log = logger
        self._rl = rl
        self.reserve = Path(f"{path}.reserve")
        self.tight = False  # a full or nearly full disk

    def free_bytes(self) -> int | None:
        try:
            st = os.statvfs(self.path.parent)
        except OSError:
            return None
        return st.f_bavail * st.f_frsize

    def space_low(self) -> bool:
        free = self.free_bytes()
        return free is not None and free < LOW_SPACE_BYTES

    def fits(self, size: int) -> tuple[bool, int | None]:
        """Whether a batch of `size` bytes may be tried: its WAL frames and the file's
        growth at its checkpoint fit (or the free space is unknown); and the free bytes."""
        free = self.free_bytes()
        return free is None or free >= 2 * size + BATCH_HEADROOM, free

    def enter_tight(self, why: str) -> None:
        if not self.tight:
            self.tight = True
            self.log.warning(kv("outbox: little or no disk space; writing in small batches "
                                "and deleting delivered rows first", why=why,
                                free_bytes=self.free_bytes(), path=str(self.path)))

    def leave_tight_if_room(self) -> None:
        """After the backlog went in: back to normal writing once there is room."""
        free = self.free_bytes()
        if free is None or free >= LOW_SPACE_BYTES + LEAVE_TIGHT_MARGIN:
            self.tight = False
            self.log.info(kv("outbox: space is back; writing normally", free_bytes=free,
                             path=str(self.path)))

    def ensure_reserve(self) -> bool:
        """The reserve file exists (made now if there is room); False only when the disk
        has no room for it. A file system that cannot hold one for another reason (no
        permission) is logged once and treated as having it."""
        try:
            if self.reserve.stat().st_size >= RESERVE_BYTES:
                return True
        except OSError:
            pass
        try:
            fd = os.open(self.reserve, os.O_WRONLY | os.O_CREAT, 0o600)
            try:
                try:
                    os.posix_fallocate(fd, 0, RESERVE_BYTES)
                except OSError as exc:
                    if exc.errno not in (errno.EOPNOTSUPP, errno.EINVAL):
                        raise
                    os.pwrite(fd, bytes(RESERVE_BYTES), 0)  # no fallocate: real zeros
            finally:
                os.close(fd)
            return True
        except OSError as exc:
            with contextlib.suppress(OSError):
                self.reserve.unlink()
            if exc.errno in (errno.ENOSPC, errno.EDQUOT):
                return False
            self._rl.warning("reserve-other", "outbox: cannot make the reserve file",
                             path=str(self.reserve), error=str(exc))
            return True

    def release_reserve(self) -> bool:
        """Give the reserve's space to SQLite; True if there was one."""
        try:
            self.reserve.unlink()
        except OSError:
            return False
        self.log.warning(kv("outbox: disk full; reserve released for deletes and the "
                            "checkpoint", path=str(self.reserve)))
        return True

    def checkpoint(self, db: sqlite3.Connection) -> bool:
        """Move the WAL into the database file and truncate it (tight mode): no committed
        frame then waits for the file to grow, and the WAL's space is free again. On a
        full disk the reserve is released once for it."""
        for attempt in (0, 1):
            try:
                busy = db.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchone()[0]
                if not busy:
                    return True
            except sqlite3.Error as exc:
                self.metrics.outbox_errors.labels(error_reason(exc)).inc()
            if attempt == 0 and not self.release_reserve():
                return False
        return False

    def give_back_space(self, db: sqlite3.Connection) -> None:
        """Tight mode, after a delete: the pages it freed go back to the file system (so
        the reserve and the backlog find room) and the WAL is truncated."""
        try:
            db.execute("PRAGMA incremental_vacuum").fetchall()
        except sqlite3.Error as exc:
            self.metrics.outbox_errors.labels(error_reason(exc)).inc()
        self.checkpoint(db)
