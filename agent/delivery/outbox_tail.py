"""The newest committed outbox rows, kept in memory so an upstream that keeps up reads
what was just written without a query (the file stays the only record)."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from itertools import islice

from agent.delivery.outbox_file import Row
from agent.pipeline.messages import OutMessage

# Committed rows kept in memory for `fetch_after`: the newest ids. They hold the
# messages' own payload objects, no copies, and let go of a row once it is delivered.
# 1,024 rows are several ticks of a 200-asset gateway and many in-flight windows.
TAIL_ROWS = 1024


class Tail:
    """`rows[k]` is the committed row with id `first + k`, or None once it left the file
    (delete, drop); always `first + len(rows) == max_id + 1`, so every stored row with
    id >= `first` is in it; `live` counts its rows (when it equals the stored rows,
    every stored row is in it). Not thread-safe: the outbox's lock guards it."""

    __slots__ = ("first", "live", "rows")

    def __init__(self, first: int) -> None:
        self.rows: list[Row | None] = []
        self.first = first
        self.live = 0

    def extend(self, first: int, last: int, batch: Sequence[tuple[OutMessage, float]],
               dropped_ids: list[int]) -> None:
        """After a commit: the rows `first..last` just written (`batch`, in order), less
        the ones the bounds dropped in the same transaction."""
        if first <= last and first != self.first + len(self.rows):
            # ids did not follow on: start afresh
            self.rows, self.first, self.live = [], first, 0
        tail = self.rows
        new = tuple.__new__
        tail += [new(Row, (i, m.kind, m.topic, m.payload, m.qos, bool(m.retain)))
                 for i, (m, _) in zip(range(first, last + 1), batch, strict=True)]
        self.live += last - first + 1 if first <= last else 0
        self.forget(dropped_ids)
        cut = len(tail) - TAIL_ROWS
        if cut > 0:
            self.live -= cut - tail[:cut].count(None)
            del tail[:cut]
            self.first += cut

    def forget(self, ids: Iterable[int]) -> None:
        """Rows gone from the file are gone from the tail."""
        tail, base = self.rows, self.first
        n = len(tail)
        for i in ids:
            k = i - base
            if 0 <= k < n and tail[k] is not None:
                tail[k] = None
                self.live -= 1

    def after(self, after_id: int, limit: int, stored_rows: int) -> list[Row] | None:
        """Up to `limit` rows with id > `after_id`, in id order, when every stored row
        with such an id is here (their ids are in the tail's span, or it holds all
        `stored_rows`); None when the file must be read."""
        if after_id + 1 < self.first and self.live != stored_rows:
            return None
        out: list[Row] = []
        if limit > 0:
            skip = max(0, after_id + 1 - self.first)
            for r in islice(self.rows, skip, None):
                if r is not None:
                    out.append(r)
                    if len(out) == limit:
                        break
        return out
