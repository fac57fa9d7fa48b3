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
- A full disk (issue 20): the outbox keeps a reserve file (`<path>.reserve`,
  `RESERVE_BYTES`) and watches the free space of its file system. Below
  `LOW_SPACE_BYTES`, or after a "disk full" error, it runs *tight*: the backlog is
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
  the last few ticks are also kept in memory (`TAIL_ROWS`), so an upstream that keeps
  up reads what was just written without a query; the file stays the only record.
- The outbox is bounded by rows and bytes; past a bound, rows are dropped in
  priority order (`DROP_ORDER`), oldest first within a class, and every drop is
  counted by kind and logged.
- One connection, one lock: a single writer by construction. WAL journal,
  `synchronous` from the config (FULL by default: a power cut on an SD card or
  eMMC must not lose a committed tick; deletes of acknowledged rows commit without an
  fsync of their own, see `delete`), `PRAGMA user_version` is the schema
  version, `PRAGMA quick_check` runs at open, and a corrupt file is moved aside
  (`<name>.corrupt-<UTC time>`) and replaced by a new, empty outbox.
- File growth: `auto_vacuum=INCREMENTAL` on new files and a bounded
  `incremental_vacuum` when many pages are free; never a full VACUUM at start-up.
"""

from __future__ import annotations

import contextlib
import errno
import logging
import os
import sqlite3
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterable, Mapping, Sequence
from datetime import UTC, datetime
from itertools import islice
from pathlib import Path
from typing import Any, NamedTuple

from agent.config.load import OutboxConfig, Synchronous
from agent.errors import OutboxError
from agent.fsutil import private_dir, private_file
from agent.ops.logs import RateLimited, kv
from agent.ops.metrics import Metrics
from agent.pipeline.messages import Kind, OutMessage

SCHEMA_VERSION = 1

# Drop classes in the order a full outbox gives them up: score telemetry, retained
# states a newer state of the same key supersedes, non-anomaly events, the current
# (unsuperseded) states, anomaly events last.
DROP_ORDER = ("score", "state_superseded", "event", "state_current", "anomaly")

_CLASS_SQL = {
    "score": f"kind = {int(Kind.SCORE)}",
    "state_superseded": f"kind = {int(Kind.STATE)} AND key IS NOT NULL AND EXISTS "
                        "(SELECT 1 FROM outbox n WHERE n.key = outbox.key AND n.id > outbox.id)",
    "event": f"kind = {int(Kind.EVENT)}",
    "state_current": f"kind = {int(Kind.STATE)}",
    "anomaly": f"kind = {int(Kind.ANOMALY)}",
}

_SCHEMA = """
CREATE TABLE IF NOT EXISTS outbox (
    id INTEGER PRIMARY KEY AUTOINCREMENT,  -- never reused, so a delivery cursor only grows
    created REAL NOT NULL,
    kind INTEGER NOT NULL,
    topic TEXT NOT NULL,
    payload BLOB NOT NULL,
    qos INTEGER NOT NULL,
    retain INTEGER NOT NULL,
    key TEXT,
    size INTEGER NOT NULL
);
CREATE INDEX IF NOT EXISTS outbox_kind ON outbox (kind, id);
CREATE INDEX IF NOT EXISTS outbox_key ON outbox (key, id) WHERE key IS NOT NULL;
CREATE TABLE IF NOT EXISTS sequences (asset TEXT PRIMARY KEY, seq INTEGER NOT NULL);
"""

# Free pages above which a bounded incremental vacuum runs (4 KiB pages: 16 MiB).
VACUUM_FREE_PAGES = 4096
VACUUM_STEP_PAGES = 1024
DROP_LOG_INTERVAL_S = 10.0
# Committed rows kept in memory for `fetch_after`: the newest ids. They hold the
# messages' own payload objects, no copies, and let go of a row once it is delivered.
# 1,024 rows are several ticks of a 200-asset gateway and many in-flight windows.
TAIL_ROWS = 1024
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
# Reasons of `watchkeep_outbox_dropped_by_reason_total`.
DROP_REASONS = ("outbox_full", "memory_full", "shutdown")


class Row(NamedTuple):
    """One stored message, as the upstream side publishes it (a tuple: cheap to build for
    every row fetched)."""

    id: int
    kind: Kind
    topic: str
    payload: bytes
    qos: int
    retain: bool


_KINDS = {int(k): k for k in Kind}
# Multi-row INSERTs: one statement per chunk instead of one per row (executemany) saves
# a third of the insert time, mostly the AUTOINCREMENT bookkeeping each statement does.
# Chunks are powers of two up to 64 rows, so a few statements are prepared once and
# cached; 64 rows x 8 columns stay within the oldest SQLite variable limit (999).
INSERT_CHUNKS = (64, 32, 16, 8, 4, 2, 1)
_INSERT_SQL = {n: "INSERT INTO outbox (created, kind, topic, payload, qos, retain, key, size) "
                  "VALUES " + ", ".join(["(?, ?, ?, ?, ?, ?, ?, ?)"] * n)
               for n in INSERT_CHUNKS}
_DELETE_RUN_SQL = "DELETE FROM outbox WHERE id BETWEEN ? AND ? RETURNING size"


def message_size(m: OutMessage) -> int:
    """The bytes a message counts against `outbox.max_bytes` (topic + payload)."""
    topic = m.topic
    # isascii() is O(1) on CPython's str; an ASCII topic's UTF-8 length is its length.
    return (len(topic) if topic.isascii() else len(topic.encode())) + len(m.payload)


def chunk_sizes(n: int) -> list[int]:
    """`n` rows as a sum of `INSERT_CHUNKS` sizes, largest first."""
    out: list[int] = []
    for c in INSERT_CHUNKS:
        k, n = divmod(n, c)
        out += [c] * k
    return out


def id_runs(ids: Iterable[int]) -> list[tuple[int, int]]:
    """The distinct ids as (first, last) runs of consecutive integers, ascending.

    `id BETWEEN first AND last` then matches exactly the given ids, whatever other rows
    exist, so a batch of acknowledged rows (usually one run) is deleted by one statement.
    """
    runs: list[tuple[int, int]] = []
    it = iter(sorted(set(ids)))
    for first in it:
        last = first
        for i in it:
            if i != last + 1:
                runs.append((first, last))
                first = i
            last = i
        runs.append((first, last))
    return runs


def plan_drops(candidates: Iterable[tuple[int, int]], rows: int, nbytes: int,
               max_rows: int, max_bytes: int) -> tuple[list[int], int]:
    """Ids to drop, taken in the given order, until `rows`/`nbytes` are within bounds.

    `candidates` are (id, size) in drop order. Returns (ids, bytes freed); stops as
    soon as both bounds hold, so no more is dropped than needed.
    """
    ids: list[int] = []
    freed = 0
    for rid, size in candidates:
        if rows - len(ids) <= max_rows and nbytes - freed <= max_bytes:
            break
        ids.append(rid)
        freed += size
    return ids, freed


def corrupt_name(path: Path, now: float) -> Path:
    stamp = datetime.fromtimestamp(now, UTC).strftime("%Y%m%dT%H%M%SZ")
    return path.with_name(f"{path.name}.corrupt-{stamp}")


def _error_reason(exc: sqlite3.Error) -> str:
    text = str(exc).lower()
    if "full" in text:
        return "disk_full"
    if "locked" in text or "busy" in text:
        return "locked"
    if "malformed" in text or "not a database" in text:
        return "corrupt"
    if "readonly" in text or "read-only" in text:
        return "readonly"
    return "other"


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
        # The in-memory tail: _tail[k] is the committed row with id _tail_from + k, or
        # None once it left the file (delete, drop); always _tail_from + len(_tail) ==
        # max_id + 1, so every stored row with id >= _tail_from is in it; _tail_live
        # counts its rows (when it equals _rows, every stored row is in it).
        self._tail: list[Row | None] = []
        self._tail_from = 1
        self._tail_live = 0
        self._pending: list[tuple[OutMessage, float]] = []
        self._pending_bytes = 0
        self._pending_seqs: dict[str, int] = {}
        self._drops_unlogged: Counter[str] = Counter()
        self._drop_logged_at = -float("inf")
        self._drop_counters = {k.label: metrics.outbox_drops.labels(k.label) for k in Kind}
        self._reason_counters = {r: metrics.outbox_drop_reasons.labels(r)
                                 for r in DROP_REASONS}
        self._rl = RateLimited(logger)
        self.reserve = Path(f"{self.path}.reserve")
        self.tight = False  # a full or nearly full disk (module docstring)
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
        problem = self._check_existing()
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
            self._db = self._connect()
        except sqlite3.Error as exc:
            raise OutboxError(f"outbox {self.path}: cannot open: {exc}") from exc
        self._refresh_counts()
        self._ensure_reserve()
        return self

    def _check_existing(self) -> str | None:
        """Why the existing file cannot be used (corrupt), or None."""
        if not self.path.exists():
            return None
        try:
            db = sqlite3.connect(self.path, isolation_level=None)
            try:
                res = [r[0] for r in db.execute("PRAGMA quick_check").fetchall()]
                version = db.execute("PRAGMA user_version").fetchone()[0]
            finally:
                db.close()
        except sqlite3.DatabaseError as exc:
            return str(exc)
        if res != ["ok"]:
            return "; ".join(str(r) for r in res[:5])
        if version > SCHEMA_VERSION:
            raise OutboxError(f"outbox {self.path}: schema version {version} was written by a "
                              f"newer watchkeep (this one knows {SCHEMA_VERSION}); refusing "
                              f"to touch it")
        return None

    def _move_aside(self, problem: str) -> None:
        now = self.clock()
        dest = corrupt_name(self.path, now)
        for suffix in ("", "-wal", "-shm"):
            src = Path(f"{self.path}{suffix}")
            if src.exists():
                src.replace(Path(f"{dest}{suffix}"))
        self.metrics.outbox_resets.inc()
        self.corrupt_reset = {"moved_to": str(dest), "at": now, "problem": problem[:200]}
        self.log.error(kv("OUTBOX CORRUPT: moved aside and started a new, empty outbox; "
                          "undelivered messages in it are not sent", path=str(self.path),
                          moved_to=str(dest), problem=problem[:200]))

    def _connect(self) -> sqlite3.Connection:
        new = not self.path.exists() or self.path.stat().st_size == 0
        # isolation_level=None: we issue BEGIN IMMEDIATE ourselves; check_same_thread
        # off because the one connection is shared behind self._lock.
        db = sqlite3.connect(self.path, isolation_level=None, check_same_thread=False,
                             timeout=5.0)
        if new:
            db.execute("PRAGMA auto_vacuum = INCREMENTAL")  # only takes effect before tables
        db.execute("PRAGMA journal_mode = WAL")
        db.execute(f"PRAGMA synchronous = {self.cfg.synchronous.value}")
        db.execute("PRAGMA journal_size_limit = 4194304")
        # Some builds (Debian's) default to secure_delete=ON, which writes every freed page
        # (zeroed) again: delivered rows are deleted all the time, so that is ~10% more WAL
        # I/O per tick. FAST still zeroes deleted content where that costs no extra I/O.
        # Not a durability setting: commits are fsynced exactly as before.
        db.execute("PRAGMA secure_delete = FAST")
        db.executescript(_SCHEMA)
        version = db.execute("PRAGMA user_version").fetchone()[0]
        if version < SCHEMA_VERSION:
            db.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
        return db

    def _refresh_counts(self) -> None:
        db = self._conn()
        rows, nbytes = db.execute("SELECT count(*), coalesce(sum(size), 0) FROM outbox"
                                  ).fetchone()
        self._rows, self._bytes = int(rows), int(nbytes)
        seq = db.execute("SELECT seq FROM sqlite_sequence WHERE name = 'outbox'").fetchone()
        self.max_id = int(seq[0]) if seq else 0
        self._tail = []
        self._tail_from = self.max_id + 1
        self._tail_live = 0
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
            self._log_drops(now)
            self._gauges()
        for fn in self.on_written:
            fn()

    def _flush(self) -> bool:
        """Write what waits in memory; True when all of it is in the file."""
        if not self.tight and self._space_low():
            self._enter_tight("low_space")
        if not self.tight:
            try:
                self._write_pending(len(self._pending))
                return True
            except sqlite3.Error as exc:
                self._failed(exc)
                return False
        # Tight: only while the reserve exists, in bounded batches, each checkpointed.
        if not self._ensure_reserve():
            self._rl.warning("reserve", "outbox: disk full and no room for the reserve; "
                             "delivered rows are deleted first, new rows wait in memory",
                             pending=len(self._pending), reserve=str(self.reserve))
            self.metrics.outbox_errors.labels("disk_full").inc()
            return False
        while self._pending or self._pending_seqs:
            n, size = self._batch_len()
            free = self._free_bytes()
            if free is not None and free < 2 * size + BATCH_HEADROOM:
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
            if not self._checkpoint() or not self.reserve.exists():
                return False  # the batch took the reserve: deletes first from here
        free = self._free_bytes()
        if free is None or free >= LOW_SPACE_BYTES + LEAVE_TIGHT_MARGIN:
            self.tight = False
            self.log.info(kv("outbox: space is back; writing normally", free_bytes=free,
                             path=str(self.path)))
        return True

    def _batch_len(self) -> tuple[int, int]:
        """How many of the oldest waiting rows make one tight batch (at least one), and
        their bytes."""
        n = size = 0
        for m, _ in self._pending:
            k = message_size(m)
            if n and (n >= BATCH_ROWS or size + k > BATCH_BYTES):
                break
            n += 1
            size += k
        return n, size

    def _failed(self, exc: sqlite3.Error) -> None:
        """After a failed write: roll back, count, log (rate-limited), and on a full disk
        go tight and give the failed attempt's WAL growth back."""
        self._rollback()
        reason = _error_reason(exc)
        self.metrics.outbox_errors.labels(reason).inc()
        self._rl.warning(f"write:{reason}", "outbox write failed; kept in memory and "
                         "retried next tick", reason=reason, error=str(exc),
                         pending=len(self._pending))
        if reason == "disk_full":
            self._enter_tight(reason)
            self._checkpoint()

    def _enter_tight(self, why: str) -> None:
        if not self.tight:
            self.tight = True
            self.log.warning(kv("outbox: little or no disk space; writing in small batches "
                                "and deleting delivered rows first", why=why,
                                free_bytes=self._free_bytes(), path=str(self.path)))

    def _free_bytes(self) -> int | None:
        try:
            st = os.statvfs(self.path.parent)
        except OSError:
            return None
        return st.f_bavail * st.f_frsize

    def _space_low(self) -> bool:
        free = self._free_bytes()
        return free is not None and free < LOW_SPACE_BYTES

    def _ensure_reserve(self) -> bool:
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

    def _release_reserve(self) -> bool:
        """Give the reserve's space to SQLite; True if there was one."""
        try:
            self.reserve.unlink()
        except OSError:
            return False
        self.log.warning(kv("outbox: disk full; reserve released for deletes and the "
                            "checkpoint", path=str(self.reserve)))
        return True

    def _checkpoint(self) -> bool:
        """Move the WAL into the database file and truncate it (tight mode): no committed
        frame then waits for the file to grow, and the WAL's space is free again. On a
        full disk the reserve is released once for it."""
        db = self._conn()
        for attempt in (0, 1):
            try:
                busy = db.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchone()[0]
                if not busy:
                    return True
            except sqlite3.Error as exc:
                self.metrics.outbox_errors.labels(_error_reason(exc)).inc()
            if attempt == 0 and not self._release_reserve():
                return False
        return False

    def _write_pending(self, count: int) -> None:
        """Write the `count` oldest waiting rows in one transaction (the assets' sequence
        numbers go with the last of them); they leave memory only after the commit."""
        db = self._conn()
        batch = self._pending[:count]
        last_batch = count == len(self._pending)
        db.execute("BEGIN IMMEDIATE")
        values: list[Any] = []
        added_bytes = 0
        for m, created in batch:
            size = message_size(m)
            added_bytes += size
            values += (created, int(m.kind), m.topic, m.payload, m.qos, int(m.retain), m.key,
                       size)
        added_rows = len(batch)
        last_id = self.max_id
        if added_rows:
            start = 0
            for n in chunk_sizes(added_rows):
                db.execute(_INSERT_SQL[n], values[start:start + 8 * n])
                start += 8 * n
            # One writer inside this transaction: the new ids run up to the last one.
            last_id = int(db.execute("SELECT last_insert_rowid()").fetchone()[0])
        if self._pending_seqs and last_batch:
            db.executemany(
                "INSERT INTO sequences (asset, seq) VALUES (?, ?) "
                "ON CONFLICT (asset) DO UPDATE SET seq = excluded.seq",
                list(self._pending_seqs.items()))
        rows, nbytes = self._rows + added_rows, self._bytes + added_bytes
        dropped: Counter[str] = Counter()
        dropped_ids: list[int] = []
        if rows > self.cfg.max_rows or nbytes > self.cfg.max_bytes:
            rows, nbytes, dropped = self._enforce_bounds(db, rows, nbytes, dropped_ids)
        db.execute("COMMIT")
        # Only now, after COMMIT, is the state in memory updated.
        self._rows, self._bytes = rows, nbytes
        self._extend_tail(last_id - added_rows + 1, last_id, batch, dropped_ids)
        self.max_id = last_id
        del self._pending[:count]
        self._pending_bytes -= added_bytes
        if last_batch:
            self._pending_seqs = {}
        self._count_drops(dropped, "outbox_full")

    def _enforce_bounds(self, db: sqlite3.Connection, rows: int, nbytes: int,
                        dropped_ids: list[int]) -> tuple[int, int, Counter[str]]:
        dropped: Counter[str] = Counter()
        for cls in DROP_ORDER:
            while rows > self.cfg.max_rows or nbytes > self.cfg.max_bytes:
                chunk = db.execute(f"SELECT id, size, kind FROM outbox WHERE {_CLASS_SQL[cls]} "
                                   "ORDER BY id LIMIT 512").fetchall()
                if not chunk:
                    break
                ids, freed = plan_drops(((r[0], r[1]) for r in chunk), rows, nbytes,
                                        self.cfg.max_rows, self.cfg.max_bytes)
                if not ids:
                    break
                db.executemany("DELETE FROM outbox WHERE id = ?", [(i,) for i in ids])
                dropped_ids += ids
                kinds = {r[0]: r[2] for r in chunk}
                for i in ids:
                    dropped[Kind(kinds[i]).label] += 1
                rows -= len(ids)
                nbytes -= freed
        return rows, nbytes, dropped

    def _extend_tail(self, first: int, last: int, batch: list[tuple[OutMessage, float]],
                     dropped_ids: list[int]) -> None:
        """After a commit: the rows `first..last` just written (`batch`, in order), less
        the ones the bounds dropped in the same transaction."""
        if first <= last and first != self._tail_from + len(self._tail):
            # ids did not follow on: start afresh
            self._tail, self._tail_from, self._tail_live = [], first, 0
        tail = self._tail
        new = tuple.__new__
        tail += [new(Row, (i, m.kind, m.topic, m.payload, m.qos, bool(m.retain)))
                 for i, (m, _) in zip(range(first, last + 1), batch, strict=True)]
        self._tail_live += last - first + 1 if first <= last else 0
        self._forget(dropped_ids)
        cut = len(tail) - TAIL_ROWS
        if cut > 0:
            self._tail_live -= cut - tail[:cut].count(None)
            del tail[:cut]
            self._tail_from += cut

    def _forget(self, ids: Iterable[int]) -> None:
        """Rows gone from the file are gone from the tail."""
        tail, base = self._tail, self._tail_from
        n = len(tail)
        for i in ids:
            k = i - base
            if 0 <= k < n and tail[k] is not None:
                tail[k] = None
                self._tail_live -= 1

    def _count_drops(self, dropped: Counter[str], reason: str) -> None:
        for label, n in dropped.items():
            self._drop_counters[label].inc(n)
        total = sum(dropped.values())
        if total:
            self._reason_counters[reason].inc(total)
            # outbox_full keeps the plain kind as its log key (as before); the others
            # carry their reason: memory_full_anomaly=3.
            pre = "" if reason == "outbox_full" else f"{reason}_"
            self._drops_unlogged.update({f"{pre}{k}": n for k, n in dropped.items()})

    def _log_drops(self, now: float) -> None:
        """Every drop is logged: at once the first time, then summed at most every 10 s."""
        if not self._drops_unlogged or now - self._drop_logged_at < DROP_LOG_INTERVAL_S:
            return
        self._drop_logged_at = now
        counts = dict(sorted(self._drops_unlogged.items()))
        self._drops_unlogged.clear()
        self.log.warning(kv("outbox full: messages dropped", **counts,
                            max_rows=self.cfg.max_rows, max_bytes=self.cfg.max_bytes,
                            max_memory_bytes=self.cfg.max_memory_bytes))

    def _bound_pending(self) -> None:
        """Keep the in-memory retry list within `max_rows` and `max_memory_bytes` by the
        same drop policy (counted with reason `memory_full`)."""
        pending = self._pending
        if len(pending) <= self.cfg.max_rows and \
                self._pending_bytes <= self.cfg.max_memory_bytes:
            return
        order = {c: i for i, c in enumerate(DROP_ORDER)}
        latest: dict[str, int] = {}
        for i, (m, _) in enumerate(pending):
            if m.kind is Kind.STATE and m.key is not None:
                latest[m.key] = i

        def cls(i: int, m: OutMessage) -> str:
            if m.kind is Kind.STATE:
                return "state_current" if latest.get(m.key or "") == i or m.key is None \
                    else "state_superseded"
            return m.kind.label

        ranked = sorted(range(len(pending)), key=lambda i: (order[cls(i, pending[i][0])], i))
        ids, freed = plan_drops(((i, message_size(pending[i][0])) for i in ranked),
                                len(pending), self._pending_bytes, self.cfg.max_rows,
                                self.cfg.max_memory_bytes)
        drop = set(ids)
        dropped: Counter[str] = Counter(pending[i][0].kind.label for i in drop)
        self._pending = [p for i, p in enumerate(pending) if i not in drop]
        self._pending_bytes -= freed
        self._count_drops(dropped, "memory_full")

    def _rollback(self) -> None:
        with contextlib.suppress(sqlite3.Error):  # no transaction was open
            self._conn().execute("ROLLBACK")

    # -- delivery ------------------------------------------------------------------

    def fetch_after(self, after_id: int, limit: int) -> list[Row]:
        """Up to `limit` rows with id > `after_id`, in id order."""
        with self._lock:
            # All of them are in the tail: their ids are in its span, or it holds every
            # stored row.
            if after_id + 1 >= self._tail_from or self._tail_live == self._rows:
                out: list[Row] = []
                if limit > 0:
                    skip = max(0, after_id + 1 - self._tail_from)
                    for r in islice(self._tail, skip, None):
                        if r is not None:
                            out.append(r)
                            if len(out) == limit:
                                break
                return out
            found = self._conn().execute(
                "SELECT id, kind, topic, payload, qos, retain FROM outbox WHERE id > ? "
                "ORDER BY id LIMIT ?", (after_id, limit)).fetchall()
        # tuple.__new__ is what Row._make uses, without a Python-level call per row; the
        # payload column only ever holds the bytes that submit wrote.
        kinds, new = _KINDS, tuple.__new__
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
                if _error_reason(exc) != "disk_full":
                    raise
                # Deletes go first: the reserve is given up for them (and the checkpoint
                # that frees the WAL), then they are tried once more.
                self._enter_tight("disk_full")
                self._release_reserve()
                self._checkpoint()
                n = self._delete(ids)
            wrote = False
            if self.tight:
                self._give_back_space()
                if self._pending or self._pending_seqs:
                    # The room the delete freed takes the backlog now, not at the next tick.
                    wrote = self._flush()
                    self.last_write_ok = wrote
                    if not wrote:
                        self._bound_pending()
                    self._log_drops(self.clock())
                    self._gauges()
        if wrote:
            for fn in self.on_written:
                fn()
        return n

    def _give_back_space(self) -> None:
        """Tight mode, after a delete: the pages it freed go back to the file system (so
        the reserve and the backlog find room) and the WAL is truncated."""
        db = self._conn()
        try:
            db.execute("PRAGMA incremental_vacuum").fetchall()
        except sqlite3.Error as exc:
            self.metrics.outbox_errors.labels(_error_reason(exc)).inc()
        self._checkpoint()

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
                sizes += db.execute(_DELETE_RUN_SQL, run).fetchall()
            db.execute("COMMIT")
            n, freed = len(sizes), sum([s for (s,) in sizes])
        except sqlite3.Error as exc:
            self._rollback()
            self.metrics.outbox_errors.labels(_error_reason(exc)).inc()
            raise
        finally:
            if relax:
                with contextlib.suppress(sqlite3.Error):
                    db.execute("PRAGMA synchronous = FULL")
        self._rows -= n
        self._bytes -= freed
        self._forget(ids)
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
                self.metrics.outbox_errors.labels(_error_reason(exc)).inc()
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
                               "disk_tight": self.tight}
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
                    self._count_drops(dropped, "shutdown")
                    self.log.error(kv("OUTBOX CLOSING WITH UNWRITTEN MESSAGES: dropped",
                                      dropped=len(self._pending),
                                      **{f"kind_{k}": n for k, n in sorted(dropped.items())},
                                      reason="shutdown", path=str(self.path)))
                    self._drops_unlogged.clear()
                    self._pending, self._pending_bytes = [], 0
                self._log_drops(float("inf"))
                with contextlib.suppress(sqlite3.Error):
                    self._db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
                self._db.close()
                self._db = None
