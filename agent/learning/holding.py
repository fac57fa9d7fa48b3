"""Holding back a learning asset's anomaly events, in front of the real sink.

While an asset learns a new normal (agent/learning/manager.py, "Collecting"), its
`anomaly.raised` and what follows it (escalations, the clear that ends it) are not
published but counted, and its retained state messages carry `"learning": {...}`.
The learning guard lets an anomaly far past the threshold through: `Holding` calls
`guard(job, ratio, out)` for it, which decides whether learning ends.

Messages are read by their typed fields (`OutMessage.asset`, `.event`, `.score`,
`.threshold`), never by parsing a topic or a payload.
"""

from __future__ import annotations

import json
import logging
from collections.abc import Callable, Mapping, Sequence

from agent.core.events import EventType
from agent.learning.jobs import Job
from agent.learning.ports import Sink
from agent.ops.logs import kv
from agent.pipeline.messages import Kind, OutMessage

Guard = Callable[[Job, float, list[OutMessage]], None]


def with_learning(m: OutMessage, summary: Mapping[str, object]) -> OutMessage:
    """A state message with `"learning": summary` added as its last key."""
    extra = json.dumps({"learning": summary}, separators=(",", ":")).encode()
    return m._replace(payload=m.payload[:-1] + b"," + extra[1:])


def far_ratio(score: float | None, threshold: float | None, line: float) -> float | None:
    """score / threshold when it reaches the guard's `line`, else None."""
    if score is None or threshold is None or threshold <= 0:
        return None
    ratio = float(score) / float(threshold)
    return ratio if ratio >= line else None


class Holding:
    """Filters one tick's messages for the learning assets (`jobs`, a live mapping the
    manager owns; call `filter` with the manager's lock held)."""

    def __init__(self, jobs: Mapping[str, Job], line: Callable[[], float], guard: Guard,
                 count_held: Callable[[str], None], logger: logging.Logger) -> None:
        self.jobs = jobs
        self.line = line  # FAR_FACTOR x max_shift: the ratio the guard acts on
        self.guard = guard
        self.count_held = count_held
        self.log = logger

    def filter(self, msgs: Sequence[OutMessage]) -> list[OutMessage]:
        """The messages to publish: learning assets' anomaly events held back, their state
        messages marked."""
        if not self.jobs:
            return list(msgs)
        out: list[OutMessage] = []
        for m in msgs:
            job = self.jobs.get(m.asset) if m.asset is not None else None
            if job is None or m.kind not in (Kind.ANOMALY, Kind.STATE):
                out.append(m)
            elif m.kind is Kind.STATE:
                self._state(job, m, out)
            else:
                self._anomaly(job, m, out)
        return out

    def _state(self, job: Job, m: OutMessage, out: list[OutMessage]) -> None:
        """A window of a learning asset: far past the guard while a raise is held, the
        held raise goes out first and the guard acts; the state is marked as learning
        unless that ended it."""
        if job.holding_raise and job.held_raise is not None:
            far = far_ratio(m.score, m.threshold, self.line())
            if far is not None:
                out.append(job.held_raise)
                job.held_raise = None
                job.holding_raise = False
                self.guard(job, far, out)
        out.append(m if job.aborted is not None else with_learning(m, job.summary()))

    def _anomaly(self, job: Job, m: OutMessage, out: list[OutMessage]) -> None:
        raised = m.event is EventType.ANOMALY_RAISED
        cleared = m.event is EventType.ANOMALY_CLEARED
        far = far_ratio(m.score, m.threshold, self.line())
        if raised and far is not None:
            out.append(m)  # past the guard: never held
            self.guard(job, far, out)
        elif far is not None and not cleared and job.held_raise is not None:
            # An escalation of a held raise, past the guard: both go out.
            out += [job.held_raise, m]
            job.held_raise, job.holding_raise = None, False
            self.guard(job, far, out)
        elif raised or job.holding_raise:
            # A raise, and what follows it (escalations, its clear), held.
            job.holding_raise = not cleared
            if raised or cleared:
                job.held_raise = m if raised else None
            job.held_events += 1
            self.count_held(job.asset)
            self.log.info(kv("event held back while learning", asset=job.asset,
                             type=m.event.full if m.event is not None else None,
                             id=m.event_id, held="true", score=m.score))
        else:
            out.append(m)  # clears an anomaly raised (and published) before


class HoldingSink:
    """A Sink in front of the real one: `filter` holds back and marks messages, and
    `take_sequences` adds the sequence numbers of events the guard added."""

    def __init__(self, inner: Sink, filter: Callable[[Sequence[OutMessage]], list[OutMessage]],
                 take_sequences: Callable[[], dict[str, int]]) -> None:
        self.inner = inner
        self._filter = filter
        self._take_sequences = take_sequences

    def submit(self, msgs: Sequence[OutMessage],
               sequences: Mapping[str, int] | None = None) -> None:
        kept = self._filter(msgs)
        more = self._take_sequences()  # events the guard added (aborted)
        if more:
            sequences = {**(sequences or {}), **more}
        if kept or sequences:
            self.inner.submit(kept, sequences=sequences)
