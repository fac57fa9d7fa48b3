"""The channels of one rate of an asset: a preallocated 2-D store (a row per channel,
each row holding its pending samples in time order between its own `lo` and `hi`),
so closing a window is a few numpy operations per rate group rather than several per
channel: the samples below the window's end are counted for all rows at once and
copied out in one gather. A window's samples come out as [rows, samples] blocks that
the feature pass stacks across assets; per-channel arrays are views made on demand.
Pure.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

_AR = np.arange(1024, dtype=np.int64)


def _arange(n: int) -> np.ndarray:
    """0..n-1 (a view of one shared array, grown when needed)."""
    global _AR
    if n > _AR.size:
        _AR = np.arange(max(n, 2 * _AR.size), dtype=np.int64)
    return _AR[:n]


class _Group:
    """The channels of one rate: one row each in a 2-D store of timestamps and values.

    Row r holds its pending samples in `[lo[r], hi[r])`; rows fill and drain on their
    own. When a row reaches the end of the store the rows are compacted to the left,
    and the store doubles when that is not enough room.
    """

    __slots__ = ("bound", "chans", "expected", "hi", "keep_times", "lo", "near", "pos", "rows",
                 "ts", "vals", "views")

    def __init__(self, chans: tuple[int, ...], expected: float, pos: int = 0) -> None:
        k = len(chans)
        self.pos = pos  # its index in its assembler's groups (a closed window's block)
        cap = max(16, int(2 * expected) + 16)
        self.chans = chans
        self.expected = expected
        # How many samples per row one gather looks at before falling back to a search
        # (`close_due`), and the joint cut counts at most (`counting.row_counts`).
        self.bound = int(1.25 * expected) + 16
        # Where the joint cut looks for a window's end in a row of a sensor at its rate
        # (`counting.band`): a sixteenth of a window and 8 samples either side.
        e = int(expected)
        self.near = (max(0, e - 8 - e // 16), e + 8 + e // 16)
        self.ts = np.empty((k, cap))
        self.vals = np.empty((k, cap))
        self.lo = [0] * k
        self.hi = [0] * k
        # Whether windows cut together with others (`close_many`) carry these samples'
        # timestamps (`WindowAssembler.keep_times_of`).
        self.keep_times = True
        self.rows = np.arange(k, dtype=np.int64)[:, None]
        # (values, times) of samples lo0..lo0 + m of every row, by (lo0, m), as views of
        # the store (`span`); dropped when the store is replaced.
        self.views: dict[tuple[int, int], tuple[np.ndarray, np.ndarray]] = {}

    def span(self, lo0: int, m: int) -> tuple[np.ndarray, np.ndarray]:
        """(values, times) of samples lo0..lo0 + m of every row: views of the store,
        kept for the next window cut at the same place (a steady sensor's windows
        start at a few places of the store, which compacts as it fills)."""
        got = (self.vals[:, lo0:lo0 + m], self.ts[:, lo0:lo0 + m])
        if len(self.views) >= 8:
            self.views.clear()
        self.views[(lo0, m)] = got
        return got

    def room(self, r: int, n: int) -> int:
        """Make room for `n` more samples in row r; returns where they go."""
        cap = self.ts.shape[1]
        used = [h - lo for lo, h in zip(self.lo, self.hi, strict=True)]
        for i, (lo, u) in enumerate(zip(self.lo, used, strict=True)):
            if lo and u:
                self.ts[i, :u] = self.ts[i, lo:lo + u]  # numpy copies overlapping slices right
                self.vals[i, :u] = self.vals[i, lo:lo + u]
        self.lo = [0] * len(used)
        self.hi = used
        need = used[r] + n
        if need > cap:
            new_cap = max(2 * cap, need)
            top = max(used)
            ts = np.empty((len(used), new_cap))
            vals = np.empty((len(used), new_cap))
            ts[:, :top] = self.ts[:, :top]
            vals[:, :top] = self.vals[:, :top]
            self.ts, self.vals = ts, vals
            self.views.clear()
        return used[r]

    def pending(self) -> int:
        return sum(h - lo for lo, h in zip(self.lo, self.hi, strict=True))

    def first(self) -> float | None:
        firsts = [float(self.ts[r, lo]) for r, (lo, h) in enumerate(zip(self.lo, self.hi,
                                                                        strict=True)) if h > lo]
        return min(firsts) if firsts else None

    def count_below(self, t: float) -> list[int]:
        """Per row, how many pending samples are earlier than `t` (rows are sorted)."""
        return [int(self.ts[r, lo:h].searchsorted(t)) if h > lo else 0
                for r, (lo, h) in enumerate(zip(self.lo, self.hi, strict=True))]

    def cut(self, end: float, next_start: float | None
            ) -> tuple[np.ndarray, np.ndarray, list[int], list[int]]:
        """The samples before `end` of every row, copied out: (timestamps, values, counts,
        per row how many are before `next_start`, which are dropped once the window
        is out; `next_start` None: the counted ones)."""
        lo, hi = self.lo, self.hi
        lo0, hi0 = min(lo), max(hi)
        if lo0 == max(lo) and hi0 == min(hi) and hi0 - lo0 <= self.bound:
            # Rows in step (the usual case): plain slices, no gather.
            t = self.ts[:, lo0:hi0]
            if hi0 > lo0 and t[:, -1].max() < end:  # all of it is in the window
                counts = [hi0 - lo0] * len(lo)
                mc = hi0 - lo0
            else:
                counts = (t < end).sum(axis=1).tolist()
                mc = max(counts)
            nxt = counts if next_start is None else (t < next_start).sum(axis=1).tolist()
            return (self.ts[:, lo0:lo0 + mc].copy(), self.vals[:, lo0:lo0 + mc].copy(),
                    counts, nxt)
        lo_a = np.array(lo, dtype=np.int64)
        n = np.array(hi, dtype=np.int64) - lo_a
        m = min(int(n.max()), self.bound)
        cap = self.ts.shape[1]
        ar = _arange(m)
        idx = lo_a[:, None] + ar
        np.minimum(idx, cap - 1, out=idx)
        t = self.ts[self.rows, idx]
        valid = ar < n[:, None]
        c_a = ((t < end) & valid).sum(axis=1)
        n_a = None if next_start is None else ((t < next_start) & valid).sum(axis=1)
        if m and np.any((c_a == m) & (n > m)):
            # A row with more samples than one gather looks at (a sensor sending faster
            # than its configured rate): search the rows instead.
            c_a = np.array(self.count_below(end), dtype=np.int64)
            if next_start is not None:
                n_a = np.array(self.count_below(next_start), dtype=np.int64)
            m = int(c_a.max())
            ar = _arange(m)
            idx = lo_a[:, None] + ar
            np.minimum(idx, cap - 1, out=idx)
            t = self.ts[self.rows, idx]
        counts = c_a.tolist()
        mc = max(counts) if counts else 0
        if mc < t.shape[1]:
            idx = idx[:, :mc]
            t = t[:, :mc]
        return t, self.vals[self.rows, idx], counts, counts if n_a is None else n_a.tolist()

    def drop(self, counts: Sequence[int]) -> None:
        self.lo = [lo + c for lo, c in zip(self.lo, counts, strict=True)]

    def sort_row(self, r: int) -> None:
        lo, h = self.lo[r], self.hi[r]
        t = self.ts[r, lo:h]
        if t.size > 1 and np.any(t[1:] < t[:-1]):
            order = np.argsort(t, kind="stable")
            self.ts[r, lo:h] = t[order]
            self.vals[r, lo:h] = self.vals[r, lo:h][order]
