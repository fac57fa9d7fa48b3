"""State detection: k-of-n raise, m-consecutive clear, with a deadband between.

Pure: a detector takes scores and returns transitions. The raise rule is "k of the
last n scored windows above the threshold"; the clear rule is "m consecutive scored
windows below the clear threshold" (a deadband, as alarm-management practice
recommends against chattering: ISA-18.2 / IEC 62682, numbers from memory).
"""

from __future__ import annotations

from collections import deque
from enum import StrEnum

import numpy as np

# Defined apart (numpy-free, for config and the ingest child); re-exported here.
from agent.core.detector_params import DetectorParams as DetectorParams


class State(StrEnum):
    """Detector state of one asset (and its mode)."""

    NORMAL = "normal"
    ANOMALOUS = "anomalous"


class Transition(StrEnum):
    RAISED = "raised"
    CLEARED = "cleared"


class Detector:
    """One asset's detector; `step` is called once per scored window, in time order."""

    __slots__ = ("_below", "_n_above", "_quiet_run", "_recent", "_span", "_stride", "params",
                 "peak_score", "settled", "state")

    def __init__(self, params: DetectorParams) -> None:
        self.params = params
        self.state = State.NORMAL
        self._stride = params.stride
        span = (params.raise_n - 1) * params.stride + 1
        self._span = span
        self._recent: deque[bool] = deque(maxlen=span)
        self._n_above = 0  # how many of `_recent` are True (kept, not summed per window)
        self._below = 0
        self.peak_score = 0.0
        # How many windows in a row went through `quiet` since `_recent` last changed
        # otherwise: once it is full of them, another changes nothing, and `settled`
        # says so (a caller may leave out `quiet` then).
        self._quiet_run = 0
        self.settled = False

    def _rises(self, above: bool) -> bool:
        """Append this window's verdict; whether k of the last n (strided) are above."""
        recent = self._recent
        if self._stride == 1:
            if len(recent) == recent.maxlen and recent[0]:
                self._n_above -= 1  # about to fall out of the last n
            recent.append(above)
            if above:
                self._n_above += 1
            return self._n_above >= self.params.raise_k
        recent.append(above)
        if not above:
            return False
        n = len(recent)
        return sum(recent[i] for i in range(n - 1, -1, -self._stride)) >= self.params.raise_k

    def step(self, score: float, threshold: float, clear_threshold: float) -> Transition | None:
        """Feed one window's score; return the transition it causes, if any."""
        above = score > threshold
        self._quiet_run = 0
        self.settled = False
        if self.state is State.NORMAL:
            if self._rises(above):
                self.state = State.ANOMALOUS
                self._below = 0
                self.peak_score = score
                return Transition.RAISED
            return None
        self.peak_score = max(self.peak_score, score)
        if score < clear_threshold:
            self._below += 1
            if self._below >= self.params.clear_m:
                self.state = State.NORMAL
                self._recent.clear()
                self._n_above = 0
                self._below = 0
                return Transition.CLEARED
        else:
            self._below = 0
        return None

    def quiet(self) -> None:
        """`step` of a window not above the threshold while NORMAL, which cannot raise
        (k of the last n were not above before it, and it adds none): only the
        history moves."""
        if self._quiet_run == self._span:
            return  # `_recent` is all False and full: as it was
        self._quiet_run += 1
        self.settled = self._quiet_run == self._span
        recent = self._recent
        if self._n_above and len(recent) == recent.maxlen and recent[0]:
            self._n_above -= 1  # strided, `_n_above` stays 0 (`_rises` sums instead)
        recent.append(False)

    def reset(self) -> None:
        """Forget history (after a model change or a gap)."""
        self.state = State.NORMAL
        self._recent.clear()
        self._n_above = 0
        self._below = 0
        self.peak_score = 0.0
        self._quiet_run = 0
        self.settled = False


def run_detector(scores: np.ndarray, threshold: float, clear_threshold: float,
                 params: DetectorParams) -> list[tuple[int, Transition]]:
    """Run a fresh detector over a score series; return (index, transition) pairs.

    The offline tools (evaluate, replay checks) use this so they judge with exactly
    the daemon's rule.
    """
    det = Detector(params)
    out: list[tuple[int, Transition]] = []
    for i, s in enumerate(np.asarray(scores, dtype=np.float64)):
        t = det.step(float(s), threshold, clear_threshold)
        if t is not None:
            out.append((i, t))
    return out
