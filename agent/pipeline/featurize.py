"""The full feature row of each window of a tick, computed for all windows at once.

Time-domain features come from one `block_features` pass per segment length over the
full-length rate-group blocks of every window (the usual case; blocks cut together for
many assets are taken as the one matrix they are rows of), and one `segment_features`
pass over the rest; spectral features from one FFT per group of equal-length segments
(`agent/core/spectral.py`, fed slices of the cut matrices where the segments are
consecutive rows of one). A window's row is its channels' time-domain features in
channel order, each followed by the channel's spectral ones (`runtime.feature_layout`).

Every pass writes into one flat array, and the rows are gathered from it in one numpy
step per *class* of windows: windows whose assets lay out their rows alike
(`_Template`) and whose blocks have the same lengths. Python then touches each window
a few times (where its blocks are), not once per channel and feature.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from itertools import repeat
from operator import attrgetter, is_, ne
from typing import Protocol

import numpy as np

from agent.config.load import SpectrumConfig
from agent.core.features import (
    FEATURE_INDEX,
    WorkArrays,
    block_features,
    segment_features,
    stack_rows,
    work_array,
)
from agent.core.spectral import Segment, spectral_flat, spectral_rows
from agent.core.windows.closed import ClosedWindow, whole_cut
from agent.pipeline.runtime import AssetLayout, AssetRuntime

NF = len(FEATURE_INDEX)
_BASE, _ROW0, _UNIFORM = attrgetter("base"), attrgetter("row0"), attrgetter("uniform")
_W = attrgetter("w")  # of a Pending
# Per cut matrix (by id): the matrix, its rows' lowest and highest values (`feature_rows`).
Extremes = dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]]


class Pending(Protocol):
    """A window on its way through the tick: whose it is and its samples."""

    @property
    def rt(self) -> AssetRuntime: ...

    @property
    def w(self) -> ClosedWindow: ...


@dataclass(frozen=True, slots=True)
class _Template:
    """How one kind of layout's full row is gathered: column j is `slots[slot[j]] +
    const[j]` in the tick's flat feature array, where a window's slots are where each
    channel's time-domain features start, then where each spectral channel's features
    start. Assets whose channels sit alike in their windows and have equal spectra
    share one (`template`), so their windows are gathered together."""

    chan_at: tuple[tuple[int, int], ...]
    slot: np.ndarray
    const: np.ndarray
    # Per spectral channel: its spectrum (one object for equal configs) and rate.
    spectra: tuple[tuple[SpectrumConfig, float], ...]
    wants_speed: bool  # a spectral channel tracks orders of the running speed

    @property
    def n_spec(self) -> int:
        return len(self.spectra)


def _template_of(lay: AssetLayout) -> _Template:
    cfg = lay.cfg
    slot: list[int] = []
    const: list[int] = []
    n_ch = len(cfg.channels)
    spectra: list[tuple[SpectrumConfig, float]] = []
    for ci, ch in enumerate(cfg.channels):
        slot += [ci] * NF
        const += range(NF)
        if ch.spectrum is not None:
            k = len(ch.spectral_features)
            slot += [n_ch + len(spectra)] * k
            const += range(k)
            spectra.append((ch.spectrum, ch.rate_hz))
    return _Template(lay.chan_at, np.asarray(slot, np.int64), np.asarray(const, np.int64),
                     tuple(spectra), any(sp.orders for sp, _ in spectra))


_BY_LAYOUT: dict[int, tuple[AssetLayout, _Template]] = {}
_BY_SHAPE: dict[tuple[object, ...], _Template] = {}


def template(lay: AssetLayout) -> _Template:
    """The layout's `_Template`, shared by every layout of the same shape (made once per
    layout)."""
    got = _BY_LAYOUT.get(id(lay))
    if got is None or got[0] is not lay:
        if len(_BY_LAYOUT) > 4096:
            _BY_LAYOUT.clear()
            _BY_SHAPE.clear()
        t = _template_of(lay)
        # The slots say where in the row each channel's features go: layouts alike in
        # blocks and spectra can still order their channels differently.
        shape = (t.chan_at, t.spectra, t.slot.tobytes(), t.const.tobytes())
        t = _BY_SHAPE.setdefault(shape, t)
        got = _BY_LAYOUT[id(lay)] = (lay, t)
    return got[1]


@dataclass(slots=True)
class _Placed:
    """Where the tick's segments go in the time-domain passes: full-length rows by
    segment length (and the one cut matrix they are, when they are one whole), the
    ragged segments, and per window its blocks' lengths (-1: ragged) and first rows."""

    by_len: dict[int, list[np.ndarray]]
    n_by_len: dict[int, int]
    whole: dict[int, np.ndarray | None]
    ragged: list[np.ndarray]
    lens: list[tuple[int, ...]]
    offs: list[tuple[int, ...]]


def _place_all(todo: Sequence[Pending]) -> _Placed:
    by_len: dict[int, list[np.ndarray]] = {}
    n_by_len: dict[int, int] = {}
    whole: dict[int, np.ndarray | None] = {}
    ragged: list[np.ndarray] = []
    lens: list[tuple[int, ...]] = []
    offs: list[tuple[int, ...]] = []
    for p in todo:
        blocks = p.w.blocks
        if not blocks:  # a window built from per-channel arrays: ragged, in channel order
            lens.append(())
            offs.append((len(ragged),))
            ragged.extend(p.w.values)
            continue
        ln: list[int] = []
        of: list[int] = []
        for blk in blocks:
            if blk.uniform:
                vals = blk.values
                n = vals.shape[1]
                off = n_by_len.get(n)
                if off is None:
                    off = 0
                    by_len[n] = [vals]
                    whole[n] = blk.base if blk.row0 == 0 else None
                else:
                    by_len[n].append(vals)
                    # Still the rows 0..off of one matrix cut for all these blocks?
                    if whole[n] is not None and (blk.base is not whole[n] or blk.row0 != off):
                        whole[n] = None
                n_by_len[n] = off + len(blk.chans)
            else:
                n, off = -1, len(ragged)
                ragged.extend(blk.values[r, :k] for r, k in enumerate(blk.counts))
            ln.append(n)
            of.append(off)
        lens.append(tuple(ln))
        offs.append(tuple(of))
    return _Placed(by_len, n_by_len, whole, ragged, lens, offs)


def feature_rows(todo: Sequence[Pending], work: WorkArrays | None = None,
                 extremes: Extremes | None = None) -> list[np.ndarray] | np.ndarray:
    """The full feature row of each window (module docstring), the passes in `work`'s
    reusable arrays. Rows are views of one array per class of windows; the aligned
    tick's (`_aligned`) come as that one [windows, features] matrix, row j window j's.
    `extremes`: per cut matrix (by id) the matrix and its rows' lowest and highest
    values, found already (sensor health's), which the aligned pass does not reduce
    again."""
    al = _aligned(todo)
    if al is not None:
        return _aligned_rows(al, len(todo), work, extremes or {})
    needed = frozenset().union(*{p.rt.layout.td_needed for p in todo})
    pl = _place_all(todo)
    flats: list[np.ndarray] = []
    starts: dict[int, int] = {}
    pos = 0
    for n, parts in pl.by_len.items():
        base = pl.whole.get(n)
        x = base if base is not None and base.shape[0] == pl.n_by_len[n] \
            else stack_rows(parts, work=work)
        f = block_features(x, needed, work=work)
        starts[n] = pos
        flats.append(f.reshape(-1))
        pos += f.size
    if pl.ragged:
        f = segment_features(pl.ragged)
        starts[-1] = pos
        flats.append(f.reshape(-1))
        pos += f.size
    tmpls = [template(p.rt.layout) for p in todo]
    spec_flat, spec_starts, first = _spectral(todo, tmpls, work)
    spec_starts += pos
    flats.append(spec_flat)
    flat = np.concatenate(flats) if len(flats) > 1 else flats[0]
    return _gather(flat, starts, spec_starts, first, tmpls, pl)


@dataclass(frozen=True, slots=True)
class _Aligned:
    """The usual tick's windows (`_aligned`): per block of a window, the matrix whose
    rows those blocks are (window j's block b is rows j * rows[b].. of bases[b]), the
    template their assets share, one of their layouts, the time-domain features any of
    them needs."""

    bases: tuple[np.ndarray, ...]
    rows: tuple[int, ...]
    tmpl: _Template
    lay: AssetLayout
    needed: frozenset[str]


def _aligned(todo: Sequence[Pending]) -> _Aligned | None:
    """The windows as `_Aligned` when every block of each is full and, block by block,
    the windows' blocks are the rows of one matrix in window order (the joint cut's),
    and their assets share one `_Template` (and speed channel); else None.

    Asked once per tick of every window: each question is put to all the windows at
    once (attribute reads mapped over them), not window by window."""
    n = len(todo)
    cut = whole_cut(list(map(_W, todo)))
    if cut is not None:  # the joint cut's windows, alike: its matrices
        shared = _shared([p.rt.layout for p in todo])
        return None if shared is None else _Aligned(cut.bases, cut.rows, *shared)
    first = todo[0].w.blocks
    if not first or any(b.base is None or not b.uniform for b in first):
        return None
    blocks = [p.w.blocks for p in todo]
    if any(map(ne, map(len, blocks), repeat(len(first)))):
        return None
    bases: list[np.ndarray] = []
    rows: list[int] = []
    for b, blk in enumerate(first):
        base, r = blk.base, len(blk.chans)
        assert base is not None
        of_b = [w[b] for w in blocks]
        # Window j's block b is rows j * r.. of the one matrix, every row full.
        if (base.shape[0] != n * r or not all(map(is_, map(_BASE, of_b), repeat(base)))
                or list(map(_ROW0, of_b)) != list(range(0, n * r, r))
                or not all(map(_UNIFORM, of_b))):
            return None
        bases.append(base)
        rows.append(r)
    shared = _shared([p.rt.layout for p in todo])
    if shared is None:
        return None
    return _Aligned(tuple(bases), tuple(rows), *shared)


# The layouts of the last windows `_shared` was asked about, and its answer: the same
# assets close windows tick after tick (one entry, replaced whole).
_LAST_SHARED: list[tuple[list[AssetLayout], tuple[_Template, AssetLayout,
                                                  frozenset[str]] | None]] = [([], None)]


def _shared(lays: list[AssetLayout]) -> tuple[_Template, AssetLayout, frozenset[str]] | None:
    """The `_Template` every layout of `lays` has (with the first's speed channel), the
    first layout, and the time-domain features any of them needs; None when they are
    not all alike."""
    last, got = _LAST_SHARED[0]
    if len(last) == len(lays) and all(map(is_, lays, last)):
        return got
    lay0 = lays[0]
    tmpl = template(lay0)
    distinct = {id(lay): lay for lay in lays}.values()
    got = None if any(template(lay) is not tmpl or lay.speed_index != lay0.speed_index
                      for lay in distinct) else \
        (tmpl, lay0, frozenset().union(*{lay.td_needed for lay in distinct}))
    _LAST_SHARED[0] = (lays, got)
    return got


def _aligned_rows(al: _Aligned, n: int, work: WorkArrays | None, extremes: Extremes
                  ) -> np.ndarray:
    """`feature_rows` of the n windows of `al`: one time-domain pass per block matrix,
    the spectra of its rows, every row gathered in one step."""
    flats: list[np.ndarray] = []
    starts: list[int] = []
    pos = 0
    # Each matrix's row sums, reduced once: the time-domain means and the spectra's
    # means are both these sums over the row length.
    sums = [base.sum(axis=1) for base in al.bases]
    for b, base in enumerate(al.bases):
        ext = extremes.get(id(base))
        f = block_features(base, al.needed, work=work,
                           out=work_array(work, f"td_{b}", (base.shape[0], NF)),
                           extremes=ext[1:] if ext is not None and ext[0] is base else None,
                           sums=sums[b])
        starts.append(pos)
        flats.append(f.reshape(-1))
        pos += f.size
    t, lay = al.tmpl, al.lay
    if not t.n_spec:
        flat = np.concatenate(flats) if len(flats) > 1 else flats[0]
        return flat[_plain_index(t, n, al.rows, tuple(starts))]
    td = _td_starts(t, n, al.rows, starts)
    # The spectra of the spectral channels' rows, one FFT per group of segments.
    speeds = np.full(n, np.nan)
    if t.wants_speed and lay.speed_index is not None:
        b, r = lay.chan_at[lay.speed_index]
        # As `_spectral` reads it: each window's speed samples' mean, in rev/min.
        speeds = al.bases[b][r::al.rows[b]].mean(axis=1) / 60.0
    chans = [(lay.chan_at[ci], spec, fs) for ci, (spec, fs) in zip(lay.spectral, t.spectra,
                                                                       strict=True)]
    if len({(al.bases[b].shape[1], float(fs), spec) for (b, _), spec, fs in chans}) \
            == len(chans):
        # Each spectral channel a group of its own (as `spectral_flat` would group its
        # segments): its rows of the block matrix straight to the FFT.
        got = [spectral_rows(al.bases[b][r::al.rows[b]] if al.rows[b] > 1 else al.bases[b],
                             fs, spec, speeds, work,
                             sums[b][r::al.rows[b]] if al.rows[b] > 1 else sums[b])
               for (b, r), spec, fs in chans]
        block = np.concatenate(got, axis=1) if len(got) > 1 else got[0]
        flats.append(block.reshape(-1))
        offs = np.cumsum([0] + [g.shape[1] for g in got[:-1]])
        sp = pos + block.shape[1] * np.arange(n, dtype=np.int64)[:, None] + offs
    else:
        segs: list[Segment] = []
        for jj in range(n):
            for ci in lay.spectral:
                b, r = lay.chan_at[ci]
                segs.append((al.bases[b], jj * al.rows[b] + r))
        rates = [fs for _, fs in t.spectra] * n
        cfgs = [sp for sp, _ in t.spectra] * n
        spec_flat, spec_starts = spectral_flat(segs, rates, cfgs,
                                               np.repeat(speeds, t.n_spec).tolist(), work)
        flats.append(spec_flat)
        sp = spec_starts.reshape(n, t.n_spec) + pos
    td = np.concatenate([td, sp], axis=1)
    flat = np.concatenate(flats) if len(flats) > 1 else flats[0]
    return flat[td[:, t.slot] + t.const]


def _td_starts(t: _Template, n: int, rows: Sequence[int], starts: Sequence[int]
               ) -> np.ndarray:
    """Per window j of an aligned tick (`_aligned_rows`; its blocks rows j * rows[b]..
    of the block matrices, whose features start at `starts[b]` in the passes' flat
    array), where each channel's time-domain features start: [n, channels]."""
    j = np.arange(n, dtype=np.int64)[:, None]
    return np.asarray([starts[b] for b, _ in t.chan_at], dtype=np.int64) + \
        (j * np.asarray([rows[b] for b, _ in t.chan_at], dtype=np.int64)
         + np.asarray([r for _, r in t.chan_at], dtype=np.int64)) * NF


# The last gather index `_plain_index` made and what for (one entry, replaced whole).
_LAST_INDEX: list[tuple[_Template | None, tuple[object, ...], np.ndarray]] = [
    (None, (), np.empty((0, 0), np.int64))]


def _plain_index(t: _Template, n: int, rows: tuple[int, ...], starts: tuple[int, ...]
                 ) -> np.ndarray:
    """The index whose row j gathers window j's row out of the passes' flat array, for
    an aligned tick without spectra; made again only when the template, the number of
    windows or the passes' layout change (the same assets close windows tick after
    tick)."""
    tmpl, key, index = _LAST_INDEX[0]
    if tmpl is not t or key != (n, rows, starts):
        index = _td_starts(t, n, rows, starts)[:, t.slot] + t.const
        _LAST_INDEX[0] = (t, (n, rows, starts), index)
    return index


def _gather(flat: np.ndarray, starts: dict[int, int], spec_starts: np.ndarray,
            first: list[int], tmpls: list[_Template], pl: _Placed) -> list[np.ndarray]:
    """Every window's row out of `flat`, one gather per class (`_Template`, lengths)."""
    classes: dict[tuple[int, tuple[int, ...]], list[int]] = {}
    for i, (t, ln) in enumerate(zip(tmpls, pl.lens, strict=True)):
        classes.setdefault((id(t), ln), []).append(i)
    rows: list[np.ndarray] = [flat[:0]] * len(tmpls)
    for (_, ln), members in classes.items():
        t = tmpls[members[0]]
        offs = np.asarray([pl.offs[i] for i in members], dtype=np.int64)
        # Per window, where each channel's time-domain features start.
        if ln:
            chan_at = t.chan_at
            blk = [b for b, _ in chan_at]
            row = np.asarray([r for _, r in chan_at], dtype=np.int64)
            base = np.asarray([starts[ln[b]] for b in blk], dtype=np.int64)
            td = base + (offs[:, blk] + row) * NF
        else:  # per-channel arrays: ragged segments in channel order
            n_ch = len(t.chan_at)
            td = starts[-1] + (offs[:, :1] + np.arange(n_ch)) * NF
        if t.n_spec:
            f = np.asarray([first[i] for i in members], dtype=np.int64)
            sp = spec_starts[f[:, None] + np.arange(t.n_spec)]
            td = np.concatenate([td, sp], axis=1)
        got = flat[td[:, t.slot] + t.const]
        for j, i in enumerate(members):
            rows[i] = got[j]
    return rows


def _spectral(todo: Sequence[Pending], tmpls: list[_Template], work: WorkArrays | None
              ) -> tuple[np.ndarray, np.ndarray, list[int]]:
    """The spectral features of every spectral channel of every window, in window and
    channel order, as `spectral_flat` gives them, and per window the index of its first
    spectral segment (-1: none)."""
    segs: list[Segment] = []
    rates: list[float] = []
    cfgs: list[SpectrumConfig] = []
    speeds: list[float] = []
    first: list[int] = []
    for p, t in zip(todo, tmpls, strict=True):
        if not t.n_spec:
            first.append(-1)
            continue
        w = p.w
        lay = p.rt.layout
        first.append(len(segs))
        speed_hz = np.nan
        if t.wants_speed and lay.speed_index is not None:
            sv = w.channel(lay.speed_index, lay.chan_at[lay.speed_index])
            speed_hz = float(sv.mean()) / 60.0 if sv.size else np.nan
        blocks = w.blocks
        for ci, (spec, fs) in zip(lay.spectral, t.spectra, strict=True):
            at = lay.chan_at[ci]
            blk = blocks[at[0]] if blocks else None
            if blk is not None and blk.uniform:
                # A whole row of a matrix (of the joint cut's, when it made the block).
                segs.append((blk.base, blk.row0 + at[1]) if blk.base is not None
                            else (blk.values, at[1]))
            else:
                segs.append(w.channel(ci, at))
            rates.append(fs)
            cfgs.append(spec)
            speeds.append(speed_hz)
    if not segs:
        return np.empty(0), np.empty(0, np.int64), first
    flat, starts = spectral_flat(segs, rates, cfgs, speeds, work)
    return flat, starts, first
