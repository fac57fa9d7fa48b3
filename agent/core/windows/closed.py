"""A closed window: per rate group a block of [channels, samples], per channel views.

`WindowAssembler.close_due` and the joint cut (`batch.close_many`) make them; the
pipeline reads them. Pure.
"""

from __future__ import annotations

from collections.abc import Sequence
from itertools import repeat
from operator import attrgetter, is_

import numpy as np

_EMPTY = np.empty(0, dtype=np.float64)


class Block:
    """The samples of one rate group of channels in one window: row r holds channel
    `chans[r]`, its first `counts[r]` entries valid (the rest is padding)."""

    __slots__ = ("_timestamps", "_values", "base", "chans", "counts", "row0", "tbase",
                 "uniform")

    def __init__(self, chans: tuple[int, ...], timestamps: np.ndarray, values: np.ndarray,
                 counts: Sequence[int], uniform: bool | None = None,
                 base: np.ndarray | None = None, row0: int = 0,
                 tbase: np.ndarray | None = None) -> None:
        self.chans = chans
        self._timestamps: np.ndarray | None = timestamps
        self._values: np.ndarray | None = values
        self.counts = counts
        # When `values` is rows row0.. of a matrix cut for many assets at once: that
        # matrix (the feature pass takes it whole instead of stacking the blocks again).
        self.base = base
        self.tbase = tbase  # the same for `timestamps`
        self.row0 = row0
        # Every row full: the block is a plain [rows, samples] matrix.
        self.uniform = (not counts or min(counts) == values.shape[1]) if uniform is None \
            else uniform

    @classmethod
    def rows_of(cls, base: np.ndarray, row0: int, chans: tuple[int, ...],
                counts: Sequence[int], tbase: np.ndarray | None = None) -> Block:
        """Rows row0.. of `base` (one per channel), every row full, their timestamps the
        same rows of `tbase` (None: not kept, NaN): the joint cut's usual block, its
        views made when first read."""
        b = cls.__new__(cls)
        b.chans = chans
        b._timestamps = b._values = None
        b.tbase = tbase
        b.counts = counts
        b.base = base
        b.row0 = row0
        b.uniform = True
        return b

    @property
    def values(self) -> np.ndarray:
        v = self._values
        if v is None:
            assert self.base is not None
            v = self._values = self.base[self.row0:self.row0 + len(self.chans)]
        return v

    @property
    def timestamps(self) -> np.ndarray:
        t = self._timestamps
        if t is None:
            tb = self.tbase
            t = self._timestamps = no_times(len(self.chans), self.values.shape[1]) \
                if tb is None else tb[self.row0:self.row0 + len(self.chans)]
        return t


_NO_TIMES: dict[tuple[int, int], np.ndarray] = {}


def no_times(n: int, m: int) -> np.ndarray:
    """The timestamps of a block whose assembler does not keep them: NaN (read-only,
    one array per shape)."""
    got = _NO_TIMES.get((n, m))
    if got is None:
        if len(_NO_TIMES) > 64:
            _NO_TIMES.clear()
        got = _NO_TIMES[(n, m)] = np.broadcast_to(np.nan, (n, m))
    return got


class RowsCut:
    """Windows the joint cut made alike (`steady.close_whole`): window j's block b is
    rows `j * rows[b]` .. of `bases[b]`, every row full (`counts[b]`), its times the same
    rows of `tbases[b]` (None: not kept); `n` windows, every one of them its window j
    (`ClosedWindow.cut`). The stages that take a tick's windows as rows of matrices ask
    this instead of every block."""

    __slots__ = ("bases", "counts", "n", "rows", "tbases")

    def __init__(self, bases: tuple[np.ndarray, ...], tbases: tuple[np.ndarray | None, ...],
                 rows: tuple[int, ...], n: int) -> None:
        self.bases, self.tbases, self.rows, self.n = bases, tbases, rows, n
        self.counts = tuple((b.shape[1],) * r for b, r in zip(bases, rows, strict=True))


