"""The messages between the daemon (agent/ingest/parent.py) and the ingest child
(agent/ingest/child.py), pickled over their socket pair; the parent's docstring says
when each is sent.

Each message is a NamedTuple of its own class, so both sides name the fields and a
reader tells the kinds apart by type. Standard library only: the child must stay free
of numpy, prometheus_client and onnx. A channel is named on the wire by one int,
`channel_key(asset_index, channel_index)`.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, NamedTuple

if TYPE_CHECKING:
    from agent.config.schema import Config

KEY_SHIFT = 16  # key = asset_index << 16 | channel_index
KEY_MASK = (1 << KEY_SHIFT) - 1


def channel_key(asset_index: int, channel_index: int) -> int:
    """One int naming a channel on the wire (`key >> KEY_SHIFT`, `key & KEY_MASK`)."""
    return (asset_index << KEY_SHIFT) | channel_index


# -- child -> parent ------------------------------------------------------------------------

class Blocks(NamedTuple):
    """json-batch blocks, one per item of the parallel tuples; their float64 values
    concatenated in one bytes object (one large buffer pickles far faster than many)."""

    keys: tuple[int, ...]
    t0s: tuple[float, ...]
    rates: tuple[float, ...]
    sizes: tuple[int, ...]
    arrivals: tuple[float, ...]
    values: bytes


class Data(NamedTuple):
    """Scalar samples of config generation `gen` as parallel lists, and blocks."""

    gen: int
    keys: list[int]
    ts: list[float]
    values: list[float]
    arrivals: list[float]
    blocks: Blocks | None


class KeyCounts(NamedTuple):
    """One channel's counts since the last `Counts`."""

    messages: int
    samples: int
    gaps: int


class Counts(NamedTuple):
    """Deltas: per channel key, and rejected messages per reason (`Reason` value)."""

    gen: int
    per_key: dict[int, KeyCounts]
    rejected: dict[str, int]


class Errors(NamedTuple):
    """Callback errors counted in the child since the last one."""

    n: int


class Live(NamedTuple):
    """A Sparkplug death certificate (`death` names it) or a birth after one (None) for
    one channel, after the samples decoded before it."""

    gen: int
    key: int
    death: str | None
    t: float


class State(NamedTuple):
    """The local broker connection came up or went down."""

    connected: bool
    reason: str


class Log(NamedTuple):
    """A log line (the child's logging is rate-limited already)."""

    levelno: int
    message: str


class Switched(NamedTuple):
    """The child now routes with config generation `gen`."""

    gen: int


class Bye(NamedTuple):
    """The last message before a requested exit."""


ChildMessage = Data | Counts | Errors | Live | State | Log | Switched | Bye


# -- parent -> child ------------------------------------------------------------------------

class Init(NamedTuple):
    """The first message: the config of generation `gen` and the log level."""

    gen: int
    cfg: Config
    level: int


class Reconfigure(NamedTuple):
    """Reload: route with this config from now on."""

    gen: int
    cfg: Config


class Stop(NamedTuple):
    """Disconnect, send what is left, exit."""


ParentMessage = Init | Reconfigure | Stop
