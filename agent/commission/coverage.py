"""What a recording covers: its window geometry, the slow variables in it, and which
features a model can be trusted with.

Pure: values in, values out.

A *slow* channel is one whose level moves between windows by more than its samples
scatter inside a window: over non-overlapping windows,
`var(window means) >= mean(within-window variance)`. For white noise the left side is
the right side divided by the samples per window; for a process whose correlation time
is short against the window it is that time (in samples) over the samples per window;
reaching 1 means a single sample says as much about the window's level as all of them,
i.e. the level is a slowly moving state (a temperature, a tank level, a drifting
setpoint), not noise around a fixed value. (The ratio is the one-way ANOVA of the
window means against the within-window variance; textbook.)

A slow channel's level is only *covered* by the recording when the recording shows
its wander repeatedly: its non-overlapping window means must cross their median at
least `MIN_CROSSINGS` times (each crossing is half a swing; 10 is five full swings,
enough to have seen the range it moves over and how fast; common practice, no
source). A temperature that follows the load cycle six times in an hour is covered; one
that crept one way during a ten-minute recording is not, however many windows it gave.
A model trained on a recording that holds only a few minutes of a temperature that
wanders over hours has learnt one point of its range: every later value looks
anomalous (on the SKAB pump test bed, the engine and fluid temperatures were the top
contributor of most false alarms). Its spread inside a window is no better: for a level
that moves slower than a window, the within-window spread measures how fast it is
moving, which the recording has not covered either (there, a fluid temperature's
window spread reached 39 times its recorded spread in normal running). So every
feature of a slow, uncovered channel is left out of the model and reported; a limit on
the channel still watches it, and recording for longer, until its wander repeats,
brings it back.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

MIN_CROSSINGS = 10


@dataclass(frozen=True)
class WindowGeometry:
    length_s: float
    hop_s: float

    @property
    def per_length(self) -> int:
        """Windows that share any one instant: ceil(length / hop)."""
        return max(1, math.ceil(self.length_s / self.hop_s - 1e-9))


def window_geometry(window: dict[str, Any] | Any, window_start: np.ndarray,
                    window_end: np.ndarray) -> WindowGeometry:
    """The window settings from a dataset's manifest, else inferred from its times."""
    length = window.get("length_s") if hasattr(window, "get") else None
    hop = window.get("hop_s") if hasattr(window, "get") else None
    ws = np.asarray(window_start, dtype=np.float64)
    we = np.asarray(window_end, dtype=np.float64)
    if not length:
        length = float(np.median(we - ws)) if ws.size else 1.0
    if not hop:
        d = np.diff(ws)
        d = d[d > 0]
        hop = float(np.median(d)) if d.size else float(length)
    length = float(length) if length and length > 0 else 1.0
    hop = min(float(hop), length) if hop and hop > 0 else length
    return WindowGeometry(length, hop)


@dataclass(frozen=True)
class ChannelCoverage:
    channel: str
    slow: bool
    level_ratio: float          # var(window means) / mean(within-window variance)
    crossings: int              # times its window means crossed their median
    covered: bool

    def as_json(self) -> dict[str, Any]:
        return {"channel": self.channel, "slow": self.slow,
                "level_ratio": round(self.level_ratio, 4),
                "median_crossings": self.crossings,
                "covered": self.covered}


@dataclass(frozen=True)
class Coverage:
    geometry: WindowGeometry
    channels: tuple[ChannelCoverage, ...]
    excluded: tuple[str, ...]   # feature names left out of the model
    independent_windows: int

    def uncovered(self) -> list[ChannelCoverage]:
        return [c for c in self.channels if c.slow and not c.covered]

    def as_json(self) -> dict[str, Any]:
        return {"window": {"length_s": self.geometry.length_s, "hop_s": self.geometry.hop_s},
                "independent_windows": self.independent_windows,
                "min_median_crossings": MIN_CROSSINGS,
                "slow_channels": [c.as_json() for c in self.channels if c.slow],
                "excluded_features": list(self.excluded)}

    def lines(self) -> list[str]:
        """What the recording covers, for `train`'s summary."""
        out = []
        span_s = self.independent_windows * self.geometry.length_s
        for c in self.uncovered():
            need_s = MIN_CROSSINGS / max(c.crossings, 1) * span_s
            out.append(f"{c.channel}: its level wanders slower than a window "
                       f"(ratio {c.level_ratio:.3g}) and crossed its median {c.crossings} "
                       f"time(s) in the {span_s / 60:.0f} min recorded (needs "
                       f"{MIN_CROSSINGS}); it is not modelled: watch it with a limit, or "
                       f"record until its wander repeats (at this pace about "
                       f"{need_s / 3600:.2g} h)")
        return out


def median_crossings(x: np.ndarray) -> int:
    """How often the series crosses its median (values on the median are skipped)."""
    d = np.sign(np.asarray(x, dtype=np.float64) - np.median(x))
    d = d[d != 0]
    return int(np.count_nonzero(d[1:] != d[:-1]))


def assess(feature_names: tuple[str, ...] | list[str], features: np.ndarray,
           geometry: WindowGeometry) -> Coverage:
    """Slow channels and the features to leave out (see the module docstring).

    `features` are a recording's windows in time order (rows) by `feature_names`."""
    x = np.asarray(features, dtype=np.float64)
    sub = x[:: geometry.per_length]
    index = {n: i for i, n in enumerate(feature_names)}
    channels = list(dict.fromkeys(n.rsplit(".", 1)[0] for n in feature_names))
    out: list[ChannelCoverage] = []
    excluded: list[str] = []
    for ch in channels:
        mi, si = index.get(f"{ch}.mean"), index.get(f"{ch}.std")
        if mi is None or si is None or sub.shape[0] < 3:
            continue
        means = sub[:, mi]
        within = float(np.mean(sub[:, si] ** 2))
        between = float(np.var(means, ddof=1))
        ratio = between / within if within > 0 else (math.inf if between > 0 else 0.0)
        crossings = median_crossings(means)
        slow = ratio >= 1.0
        covered = (not slow) or crossings >= MIN_CROSSINGS
        out.append(ChannelCoverage(ch, slow, ratio, crossings, covered))
        if not covered:
            excluded += [n for n in feature_names if n.rsplit(".", 1)[0] == ch]
    return Coverage(geometry, tuple(out), tuple(excluded), int(sub.shape[0]))