class ClosedWindow:
    """One closed window of one asset: per channel the samples inside it.

    Built either from per-channel arrays or from rate-group `blocks`, or as window j of
    a `RowsCut` (`cut`, `j`: its blocks are made when first read); `values`,
    `timestamps` and `coverage` are per-channel tuples in channel order either way.
    """

    __slots__ = ("_blocks", "_cov", "_ts", "_vals", "block_chans", "complete", "cut", "end",
                 "expected", "j", "min_coverage", "start")

    def __init__(self, start: float, end: float, values: Sequence[np.ndarray] | None,
                 timestamps: Sequence[np.ndarray] | None, coverage: Sequence[float] | None,
                 complete: bool, *, blocks: tuple[Block, ...] = (),
                 expected: tuple[float, ...] = (), min_coverage: float | None = None
                 ) -> None:
        self.start = start
        self.end = end
        self.complete = complete
        self._blocks: tuple[Block, ...] | None = blocks
        self.cut: RowsCut | None = None
        self.j = 0
        self.block_chans: tuple[tuple[int, ...], ...] = ()  # of a RowsCut window
        self.expected = expected
        self._vals = tuple(values) if values is not None else None
        self._ts = tuple(timestamps) if timestamps is not None else None
        self._cov = tuple(coverage) if coverage is not None else None
        # The lowest channel's coverage (1.0 without channels).
        self.min_coverage = min(self.coverage, default=1.0) if min_coverage is None \
            else min_coverage

    @classmethod
    def of_blocks(cls, start: float, end: float, complete: bool, blocks: tuple[Block, ...],
                  expected: tuple[float, ...], min_coverage: float) -> ClosedWindow:
        """`ClosedWindow(start, end, None, None, None, complete, blocks=blocks,
        expected=expected, min_coverage=min_coverage)`, made the cheaper way (the joint
        cut makes one per asset and tick)."""
        w = cls.of_cut(start, end, complete, None, 0, (), expected, min_coverage)
        w._blocks = blocks
        return w

    @classmethod
    def of_cut(cls, start: float, end: float, complete: bool, cut: RowsCut | None, j: int,
               chans: tuple[tuple[int, ...], ...], expected: tuple[float, ...],
               min_coverage: float) -> ClosedWindow:
        """Window j of `cut`, block b holding the channels `chans[b]` (its blocks made
        when first read, as `Block.rows_of` of the cut's rows; `of_blocks` gives None
        and sets the blocks)."""
        w = cls.__new__(cls)
        w.start = start
        w.end = end
        w.complete = complete
        w._blocks = None
        w.cut = cut
        w.j = j
        w.block_chans = chans
        w.expected = expected
        w._vals = w._ts = w._cov = None
        w.min_coverage = min_coverage
        return w

    @property
    def blocks(self) -> tuple[Block, ...]:
        """Per rate group a block of [channels, samples]."""
        got = self._blocks
        if got is None:
            cut, j = self.cut, self.j
            assert cut is not None
            got = self._blocks = tuple(
                Block.rows_of(base, j * r, chans, counts, tbase)
                for base, tbase, r, counts, chans in zip(cut.bases, cut.tbases, cut.rows,
                                                         cut.counts, self.block_chans, strict=True))
        return got

    def _split(self) -> None:
        n = len(self.expected)
        vals: list[np.ndarray] = [_EMPTY] * n
        tss: list[np.ndarray] = [_EMPTY] * n
        for b in self.blocks:
            for r, (c, k) in enumerate(zip(b.chans, b.counts, strict=True)):
                vals[c] = b.values[r, :k]
                tss[c] = b.timestamps[r, :k]
        self._vals, self._ts = tuple(vals), tuple(tss)

    @property
    def values(self) -> tuple[np.ndarray, ...]:
        if self._vals is None:
            self._split()
        assert self._vals is not None
        return self._vals

    @property
    def timestamps(self) -> tuple[np.ndarray, ...]:
        if self._ts is None:
            self._split()
        assert self._ts is not None
        return self._ts

    @property
    def coverage(self) -> tuple[float, ...]:
        if self._cov is None:
            cov = [1.0] * len(self.expected)
            for b in self.blocks:
                for c, k in zip(b.chans, b.counts, strict=True):
                    e = self.expected[c]
                    cov[c] = k / e if e else 1.0
            self._cov = tuple(cov)
        return self._cov

    def channel(self, ci: int, at: tuple[int, int]) -> np.ndarray:
        """Channel `ci`'s samples (`values[ci]` without splitting every channel); `at`
        is its (block, row) in `blocks` (`WindowAssembler.channel_rows`)."""
        if not self.blocks:
            return self.values[ci]
        blk = self.blocks[at[0]]
        return blk.values[at[1], :blk.counts[at[1]]]

    def __repr__(self) -> str:
        return f"ClosedWindow(start={self.start!r}, end={self.end!r}, complete={self.complete})"


_CUT, _J = attrgetter("cut"), attrgetter("j")


def whole_cut(windows: Sequence[ClosedWindow]) -> RowsCut | None:
    """The `RowsCut` that `windows` are, every one of its windows in order (window j
    its window j), else None. Asked of all windows at once (attribute reads mapped)."""
    cut = windows[0].cut
    if cut is None or cut.n != len(windows) \
            or not all(map(is_, map(_CUT, windows), repeat(cut))) \
            or list(map(_J, windows)) != list(range(cut.n)):
        return None
    return cut
