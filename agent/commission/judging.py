"""Judging a detector against the truth, for `watchkeep evaluate` (pure).

- an event is *detected* when the detector is in the anomalous state at any of its
  windows; the *delay* runs from the fault's onset to the end of the first such window
  (0 windows if the detector was already anomalous at onset);
- a *false alarm* is a raise whose evidence — the raising window and the n-1 before
  it — holds no faulty window; false alarms per day divide by the time covered by
  normal windows (the union of their intervals, so hopping windows count once);
- ROC AUC compares faulty windows' scores with normal ones (Mann-Whitney).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from agent.commission.truth import TruthEvent
from agent.core.detector import DetectorParams, Transition, run_detector

SECONDS_PER_DAY = 86400.0


def rank_average(x: np.ndarray) -> np.ndarray:
    """1-based ranks with ties given their average rank."""
    x = np.asarray(x, np.float64)
    order = np.argsort(x, kind="mergesort")
    sx = x[order]
    # boundaries of runs of equal values
    starts = np.concatenate([[0], np.nonzero(np.diff(sx))[0] + 1])
    ends = np.concatenate([starts[1:], [sx.size]])
    avg = (starts + ends + 1) / 2.0  # mean of ranks starts+1 .. ends
    ranks = np.empty(x.size, np.float64)
    ranks[order] = np.repeat(avg, ends - starts)
    return ranks


def roc_auc(scores: np.ndarray, positive: np.ndarray) -> float:
    """ROC AUC by the Mann-Whitney rank statistic: P(score_pos > score_neg) + P(tie)/2.

    NaN when one class is empty.
    """
    s = np.asarray(scores, np.float64)
    y = np.asarray(positive, bool)
    n_pos = int(y.sum())
    n_neg = int(y.size - n_pos)
    if n_pos == 0 or n_neg == 0:
        return math.nan
    r = rank_average(s)
    u = r[y].sum() - n_pos * (n_pos + 1) / 2.0
    return float(u / (n_pos * n_neg))


def union_duration_s(start: np.ndarray, end: np.ndarray) -> float:
    """Length of the union of intervals [start, end) in seconds."""
    if len(start) == 0:
        return 0.0
    order = np.argsort(start, kind="mergesort")
    s, e = np.asarray(start, np.float64)[order], np.asarray(end, np.float64)[order]
    total, cur_s, cur_e = 0.0, s[0], e[0]
    for a, b in zip(s[1:], e[1:], strict=True):
        if a > cur_e:
            total += cur_e - cur_s
            cur_s, cur_e = a, b
        else:
            cur_e = max(cur_e, b)
    return float(total + cur_e - cur_s)


@dataclass(frozen=True)
class EventOutcome:
    event: TruthEvent
    detected: bool
    delay_windows: int | None
    delay_s: float | None


@dataclass(frozen=True)
class Detection:
    """How one (k, n, m) setting did on one scenario."""

    params: DetectorParams
    events: list[EventOutcome]
    false_alarms: int
    normal_s: float
    raises: int

    @property
    def n_events(self) -> int:
        return len(self.events)

    @property
    def n_detected(self) -> int:
        return sum(e.detected for e in self.events)

    @property
    def detection_rate(self) -> float:
        return self.n_detected / self.n_events if self.events else math.nan

    def delays(self) -> tuple[list[int], list[float]]:
        w = [e.delay_windows for e in self.events if e.delay_windows is not None]
        s = [e.delay_s for e in self.events if e.delay_s is not None]
        return w, s

    @property
    def false_alarms_per_day(self) -> float:
        return self.false_alarms / (self.normal_s / SECONDS_PER_DAY) if self.normal_s else math.nan


def judge(scores: np.ndarray, window_start: np.ndarray, window_end: np.ndarray,
          kinds: np.ndarray, events: Sequence[TruthEvent], threshold: float,
          clear_threshold: float, params: DetectorParams) -> Detection:
    """Run the daemon's detector over `scores` and score it against the truth."""
    transitions = run_detector(scores, threshold, clear_threshold, params)
    return judge_transitions(transitions, len(scores), window_start, window_end, kinds, events,
                             params)


def judge_transitions(transitions: Sequence[tuple[int, Transition]], n: int,
                      window_start: np.ndarray, window_end: np.ndarray, kinds: np.ndarray,
                      events: Sequence[TruthEvent], params: DetectorParams) -> Detection:
    """`judge` from the detector's transitions (index into the `n` windows) already run."""
    faulty = np.asarray([k != "" for k in kinds], bool)
    anomalous = np.zeros(n, bool)
    state, last = False, 0
    for idx, t in transitions:
        anomalous[last:idx] = state
        state = t is Transition.RAISED
        last = idx
    anomalous[last:] = state
    raises = [i for i, t in transitions if t is Transition.RAISED]
    false_alarms = sum(1 for i in raises
                       if not faulty[max(0, i - params.raise_n + 1):i + 1].any())
    outcomes = []
    for ev in events:
        hit = np.nonzero(anomalous[ev.first:ev.last + 1])[0]
        if hit.size:
            j = ev.first + int(hit[0])
            outcomes.append(EventOutcome(ev, True, j - ev.first,
                                         max(0.0, float(window_end[j]) - ev.onset_s)))
        else:
            outcomes.append(EventOutcome(ev, False, None, None))
    normal_s = union_duration_s(np.asarray(window_start)[~faulty],
                                np.asarray(window_end)[~faulty])
    return Detection(params, outcomes, false_alarms, normal_s, len(raises))
