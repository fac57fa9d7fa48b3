"""Fault progression and sensor-fault effects (pure apart from the generator passed in).

Machine faults are severities in [0, 1] over time (linear ramp from onset); the plant
turns them into physics. Sensor faults rewrite what a sensor reports, after the
physics: stuck (holds the last good value), drift (a growing offset), dropout (no
messages), spikes (isolated outliers of random sign).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from simulator.scenario import MachineFault, MachineFaultKind, SensorFault, SensorFaultKind
from simulator.signals import ramp

FloatArray = NDArray[np.float64]
BoolArray = NDArray[np.bool_]


@dataclass(frozen=True)
class FaultLevels:
    """Severity of each machine fault kind at each time (0 = healthy)."""

    imbalance: FloatArray
    bearing: FloatArray
    cavitation: FloatArray
    strainer: FloatArray
    misalignment: FloatArray


_FIELD = {
    MachineFaultKind.IMBALANCE: "imbalance",
    MachineFaultKind.BEARING_OUTER_RACE: "bearing",
    MachineFaultKind.CAVITATION: "cavitation",
    MachineFaultKind.CLOGGED_STRAINER: "strainer",
    MachineFaultKind.MISALIGNMENT: "misalignment",
}


def fault_levels(faults: Sequence[MachineFault], t_s: FloatArray, end_s: float) -> FaultLevels:
    """Severities at scenario times `t_s`; overlapping faults of one kind take the maximum."""
    t = np.asarray(t_s, dtype=np.float64)
    levels = {name: np.zeros_like(t) for name in _FIELD.values()}
    for f in faults:
        stop = f.end_s if f.end_s is not None else end_s + 1.0
        sev = f.severity * ramp(t, f.onset_s, f.ramp_s, stop)
        name = _FIELD[f.kind]
        np.maximum(levels[name], sev, out=levels[name])
    return FaultLevels(**levels)


def _active(f: SensorFault, t: FloatArray, end_s: float) -> BoolArray:
    stop = f.end_s if f.end_s is not None else end_s + 1.0
    return (t >= f.onset_s) & (t < stop)


def dropout_mask(faults: Sequence[SensorFault], t_s: FloatArray, end_s: float) -> BoolArray:
    """True for messages that are published (False inside a dropout)."""
    t = np.asarray(t_s, dtype=np.float64)
    keep = np.ones(t.shape, dtype=bool)
    for f in faults:
        if f.kind is SensorFaultKind.DROPOUT:
            keep &= ~_active(f, t, end_s)
    return keep


@dataclass
class SensorFaultState:
    """What a channel's sensor faults carry from one chunk to the next.

    `last_good` is the last value the healthy sensor reported; `held` the value each
    stuck fault (by index) froze at.
    """

    last_good: float = 0.0
    held: dict[int, float] = field(default_factory=dict)


def apply_sensor_faults(
    values: FloatArray, t_s: FloatArray, faults: Sequence[SensorFault], end_s: float,
    state: SensorFaultState, rng: np.random.Generator, rate_hz: float,
) -> FloatArray:
    """The values the faulty sensor reports for true `values` sampled at `t_s`.

    `rng` draws spike times and signs; it is advanced by the same amount on every call
    whatever the faults are, so a fault never shifts the randomness of later chunks.
    """
    v = np.asarray(values, dtype=np.float64)
    t = np.asarray(t_s, dtype=np.float64)
    u = rng.random(v.shape)
    sign = rng.random(v.shape)
    out = v.copy()
    for i, f in enumerate(faults):
        on = _active(f, t, end_s)
        if not on.any():
            continue
        if f.kind is SensorFaultKind.STUCK:
            if i not in state.held:
                first = int(np.argmax(on))
                state.held[i] = float(v[first - 1]) if first > 0 else state.last_good
            out[on] = state.held[i]
        elif f.kind is SensorFaultKind.DRIFT:
            stop = f.end_s if f.end_s is not None else end_s + 1.0
            out += f.magnitude * ramp(t, f.onset_s, f.ramp_s, stop)
        elif f.kind is SensorFaultKind.SPIKES:
            hit = on & (u < f.rate_hz / rate_hz)
            size = f.magnitude * (0.5 + 0.5 * np.abs(2 * sign - 1))
            out[hit] += np.where(sign[hit] < 0.5, -1.0, 1.0) * size[hit]
    if len(v):
        state.last_good = float(v[-1])
    return out
