"""A full disk under the outbox, on a real small file system (issue 20, finding 3).

The state directory is a tmpfs of a few MiB mounted by the test (root only; without
root the tests skip, or fail when WATCHKEEP_CI=1). Another file on it ("the rest of
the gateway's data") takes most of the room; the outbox fills the rest while the
upstream broker is down.
"""

from __future__ import annotations

import logging
import os
import subprocess
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import pytest
from prometheus_client import CollectorRegistry

from agent.config.load import Config, load_config
from agent.delivery.outbox import Outbox
from agent.delivery.upstream import Upstream
from agent.ops.metrics import Metrics
from agent.pipeline.messages import Kind, OutMessage
from tests.brokers import Broker, free_port, wait_for
from tests.helpers import Collector, asset_doc, write_config

LOG = logging.getLogger("watchkeep.test.diskfull")
MiB = 1024 * 1024
FS_MIB = 16
FILLER_MIB = 6  # the rest of the gateway's data on the same file system
TOPIC = "watchkeep/testworks/gw1/assets/P-1/events"
PAYLOAD_BYTES = 900  # an anomaly event is about this size (issue 20: ~0.9 KB per event)
TICK = 50  # events per tick


@contextmanager
def small_fs(path: Path, size_mib: int) -> Iterator[Path]:
    """A tmpfs of `size_mib` MiB at `path`, unmounted afterwards."""
    if os.geteuid() != 0:
        if os.environ.get("WATCHKEEP_CI") == "1":
            pytest.fail("the disk-full tests need root to mount a small tmpfs (WATCHKEEP_CI=1 "
                        "is set: they must run in CI)")
        pytest.skip("the disk-full tests need root to mount a small tmpfs")
    path.mkdir(parents=True)
    subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size_mib}m,mode=0700", "tmpfs",
                    str(path)], check=True)
    try:
        yield path
    finally:
        if subprocess.run(["umount", str(path)]).returncode != 0:
            subprocess.run(["umount", "-l", str(path)], check=False)


def fill(path: Path, nbytes: int) -> None:
    with open(path, "wb") as fh:
        fh.write(os.urandom(nbytes))


class Producer:
    """Ticks of numbered anomaly events, as the pipeline hands them to the outbox."""

    def __init__(self, ob: Outbox) -> None:
        self.ob = ob
        self.n = 0

    def tick(self, n: int = TICK) -> None:
        self.ob.submit([OutMessage(TOPIC, f"{i:07d}".encode().ljust(PAYLOAD_BYTES, b"."),
                                   Kind.ANOMALY, qos=1)
                        for i in range(self.n, self.n + n)])
        self.n += n


def value(reg: CollectorRegistry, name: str, **labels: str) -> float:
    return reg.get_sample_value(name, labels) or 0.0


def setup(mnt: Path, upstream_port: int) -> tuple[Config, CollectorRegistry, Metrics, Outbox]:
    cfg = load_config(write_config(mnt / "wk.yaml", free_port(), upstream_port,
                                   [asset_doc("P-1", None)]))
    assert cfg.outbox.path.is_relative_to(mnt)
    reg = CollectorRegistry()
    metrics = Metrics(reg)
    return cfg, reg, metrics, Outbox(cfg.outbox, metrics, LOG).open()


def fill_until_full(prod: Producer, reg: CollectorRegistry) -> None:
    """Produce until a write fails for a full disk (bounded: 40,000 events)."""
    while value(reg, "watchkeep_outbox_write_errors_total", reason="disk_full") == 0:
        prod.tick()
        assert prod.n < 40_000, "the file system never filled"


@contextmanager
def full_outbox(tmp_path: Path, port: int
                ) -> Iterator[tuple[Path, Config, CollectorRegistry, Metrics, Outbox, Producer]]:
    """The outbox on a full small file system, its upstream down, 3,000 events (2.7 MB)
    waiting in memory."""
    with small_fs(tmp_path / "state-fs", FS_MIB) as mnt:
        fill(mnt / "other-data", FILLER_MIB * MiB)
        cfg, reg, metrics, ob = setup(mnt, port)
        try:
            prod = Producer(ob)
            fill_until_full(prod, reg)
            for _ in range(60):
                prod.tick()
            waiting = ob.status()["pending_in_memory"]
            print(f"disk full after {prod.n - waiting} events stored; {waiting} in memory")
            assert waiting > 0
            yield mnt, cfg, reg, metrics, ob, prod
        finally:
            ob.close()


