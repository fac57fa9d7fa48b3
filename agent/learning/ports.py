"""What re-learning needs of the rest of the daemon, as small protocols.

`RebaselineManager` never sees the daemon, the pipeline or an asset's runtime: it works
on assets by name through `RunningAssets` (implemented over the running pipeline by
agent/pipeline/control.py), holds the pipeline between two ticks through `Pausable`
(the pipeline loop, agent/ops/loop.py) and hands its own events to a `Sink` (the
outbox). Its unit tests drive it with small fakes of these.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from contextlib import AbstractContextManager
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Protocol

from agent.core.detector_params import DetectorParams
from agent.core.events import EventType
from agent.pipeline.messages import Kind, OutMessage

if TYPE_CHECKING:
    from agent.models.bundle import Bundle


class Sink(Protocol):
    """Takes messages for the upstream broker, with the assets' event sequence numbers
    after them (the outbox stores both in one transaction)."""

    def submit(self, msgs: Sequence[OutMessage],
               sequences: Mapping[str, int] | None = None) -> None: ...


class Pausable(Protocol):
    """The pipeline loop: `paused()` holds it between two ticks (its lock)."""

    def paused(self) -> AbstractContextManager[None]: ...


@dataclass(frozen=True)
class OpenAnomaly:
    """An anomaly raised (and published) on an asset that is still open."""

    raised_at: float | None
    peak_score: float


class RunningAssets(Protocol):
    """The running assets as re-learning sees them, by name, in whichever pipeline runs
    now (a reload may have replaced it). Call the methods marked "loop paused" only
    inside `Pausable.paused()`: they change what the pipeline reads between ticks."""

    def names(self) -> list[str]:
        """The running assets, in config order."""
        ...

    def has(self, asset: str) -> bool: ...

    def mode_now(self, asset: str) -> str:
        """The asset's operating mode now: "unknown" until its mode is known, "default"
        for an asset without modes."""
        ...

    def serving(self, asset: str, mode: str) -> Bundle | None:
        """The bundle that scores the asset's windows in `mode` (its own or the asset's)."""
        ...

    def serving_modes(self, asset: str) -> dict[str, Bundle]:
        """Every bundle serving the asset, by mode (the asset-level one as "default")."""
        ...

    def fits(self, asset: str, bundle: Bundle) -> str | None:
        """Why `bundle` cannot serve the asset (features it does not compute), or None."""
        ...

    def detector(self, asset: str) -> DetectorParams:
        """The asset's detector settings as applied to its windows."""
        ...

    def open_anomaly(self, asset: str) -> OpenAnomaly | None:
        """The asset's open anomaly, if its detector is raised."""
        ...

    def install(self, asset: str, mode: str, bundle: Bundle) -> None:
        """Serve `mode` with `bundle` from the next tick on; the detector starts afresh
        (loop paused)."""
        ...

    def event(self, asset: str, etype: EventType, data: Mapping[str, Any], id_key: str,
              kind: Kind, time_s: float) -> tuple[OutMessage, int]:
        """One event of the asset as a message, and the sequence number it took (the
        asset's next; loop paused)."""
        ...
