"""Ingest's window side: channel buffers that put samples straight into each asset's
window assembler, and the locked cut the pipeline takes them out with.

The MQTT loop and the decode-and-dispatch per message are in agent/ingest/mqtt.py
(no numpy there, for the ingest child); they are re-exported here.
"""

from __future__ import annotations

import threading
from collections.abc import Sequence

import numpy as np

from agent.config.load import AssetConfig, Config
from agent.core.decode import Block
from agent.core.routing import Route
from agent.core.timebase import DEFAULT_TOLERANCE_S, Step, TimeBase
from agent.core.windows.assembler import AssembleResult, WindowAssembler
from agent.core.windows.batch import close_many
from agent.ingest.mqtt import Ingest, IngestHandler, PlainCount, make_client

__all__ = ["AssetInbox", "Buffers", "ChannelBuffer", "Ingest", "IngestHandler", "PlainCount",
           "append_run", "asset_buffers", "close_inboxes", "make_client"]


class AssetInbox:
    """Where one asset's channel buffers put their samples: the asset's window
    assembler, under one lock that the network thread (adding samples) and the
    pipeline (closing windows) share. Late samples, messages refused by a channel's
    time-base guard (`ahead`) and the guard's confirmed clock steps (channel, `Step`)
    are kept here until a tick takes them."""

    __slots__ = ("ahead", "assembler", "late", "liveness", "lock", "steps")

    def __init__(self, assembler: WindowAssembler) -> None:
        self.lock = threading.Lock()
        self.assembler = assembler
        self.late = 0
        self.ahead = 0
        self.steps: list[tuple[int, Step]] = []
        # (channel, death reason or None for alive again, time) from Sparkplug death and
        # birth certificates, until a tick takes them (`take_liveness`).
        self.liveness: list[tuple[int, str | None, float]] = []

    def take_liveness(self) -> list[tuple[int, str | None, float]]:
        with self.lock:
            notes, self.liveness = self.liveness, []
        return notes


# What `close_inboxes` notes for an inbox with no refused messages and no clock steps
# (shared: read only).
_NO_NOTES: tuple[int, list[tuple[int, Step]]] = (0, [])


def close_inboxes(inboxes: Sequence[AssetInbox], now: float,
                  notes: list[tuple[int, list[tuple[int, Step]]]] | None = None
                  ) -> tuple[list[AssembleResult], list[int]]:
    """Every asset's windows due at `now` and the late samples counted since the last
    call, under every asset's lock, held for the one cut (`close_many`: the assets
    whose next tumbling window is due with rows in step are cut together).

    An assembler that raises fails alone: its result carries the error
    (`AssembleResult.error`). `notes`, when given, gets per inbox (ahead messages,
    clock steps) taken since the last call."""
    n = len(inboxes)
    late = [0] * n
    base = 0
    if notes is not None:  # the usual note, replaced below where an inbox has one
        base = len(notes)
        notes.extend([_NO_NOTES] * n)
    held = 0
    try:
        for i, ib in enumerate(inboxes):
            ib.lock.acquire()
            held += 1
            if ib.late:
                late[i], ib.late = ib.late, 0
            if notes is not None and (ib.ahead or ib.steps):
                notes[base + i] = (ib.ahead, ib.steps)
                ib.ahead = 0
                ib.steps = []
        results = close_many([ib.assembler for ib in inboxes], now)
    finally:
        for ib in inboxes[:held]:
            ib.lock.release()
    return results, late


