"""The detector's parameters, apart from the detector so config (and the ingest child,
which unpickles config) can name them without importing numpy."""

from __future__ import annotations

import math
from dataclasses import dataclass


@dataclass(frozen=True)
class DetectorParams:
    """Raise after `raise_k` of the last `raise_n` windows above threshold;
    clear after `clear_m` consecutive windows below the clear threshold.

    `stride` > 1 (hopping windows, see `over_windows`): the `raise_n` windows looked at
    are the current one and those `stride`, `2 * stride`, ... windows before it."""

    raise_k: int = 2
    raise_n: int = 3
    clear_m: int = 3
    stride: int = 1

    def over_windows(self, length_s: float, hop_s: float) -> DetectorParams:
        """The parameters for windows of `length_s` cut every `hop_s`.

        `raise_k` of `raise_n` count independent windows. Hopping windows overlap
        (`w = ceil(length_s / hop_s)` of them share any one sample), so counting
        consecutive ones would count one short disturbance several times (a 20 s window
        hopped by 1 s sees a 3 s spike in 20 windows). So the rule looks at windows that
        do not overlap: the current one and those `w`, `2w`, ... windows before it
        (`stride = w`), which a disturbance shorter than a window length cannot fill
        twice. It is judged at every hop, so the raise comes at the first hop that
        satisfies it. The clear rule is not strided: a state that lingers after the
        machine is back is itself a false alarm, and a re-raise needs the strided rule
        again.
        """
        w = max(1, math.ceil(length_s / hop_s - 1e-9))
        if w == 1:
            return self
        return DetectorParams(self.raise_k, self.raise_n, self.clear_m, stride=w)

    def __post_init__(self) -> None:
        if not (1 <= self.raise_k <= self.raise_n):
            raise ValueError("need 1 <= raise_k <= raise_n")
        if self.clear_m < 1:
            raise ValueError("need clear_m >= 1")
        if self.stride < 1:
            raise ValueError("need stride >= 1")
