"""The outbox's SQLite file: its schema, the statements that write and delete rows, the
row type the delivery side reads, opening the file and moving a corrupt one aside.

The queue's contract (transactions, bounds, a full disk) is in `agent.delivery.outbox`.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterable
from datetime import UTC, datetime
from pathlib import Path
from typing import NamedTuple

from agent.config.load import Synchronous
from agent.errors import OutboxError
from agent.pipeline.messages import Kind, OutMessage

SCHEMA_VERSION = 1

SCHEMA = """
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


class Row(NamedTuple):
    """One stored message, as the upstream side publishes it (a tuple: cheap to build for
    every row fetched)."""

    id: int
    kind: Kind
    topic: str
    payload: bytes
    qos: int
    retain: bool


KINDS = {int(k): k for k in Kind}
# Multi-row INSERTs: one statement per chunk instead of one per row (executemany) saves
# a third of the insert time, mostly the AUTOINCREMENT bookkeeping each statement does.
# Chunks are powers of two up to 64 rows, so a few statements are prepared once and
# cached; 64 rows x 8 columns stay within the oldest SQLite variable limit (999).
INSERT_CHUNKS = (64, 32, 16, 8, 4, 2, 1)
INSERT_SQL = {n: "INSERT INTO outbox (created, kind, topic, payload, qos, retain, key, size) "
                 "VALUES " + ", ".join(["(?, ?, ?, ?, ?, ?, ?, ?)"] * n)
              for n in INSERT_CHUNKS}
DELETE_RUN_SQL = "DELETE FROM outbox WHERE id BETWEEN ? AND ? RETURNING size"


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


def corrupt_name(path: Path, now: float) -> Path:
    stamp = datetime.fromtimestamp(now, UTC).strftime("%Y%m%dT%H%M%SZ")
    return path.with_name(f"{path.name}.corrupt-{stamp}")


def error_reason(exc: sqlite3.Error) -> str:
    """The `reason` label of `watchkeep_outbox_write_errors_total` for a SQLite error."""
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


def check_existing(path: Path) -> str | None:
    """Why the existing file cannot be used (corrupt), or None. Raises OutboxError for a
    file a newer watchkeep wrote."""
    if not path.exists():
        return None
    try:
        db = sqlite3.connect(path, isolation_level=None)
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
        raise OutboxError(f"outbox {path}: schema version {version} was written by a "
                          f"newer watchkeep (this one knows {SCHEMA_VERSION}); refusing "
                          f"to touch it")
    return None


def move_aside(path: Path, now: float) -> Path:
    """Rename the file and its -wal and -shm to `corrupt_name(path, now)`; returns it."""
    dest = corrupt_name(path, now)
    for suffix in ("", "-wal", "-shm"):
        src = Path(f"{path}{suffix}")
        if src.exists():
            src.replace(Path(f"{dest}{suffix}"))
    return dest


def connect(path: Path, synchronous: Synchronous) -> sqlite3.Connection:
    """The one connection: WAL, `synchronous`, the schema, its version recorded."""
    new = not path.exists() or path.stat().st_size == 0
    # isolation_level=None: we issue BEGIN IMMEDIATE ourselves; check_same_thread
    # off because the one connection is shared behind the outbox's lock.
    db = sqlite3.connect(path, isolation_level=None, check_same_thread=False,
                         timeout=5.0)
    if new:
        db.execute("PRAGMA auto_vacuum = INCREMENTAL")  # only takes effect before tables
    db.execute("PRAGMA journal_mode = WAL")
    db.execute(f"PRAGMA synchronous = {synchronous.value}")
    db.execute("PRAGMA journal_size_limit = 4194304")
    # Some builds (Debian's) default to secure_delete=ON, which writes every freed page
    # (zeroed) again: delivered rows are deleted all the time, so that is ~10% more WAL
    # I/O per tick. FAST still zeroes deleted content where that costs no extra I/O.
    # Not a durability setting: commits are fsynced exactly as before.
    db.execute("PRAGMA secure_delete = FAST")
    db.executescript(SCHEMA)
    version = db.execute("PRAGMA user_version").fetchone()[0]
    if version < SCHEMA_VERSION:
        db.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
    return db
