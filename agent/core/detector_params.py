"""The detector's parameters, apart from the detector so config (and the ingest child,
which unpickles config) can name them without importing numpy."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class DetectorParams:
    """Raise after `raise_k` of the last `raise_n` windows above threshold;
    clear after `clear_m` consecutive windows below the clear threshold."""

    raise_k: int = 2
    raise_n: int = 3
    clear_m: int = 3

    def __post_init__(self) -> None:
        if not (1 <= self.raise_k <= self.raise_n):
            raise ValueError("need 1 <= raise_k <= raise_n")
        if self.clear_m < 1:
            raise ValueError("need clear_m >= 1")
