"""Counting the joint cut's rows (agent/core/windows/batch.py): how many samples each
row of each item holds before its window's end, and for a hopping window before the
next window's start, for all items at once. Each row is counted in a band around where
a sensor at its rate puts the end (`band`), again from the first sample when the end
lies outside it. Pure.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from agent.core.windows.assembler import WindowAssembler
from agent.core.windows.store import _arange, _Group

# One item of the joint cut: (position in `close_many`'s list, the assembler, the
# window's start and end, per rate group (the group, its first pending index, how many
# samples each of its rows holds)).
Item = tuple[int, WindowAssembler, float, float, list[tuple[_Group, int, int]]]


# Per hopping item (by position): per group, how many samples its rows drop once the
# window is out (those before the next window's start).
Drops = dict[int, list[int]]


# One group of an item to count (`row_counts`): the item's position, the group's
# index, the group, its first pending index, where its band starts in the pending
# samples, the window's end, the next window's start (the end when tumbling), whether
# the band ends with the most pending in a row.
_Member = tuple[int, int, _Group, int, int, float, float, bool]


@dataclass(slots=True)
class Counted:
    """What `row_counts` found, per item by position: per group, how many samples
    each row holds before the window's end (`rows`; `_NONE` for a group without pending
    samples), the item's spans with that number when every row holds it, else 0
    (`cut`); per hopping item, per group, how many each row drops (those before the
    next window's start) when alike, else -1 (`drops`); the items with a 0 or -1 there
    (`uneven`), and those the band could not count (`unsure`: their counts are not to
    be used)."""

    rows: dict[int, list[list[int]]] = field(default_factory=dict)
    cut: dict[int, list[tuple[_Group, int, int]]] = field(default_factory=dict)
    drops: Drops = field(default_factory=dict)
    uneven: set[int] = field(default_factory=set)
    unsure: set[int] = field(default_factory=set)

    def note(self, members: list[_Member], w: int, below: list[int], before: list[int],
             known: list[bool]) -> None:
        """The counts of `row_counts`' members of band width w, row by row: `below`
        (before the end), `before` (before the next window's start), whether `known`."""
        rows_of, cut, drops, uneven, unsure = (self.rows, self.cut, self.drops,
                                               self.uneven, self.unsure)
        off = 0
        for i, gi, g, lo0, s0, _, _, to_end in members:
            n = len(g.chans)
            row = rows_of[i][gi] = below[off:off + n]
            if (not to_end and s0 + w in row) or (s0 and False in known[off:off + n]):
                unsure.add(i)
            c = row[0]
            if c and row.count(c) == n:
                cut[i][gi] = (g, lo0, c)
            else:
                uneven.add(i)
            if i in drops:
                d = before[off:off + n]
                if d.count(d[0]) == n:
                    drops[i][gi] = d[0]
                else:
                    uneven.add(i)
            off += n

    def merge(self, again: Counted) -> None:
        """`again`, a count of this one's unsure items, in place of theirs."""
        self.uneven -= self.unsure
        self.uneven |= again.uneven
        self.unsure = again.unsure
        self.rows.update(again.rows)
        self.cut.update(again.cut)
        self.drops.update(again.drops)


def band(g: _Group, m: int, wide: bool) -> tuple[int, int]:
    """Where `row_counts` looks in a group's m pending samples per row: [s0, top).
    A tumbling window of a sensor at its rate ends near `expected` samples in, so a
    band around that holds the end (`_Group.near`); a hopping one also needs the next
    window's start, and a window whose end the band missed is counted again (`wide`):
    from the first sample, at most `bound` samples (a whole window with room for a
    faster sensor)."""
    if wide:
        return 0, min(m, g.bound)
    s0, top = g.near
    if m >= top:
        return s0, top
    e = int(g.expected)  # fewer pending than the band's top
    return max(0, min(m, e) - 8 - e // 16), m


# A group's counts while it has no pending samples (`row_counts`; shared: read only).
_NONE: list[int] = []


def row_counts(items: list[Item], wide: bool = False) -> Counted:
    """How many samples each row of each item holds before the window's end, and for
    a hopping window before the next window's start (`Counted`). Counted for all
    groups of one band width in one step, within a band of each row (`band`; `wide`:
    from the first sample); an item whose count the band cannot tell (a row's end
    outside it: samples missing, a sensor far off its rate) is `unsure`."""
    by_w: dict[int, list[_Member]] = {}  # by band width
    got = Counted()
    rows_of, cut, drops, uneven = got.rows, got.cut, got.drops, got.uneven
    hopping = False
    for i, a, _, end, spans in items:
        rows_of[i] = [_NONE] * len(spans)
        cut[i] = list(spans)
        after = end
        if a._span_k != 1:
            hopping = True
            drops[i] = [-1] * len(spans)
            after = (a._next_k + 1) * a.cfg.hop_s  # type: ignore[operator]
        for gi, (g, lo0, m) in enumerate(spans):
            if m:
                s0, top = band(g, m, wide or i in drops)
                by_w.setdefault(top - s0, []).append(
                    (i, gi, g, lo0, s0, end, after, top == m))
            else:
                uneven.add(i)
    for w, members in by_w.items():
        tm = np.concatenate([mb[2].ts[:, mb[3] + mb[4]:mb[3] + mb[4] + w] for mb in members])
        rows = [len(mb[2].chans) for mb in members]
        s0s = np.repeat([mb[4] for mb in members], rows)
        # Rows holding fewer samples than their group's most: their band ends early.
        held = _held(members, rows, w)
        lt = tm < np.repeat([mb[5] for mb in members], rows)[:, None]
        b = (lt if held is None else lt & held).sum(axis=1)
        # A row's count is known when its band holds its end: some of the band before
        # the end unless the band starts with the pending samples, some at or after it
        # unless the band ends with them.
        known = ((b > 0) | (s0s == 0)).tolist()
        below = (b + s0s).tolist()
        before = below
        if hopping:
            lt = tm < np.repeat([mb[6] for mb in members], rows)[:, None]
            before = (lt if held is None else lt & held).sum(axis=1).tolist()
        got.note(members, w, below, before, known)
    return got


def _held(members: list[_Member], rows: list[int], w: int) -> np.ndarray | None:
    """Which places of `row_counts`' bands (w wide, one row per group row) hold a
    pending sample, when a group's rows hold different numbers; else None (all do)."""
    if all(g.hi.count(g.hi[0]) == len(g.hi) for _, _, g, *_ in members):
        return None
    ends = np.array([h for mb in members for h in mb[2].hi], dtype=np.int64)
    ends -= np.repeat([mb[3] + mb[4] for mb in members], rows)  # from each band's start
    return _arange(w)[None, :] < ends[:, None]
