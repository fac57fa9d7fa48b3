"""While an asset is raised: say when its anomaly gets worse or changes character.

Pure. A raised asset stays raised until its score is back under the clear threshold, so
without this a second fault that starts while the first (or a false alarm) is still up
produces no event and no explanation. `anomaly.escalated` is published when the
detector's own raise rule (`raise_k` of the last `raise_n` windows, strided over hopping
windows: `DetectorParams`) holds for:

* `severity`: a severity band above the reference band (minor -> major -> critical);
  or
* `explanation`: leading channels none of which were reported since the raise (the
  leading channels: the fewest channels whose summed share of the squared error reaches
  half).

The reference band at the raise is the band the raise rule itself held (the `raise_k`-th
highest of the windows it looked at), not the band of the one window that completed it,
so a fault whose windows scatter across a band edge is not escalated at once. Each
escalation becomes the new reference, so one change is reported once. Channels, not
features, are compared: the features of one channel trade places from window to window
without the machine changing.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass
from enum import StrEnum

import numpy as np

from agent.core.events import Severity

_RANK = {Severity.MINOR: 0, Severity.MAJOR: 1, Severity.CRITICAL: 2}
_BAND = {v: k for k, v in _RANK.items()}
LEADING_SHARE = 0.5
_QUIET = (_RANK[Severity.MINOR], frozenset[str]())


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


class EscalationTracker:
    """One asset's reference (what was last reported) and the recent windows."""

    __slots__ = ("_quiet_run", "_recent", "_span", "channels", "k", "n", "seen", "settled",
                 "severity", "stride")

    def __init__(self, raise_k: int = 1, raise_n: int = 1, stride: int = 1) -> None:
        self.k = raise_k
        self.n = raise_n
        self.stride = stride
        self._span = (raise_n - 1) * stride + 1
        self._recent: deque[tuple[int, frozenset[str]]] = deque(maxlen=self._span)
        # How many windows in a row went through `observe_quiet`: once `_recent` is full
        # of them, another changes nothing, and `settled` says so (a caller may leave
        # out `observe_quiet` then).
        self._quiet_run = 0
        self.settled = False
        self.severity: Severity | None = None
        self.channels: frozenset[str] = frozenset()
        self.seen: frozenset[str] = frozenset()

    def _looked_at(self) -> list[tuple[int, frozenset[str]]]:
        """The windows the raise rule looks at: the newest and every stride-th before."""
        r = self._recent
        return [r[i] for i in range(len(r) - 1, -1, -self.stride)][: self.n]

    def observe(self, severity: Severity, channels: frozenset[str]) -> None:
        """Every scored window, raised or not (the raise rule's evidence)."""
        self._recent.append((_RANK[severity], channels))
        self._quiet_run = 0
        self.settled = False

    def observe_quiet(self) -> None:
        """`observe` of a window in the lowest band with no leading channels (a score
        under the threshold while not raised), without working out its band."""
        if self._quiet_run == self._span:
            return  # `_recent` is all _QUIET and full: as it was
        self._quiet_run += 1
        self.settled = self._quiet_run == self._span
        self._recent.append(_QUIET)

    def start(self, channels: frozenset[str]) -> Severity:
        """The asset was raised on the windows observed; returns the band the raise rule
        held (the reference), and takes `channels` as the reported explanation."""
        ranks = sorted((r for r, _ in self._looked_at()), reverse=True)
        held = ranks[min(self.k, len(ranks)) - 1] if ranks else 0
        self.severity = _BAND[held]
        self.channels = channels
        self.seen = channels
        return self.severity

    def stop(self) -> None:
        """The asset cleared (or its detector was reset)."""
        self.severity = None
        self.channels = frozenset()
        self.seen = frozenset()

    def step(self) -> Escalated | None:
        """After `observe` of a raised window: the escalation it completes, if any."""
        if self.severity is None or not self._recent:
            return None
        looked = self._looked_at()
        ref = _RANK[self.severity]
        higher = sorted((r for r, _ in looked if r > ref), reverse=True)
        rank, channels = self._recent[-1]
        if len(higher) >= self.k:
            out = Escalated(Reason.SEVERITY, _BAND[higher[self.k - 1]], self.severity,
                            channels, self.channels)
            self.severity = out.severity
        elif channels and not (channels & self.seen) and sum(
                1 for _, c in looked if c and not (c & self.seen)) >= self.k:
            out = Escalated(Reason.EXPLANATION, _BAND[rank], self.severity, channels,
                            self.channels)
        else:
            return None
        self.channels = channels
        self.seen = self.seen | channels
        return out
