"""Gaps ingest can see: json-batch blocks that do not follow on, sensor counters that jump."""

from __future__ import annotations

import json
import logging
from pathlib import Path

import pytest
from prometheus_client import CollectorRegistry

from agent.config.load import parse_config
from agent.core.decode import decode_message
from agent.ingest.buffers import Buffers, IngestHandler
from agent.ops.metrics import Metrics


def _handler(channel: dict) -> tuple[IngestHandler, Metrics]:
    doc = {"site": "s", "gateway": "g", "state_dir": "/tmp/unused",
           "assets": [{"name": "A", "channels": {"c": {"topic": "t/c", **channel}}}]}
    cfg = parse_config(doc, Path("."))
    m = Metrics(CollectorRegistry())
    return IngestHandler(cfg, Buffers(cfg), m, logging.getLogger("test")), m


def _gaps(m: Metrics) -> float:
    return m.registry.get_sample_value("watchkeep_sample_gaps_total",
                                       {"asset": "A", "channel": "c"}) or 0.0


@pytest.mark.parametrize(("seqs", "gaps"), [
    ([1, 2, 3, 4], 0),
    ([1, 2, 4, 5], 1),          # one message lost
    ([1, 2, 3, 1, 2], 1),       # the sensor restarted its counter
    ([7, 9, 12], 2),
])
def test_sequence_counter_jumps_are_counted(seqs: list[int], gaps: int) -> None:
    """Each time the counter does not follow on, one gap is counted."""
    h, m = _handler({"decoder": "json", "rate_hz": 1, "seq_field": "meta.n"})
    for i, n in enumerate(seqs):
        h.handle("t/c", json.dumps({"ts": 100.0 + i, "value": 1.0, "meta": {"n": n}}).encode(),
                 100.0 + i)
    assert _gaps(m) == gaps


def test_without_seq_field_counters_are_ignored() -> None:
    """A channel that names no counter field never counts counter gaps."""
    h, m = _handler({"decoder": "json", "rate_hz": 1})
    for i, n in enumerate([1, 5, 2]):
        h.handle("t/c", json.dumps({"ts": 100.0 + i, "value": 1.0, "seq": n}).encode(), 100.0)
    assert _gaps(m) == 0


def test_block_that_does_not_follow_on_is_a_gap() -> None:
    """json-batch: a block starting later than the previous one ended is one gap."""
    h, m = _handler({"decoder": "json-batch", "rate_hz": 10})
    for ts in (100.0, 101.0, 103.0, 104.0):  # 10 samples at 10 Hz = 1 s per block
        h.handle("t/c", json.dumps({"ts": ts, "rate_hz": 10, "values": [0.0] * 10}).encode(),
                 ts)
    assert _gaps(m) == 1


def test_decode_message_returns_the_counter() -> None:
    """decode_message gives the samples and the counter; a non-integer counter is None."""
    h, _ = _handler({"decoder": "json", "rate_hz": 1, "seq_field": "seq"})
    ch = h.cfg.assets[0].channels[0]
    (ts, v), seq = decode_message(b'{"ts": 5, "value": 2.5, "seq": 41}', ch, 5.0,
                                  max_payload_bytes=1000, max_skew_s=10)
    assert (ts, v, seq) == (5.0, 2.5, 41)
    _, seq = decode_message(b'{"ts": 5, "value": 2.5, "seq": "41"}', ch, 5.0,
                            max_payload_bytes=1000, max_skew_s=10)
    assert seq is None