def test_freeing_a_little_space_lets_a_little_of_the_backlog_in(tmp_path: Path) -> None:
    """Disk full, a backlog of 2.7 MB in memory: freeing 1 MiB gets part of it into the
    file at the next tick (the backlog goes in bounded batches)."""
    with full_outbox(tmp_path, free_port()) as (mnt, _, _, _, ob, prod):
        stored_full = ob.counts()[0]
        with open(mnt / "other-data", "r+b") as fh:
            fh.truncate((FILLER_MIB - 1) * MiB)
        prod.tick()
        stored_after = ob.counts()[0]
        print(f"1 MiB freed: rows in the file {stored_full} -> {stored_after}")
        assert stored_after > stored_full, "freeing 1 MiB let nothing in"


def test_the_upstream_drains_a_full_disk_and_nothing_is_lost_uncounted(
        tmp_path: Path) -> None:
    """Disk full, upstream down, a backlog in memory; the upstream comes back while the
    disk stays full: every row is delivered and deleted, the backlog follows through the
    room the deletes free, new events flow, and delivered + counted dropped == produced."""
    port = free_port()
    with full_outbox(tmp_path, port) as (_, cfg, reg, metrics, ob, prod):
        up = Upstream(cfg, ob, metrics, LOG)
        up.start()  # its broker is down
        broker = Broker(tmp_path / "upstream", port=port)
        collector = None
        try:
            prod.tick()
            broker.start()
            collector = Collector(port, TOPIC, client_id="diskfull-collector")
            wait_for(lambda: ob.counts()[0] == 0 and
                     ob.status()["pending_in_memory"] == 0, timeout_s=120, interval_s=0.1,
                     what="the outbox and its in-memory backlog drained upstream")
            prod.tick()  # and new events flow
            last = f"{prod.n - 1:07d}".encode()
            wait_for(lambda: any(p.startswith(last) for _, p, _ in list(collector.messages)),
                     timeout_s=30, what="the newest event upstream")
            wait_for(lambda: ob.counts()[0] == 0, timeout_s=30, what="the last rows deleted")
            delivered = value(reg, "watchkeep_upstream_published_total", kind="anomaly")
            dropped = value(reg, "watchkeep_outbox_dropped_total", kind="anomaly")
            print(f"produced {prod.n}, delivered {delivered:.0f}, counted dropped "
                  f"{dropped:.0f}")
            assert delivered + dropped == prod.n
        finally:
            up.stop()
            if collector is not None:
                collector.close()
            broker.stop()


def test_what_cannot_be_written_at_stop_is_counted_and_logged(
        tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    """Upstream down, disk full, events in memory at close: each is counted dropped
    (reason shutdown) and the log says how many; stored + dropped == produced."""
    with small_fs(tmp_path / "state-fs", FS_MIB) as mnt:
        fill(mnt / "other-data", FILLER_MIB * MiB)
        _, reg, _, ob = setup(mnt, free_port())
        prod = Producer(ob)
        try:
            fill_until_full(prod, reg)
            for _ in range(20):
                prod.tick()
            waiting = ob.status()["pending_in_memory"]
            stored = ob.counts()[0]
        finally:
            with caplog.at_level(logging.ERROR, logger=LOG.name):
                ob.close()
        assert waiting > 0
        assert value(reg, "watchkeep_outbox_dropped_by_reason_total",
                     reason="shutdown") == waiting
        dropped = value(reg, "watchkeep_outbox_dropped_total", kind="anomaly")
        assert stored + dropped == prod.n
        assert any(f"dropped={waiting}" in r.getMessage() for r in caplog.records)
