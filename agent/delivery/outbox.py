"""The SQLite store-and-forward queue between the pipeline and the upstream broker.

Contract:
- `submit(msgs, sequences)` writes one tick's messages (and the assets' event
  sequence numbers) in ONE `BEGIN IMMEDIATE` transaction, before anything is
  published; it never raises. A write that fails ("database or disk is full",
  "database is locked", ...) is counted, its rows are kept in memory and retried
  first on the next submit, so order is kept and the daemon stays up. The rows kept
  in memory are bounded (`outbox.max_memory_bytes`, and `max_rows`) by the drop policy
  below; every message that cannot be kept is counted by kind
  (`watchkeep_outbox_dropped_total`) and by reason
  (`watchkeep_outbox_dropped_by_reason_total`: `outbox_full`, `memory_full`,
  `shutdown`) and logged with the numbers, including what is still in memory at
  `close`.
- A full disk (issue 20; `outbox_disk.DiskGuard`): the outbox keeps a reserve file
  (`<path>.reserve`, `RESERVE_BYTES`) and watches the free space of its file system.
  Below `LOW_SPACE_BYTES`, or after a "disk full" error, it runs *tight*: the backlog is
  written in batches of at most `BATCH_ROWS` rows / `BATCH_BYTES` bytes, one
  transaction each, so freeing a little space lets a little through; every commit
  and every failed attempt is followed by a `wal_checkpoint(TRUNCATE)`, so the WAL
  holds no committed frames waiting for the database file to grow, and a failed
  attempt gives its WAL growth back instead of keeping it; new rows are written only
  while the reserve exists. When a checkpoint or a delete of acknowledged rows finds
  the disk full, the reserve is given up for it: deletes (the upstream's
  acknowledgements) always go first, and the space they free inside the file is
  returned to the file system (`incremental_vacuum`), so the reserve, and then the
  backlog, come back as soon as there is room.
- Rows are delivered in id order (`fetch_after`) and removed only by `delete`,
  which the upstream side calls once the broker has acknowledged them. The rows of
  the last few ticks are also kept in memory (`outbox_tail.Tail`), so an upstream
  that keeps up reads what was just written without a query; the file stays the only
  record.
- The outbox is bounded by rows and bytes; past a bound, rows are dropped in
  priority order (`outbox_drops.DROP_ORDER`), oldest first within a class, and every
  drop is counted by kind and logged.
- One connection, one lock: a single writer by construction. WAL journal,
  `synchronous` from the config (FULL by default: a power cut on an SD card or
  eMMC must not lose a committed tick; deletes of acknowledged rows commit without an
  fsync of their own, see `delete`), `PRAGMA user_version` is the schema
  version, `PRAGMA quick_check` runs at open, and a corrupt file is moved aside
  (`<name>.corrupt-<UTC time>`) and replaced by a new, empty outbox (`outbox_file`).
- File growth: `auto_vacuum=INCREMENTAL` on new files and a bounded
  `incremental_vacuum` when many pages are free; never a full VACUUM at start-up.
"""

from __future__ import annotations

import contextlib
import logging
import sqlite3
import threading
import time
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

from agent.config.load import OutboxConfig, Synchronous
from agent.delivery.outbox_disk import DiskGuard, batch_len
from agent.delivery.outbox_drops import DropLog, backlog_drops, drop_to_bounds
from agent.delivery.outbox_file import (
    DELETE_RUN_SQL,
    INSERT_SQL,
    KINDS,
    Row,
    check_existing,
    chunk_sizes,
    connect,
    error_reason,
    id_runs,
    message_size,
    move_aside,
)
from agent.delivery.outbox_tail import Tail
from agent.errors import OutboxError
from agent.fsutil import private_dir, private_file
from agent.ops.logs import RateLimited, kv
from agent.ops.metrics import Metrics
from agent.pipeline.messages import OutMessage

# Free pages above which a bounded incremental vacuum runs (4 KiB pages: 16 MiB).
VACUUM_FREE_PAGES = 4096
VACUUM_STEP_PAGES = 1024


