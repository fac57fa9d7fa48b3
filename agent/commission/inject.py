"""Synthetic faults injected into feature windows of normal data, for `evaluate`.

Pure: arrays in, arrays out, one seeded generator. A fault hits one channel per event:
every feature named `<channel>.<...>` (the part before the first dot; a name without
a dot is its own channel). Sizes are in units of sigma, the model's scaler scale for
each feature (its normal standard deviation), so a severity means the same on every
feature. What each kind does to the channel's features during an event of L windows:

    step    +s*sigma from onset to end: a level change (loose mount, a new load, a
            sensor offset)
    drift   +s*sigma*(i/L) for the i-th window, rising to s at the end: slow wear
    noise   +N(0, (s*sigma)^2) drawn per window and feature: a noise burst (a loose
            connector, electrical interference)
    stuck   every feature frozen at its value in the window before onset: a stale or
            frozen sensor. On the raw signal a flatline would also collapse the
            channel's dispersion features, which is easier to see; this is the
            harder case, where only the broken correlation with the other channels
            gives it away (s is unused)
    spike   +s*sigma for L windows (default 1): a transient. With a k-of-n raise
            rule (k > 1) a one-window spike should NOT raise an alarm; its event
            detection rate measures the filtering, and its AUC the score's response

Events are placed in slots of `L + gap` windows, one per slot, with a seeded jitter,
so the detector can clear between events; `gap` defaults to max(3L, 30).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from enum import StrEnum

import numpy as np

from agent.errors import DatasetError


class FaultKind(StrEnum):
    STEP = "step"
    DRIFT = "drift"
    NOISE = "noise"
    STUCK = "stuck"
    SPIKE = "spike"


_ALIASES = {"noise-burst": FaultKind.NOISE, "noise_burst": FaultKind.NOISE,
            "stuck-channel": FaultKind.STUCK, "stuck_channel": FaultKind.STUCK}
DEFAULT_SEVERITY = {FaultKind.STEP: 3.0, FaultKind.DRIFT: 6.0, FaultKind.NOISE: 3.0,
                    FaultKind.STUCK: 0.0, FaultKind.SPIKE: 8.0}
DEFAULT_LENGTH = {FaultKind.STEP: 30, FaultKind.DRIFT: 60, FaultKind.NOISE: 20,
                  FaultKind.STUCK: 30, FaultKind.SPIKE: 1}


@dataclass(frozen=True)
class InjectSpec:
    """One kind of fault to inject: size in sigma, event length in windows."""

    kind: FaultKind
    severity: float
    length: int

    @property
    def name(self) -> str:
        return self.kind.value


@dataclass(frozen=True)
class InjectedEvent:
    kind: FaultKind
    channel: str
    first: int  # index of the first faulty window
    last: int  # index of the last faulty window (inclusive)
    severity: float


def parse_inject(text: str) -> InjectSpec:
    """'step', 'step:4' (severity) or 'step:4:40' (severity, length) -> InjectSpec."""
    parts = text.strip().lower().split(":")
    key = parts[0]
    try:
        kind = _ALIASES.get(key) or FaultKind(key)
    except ValueError:
        known = ", ".join(k.value for k in FaultKind)
        raise ValueError(f"unknown fault kind {key!r} (known: {known})") from None
    try:
        severity = float(parts[1]) if len(parts) > 1 and parts[1] else DEFAULT_SEVERITY[kind]
        length = int(parts[2]) if len(parts) > 2 and parts[2] else DEFAULT_LENGTH[kind]
    except ValueError:
        raise ValueError(f"bad fault spec {text!r}: expected KIND[:SEVERITY[:LENGTH]]") from None
    if len(parts) > 3 or length < 1 or not np.isfinite(severity) or severity < 0:
        raise ValueError(f"bad fault spec {text!r}: expected KIND[:SEVERITY>=0[:LENGTH>=1]]")
    return InjectSpec(kind, severity, length)


def channel_groups(feature_names: Sequence[str]) -> dict[str, list[int]]:
    """Channel name -> column indices of its features, in first-seen order."""
    groups: dict[str, list[int]] = {}
    for i, name in enumerate(feature_names):
        groups.setdefault(name.split(".", 1)[0], []).append(i)
    return groups


def event_slots(n: int, spec: InjectSpec, gap: int | None = None) -> tuple[int, int]:
    """How many events of `spec` fit in `n` windows and the slot each gets (its own
    windows plus a gap of `gap`, by default 3 x its length and at least 30)."""
    length = spec.length
    gap = max(3 * length, 30) if gap is None else gap
    slot = length + gap
    n_events = n // slot
    if n_events == 0:
        if n < length + 2:
            raise DatasetError(f"{n} normal window(s) are too few to inject {spec.name} "
                               f"events of {length} window(s)")
        n_events, slot = 1, n
    return n_events, slot


def inject(features: np.ndarray, sigma: np.ndarray, feature_names: Sequence[str],
           spec: InjectSpec, *, seed: int = 0,
           gap: int | None = None) -> tuple[np.ndarray, list[InjectedEvent]]:
    """A copy of `features` [N, F] with `spec` events injected, and the events."""
    x = np.array(features, dtype=np.float64, copy=True)
    n = x.shape[0]
    sigma = np.asarray(sigma, np.float64)
    length = spec.length
    n_events, slot = event_slots(n, spec, gap)
    groups = channel_groups(feature_names)
    channels = list(groups)
    rng = np.random.default_rng([seed, list(FaultKind).index(spec.kind)])
    events: list[InjectedEvent] = []
    for e in range(n_events):
        room = slot - length
        # keep at least one normal window before onset (stuck needs a last good value)
        first = e * slot + 1 + int(rng.integers(0, max(1, room - 1)))
        last = min(first + length, n) - 1
        channel = channels[int(rng.integers(0, len(channels)))]
        cols = np.asarray(groups[channel])
        rows = slice(first, last + 1)
        size = spec.severity * sigma[cols]
        if spec.kind is FaultKind.STEP or spec.kind is FaultKind.SPIKE:
            x[rows, cols] += size
        elif spec.kind is FaultKind.DRIFT:
            ramp = np.arange(1, last - first + 2, dtype=np.float64) / length
            x[rows, cols] += ramp[:, None] * size
        elif spec.kind is FaultKind.NOISE:
            x[rows, cols] += rng.normal(0.0, 1.0, (last - first + 1, cols.size)) * size
        elif spec.kind is FaultKind.STUCK:
            x[rows, cols] = x[first - 1, cols]
        events.append(InjectedEvent(spec.kind, channel, first, last, spec.severity))
    return x, events
