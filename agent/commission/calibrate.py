"""Threshold calibration from held-out normal scores.

threshold       = numpy.quantile(scores, quantile) * margin
clear_threshold = max(clear_ratio * threshold, median(scores)), and never above threshold

The quantile sets the per-window exceedance rate on normal data (about 1 - quantile
before the margin); the margin covers the drift of "normal" between commissioning and
operation, and the k-of-n raise rule of the detector cuts the rate of raised alarms
further. The clear threshold sits below the raise level (a deadband against
chattering, ISA-18.2 practice) but never below the typical normal score, or a
healthy machine could fail to clear. Defaults are common practice, no source.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from agent.errors import DatasetError

DEFAULT_QUANTILE = 0.995
DEFAULT_MARGIN = 1.25
DEFAULT_CLEAR_RATIO = 0.8
MIN_CALIBRATION_WINDOWS = 20


@dataclass(frozen=True)
class Calibration:
    """Both thresholds and how they were obtained (`as_json` goes into model.json)."""

    threshold: float
    clear_threshold: float
    quantile: float
    margin: float
    clear_ratio: float
    n_windows: int
    quantile_score: float
    median_score: float
    method: str = "quantile"

    def as_json(self) -> dict[str, Any]:
        return {"method": self.method, "quantile": self.quantile, "margin": self.margin,
                "clear_ratio": self.clear_ratio, "n_windows": self.n_windows,
                "quantile_score": self.quantile_score, "median_score": self.median_score}


def calibrate(scores: np.ndarray, *, quantile: float = DEFAULT_QUANTILE,
              margin: float = DEFAULT_MARGIN, clear_ratio: float = DEFAULT_CLEAR_RATIO,
              min_windows: int = MIN_CALIBRATION_WINDOWS) -> Calibration:
    """Thresholds from held-out normal `scores` (see the module docstring).

    Raises ValueError for settings out of range and DatasetError when the scores
    cannot support a threshold (too few, non-finite, or all zero).
    """
    if not 0.0 < quantile <= 1.0:
        raise ValueError("quantile must be in (0, 1]")
    if not margin >= 1.0:
        raise ValueError("margin must be >= 1 (a margin below 1 raises on normal data)")
    if not 0.0 < clear_ratio <= 1.0:
        raise ValueError("clear_ratio must be in (0, 1]")
    s = np.asarray(scores, dtype=np.float64).reshape(-1)
    if s.size < min_windows:
        raise DatasetError(f"only {s.size} held-out window(s) to calibrate on; at least "
                           f"{min_windows} are needed (record for longer)")
    if not np.all(np.isfinite(s)):
        raise DatasetError("held-out scores contain non-finite values")
    q_score = float(np.quantile(s, quantile))
    threshold = q_score * margin
    if not threshold > 0.0:
        raise DatasetError("held-out scores are all zero: the data has nothing the model "
                           "cannot reproduce, so no threshold can be set")
    median = float(np.median(s))
    clear = min(threshold, max(clear_ratio * threshold, median))
    return Calibration(threshold=float(threshold), clear_threshold=float(clear),
                       quantile=float(quantile), margin=float(margin),
                       clear_ratio=float(clear_ratio), n_windows=int(s.size),
                       quantile_score=q_score, median_score=median)
