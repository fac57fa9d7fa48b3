"""The upstream's store thread: reads rows ahead from the outbox into the hand-over
queue the network thread publishes from, and deletes the rows the broker acknowledged.

No SQLite work runs on the MQTT network thread: it takes rows from `OutboxFeed.ready`
and puts each acknowledgement (row, accepted) on `OutboxFeed.acks`; this thread does
the reads and the deletes. The delivery contract is in `agent.delivery.upstream`.
"""

from __future__ import annotations

import contextlib
import queue
import sqlite3
import threading
import time
from collections import deque
from collections.abc import Callable

from agent.delivery.outbox import Outbox
from agent.delivery.outbox_file import Row
from agent.ops.logs import RateLimited
from agent.ops.metrics import Metrics
from agent.pipeline.messages import Kind

# Rows read ahead of the in-flight window: fewer, larger reads while draining a backlog.
PREFETCH_ROWS = 200
FETCH_RETRY_S = 0.1
REFUSED_RETRY_S = 5.0
GAUGE_EVERY_S = 0.5
MAINTAIN_EVERY_S = 60.0


class OutboxFeed:
    """Feeds the network thread from the outbox: at most max(PREFETCH_ROWS, 2 x window)
    rows ahead (at once when rows are waiting, so a backlog starts going out without a
    wait); deletes acknowledged rows in batches, one transaction per batch; offers
    refused rows again after `REFUSED_RETRY_S`; refreshes the outbox gauges and runs
    its maintenance."""

    def __init__(self, outbox: Outbox, metrics: Metrics, window: int, rl: RateLimited, *,
                 wake_network: Callable[[], None],
                 seconds_since_ack: Callable[[], float]) -> None:
        self.outbox = outbox
        self.metrics = metrics
        self.window = window
        self._rl = rl
        self._wake_network = wake_network
        self._seconds_since_ack = seconds_since_ack
        self._published = {k: metrics.published.labels(k.label) for k in Kind}
        # Hand-over between the threads (deque and SimpleQueue are thread-safe):
        self.ready: deque[Row] = deque()
        # Acknowledged rows for the store thread; `None` only wakes it (new rows written).
        self.acks: queue.SimpleQueue[tuple[Row, bool] | None] = queue.SimpleQueue()
        outbox.on_written.append(lambda: self.acks.put(None))
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="watchkeep-upstream-store",
                                        daemon=True)

    def start(self) -> None:
        self._thread.start()

    def stop(self, timeout_s: float) -> None:
        """Delete what was acknowledged so far, then end the thread."""
        self._stop.set()
        self._thread.join(timeout_s)

    def _run(self) -> None:
        cursor = 0
        handed: set[int] = set()
        to_delete: list[Row] = []
        rescan_at: float | None = None
        next_gauges = next_maintain = 0.0
        while True:
            stopping = self._stop.is_set()
            # Block for acknowledgements only when there is nothing to read ahead: with a
            # backlog at start-up the first rows are handed over at once, not after a wait.
            block = not stopping and not self._can_refill(cursor, handed)
            refused = self._take_acks(to_delete, handed, block=block)
            if refused:
                rescan_at = rescan_at or time.monotonic() + REFUSED_RETRY_S
            if to_delete:
                to_delete = self._delete(to_delete)
            if stopping:
                break
            if rescan_at is not None and time.monotonic() >= rescan_at:
                cursor, rescan_at = 0, None  # refused rows are still there: offer them again
            cursor = self._refill(cursor, handed)
            now = time.monotonic()
            if now >= next_gauges:
                next_gauges = now + GAUGE_EVERY_S
                self.metrics.since_ack.set(self._seconds_since_ack())
                with contextlib.suppress(sqlite3.Error):
                    self.outbox.update_gauges()
            if now >= next_maintain:
                next_maintain = now + MAINTAIN_EVERY_S
                self.outbox.maintain()

    def _delete(self, to_delete: list[Row]) -> list[Row]:
        """Delete acknowledged rows; returns the ones still to delete (all of them when
        the delete failed: counted by the outbox, kept and retried)."""
        try:
            self.outbox.delete([r.id for r in to_delete])
        except sqlite3.Error as exc:
            self._rl.warning("delete", "outbox delete failed; retrying", error=str(exc))
            return to_delete
        for r in to_delete:
            self._published[r.kind].inc()
        return []

    def _take_acks(self, to_delete: list[Row], handed: set[int], block: bool) -> bool:
        refused = False
        try:
            item = self.acks.get(timeout=0.1) if block else self.acks.get_nowait()
            while True:
                if item is not None:
                    row, ok = item
                    handed.discard(row.id)
                    if ok:
                        to_delete.append(row)
                    else:
                        refused = True
                item = self.acks.get_nowait()
        except queue.Empty:
            pass
        return refused

    def _room(self, handed: set[int]) -> int:
        return max(PREFETCH_ROWS, 2 * self.window) - len(handed)

    def _can_refill(self, cursor: int, handed: set[int]) -> bool:
        return self._room(handed) > 0 and self.outbox.max_id > cursor

    def _refill(self, cursor: int, handed: set[int]) -> int:
        room = self._room(handed)
        top = self.outbox.max_id
        if room <= 0 or top <= cursor:
            return cursor
        try:
            rows = self.outbox.fetch_after(cursor, room)
        except sqlite3.Error as exc:
            self._rl.warning("fetch", "outbox read failed; retrying", error=str(exc))
            # The loop does not block while rows wait to be read: pause here instead of
            # retrying a failing read in a tight loop.
            self._stop.wait(FETCH_RETRY_S)
            return cursor
        for r in rows:
            if r.id not in handed:
                handed.add(r.id)
                self.ready.append(r)
            cursor = max(cursor, r.id)
        if rows:
            self._wake_network()
        if len(rows) < room:
            cursor = max(cursor, top)  # everything up to `top` has been seen
        return cursor
