"""One asset's part of `/status` and `watchkeep status`, from its runtime."""

from __future__ import annotations

from typing import Any

from agent.core.events import rfc3339
from agent.core.limits import ZoneLimits
from agent.pipeline.runtime import AssetRuntime


def asset_status(rt: AssetRuntime) -> dict[str, Any]:
    """The asset's mode, state, score, model, sensor faults, limits and errors."""
    meta = rt.models.shown.meta if rt.models.shown else None
    serving, _ = rt.models.for_mode(rt.mode)
    if serving is not None:
        meta = serving.meta
    limits = {}
    for ci, _at, mon in rt.limits:
        ch = rt.cfg.channels[ci]
        if isinstance(mon, ZoneLimits):
            limits[mon.feature] = {"zone": mon.zone, "operational": mon.operational}
        else:
            limits[f"{ch.name}.{mon.cfg.feature}"] = {"level": mon.level}
    return {
        "asset": rt.cfg.name, "mode": rt.mode, "state": rt.state.value,
        "settling": rt.settling,
        "score": rt.last_score, "threshold": meta.threshold if meta else None,
        "last_window_end": rfc3339(rt.last_window_end) if rt.last_window_end else None,
        "last_event": rt.last_event,
        "model": ({"id": meta.model_id, "version": meta.version} if meta else None),
        "model_error": rt.models.error,
        "mode_models": {m: b.meta.model_id for m, b in rt.models.mode_bundles.items()},
        "mode_model_errors": dict(rt.models.mode_errors),
        "sensor_faults": {c.name: [r.value for r in h.reasons]
                          for c, h in zip(rt.cfg.channels, rt.health, strict=True)
                          if h.faulty},
        "velocity_rms_mm_s": {k: round(v, 4) for k, v in rt.last_velocity_mm_s.items()},
        "limits": limits,
        # Containment (issue 20): the stage and error of the asset's failing work, None
        # while it works; failures in all.
        "error": ({"stage": rt.error[0], "detail": rt.error[1]}
                  if rt.error is not None else None),
        "errors": rt.errors,
        "coverage": None if rt.coverage is None else round(rt.coverage, 4),
        "empty_windows": rt.empty_streak,
    }
