"""What the pipeline keeps per asset between ticks (`AssetRuntime`), and how an asset's
feature row is laid out.

A runtime holds the asset's window assembler, detector, bundles (the asset's and its
modes'), sensor health, limits and the positions in the full feature row that the
models, limits and the window observer read. Built once per asset from the config
(`AssetRuntime.build`); only the bundles change while it lives (`set_bundle`).
"""

from __future__ import annotations

import logging
from collections import deque
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from agent.config.load import AssetConfig, Decoder
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


def _full_index(asset: AssetConfig, names: Sequence[str]) -> np.ndarray:
    """Positions of `names` in the asset's full feature row."""
    layout = feature_layout(asset)
    return np.asarray([layout[n] for n in names], dtype=np.int64)


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


@dataclass(slots=True)
class AssetRuntime:
    """Everything the pipeline keeps for one asset between ticks."""

    cfg: AssetConfig
    assembler: WindowAssembler
    detector: Detector
    bundle: Bundle | None = None
    bundle_error: str | None = None
    model_index: np.ndarray = field(default_factory=lambda: np.empty(0, np.int64))
    record_index: np.ndarray = field(default_factory=lambda: np.empty(0, np.int64))
    record_names: tuple[str, ...] = ()
    mode: str = DEFAULT_MODE
    sequence: int = 0
    last_score: float | None = None
    last_window_end: float | None = None
    last_event: dict[str, Any] | None = None
    raised_at: float | None = None
    raised_window: tuple[float, float] | None = None
    escalation: EscalationTracker = field(default_factory=EscalationTracker)
    # Per-feature squared errors of the last windows, as far back as the raise rule looks
    # (the drifting-sensor check compares the oldest with the newest); channels reported
    # as drifting sensors -> consecutive normal windows since.
    sq_history: deque[np.ndarray] = field(default_factory=lambda: deque(maxlen=1))
    suspects: dict[str, int] = field(default_factory=dict)
    # Machine know-how: per-mode bundles, mode tracking, sensor health, limits.
    asset_bundle: Bundle | None = None
    mode_bundles: dict[str, Bundle] = field(default_factory=dict)
    mode_bundle_errors: dict[str, str] = field(default_factory=dict)
    mode_index: dict[str, np.ndarray] = field(default_factory=dict)
    modes: ModeTracker | None = None
    settling: bool = False
    health: list[ChannelHealth] = field(default_factory=list)
    # (channel index, row position, monitor) for every configured limit and ISO zone
    limits: list[tuple[int, int, FeatureLimits | ZoneLimits]] = field(default_factory=list)
    last_velocity_mm_s: dict[str, float] = field(default_factory=dict)
    started_s: float | None = None
    spectral: list[int] = field(default_factory=list)  # channels with spectral features
    # Per channel: (block, row) of its samples in a closed window's `blocks`.
    chan_at: tuple[tuple[int, int], ...] = ()
    speed_index: int | None = None
    mode_index_ch: int | None = None
    velocity_at: list[tuple[int, int]] = field(default_factory=list)  # (channel, row position)
    stale_channels: list[int] = field(default_factory=list)  # channels with `stale_s`
    checked: list[int] = field(default_factory=list)  # channels with any health check
    # Per channel: whether it is in `checked`, and whether its check wants the rate of
    # change (the judge's batch statistics).
    is_checked: tuple[bool, ...] = ()
    wants_rate: tuple[bool, ...] = ()
    # What the threshold and anomalous gauges were last set to by `_step` (None: unknown).
    shown_threshold: float | None = None
    shown_anomalous: int | None = None
    # Containment (issue 20): the asset's last failure in a tick, (stage, detail), while
    # its work keeps failing (None once a tick's work succeeds); how many failures in
    # all; whether it has had any work yet.
    error: tuple[str, str] | None = None
    errors: int = 0
    worked: bool = False
    # Samples in the last closed window over those promised (lowest channel; 0 after
    # empty windows) and how many windows in a row closed empty.
    coverage: float | None = None
    shown_coverage: float | None = None
    empty_streak: int = 0
    # Time-domain features any consumer of the row reads (config, limits; models are
    # checked to need no others): the feature pass computes only these.
    td_needed: frozenset[str] = frozenset()

    @classmethod
    def build(cls, cfg: AssetConfig, bundle: Bundle | None, bundle_error: str | None,
              mode_bundles: tuple[dict[str, Bundle], dict[str, str]] | None = None
              ) -> AssetRuntime:
        """A fresh runtime. The per-mode bundles are loaded from the config unless given."""
        rt = cls(cfg=cfg,
                 assembler=WindowAssembler(cfg.window, tuple(c.rate_hz for c in cfg.channels)),
                 detector=Detector(cfg.window_detector),
                 escalation=EscalationTracker(cfg.window_detector.raise_k,
                                              cfg.window_detector.raise_n,
                                              cfg.window_detector.stride),
                 sq_history=deque(maxlen=(cfg.window_detector.raise_n - 1)
                                  * cfg.window_detector.stride + 1))
        rt.record_names = asset_feature_names(cfg)
        rt.record_index = _full_index(cfg, rt.record_names)
        rt.mode_bundles, rt.mode_bundle_errors = (mode_bundles if mode_bundles is not None
                                                  else load_mode_bundles(cfg))
        rt.mode_index = {m: _full_index(cfg, b.meta.feature_names)
                         for m, b in rt.mode_bundles.items()}
        chan_pos = {c.name: i for i, c in enumerate(cfg.channels)}
        if cfg.modes is not None:
            rt.modes = ModeTracker(cfg.modes)
            rt.mode = UNKNOWN_MODE
            rt.mode_index_ch = chan_pos.get(cfg.modes.channel)
        rt.speed_index = chan_pos.get(cfg.speed_channel) if cfg.speed_channel else None
        rt.health = [ChannelHealth(HealthLimits(c.min_value, c.max_value, c.stale_s,
                                                c.flatline_windows, c.max_rate_per_s,
                                                liveness=c.decoder is Decoder.SPARKPLUG_B))
                     for c in cfg.channels]
        rt.spectral = [i for i, c in enumerate(cfg.channels) if c.spectrum is not None]
        rt.chan_at = rt.assembler.channel_rows()
        rt.stale_channels = [i for i, c in enumerate(cfg.channels) if c.stale_s is not None]
        rt.checked = [i for i, h in enumerate(rt.health) if not h.limits.passive]
        rt.is_checked = tuple(not h.limits.passive for h in rt.health)
        rt.assembler.keep_times = bool(rt.checked)  # only sensor health reads them
        rt.wants_rate = tuple(h.limits.max_rate_per_s is not None for h in rt.health)
        td = {f for c in cfg.channels for f in c.all_features if f in FEATURE_INDEX}
        td |= {lim.feature for c in cfg.channels for lim in c.limits
               if lim.feature in FEATURE_INDEX}
        rt.td_needed = frozenset(td)
        layout = feature_layout(cfg)
        rt.velocity_at = [(i, layout[f"{c.name}.velocity_rms_mm_s"])
                          for i, c in enumerate(cfg.channels)
                          if c.spectrum is not None and c.spectrum.velocity_rms]
        for i, c in enumerate(cfg.channels):
            for lim in c.limits:
                rt.limits.append((i, layout[f"{c.name}.{lim.feature}"], FeatureLimits(lim)))
        if cfg.iso10816 is not None:
            for cname in cfg.iso10816.channels:
                feat = f"{cname}.velocity_rms_mm_s"
                rt.limits.append((chan_pos[cname], layout[feat], ZoneLimits(feat, cfg.iso10816)))
        rt.set_bundle(bundle, bundle_error)
        return rt

    def set_bundle(self, bundle: Bundle | None, error: str | None) -> None:
        """Set the asset-level bundle (serves every mode without a bundle of its own)."""
        if bundle is not None and error is None:
            error = check_bundle_fits(self.cfg, bundle)
        if error is not None:
            bundle = None
        self.asset_bundle = bundle
        # `bundle` is what the metrics and readiness look at: the asset's model, or when
        # only modes have models, the first of them.
        self.bundle = bundle if bundle is not None else next(iter(self.mode_bundles.values()),
                                                              None)
        self.bundle_error = error
        self.model_index = (_full_index(self.cfg, bundle.meta.feature_names)
                            if bundle is not None else np.empty(0, np.int64))
        self.detector.reset()
        self.raised_at = None

    def bundle_for(self, mode: str) -> tuple[Bundle | None, np.ndarray]:
        """The bundle that scores windows in `mode`, and its positions in the full row."""
        b = self.mode_bundles.get(mode)
        if b is not None:
            return b, self.mode_index[mode]
        return self.asset_bundle, self.model_index

    @property
    def faulty_channels(self) -> list[str]:
        return [c.name for c, h in zip(self.cfg.channels, self.health, strict=True)
                if h.faulty]

    @property
    def state(self) -> State:
        return self.detector.state
