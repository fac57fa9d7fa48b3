"""Operating modes: which mode a window is in, with hysteresis and settling. Pure.

A mode is decided per window from one channel of the asset:

* by value bands: the window mean of the channel (e.g. speed in rpm) against each
  mode's [min, max) band. The current mode is kept while the value stays within its
  band widened by `hysteresis` on both sides, so a speed hovering on a boundary does
  not flip modes window after window;
* by code: the last value in the window is a mode code (a PLC state word published as
  a number), matched exactly to a mode's `code`.

A window whose mode channel has no samples keeps the current mode. A value no mode
covers gives the mode `UNKNOWN_MODE` (not scored). After a change, windows that start
less than the new mode's `settling_s` after the first window in the new mode are
"settling": not scored, but counted; the first decision after start-up does not settle
(the machine may have been in that mode for hours).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from agent.config.schema import ModesConfig, ModeSpec

UNKNOWN_MODE = "unknown"


def _in_band(m: ModeSpec, v: float, widen: float = 0.0) -> bool:
    lo, hi = _widened(m, widen)
    return lo <= v < hi


def mode_for_value(cfg: ModesConfig, value: float, current: str | None) -> str:
    """The mode for one value given the current mode (hysteresis applied)."""
    if not math.isfinite(value):
        return current or UNKNOWN_MODE
    if cfg.by_code:
        return next((m.name for m in cfg.states if m.code == value), UNKNOWN_MODE)
    cur = cfg.spec(current) if current is not None else None
    if cur is not None and _in_band(cur, value, cfg.hysteresis):
        return cur.name
    return next((m.name for m in cfg.states if _in_band(m, value)), UNKNOWN_MODE)


@dataclass(frozen=True)
class ModeDecision:
    mode: str
    changed: bool  # the mode differs from the previous window's
    settling: bool  # inside the settling time after a change
    scored: bool  # the mode is one the model scores


class ModeTracker:
    """One asset's mode across windows."""

    def __init__(self, cfg: ModesConfig) -> None:
        self.cfg = cfg
        self._specs = {m.name: m for m in cfg.states}  # `cfg.spec`, looked up per window
        self.mode: str | None = None
        self.since: float | None = None  # start of the first window in this mode
        self.settle_until = -math.inf
        # The current mode, its band widened by the hysteresis (`mode_for_value` keeps
        # the mode while the value stays inside it) and the decisions that keep it (not
        # settling, settling: values, shared); None while no mode with a band holds.
        self._hold: tuple[str, float, float, ModeDecision, ModeDecision] | None = None

    def step(self, values: np.ndarray, window_start: float) -> ModeDecision:
        """Decide the mode of the window starting at `window_start` from the mode
        channel's samples in it."""
        v = values[np.isfinite(values)] if values.size else values
        if v.size == 0:
            return self.step_value(None, window_start)
        return self.step_value(float(v[-1]) if self.cfg.by_code else float(v.mean()),
                               window_start)

    def step_value(self, value: float | None, window_start: float) -> ModeDecision:
        """`step` given what it reads of the samples: the mean of the finite ones (the
        last one with `by_code`), None when there is none."""
        hold = self._hold
        if hold is not None and value is not None and hold[0] is self.mode \
                and hold[1] <= value < hold[2]:
            # The current mode holds (hysteresis): nothing changes.
            return hold[4] if window_start < self.settle_until else hold[3]
        if value is None:
            mode = self.mode or UNKNOWN_MODE
        else:
            mode = mode_for_value(self.cfg, value, self.mode)
        changed = self.mode is not None and mode != self.mode
        if changed:
            spec = self._specs.get(mode)
            settle = spec.settling_s if spec is not None else 0.0
            self.settle_until = window_start + settle
        if mode != self.mode:
            self.since = window_start
        self.mode = mode
        spec = self._specs.get(mode)
        self._hold = None
        if spec is not None and not self.cfg.by_code:
            lo, hi = _widened(spec, self.cfg.hysteresis)
            self._hold = (mode, lo, hi, ModeDecision(mode, False, False, spec.scored),
                          ModeDecision(mode, False, True, spec.scored))
        return ModeDecision(mode, changed, window_start < self.settle_until,
                            spec is not None and spec.scored)


def _widened(m: ModeSpec, widen: float) -> tuple[float, float]:
    """The mode's band [lo, hi) widened by `widen` on both sides (`_in_band`)."""
    lo = m.min_value if m.min_value is not None else -math.inf
    hi = m.max_value if m.max_value is not None else math.inf
    return lo - widen, hi + widen
