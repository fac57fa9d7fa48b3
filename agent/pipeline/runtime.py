"""What the pipeline keeps per asset (`AssetRuntime`), and how an asset's feature row
is laid out.

A runtime is three parts: the asset's `AssetLayout` (frozen, built once from its config:
feature positions in the full row, where each channel's samples are in a closed window,
which channels each check reads), its `Models` (a frozen value: the asset's and its
modes' bundles with their row positions, replaced whole by `set_bundle` and
`install_mode`), and the state the ticks change (window assembler, sensor health, mode,
limit monitors, detector, sequence number, ...). Built by `AssetRuntime.build`.
"""

from __future__ import annotations

import logging
from collections import deque
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from types import MappingProxyType
from typing import Any

import numpy as np

from agent.config.load import AssetConfig, ChannelConfig, Decoder
from agent.core.detector import Detector, State
from agent.core.escalation import EscalationTracker
from agent.core.features import FEATURE_INDEX
from agent.core.health import ChannelHealth, HealthLimits
from agent.core.limits import FeatureLimits, ZoneLimits
from agent.core.modes import UNKNOWN_MODE, ModeTracker
from agent.core.windows.assembler import WindowAssembler
from agent.errors import BundleError
from agent.models.bundle import Bundle, load_bundle
from agent.ops.logs import kv

DEFAULT_MODE = "default"
_NF = len(FEATURE_INDEX)


def asset_feature_names(asset: AssetConfig) -> tuple[str, ...]:
    """Every feature the asset's config asks for, `<channel>.<feature>`, in config order
    (each channel's time-domain features, then its spectral ones)."""
    return tuple(f"{ch.name}.{f}" for ch in asset.channels for f in ch.all_features)


def feature_layout(asset: AssetConfig) -> dict[str, int]:
    """Position of every computable feature in a window's full row: per channel, all
    FEATURES (time domain), then the channel's spectral features."""
    pos: dict[str, int] = {}
    off = 0
    for ch in asset.channels:
        for f, i in FEATURE_INDEX.items():
            pos[f"{ch.name}.{f}"] = off + i
        off += _NF
        for f in ch.spectral_features:
            pos[f"{ch.name}.{f}"] = off
            off += 1
    return pos


def load_mode_bundles(asset: AssetConfig, logger: logging.Logger | None = None
                      ) -> tuple[dict[str, Bundle], dict[str, str]]:
    """The bundles of the asset's modes (`modes.states.<mode>.bundle`), and why any failed."""
    bundles: dict[str, Bundle] = {}
    errors: dict[str, str] = {}
    if asset.modes is None:
        return bundles, errors
    for m in asset.modes.states:
        if m.bundle is None:
            continue
        try:
            b = load_bundle(m.bundle)
        except BundleError as exc:
            errors[m.name] = str(exc)
            if logger is not None:
                logger.error(kv("mode bundle rejected; the mode runs without a model",
                                asset=asset.name, mode=m.name, error=str(exc)))
            continue
        why = check_bundle_fits(asset, b)
        if why is not None:
            errors[m.name] = why
            if logger is not None:
                logger.error(kv("mode bundle does not fit", asset=asset.name, mode=m.name,
                                error=why))
            continue
        bundles[m.name] = b
    return bundles, errors


def check_bundle_fits(asset: AssetConfig, bundle: Bundle) -> str | None:
    """Why a bundle cannot serve an asset (feature names it cannot compute), or None."""
    have = set(asset_feature_names(asset))
    missing = [n for n in bundle.meta.feature_names if n not in have]
    if missing:
        shown = ", ".join(missing[:5]) + (" ..." if len(missing) > 5 else "")
        return (f"the model needs features this asset's config does not compute: {shown} "
                f"(add them to the channels' `features`)")
    return None