class ChannelBuffer:
    """One channel's way into its asset's window assembler, with the channel's arrival
    bookkeeping (last arrival, gap tracking, message and sample counts).

    Samples go straight into the assembler's preallocated store under the asset's
    lock: there is no second copy for the pipeline to take over each tick.
    """

    __slots__ = ("channel", "flushed_messages", "flushed_samples", "guard", "inbox",
                 "last_arrival", "last_seq", "n_messages", "n_samples", "next_block_ts")

    def __init__(self, inbox: AssetInbox, channel: int,
                 tolerance_s: float = DEFAULT_TOLERANCE_S) -> None:
        self.inbox = inbox
        self.channel = channel
        # The channel's time-base guard (agent/core/timebase.py): a message far ahead of
        # the channel's own recent times is refused before it reaches the windows.
        self.guard = TimeBase(tolerance_s)
        self.last_arrival = 0.0
        self.next_block_ts: float | None = None
        self.last_seq: int | None = None
        # Counted by the network thread (the only writer), moved into the Prometheus
        # counters by `IngestHandler.flush_counts` on the pipeline thread: a counter's
        # lock per message is a measurable share of the ingest cost.
        self.n_messages = 0
        self.n_samples = 0
        self.flushed_messages = 0
        self.flushed_samples = 0

    def append(self, ts: float, value: float, arrival: float) -> None:
        inbox = self.inbox
        guard = self.guard
        with inbox.lock:
            if not guard.check(ts, arrival):
                inbox.ahead += 1
            else:
                if guard.step is not None:
                    inbox.steps.append((self.channel, guard.step))
                    guard.step = None
                if inbox.assembler.add_one(self.channel, ts, value, arrival):
                    inbox.late += 1
        self.last_arrival = arrival

    def append_block(self, ts: np.ndarray, values: np.ndarray, arrival: float) -> None:
        """A block in time order (decoded blocks are, by construction)."""
        inbox = self.inbox
        guard = self.guard
        with inbox.lock:
            if not guard.check(float(ts[-1]), arrival):
                inbox.ahead += 1
            else:
                if guard.step is not None:
                    inbox.steps.append((self.channel, guard.step))
                    guard.step = None
                late = inbox.assembler.add(self.channel, ts, values, arrival,
                                           presorted=True)
                if late:
                    inbox.late += late
        self.last_arrival = arrival

    def append_decoded(self, block: Block, arrival: float) -> None:
        """A block as the decoder gives it (`IngestHandler`, thread mode)."""
        ts, values = block.arrays()
        self.append_block(ts, values, arrival)

    def set_liveness(self, death: str | None, t: float) -> None:
        """A death certificate (`death` says which) or a birth after one, at time `t`:
        the pipeline's next tick turns it into the channel's sensor health."""
        inbox = self.inbox
        with inbox.lock:
            inbox.liveness.append((self.channel, death, t))


def append_run(bufs: Sequence[ChannelBuffer], chans: Sequence[int], ts: Sequence[float],
               values: Sequence[float], arrivals: Sequence[float]) -> None:
    """`ChannelBuffer.append` for several samples of one asset (`bufs` are its channel
    buffers, `chans` index them), under one take of the asset's lock."""
    inbox = bufs[0].inbox
    late = 0
    with inbox.lock:
        add = inbox.assembler.add_one
        for c, t, v, a in zip(chans, ts, values, arrivals, strict=True):
            guard = bufs[c].guard
            if not guard.check(t, a):
                inbox.ahead += 1
                continue
            if guard.step is not None:
                inbox.steps.append((c, guard.step))
                guard.step = None
            late += add(c, t, v, a)
        if late:
            inbox.late += late
    for c, a in zip(chans, arrivals, strict=True):
        bufs[c].last_arrival = a


def asset_buffers(asset: AssetConfig) -> list[ChannelBuffer]:
    """The channel buffers of one asset, sharing one inbox and window assembler."""
    inbox = AssetInbox(WindowAssembler(asset.window, tuple(c.rate_hz for c in asset.channels)))
    tolerance = max(DEFAULT_TOLERANCE_S, asset.window.lateness_s)
    return [ChannelBuffer(inbox, i, tolerance) for i in range(len(asset.channels))]


class Buffers:
    """One ChannelBuffer per configured (asset, channel)."""

    def __init__(self, cfg: Config) -> None:
        self.by_asset: list[list[ChannelBuffer]] = [asset_buffers(a) for a in cfg.assets]

    def get(self, route: Route) -> ChannelBuffer:
        return self.by_asset[route.asset_index][route.channel_index]