class Outbox:
    """The durable queue; thread-safe (one connection behind one lock)."""

    def __init__(self, cfg: OutboxConfig, metrics: Metrics, logger: logging.Logger, *,
                 clock: Callable[[], float] = time.time) -> None:
        self.cfg = cfg
        self.metrics = metrics
        self.log = logger
        self.clock = clock
        self.path = cfg.path
        self.corrupt_reset: dict[str, Any] | None = None
        self.last_write_ok = True
        self._lock = threading.Lock()
        self._db: sqlite3.Connection | None = None
        self._rows = 0
        self._bytes = 0
        self.max_id = 0
        self._tail = Tail(1)
        self._pending: list[tuple[OutMessage, float]] = []
        self._pending_bytes = 0
        self._pending_seqs: dict[str, int] = {}
        self._drops = DropLog(metrics, logger)
        self._rl = RateLimited(logger)
        self.disk = DiskGuard(self.path, metrics, logger, self._rl)
        # Called (outside the lock) after rows were committed, so the delivery side can
        # start at once instead of finding them at its next poll.
        self.on_written: list[Callable[[], None]] = []

    # -- opening -------------------------------------------------------------------

    def open(self) -> Outbox:
        """Open (or create) the file; move a corrupt one aside. Raises OutboxError only
        when no usable outbox can be made at all (e.g. the directory is not writable).

        The file is made 0600 before SQLite opens it, whatever the umask: SQLite's unix
        VFS creates the -wal and -shm files with the database file's permissions
        (os_unix.c, findCreateFileMode; from memory, and tests/unit/test_file_modes.py
        checks it), so they are 0600 too."""
        private_dir(self.path.parent)
        problem = check_existing(self.path)
        if problem is not None:
            self._move_aside(problem)
        try:
            private_file(self.path)
            for suffix in ("-wal", "-shm"):  # left by an older run, perhaps wider
                side = Path(f"{self.path}{suffix}")
                if side.exists():
                    private_file(side)
        except OSError as exc:
            raise OutboxError(f"outbox {self.path}: cannot create: {exc}") from exc
        try:
            self._db = connect(self.path, self.cfg.synchronous)
        except sqlite3.Error as exc:
            raise OutboxError(f"outbox {self.path}: cannot open: {exc}") from exc
        self._refresh_counts()
        self.disk.ensure_reserve()
        return self

    def _move_aside(self, problem: str) -> None:
        now = self.clock()
        dest = move_aside(self.path, now)
        self.metrics.outbox_resets.inc()
        self.corrupt_reset = {"moved_to": str(dest), "at": now, "problem": problem[:200]}
        self.log.error(kv("OUTBOX CORRUPT: moved aside and started a new, empty outbox; "
                          "undelivered messages in it are not sent", path=str(self.path),
                          moved_to=str(dest), problem=problem[:200]))

    def _refresh_counts(self) -> None:
        db = self._conn()
        rows, nbytes = db.execute("SELECT count(*), coalesce(sum(size), 0) FROM outbox"
                                  ).fetchone()
        self._rows, self._bytes = int(rows), int(nbytes)
        seq = db.execute("SELECT seq FROM sqlite_sequence WHERE name = 'outbox'").fetchone()
        self.max_id = int(seq[0]) if seq else 0
        self._tail = Tail(self.max_id + 1)
        self._gauges()

    def _conn(self) -> sqlite3.Connection:
        if self._db is None:
            raise OutboxError("outbox is not open")
        return self._db

    # -- writing -------------------------------------------------------------------

    def submit(self, msgs: Sequence[OutMessage],
               sequences: Mapping[str, int] | None = None) -> None:
        """Store one tick's messages in one transaction (`last_write_ok` says if it was).

        Never raises: a failed write is counted and kept in memory (bounded by
        `max_rows` and `max_memory_bytes`, with the same drop policy) to be retried
        first next time; on a full disk the backlog goes in bounded batches.
        """
        now = self.clock()
        with self._lock:
            pending = self._pending
            for m in msgs:
                pending.append((m, now))
                self._pending_bytes += message_size(m)
            self._pending_seqs.update(sequences or {})
            if not self._pending and not self._pending_seqs:
                return
            ok = self._flush()
            if not ok:
                self._bound_pending()
            self.last_write_ok = ok
            self._drops.log_due(now, self.cfg)
            self._gauges()
        for fn in self.on_written:
            fn()

    def _flush(self) -> bool:
        """Write what waits in memory; True when all of it is in the file."""
        disk = self.disk
        if not disk.tight and disk.space_low():
            disk.enter_tight("low_space")
        if not disk.tight:
            try:
                self._write_pending(len(self._pending))
                return True
            except sqlite3.Error as exc:
                self._failed(exc)
                return False
        return self._flush_tight()

    def _flush_tight(self) -> bool:
        """Tight: only while the reserve exists, in bounded batches, each checkpointed."""
        disk = self.disk
        if not disk.ensure_reserve():
            self._rl.warning("reserve", "outbox: disk full and no room for the reserve; "
                             "delivered rows are deleted first, new rows wait in memory",
                             pending=len(self._pending), reserve=str(disk.reserve))
            self.metrics.outbox_errors.labels("disk_full").inc()
            return False
        while self._pending or self._pending_seqs:
            n, size = batch_len(self._pending)
            fits, free = disk.fits(size)
            if not fits:
                # Not even a batch's WAL frames and the file's growth at its checkpoint
                # fit: no attempt (a doomed one costs a rollback and a checkpoint).
                self._rl.warning("wait-space", "outbox: disk full; new rows wait in memory "
                                 "for space", pending=len(self._pending), free_bytes=free)
                self.metrics.outbox_errors.labels("disk_full").inc()
                return False
            try:
                self._write_pending(n)
            except sqlite3.Error as exc:
                self._failed(exc)
                return False
            if not disk.checkpoint(self._conn()) or not disk.reserve.exists():
                return False  # the batch took the reserve: deletes first from here
        disk.leave_tight_if_room()
        return True

    def _failed(self, exc: sqlite3.Error) -> None:
        """After a failed write: roll back, count, log (rate-limited), and on a full disk
        go tight and give the failed attempt's WAL growth back."""
        self._rollback()
        reason = error_reason(exc)
        self.metrics.outbox_errors.labels(reason).inc()
        self._rl.warning(f"write:{reason}", "outbox write failed; kept in memory and "
                         "retried next tick", reason=reason, error=str(exc),
                         pending=len(self._pending))
        if reason == "disk_full":
            self.disk.enter_tight(reason)
            self.disk.checkpoint(self._conn())

    def _write_pending(self, count: int) -> None:
        """Write the `count` oldest waiting rows in one transaction (the assets' sequence
        numbers go with the last of them); they leave memory only after the commit."""
        db = self._conn()
        batch = self._pending[:count]
        last_batch = count == len(self._pending)
        db.execute("BEGIN IMMEDIATE")
        added_bytes, last_id = self._insert(db, batch)
        added_rows = len(batch)
        if self._pending_seqs and last_batch:
            db.executemany(
                "INSERT INTO sequences (asset, seq) VALUES (?, ?) "
                "ON CONFLICT (asset) DO UPDATE SET seq = excluded.seq",
                list(self._pending_seqs.items()))
        rows, nbytes = self._rows + added_rows, self._bytes + added_bytes
        dropped: Counter[str] = Counter()
        dropped_ids: list[int] = []
        if rows > self.cfg.max_rows or nbytes > self.cfg.max_bytes:
            rows, nbytes, dropped = drop_to_bounds(db, rows, nbytes, self.cfg.max_rows,
                                                   self.cfg.max_bytes, dropped_ids)
        db.execute("COMMIT")
        # Only now, after COMMIT, is the state in memory updated.
        self._rows, self._bytes = rows, nbytes
        self._tail.extend(last_id - added_rows + 1, last_id, batch, dropped_ids)
        self.max_id = last_id
        del self._pending[:count]
        self._pending_bytes -= added_bytes
        if last_batch:
            self._pending_seqs = {}
        self._drops.count(dropped, "outbox_full")

    def _insert(self, db: sqlite3.Connection,
                batch: list[tuple[OutMessage, float]]) -> tuple[int, int]:
        """INSERT `batch` (inside the caller's transaction); returns its bytes and the
        last id written (`max_id` when the batch is empty)."""
        values: list[Any] = []
        added_bytes = 0
        for m, created in batch:
            size = message_size(m)
            added_bytes += size
            values += (created, int(m.kind), m.topic, m.payload, m.qos, int(m.retain), m.key,
                       size)
        last_id = self.max_id
        if batch:
            start = 0
            for n in chunk_sizes(len(batch)):
                db.execute(INSERT_SQL[n], values[start:start + 8 * n])
                start += 8 * n
            # One writer inside this transaction: the new ids run up to the last one.
            last_id = int(db.execute("SELECT last_insert_rowid()").fetchone()[0])
        return added_bytes, last_id

    def _bound_pending(self) -> None:
        """Keep the in-memory retry list within `max_rows` and `max_memory_bytes` by the
        same drop policy (counted with reason `memory_full`)."""
        pending = self._pending
        if len(pending) <= self.cfg.max_rows and \
                self._pending_bytes <= self.cfg.max_memory_bytes:
            return
        drop, freed = backlog_drops(pending, self._pending_bytes, self.cfg.max_rows,
                                    self.cfg.max_memory_bytes)
        dropped: Counter[str] = Counter(pending[i][0].kind.label for i in drop)
        self._pending = [p for i, p in enumerate(pending) if i not in drop]
        self._pending_bytes -= freed
        self._drops.count(dropped, "memory_full")

    def _rollback(self) -> None:
        with contextlib.suppress(sqlite3.Error):  # no transaction was open
            self._conn().execute("ROLLBACK")

    # -- delivery ------------------------------------------------------------------

    def fetch_after(self, after_id: int, limit: int) -> list[Row]:
        """Up to `limit` rows with id > `after_id`, in id order."""
        with self._lock:
            held = self._tail.after(after_id, limit, self._rows)
            if held is not None:
                return held
            found = self._conn().execute(
                "SELECT id, kind, topic, payload, qos, retain FROM outbox WHERE id > ? "
                "ORDER BY id LIMIT ?", (after_id, limit)).fetchall()
        # tuple.__new__ is what Row._make uses, without a Python-level call per row; the
        # payload column only ever holds the bytes that submit wrote.
        kinds, new = KINDS, tuple.__new__
        return [new(Row, (i, kinds[k], t, p, q, r == 1)) for i, k, t, p, q, r in found]

    def delete(self, ids: Sequence[int]) -> int:
        """Remove acknowledged rows in one transaction; returns how many existed.

        Raises sqlite3.Error (after rolling back) so the caller can keep the ids and
        retry; ids already gone (dropped while in flight) are ignored.
        """
        if not ids:
            return 0
        with self._lock:
            try:
                n = self._delete(ids)
            except sqlite3.Error as exc:
                if error_reason(exc) != "disk_full":
                    raise
                # Deletes go first: the reserve is given up for them (and the checkpoint
                # that frees the WAL), then they are tried once more.
                self.disk.enter_tight("disk_full")
                self.disk.release_reserve()
                self.disk.checkpoint(self._conn())
                n = self._delete(ids)
            wrote = self.disk.tight and self._after_tight_delete()
        if wrote:
            for fn in self.on_written:
                fn()
        return n

    def _after_tight_delete(self) -> bool:
        """Tight, after a delete (lock held): give its space back and let the backlog
        take the room now, not at the next tick; True if the backlog was written."""
        self.disk.give_back_space(self._conn())
        if not (self._pending or self._pending_seqs):
            return False
        wrote = self._flush()
        self.last_write_ok = wrote
        if not wrote:
            self._bound_pending()
        self._drops.log_due(self.clock(), self.cfg)
        self._gauges()
        return wrote
    def _delete(self, ids: Sequence[int]) -> int:
        """One delete transaction (lock held); raises after rolling back."""
        db = self._conn()
        # A delete commits without its own fsync (WAL + synchronous NORMAL): losing
        # it to a power cut only brings acknowledged rows back, sent again with
        # their stable ids (at least once; consumers de-duplicate), and the next
        # FULL commit of `submit` syncs the WAL with these frames in it. That
        # halves the fsyncs and the time this lock is held against the pipeline.
        relax = self.cfg.synchronous is Synchronous.FULL
        try:
            if relax:
                db.execute("PRAGMA synchronous = NORMAL")
            db.execute("BEGIN IMMEDIATE")
            sizes: list[tuple[int]] = []
            for run in id_runs(ids):
                sizes += db.execute(DELETE_RUN_SQL, run).fetchall()
            db.execute("COMMIT")
            n, freed = len(sizes), sum([s for (s,) in sizes])
        except sqlite3.Error as exc:
            self._rollback()
            self.metrics.outbox_errors.labels(error_reason(exc)).inc()
            raise
        finally:
            if relax:
                with contextlib.suppress(sqlite3.Error):
                    db.execute("PRAGMA synchronous = FULL")
        self._rows -= n
        self._bytes -= freed
        self._tail.forget(ids)
        return n

    def sequences(self) -> dict[str, int]:
        """The last event sequence number stored per asset."""
        with self._lock:
            return {a: int(s) for a, s in
                    self._conn().execute("SELECT asset, seq FROM sequences").fetchall()}

    # -- housekeeping --------------------------------------------------------------

    def counts(self) -> tuple[int, int]:
        """(rows, bytes) waiting."""
        return self._rows, self._bytes

    def oldest_created(self) -> float | None:
        with self._lock:
            r = self._conn().execute("SELECT created FROM outbox ORDER BY id LIMIT 1").fetchone()
            return float(r[0]) if r else None

    def maintain(self) -> int:
        """A bounded incremental vacuum when many pages are free; returns pages freed."""
        with self._lock:
            db = self._conn()
            try:
                free = db.execute("PRAGMA freelist_count").fetchone()[0]
                if free < VACUUM_FREE_PAGES:
                    return 0
                db.execute(f"PRAGMA incremental_vacuum({VACUUM_STEP_PAGES})").fetchall()
                return int(free - db.execute("PRAGMA freelist_count").fetchone()[0])
            except sqlite3.Error as exc:
                self.metrics.outbox_errors.labels(error_reason(exc)).inc()
                return 0

    def update_gauges(self) -> None:
        oldest = self.oldest_created()
        self.metrics.outbox_oldest_age.set(0.0 if oldest is None
                                           else max(0.0, self.clock() - oldest))
        self._gauges()

    def _gauges(self) -> None:
        self.metrics.outbox_rows.set(self._rows)
        self.metrics.outbox_bytes.set(self._bytes)
        self.metrics.outbox_memory_rows.set(len(self._pending))

    def status(self) -> dict[str, Any]:
        """For `/status` and the retained status topic."""
        doc: dict[str, Any] = {"rows": self._rows, "bytes": self._bytes,
                               "pending_in_memory": len(self._pending),
                               "pending_in_memory_bytes": self._pending_bytes,
                               "disk_tight": self.disk.tight}
        if self.corrupt_reset is not None:
            doc["corrupt_reset"] = self.corrupt_reset
        return doc

    def close(self) -> None:
        """Write what waits in memory if the disk lets it (one more try), count and log
        what it does not as dropped (reason `shutdown`), checkpoint, close."""
        with self._lock:
            if self._db is not None:
                if self._pending or self._pending_seqs:
                    self._flush()
                if self._pending:
                    dropped = Counter(m.kind.label for m, _ in self._pending)
                    self._drops.count(dropped, "shutdown")
                    self.log.error(kv("OUTBOX CLOSING WITH UNWRITTEN MESSAGES: dropped",
                                      dropped=len(self._pending),
                                      **{f"kind_{k}": n for k, n in sorted(dropped.items())},
                                      reason="shutdown", path=str(self.path)))
                    self._drops.unlogged.clear()
                    self._pending, self._pending_bytes = [], 0
                self._drops.log_due(float("inf"), self.cfg)
                with contextlib.suppress(sqlite3.Error):
                    self._db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
                self._db.close()
                self._db = None