@dataclass(frozen=True, slots=True)
class AssetLayout:
    """What the config fixes about one asset for as long as its runtime lives: where
    each feature is in a window's full row, where each channel's samples are in a
    closed window, and which channels each check of the tick reads. Built once
    (`AssetLayout.of`); never changed."""

    cfg: AssetConfig
    # Position of every computable feature in the full row (`feature_layout`).
    positions: Mapping[str, int]
    # The features the window observer (re-learning, record) gets, and where they are.
    record_names: tuple[str, ...]
    record_index: np.ndarray
    # Per channel: (block, row) of its samples in a closed window's `blocks`.
    chan_at: tuple[tuple[int, int], ...]
    spectral: tuple[int, ...]  # channels with spectral features
    speed_index: int | None  # the running-speed channel (order tracking)
    mode_channel: int | None  # the channel the operating mode is read from
    velocity_at: tuple[tuple[int, int], ...]  # (channel, row position) of velocity RMS
    stale_channels: tuple[int, ...]  # channels with `stale_s`
    checked: tuple[int, ...]  # channels with any health check
    # Per channel: whether it is in `checked`, and whether its check wants the rate of
    # change (the judge's batch statistics).
    is_checked: tuple[bool, ...]
    wants_rate: tuple[bool, ...]
    # Time-domain features any consumer of the row reads (config, limits; models are
    # checked to need no others): the feature pass computes only these.
    td_needed: frozenset[str]

    @classmethod
    def of(cls, cfg: AssetConfig, chan_at: tuple[tuple[int, int], ...]) -> AssetLayout:
        chan_pos = {c.name: i for i, c in enumerate(cfg.channels)}
        positions = feature_layout(cfg)
        record_names = asset_feature_names(cfg)
        td = {f for c in cfg.channels for f in c.all_features if f in FEATURE_INDEX}
        td |= {lim.feature for c in cfg.channels for lim in c.limits
               if lim.feature in FEATURE_INDEX}
        limits = [_health_limits(c) for c in cfg.channels]
        return cls(
            cfg=cfg, positions=MappingProxyType(positions), record_names=record_names,
            record_index=np.asarray([positions[n] for n in record_names], dtype=np.int64),
            chan_at=chan_at,
            spectral=tuple(i for i, c in enumerate(cfg.channels) if c.spectrum is not None),
            speed_index=chan_pos.get(cfg.speed_channel) if cfg.speed_channel else None,
            mode_channel=chan_pos.get(cfg.modes.channel) if cfg.modes is not None else None,
            velocity_at=tuple((i, positions[f"{c.name}.velocity_rms_mm_s"])
                              for i, c in enumerate(cfg.channels)
                              if c.spectrum is not None and c.spectrum.velocity_rms),
            stale_channels=tuple(i for i, c in enumerate(cfg.channels)
                                 if c.stale_s is not None),
            checked=tuple(i for i, h in enumerate(limits) if not h.passive),
            is_checked=tuple(not h.passive for h in limits),
            wants_rate=tuple(h.max_rate_per_s is not None for h in limits),
            td_needed=frozenset(td))

    def index(self, names: Sequence[str]) -> np.ndarray:
        """Positions of `names` in the full feature row."""
        return np.asarray([self.positions[n] for n in names], dtype=np.int64)


def _health_limits(c: ChannelConfig) -> HealthLimits:
    return HealthLimits(c.min_value, c.max_value, c.stale_s, c.flatline_windows,
                        c.max_rate_per_s, liveness=c.decoder is Decoder.SPARKPLUG_B)


_NO_INDEX = np.empty(0, np.int64)


@dataclass(frozen=True, slots=True)
class Models:
    """The bundles serving one asset and where their features are in the full row: a
    value, replaced whole when a bundle changes (`AssetRuntime.set_bundle`,
    `AssetRuntime.install_mode`), so a tick sees either the old set or the new."""

    asset_bundle: Bundle | None = None  # serves every mode without a bundle of its own
    asset_index: np.ndarray = field(default_factory=lambda: _NO_INDEX)
    error: str | None = None  # why the asset's bundle was refused
    mode_bundles: Mapping[str, Bundle] = field(default_factory=dict)
    mode_index: Mapping[str, np.ndarray] = field(default_factory=dict)
    mode_errors: Mapping[str, str] = field(default_factory=dict)

    @property
    def shown(self) -> Bundle | None:
        """What metrics and readiness look at: the asset's bundle, or when only modes
        have bundles, the first of them."""
        if self.asset_bundle is not None:
            return self.asset_bundle
        return next(iter(self.mode_bundles.values()), None)

    def for_mode(self, mode: str) -> tuple[Bundle | None, np.ndarray]:
        """The bundle that scores windows in `mode`, and its positions in the full row."""
        b = self.mode_bundles.get(mode)
        if b is not None:
            return b, self.mode_index[mode]
        return self.asset_bundle, self.asset_index


