"""The full feature row of each window of a tick, computed for all windows at once.

Time-domain features come from one `block_features` pass per segment length over the
full-length rate-group blocks of every window (the usual case; blocks cut together for
many assets are taken as the one matrix they are rows of), and one `segment_features`
pass over the rest; spectral features from one FFT per group of equal-length segments
(`agent/core/spectral.py`). A window's row is its channels' time-domain features in
channel order, each followed by the channel's spectral ones (`runtime.feature_layout`).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Protocol

import numpy as np

from agent.config.load import SpectrumConfig
from agent.core.features import WorkArrays, block_features, segment_features, stack_rows
from agent.core.spectral import spectral_features
from agent.core.windows.closed import Block, ClosedWindow
from agent.pipeline.runtime import AssetRuntime

_EMPTY = np.empty(0)


class Pending(Protocol):
    """A window on its way through the tick: whose it is and its samples."""

    @property
    def rt(self) -> AssetRuntime: ...

    @property
    def w(self) -> ClosedWindow: ...


def feature_rows(todo: Sequence[Pending], work: WorkArrays | None = None) -> list[np.ndarray]:
    """The full feature row of each window (module docstring), the passes in `work`'s
    reusable arrays."""
    needed = frozenset().union(*{p.rt.layout.td_needed for p in todo})
    by_len, n_by_len, ragged, whole, places, spans = _place_all(todo)
    feats = {}
    for n, parts in by_len.items():
        base = whole.get(n)
        x = base if base is not None and base.shape[0] == n_by_len[n] \
            else stack_rows(parts, work=work)
        feats[n] = block_features(x, needed, work=work)
    if ragged:
        feats[-1] = segment_features(ragged)
    spec = _spectral(todo, work)
    rows: list[np.ndarray] = []
    for p, (a, b), k in zip(todo, spans, spec[1], strict=True):
        rt = p.rt
        n_ch = len(rt.cfg.channels)
        if b - a == 1 and not rt.layout.spectral:
            chans, n, off = places[a]
            if len(chans) == n_ch:  # one block of every channel in order: a view
                rows.append(feats[n][off:off + n_ch].reshape(-1))
                continue
        per_ch: list[np.ndarray] = [_EMPTY] * n_ch
        for chans, n, off in places[a:b]:
            f = feats[n]
            for r, c in enumerate(chans):
                per_ch[c] = f[off + r]
        if k < 0:
            rows.append(np.concatenate(per_ch))
            continue
        spectral = rt.layout.spectral
        extra = dict(zip(spectral, spec[0][k:k + len(spectral)], strict=True))
        parts = []
        for ci in range(n_ch):
            parts.append(per_ch[ci])
            got = extra.get(ci)
            if got is not None:
                parts.append(got)
        rows.append(np.concatenate(parts))
    return rows


def _place_all(todo: Sequence[Pending]) -> tuple[
        dict[int, list[np.ndarray]], dict[int, int], list[np.ndarray],
        dict[int, np.ndarray | None], list[tuple[tuple[int, ...], int, int]],
        list[tuple[int, int]]]:
    """Where every window's blocks go in the feature pass: the full-length rows by
    segment length (and whether they are one cut matrix whole), the ragged segments,
    per block (its channels, segment length or -1 for ragged, first row there) and
    per window its span of blocks."""
    by_len: dict[int, list[np.ndarray]] = {}
    n_by_len: dict[int, int] = {}
    ragged: list[np.ndarray] = []
    whole: dict[int, np.ndarray | None] = {}
    # Per block: (its channels, segment length or -1 for ragged, first row there).
    places: list[tuple[tuple[int, ...], int, int]] = []
    spans: list[tuple[int, int]] = []
    for p in todo:
        first = len(places)
        w = p.w
        blocks = w.blocks
        if blocks:
            for blk in blocks:
                _place(blk, by_len, n_by_len, ragged, places, whole)
        else:  # a window built from per-channel arrays
            places.append((tuple(range(len(w.values))), -1, len(ragged)))
            ragged.extend(w.values)
        spans.append((first, len(places)))
    return by_len, n_by_len, ragged, whole, places, spans


def _spectral(todo: Sequence[Pending], work: WorkArrays | None = None
              ) -> tuple[list[np.ndarray], list[int]]:
    """The spectral features of every spectral channel of every window, in window and
    channel order, and per window where its first one is (-1: none)."""
    segs: list[np.ndarray] = []
    rates: list[float] = []
    cfgs: list[SpectrumConfig] = []
    speeds: list[float] = []
    first: list[int] = []
    for p in todo:
        rt = p.rt
        lay = rt.layout
        if not lay.spectral:
            first.append(-1)
            continue
        first.append(len(segs))
        speed_hz = np.nan
        if lay.speed_index is not None:
            sv = p.w.channel(lay.speed_index, lay.chan_at[lay.speed_index])
            speed_hz = float(sv.mean()) / 60.0 if sv.size else np.nan
        for ci in lay.spectral:
            ch = rt.cfg.channels[ci]
            assert ch.spectrum is not None
            segs.append(p.w.channel(ci, lay.chan_at[ci]))
            rates.append(ch.rate_hz)
            cfgs.append(ch.spectrum)
            speeds.append(speed_hz)
    return (spectral_features(segs, rates, cfgs, speeds, work) if segs else []), first


def _place(blk: Block, by_len: dict[int, list[np.ndarray]], n_by_len: dict[int, int],
           ragged: list[np.ndarray], places: list[tuple[tuple[int, ...], int, int]],
           whole: dict[int, np.ndarray | None]) -> None:
    if blk.uniform:
        n = blk.values.shape[1]
        off = n_by_len.get(n, 0)
        by_len.setdefault(n, []).append(blk.values)
        n_by_len[n] = off + len(blk.chans)
        places.append((blk.chans, n, off))
        # Still the rows 0..off of one matrix cut for all these blocks, in order?
        base = whole.get(n, blk.base) if off else blk.base
        whole[n] = base if base is not None and base is blk.base and blk.row0 == off \
            else None
    else:
        places.append((blk.chans, -1, len(ragged)))
        ragged.extend(blk.values[r, :k] for r, k in enumerate(blk.counts))
