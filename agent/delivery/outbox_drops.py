"""The outbox's drop policy: which rows a full outbox (or a full memory backlog) gives
up, and how every drop is counted and logged.

Rows are given up in priority order (`DROP_ORDER`), oldest first within a class, and
no more than the bounds need; each drop is counted by kind
(`watchkeep_outbox_dropped_total`) and by reason
(`watchkeep_outbox_dropped_by_reason_total`).
"""

from __future__ import annotations

import logging
import sqlite3
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence

from agent.config.load import OutboxConfig
from agent.delivery.outbox_file import message_size
from agent.ops.logs import kv
from agent.ops.metrics import Metrics
from agent.pipeline.messages import Kind, OutMessage

# Drop classes in the order a full outbox gives them up: score telemetry, retained
# states a newer state of the same key supersedes, non-anomaly events, the current
# (unsuperseded) states, anomaly events last.
DROP_ORDER = ("score", "state_superseded", "event", "state_current", "anomaly")

CLASS_SQL = {
    "score": f"kind = {int(Kind.SCORE)}",
    "state_superseded": f"kind = {int(Kind.STATE)} AND key IS NOT NULL AND EXISTS "
                        "(SELECT 1 FROM outbox n WHERE n.key = outbox.key AND n.id > outbox.id)",
    "event": f"kind = {int(Kind.EVENT)}",
    "state_current": f"kind = {int(Kind.STATE)}",
    "anomaly": f"kind = {int(Kind.ANOMALY)}",
}

DROP_LOG_INTERVAL_S = 10.0
# Reasons of `watchkeep_outbox_dropped_by_reason_total`.
DROP_REASONS = ("outbox_full", "memory_full", "shutdown")


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


def drop_to_bounds(db: sqlite3.Connection, rows: int, nbytes: int, max_rows: int,
                   max_bytes: int, dropped_ids: list[int]) -> tuple[int, int, Counter[str]]:
    """Inside the caller's transaction: delete stored rows by the drop policy until
    `rows` and `nbytes` are within bounds. Appends the ids to `dropped_ids`; returns
    the new (rows, bytes) and the drops by kind."""
    dropped: Counter[str] = Counter()
    for cls in DROP_ORDER:
        while rows > max_rows or nbytes > max_bytes:
            chunk = db.execute(f"SELECT id, size, kind FROM outbox WHERE {CLASS_SQL[cls]} "
                               "ORDER BY id LIMIT 512").fetchall()
            if not chunk:
                break
            ids, freed = plan_drops(((r[0], r[1]) for r in chunk), rows, nbytes,
                                    max_rows, max_bytes)
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


def backlog_drops(pending: Sequence[tuple[OutMessage, float]], pending_bytes: int,
                  max_rows: int, max_bytes: int) -> tuple[set[int], int]:
    """Positions in the in-memory backlog to drop, by the same policy, so that it holds
    at most `max_rows` rows and `max_bytes` bytes; and the bytes they free."""
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
                            len(pending), pending_bytes, max_rows, max_bytes)
    return set(ids), freed


class DropLog:
    """Counts every drop by kind and reason at once; logs them at once the first time,
    then summed at most every `DROP_LOG_INTERVAL_S`."""

    def __init__(self, metrics: Metrics, logger: logging.Logger) -> None:
        self.log = logger
        self.unlogged: Counter[str] = Counter()
        self._logged_at = -float("inf")
        self._by_kind = {k.label: metrics.outbox_drops.labels(k.label) for k in Kind}
        self._by_reason = {r: metrics.outbox_drop_reasons.labels(r) for r in DROP_REASONS}

    def count(self, dropped: Mapping[str, int], reason: str) -> None:
        for label, n in dropped.items():
            self._by_kind[label].inc(n)
        total = sum(dropped.values())
        if total:
            self._by_reason[reason].inc(total)
            # outbox_full keeps the plain kind as its log key (as before); the others
            # carry their reason: memory_full_anomaly=3.
            pre = "" if reason == "outbox_full" else f"{reason}_"
            self.unlogged.update({f"{pre}{k}": n for k, n in dropped.items()})

    def log_due(self, now: float, cfg: OutboxConfig) -> None:
        """Log the drops not logged yet, if the last log was long enough ago."""
        if not self.unlogged or now - self._logged_at < DROP_LOG_INTERVAL_S:
            return
        self._logged_at = now
        counts = dict(sorted(self.unlogged.items()))
        self.unlogged.clear()
        self.log.warning(kv("outbox full: messages dropped", **counts,
                            max_rows=cfg.max_rows, max_bytes=cfg.max_bytes,
                            max_memory_bytes=cfg.max_memory_bytes))
