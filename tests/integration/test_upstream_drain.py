"""The upstream drain on a real Mosquitto: a stored backlog and live rows, complete and in order."""

from __future__ import annotations

import logging
from pathlib import Path

from prometheus_client import CollectorRegistry

from agent.config.load import load_config
from agent.delivery.outbox import Outbox
from agent.delivery.outbox_file import INSERT_CHUNKS
from agent.delivery.upstream import Upstream
from agent.delivery.upstream_feed import PREFETCH_ROWS
from agent.ops.metrics import Metrics
from agent.pipeline.messages import Kind, OutMessage
from tests.brokers import Broker, free_port, wait_for
from tests.helpers import Collector, asset_doc, write_config

LOG = logging.getLogger("watchkeep.test.drain")
TOPIC = "watchkeep/testworks/gw1/assets/P-1/events"


def _tick(start: int, n: int) -> list[OutMessage]:
    return [OutMessage(TOPIC, f"{i:06d}".encode(), Kind.ANOMALY) for i in range(start, start + n)]


def test_backlog_and_live_rows_arrive_complete_in_order_and_are_deleted(
        tmp_path: Path, broker: Broker) -> None:
    """More rows than the read-ahead, stored before start, then more while draining: each
    arrives once, in order, and the outbox ends empty with every one counted published."""
    cfg = load_config(write_config(tmp_path / "wk.yaml", free_port(), broker.port,
                                   [asset_doc("P-1", None)],
                                   outbox={"path": str(tmp_path / "outbox.sqlite"),
                                           "inflight": 20}))
    reg = CollectorRegistry()
    metrics = Metrics(reg)
    ob = Outbox(cfg.outbox, metrics, LOG).open()
    backlog = 2 * PREFETCH_ROWS + INSERT_CHUNKS[0] + 3  # several read-aheads, odd chunks
    for start in range(0, backlog, 150):
        ob.submit(_tick(start, min(150, backlog - start)))
    collector = Collector(broker.port, TOPIC, client_id="drain-collector")
    up = Upstream(cfg, ob, metrics, LOG)
    try:
        up.start()
        live = 120
        for start in range(backlog, backlog + live, 40):
            ob.submit(_tick(start, 40))
        total = backlog + live

        def published() -> float:
            return reg.get_sample_value("watchkeep_upstream_published_total",
                                        {"kind": "anomaly"}) or 0.0

        # Counted once the acknowledged rows are deleted, so wait for the count too.
        wait_for(lambda: len(collector.messages) >= total and published() >= total,
                 timeout_s=60, what="the drain")
        with collector.lock:
            got = [int(p) for _, p, _ in collector.messages]
        assert got == list(range(total))
        assert ob.counts() == (0, 0) and ob.fetch_after(0, 10) == []
        assert published() == total
    finally:
        up.stop(timeout_s=2)
        collector.close()
        ob.close()
