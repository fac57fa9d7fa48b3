"""The detector's parameters, apart from the detector so config (and the ingest child,
which unpickles config) can name them without importing numpy."""

from __future__ import annotations

import math
from dataclasses import dataclass


@dataclass(frozen=True)
class DetectorParams:
    """Raise after `raise_k` of the last `raise_n` windows above threshold;
    clear after `clear_m` consecutive windows below the clear threshold."""

    raise_k: int = 2
    raise_n: int = 3
    clear_m: int = 3

    def over_windows(self, length_s: float, hop_s: float) -> DetectorParams:
        """The parameters for windows of `length_s` cut every `hop_s`.

        `raise_k` of `raise_n` count independent windows. Hopping windows overlap
        (`length_s / hop_s` of them share any one sample), so near-duplicates would count
        one short disturbance several times (a 20 s window hopped by 1 s sees a 3 s
        spike in 20 windows): the raise rule is stretched to the same span of time,
        `k * w` of the last `n * w` windows with `w = ceil(length_s / hop_s)`. The clear
        rule is not stretched: chattering is already held off by the stretched raise, and
        a state that lingers after the machine is back is itself a false alarm.
        """
        w = max(1, math.ceil(length_s / hop_s - 1e-9))
        if w == 1:
            return self
        return DetectorParams(self.raise_k * w, self.raise_n * w, self.clear_m)

    def __post_init__(self) -> None:
        if not (1 <= self.raise_k <= self.raise_n):
            raise ValueError("need 1 <= raise_k <= raise_n")
        if self.clear_m < 1:
            raise ValueError("need clear_m >= 1")
