"""Re-learning's handle on the running pipeline (`agent.learning.ports.RunningAssets`).

Assets are named, never handed out: each call looks the asset up in whichever pipeline
runs now (`current()`, the pipeline loop's; a reload replaces it), so a caller cannot
keep a runtime a reload has retired. This is the one module outside the pipeline that
knows how an asset's runtime holds its bundles and detector; its events are made by
the pipeline's `Emitter.message`, the one place that moves sequence numbers.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

from agent.core.detector import State
from agent.core.detector_params import DetectorParams
from agent.core.events import EventType
from agent.learning.ports import OpenAnomaly
from agent.models.bundle import Bundle
from agent.ops.metrics import Metrics
from agent.pipeline.messages import Kind, OutMessage
from agent.pipeline.runtime import DEFAULT_MODE, AssetRuntime, check_bundle_fits
from agent.pipeline.tick import Pipeline


class PipelineControl:
    """`RunningAssets` over the pipeline `current()` returns (module docstring)."""

    def __init__(self, current: Callable[[], Pipeline], metrics: Metrics) -> None:
        self.current = current
        self.metrics = metrics

    def _find(self, asset: str) -> AssetRuntime | None:
        for rt in self.current().runtimes:
            if rt.cfg.name == asset:
                return rt
        return None

    def _rt(self, asset: str) -> AssetRuntime:
        rt = self._find(asset)
        if rt is None:
            raise KeyError(asset)
        return rt

    def names(self) -> list[str]:
        return [rt.cfg.name for rt in self.current().runtimes]

    def has(self, asset: str) -> bool:
        return self._find(asset) is not None

    def mode_now(self, asset: str) -> str:
        rt = self._rt(asset)
        return rt.mode if rt.modes is not None else DEFAULT_MODE

    def serving(self, asset: str, mode: str) -> Bundle | None:
        bundle, _ = self._rt(asset).models.for_mode(mode)
        return bundle

    def serving_modes(self, asset: str) -> dict[str, Bundle]:
        """Empty for an asset that no longer runs (a scrape may race a reload)."""
        rt = self._find(asset)
        if rt is None:
            return {}
        out = dict(rt.models.mode_bundles)
        if rt.models.asset_bundle is not None:
            out.setdefault(DEFAULT_MODE, rt.models.asset_bundle)
        return out

    def fits(self, asset: str, bundle: Bundle) -> str | None:
        return check_bundle_fits(self._rt(asset).cfg, bundle)

    def detector(self, asset: str) -> DetectorParams:
        return self._rt(asset).cfg.window_detector

    def open_anomaly(self, asset: str) -> OpenAnomaly | None:
        rt = self._rt(asset)
        if rt.state is not State.ANOMALOUS:
            return None
        return OpenAnomaly(rt.raised_at, rt.detector.peak_score)

    def install(self, asset: str, mode: str, bundle: Bundle) -> None:
        rt = self._rt(asset)
        if mode in rt.models.mode_bundles:
            rt.install_mode(mode, bundle)
        else:
            rt.set_bundle(bundle, None)
        self.metrics.model_loaded.labels(asset).set(1)

    def event(self, asset: str, etype: EventType, data: Mapping[str, Any], id_key: str,
              kind: Kind, time_s: float) -> tuple[OutMessage, int]:
        rt = self._rt(asset)
        msg = self.current().emit.message(rt, etype, time_s, dict(data), kind, id_key=id_key)
        return msg, rt.sequence