@dataclass(slots=True)
class AssetRuntime:
    """One asset in the pipeline: its fixed `layout`, the `models` serving it, and the
    state its windows change from tick to tick (below, grouped by the stage that
    changes it)."""

    layout: AssetLayout
    models: Models
    # cut; the detector (emit.py)
    assembler: WindowAssembler
    detector: Detector
    started_s: float | None = None
    # judge: sensor health, modes, limits
    health: list[ChannelHealth] = field(default_factory=list)
    modes: ModeTracker | None = None
    mode: str = DEFAULT_MODE
    settling: bool = False
    # (channel index, row position, monitor) for every configured limit and ISO zone
    limits: list[tuple[int, int, FeatureLimits | ZoneLimits]] = field(default_factory=list)
    last_velocity_mm_s: dict[str, float] = field(default_factory=dict)
    # Samples in the last closed window over those promised (lowest channel; 0 after
    # empty windows) and how many windows in a row closed empty.
    coverage: float | None = None
    empty_streak: int = 0
    # detector and messages (emit.py)
    escalation: EscalationTracker = field(default_factory=EscalationTracker)
    # Per-feature squared errors of the last windows, as far back as the raise rule looks
    # (the drifting-sensor check compares the oldest with the newest); channels reported
    # as drifting sensors -> consecutive normal windows since.
    sq_history: deque[tuple[np.ndarray, int]] = field(default_factory=lambda: deque(maxlen=1))
    suspects: dict[str, int] = field(default_factory=dict)
    sequence: int = 0  # moved only by `Emitter.message`
    last_score: float | None = None
    last_window_end: float | None = None
    last_event: dict[str, Any] | None = None
    raised_at: float | None = None
    raised_window: tuple[float, float] | None = None
    # What the threshold, anomalous and coverage gauges were last set to (None: unknown).
    shown_threshold: float | None = None
    shown_anomalous: int | None = None
    shown_coverage: float | None = None
    # Containment (issue 20): the asset's last failure in a tick, (stage, detail), while
    # its work keeps failing (None once a tick's work succeeds); how many failures in
    # all; whether it has had any work yet.
    error: tuple[str, str] | None = None
    errors: int = 0
    worked: bool = False

    @classmethod
    def build(cls, cfg: AssetConfig, bundle: Bundle | None, bundle_error: str | None,
              mode_bundles: tuple[dict[str, Bundle], dict[str, str]] | None = None
              ) -> AssetRuntime:
        """A fresh runtime. The per-mode bundles are loaded from the config unless given."""
        assembler = WindowAssembler(cfg.window, tuple(c.rate_hz for c in cfg.channels))
        layout = AssetLayout.of(cfg, assembler.channel_rows())
        assembler.keep_times_of(layout.wants_rate)  # only a rate-of-change check reads them
        by_mode, errors = mode_bundles if mode_bundles is not None else load_mode_bundles(cfg)
        det = cfg.window_detector
        rt = cls(layout=layout,
                 models=Models(mode_bundles=dict(by_mode),
                               mode_index={m: layout.index(b.meta.feature_names)
                                           for m, b in by_mode.items()},
                               mode_errors=dict(errors)),
                 assembler=assembler,
                 health=[ChannelHealth(_health_limits(c)) for c in cfg.channels],
                 detector=Detector(det),
                 escalation=EscalationTracker(det.raise_k, det.raise_n, det.stride),
                 sq_history=deque(maxlen=(det.raise_n - 1) * det.stride + 1))
        if cfg.modes is not None:
            rt.modes = ModeTracker(cfg.modes)
            rt.mode = UNKNOWN_MODE
        pos = layout.positions
        for i, c in enumerate(cfg.channels):
            for lim in c.limits:
                rt.limits.append((i, pos[f"{c.name}.{lim.feature}"], FeatureLimits(lim)))
        if cfg.iso10816 is not None:
            chan_pos = {c.name: i for i, c in enumerate(cfg.channels)}
            for cname in cfg.iso10816.channels:
                feat = f"{cname}.velocity_rms_mm_s"
                rt.limits.append((chan_pos[cname], pos[feat], ZoneLimits(feat, cfg.iso10816)))
        rt.set_bundle(bundle, bundle_error)
        return rt

    @property
    def cfg(self) -> AssetConfig:
        return self.layout.cfg

    def set_bundle(self, bundle: Bundle | None, error: str | None) -> None:
        """Serve the asset with `bundle` (every mode without a bundle of its own); an
        open anomaly is closed silently (the new model judges afresh)."""
        if bundle is not None and error is None:
            error = check_bundle_fits(self.cfg, bundle)
        if error is not None:
            bundle = None
        self.models = replace(
            self.models, asset_bundle=bundle, error=error,
            asset_index=(self.layout.index(bundle.meta.feature_names)
                         if bundle is not None else _NO_INDEX))
        self._fresh_detector()

    def install_mode(self, mode: str, bundle: Bundle) -> None:
        """Serve `mode` with `bundle` (a mode that has a bundle of its own)."""
        m = self.models
        self.models = replace(
            m, mode_bundles={**m.mode_bundles, mode: bundle},
            mode_index={**m.mode_index, mode: self.layout.index(bundle.meta.feature_names)})
        self._fresh_detector()

    def _fresh_detector(self) -> None:
        self.detector.reset()
        self.raised_at = None

    @property
    def faulty_channels(self) -> list[str]:
        return [c.name for c, h in zip(self.cfg.channels, self.health, strict=True)
                if h.faulty]

    @property
    def state(self) -> State:
        return self.detector.state
