"""One rebaseline in progress (`Job`), its phases, and how a request ends (`Result`)."""

from __future__ import annotations

import subprocess
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

import numpy as np

from agent.pipeline.messages import OutMessage


class Phase(StrEnum):
    COLLECTING = "collecting"
    TRAINING = "training"


class Result(StrEnum):
    """How a rebaseline request ends: the `result` label of
    `watchkeep_rebaseline_results_total`, the `phase` of its `model.rebaseline` event
    (a new model is `model.updated` instead) and `last_rebaseline.result` in `/status`."""

    ACCEPTED = "accepted"  # the new version serves
    REJECTED = "rejected"  # trained, but failed the validation gate
    REFUSED = "refused"  # not started (the request), or not trained (the shift guard)
    FAILED = "failed"  # the worker ended without a result, or the new version did not load
    CANCELLED = "cancelled"  # by `watchkeep rebaseline --cancel`
    ABORTED = "aborted"  # the learning guard: an anomaly far past the threshold

    @classmethod
    def of_worker(cls, verdict: Any) -> Result:
        """The worker's `result.json` verdict; anything it should not say is a failure."""
        try:
            got = cls(str(verdict))
        except ValueError:
            return cls.FAILED
        ours = (cls.ACCEPTED, cls.REJECTED, cls.REFUSED, cls.FAILED)
        return got if got in ours else cls.FAILED


REQUESTED = "requested"  # the `phase` of the event a request starts with


@dataclass
class Job:
    """One rebaseline in progress (mutable; guarded by the manager's lock)."""

    request_id: str
    asset: str
    mode: str  # the pipeline mode whose windows are collected
    slot_mode: str  # the model store slot of the bundle serving that mode
    target: int
    reason: str
    who: dict[str, Any]
    accept_shift: bool
    base_version: int
    feature_names: tuple[str, ...]
    requested_s: float
    phase: Phase = Phase.COLLECTING
    rows: list[np.ndarray] = field(default_factory=list)
    starts: list[float] = field(default_factory=list)
    held_events: int = 0
    holding_raise: bool = False
    held_raise: OutMessage | None = None  # the open raise held back, for the guard
    aborted: str | None = None  # why the learning guard ended the job
    index: np.ndarray | None = None
    proc: subprocess.Popen[bytes] | None = None
    cancelled: bool = False

    def request_json(self) -> dict[str, Any]:
        return {"request_id": self.request_id, "asset": self.asset, "mode": self.mode,
                "windows": self.target, "reason": self.reason, "requested_by": self.who,
                "accept_shift": self.accept_shift}

    def summary(self) -> dict[str, Any]:
        return {"phase": self.phase.value, "mode": self.mode, "collected": len(self.rows),
                "target": self.target, "held_events": self.held_events,
                "base_version": self.base_version, "request_id": self.request_id,
                "reason": self.reason, "requested_by": self.who.get("user"),
                "worker_pid": self.proc.pid if self.proc is not None else None}

    def collect(self, row: np.ndarray, names: tuple[str, ...], start: float) -> bool:
        """Keep one window's row (the model's feature columns of it); True once the job has
        its `target` windows."""
        if self.index is None:
            pos = {n: i for i, n in enumerate(names)}
            self.index = np.asarray([pos[n] for n in self.feature_names], np.int64)
        self.rows.append(np.asarray(row, np.float64)[self.index])
        self.starts.append(float(start))
        return len(self.rows) >= self.target

    def last(self, result: Result, reasons: list[str], *, new_version: int | None = None,
             pruned: list[int] | None = None, figures: dict[str, Any] | None = None
             ) -> dict[str, Any]:
        """The asset's `last_rebaseline` record for this job's end."""
        return {"request_id": self.request_id, "result": result.value, "reasons": reasons,
                "old_version": self.base_version, "new_version": new_version,
                "held_events": self.held_events, "pruned": pruned or [],
                "figures": figures or {}}


def brief(last: dict[str, Any] | None) -> dict[str, Any] | None:
    """A `last_rebaseline` record as `/status` shows it (the main figures only)."""
    if last is None:
        return None
    f = last.get("figures", {})
    keep = ("shift", "false_alarm_rate", "rehearsal_ratio", "threshold", "old_threshold")
    return {**{k: v for k, v in last.items() if k != "figures"},
            "figures": {k: f[k] for k in keep if k in f}}
