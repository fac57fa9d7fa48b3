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

from agent.core.features import block_features, segment_features, stack_rows
from agent.core.spectral import spectral_features
from agent.core.windows.assembler import Block, ClosedWindow
from agent.pipeline.runtime import AssetRuntime


class Pending(Protocol):
    """A window on its way through the tick: whose it is and its samples."""

    @property
    def rt(self) -> AssetRuntime: ...

    @property
    def w(self) -> ClosedWindow: ...


def feature_rows(todo: Sequence[Pending]) -> list[np.ndarray]:
    """The full feature row of each window (module docstring)."""
    needed = frozenset().union(*{p.rt.td_needed for p in todo})
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
        if w.blocks:
            for blk in w.blocks:
                _place(blk, by_len, n_by_len, ragged, places, whole)
        else:  # a window built from per-channel arrays
            places.append((tuple(range(len(w.values))), -1, len(ragged)))
            ragged.extend(w.values)
        spans.append((first, len(places)))
    feats = {}
    for n, parts in by_len.items():
        base = whole.get(n)
        x = base if base is not None and base.shape[0] == n_by_len[n] else stack_rows(parts)
        feats[n] = block_features(x, needed)
    if ragged:
        feats[-1] = segment_features(ragged)
    spec_segs, spec_rates, spec_cfgs, spec_speeds, spec_at = [], [], [], [], []
    for wi, p in enumerate(todo):
        rt = p.rt
        if not rt.spectral:
            continue
        speed_hz = np.nan
        if rt.speed_index is not None:
            sv = p.w.values[rt.speed_index]
            speed_hz = float(sv.mean()) / 60.0 if sv.size else np.nan
        for ci in rt.spectral:
            ch = rt.cfg.channels[ci]
            assert ch.spectrum is not None
            spec_segs.append(p.w.values[ci])
            spec_rates.append(ch.rate_hz)
            spec_cfgs.append(ch.spectrum)
            spec_speeds.append(speed_hz)
            spec_at.append((wi, ci))
    spec = spectral_features(spec_segs, spec_rates, spec_cfgs, spec_speeds) \
        if spec_segs else []
    by_window: dict[tuple[int, int], np.ndarray] = dict(zip(spec_at, spec, strict=True))
    rows: list[np.ndarray] = []
    for wi, (p, (a, b)) in enumerate(zip(todo, spans, strict=True)):
        n_ch = len(p.rt.cfg.channels)
        if b - a == 1 and not p.rt.spectral:
            chans, n, off = places[a]
            if len(chans) == n_ch:  # one block of every channel in order: a view
                rows.append(feats[n][off:off + n_ch].reshape(-1))
                continue
        per_ch: list[np.ndarray] = [np.empty(0)] * n_ch
        for chans, n, off in places[a:b]:
            f = feats[n]
            for r, c in enumerate(chans):
                per_ch[c] = f[off + r]
        parts = []
        for ci in range(n_ch):
            parts.append(per_ch[ci])
            extra = by_window.get((wi, ci))
            if extra is not None:
                parts.append(extra)
        rows.append(np.concatenate(parts))
    return rows


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
