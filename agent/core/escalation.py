"""While an asset is raised: say when its anomaly gets worse or changes character.

Pure. A raised asset stays raised until its score is back under the clear threshold, so
without this a second fault that starts while the first (or a false alarm) is still up
produces no event and no explanation. `anomaly.escalated` is published when, for one
independent window's worth of consecutive windows (`persist`, the windows that share
an instant: `ceil(length_s / hop_s)`, so one disturbance is not counted twice):

* `severity`: the score's severity band is above every band reported since the raise
  (minor -> major -> critical); or
* `explanation`: the channels that carry the error are none of the channels reported
  since the raise (the leading channels: the fewest channels whose summed share of the
  squared error reaches half).

Each escalation becomes the new reference, so one change is reported once. Channels,
not features, are compared: the features of one channel trade places from window to
window without the machine changing.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import StrEnum

import numpy as np

from agent.core.events import Severity

_RANK = {Severity.MINOR: 0, Severity.MAJOR: 1, Severity.CRITICAL: 2}
LEADING_SHARE = 0.5


class Reason(StrEnum):
    SEVERITY = "severity"
    EXPLANATION = "explanation"


def leading_channels(names: tuple[str, ...], sq_err: np.ndarray,
                     share: float = LEADING_SHARE) -> frozenset[str]:
    """The fewest channels whose summed share of the squared error reaches `share`."""
    per: dict[str, float] = {}
    for n, e in zip(names, np.asarray(sq_err, dtype=np.float64), strict=True):
        ch = n.rsplit(".", 1)[0]
        per[ch] = per.get(ch, 0.0) + float(e)
    total = sum(per.values())
    if total <= 0.0:
        return frozenset()
    out: set[str] = set()
    acc = 0.0
    for ch, e in sorted(per.items(), key=lambda kv: -kv[1]):
        out.add(ch)
        acc += e
        if acc >= share * total:
            break
    return frozenset(out)


@dataclass(frozen=True)
class Escalated:
    reason: Reason
    severity: Severity
    previous_severity: Severity
    channels: frozenset[str]
    previous_channels: frozenset[str]


@dataclass
class EscalationTracker:
    """One asset's reference (what was last reported) and the pending change."""

    persist: int = 1
    severity: Severity | None = None
    channels: frozenset[str] = field(default_factory=frozenset)
    seen: frozenset[str] = field(default_factory=frozenset)
    _run: int = 0
    _run_reason: Reason | None = None

    def start(self, severity: Severity, channels: frozenset[str]) -> None:
        """The asset was raised with this severity and explanation."""
        self.severity = severity
        self.channels = channels
        self.seen = channels
        self._run = 0
        self._run_reason = None

    def stop(self) -> None:
        """The asset cleared (or its detector was reset)."""
        self.severity = None
        self.channels = frozenset()
        self.seen = frozenset()
        self._run = 0
        self._run_reason = None

    def step(self, severity: Severity, channels: frozenset[str]) -> Escalated | None:
        """One raised window; the escalation it completes, if any."""
        if self.severity is None:
            return None
        reason: Reason | None = None
        if _RANK[severity] > _RANK[self.severity]:
            reason = Reason.SEVERITY
        elif channels and not (channels & self.seen):
            reason = Reason.EXPLANATION
        if reason is None:
            self._run = 0
            self._run_reason = None
            return None
        self._run = self._run + 1 if reason is self._run_reason else 1
        self._run_reason = reason
        if self._run < self.persist:
            return None
        out = Escalated(reason, severity, self.severity, channels, self.channels)
        if reason is Reason.SEVERITY:
            self.severity = severity
        self.channels = channels
        self.seen = self.seen | channels
        self._run = 0
        self._run_reason = None
        return out
