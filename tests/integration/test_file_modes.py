"""What the daemon keeps private is private whatever the umask (issue 20, finding 6): the
state directory 0700, the outbox and its -wal/-shm 0600, the admin socket 0600."""

from __future__ import annotations

import logging
import os
import stat
from pathlib import Path

import pytest

from agent.config.load import load_config
from agent.daemon import Daemon
from tests.brokers import Broker, wait_for
from tests.helpers import asset_doc, write_config


def mode(p: Path) -> int:
    return stat.S_IMODE(os.lstat(p).st_mode)


@pytest.mark.parametrize("umask", [0o000, 0o022])
def test_state_files_and_sockets_are_private_under_a_permissive_umask(
        tmp_path: Path, broker: Broker, upstream_broker: Broker, umask: int) -> None:
    """Started from a shell with umask 000 or 022: 0700 state dir, 0600 outbox files and
    admin socket."""
    cfg_path = write_config(tmp_path / "watchkeep.yaml", broker.port, upstream_broker.port,
                            [asset_doc("P-1", None)])
    cfg = load_config(cfg_path)
    old = os.umask(umask)
    try:
        daemon = Daemon(cfg, logger=logging.getLogger("watchkeep.test"))
        daemon.start()
    finally:
        os.umask(old)
    try:
        wait_for(lambda: daemon.rebaseline.admin is not None
                 and cfg.rebaseline.admin_socket.exists(), what="admin socket")
        ob = cfg.outbox.path
        wait_for(lambda: Path(f"{ob}-wal").exists() and Path(f"{ob}-shm").exists(),
                 what="the outbox's WAL files")
        assert mode(cfg.state_dir) == 0o700
        for p in (ob, Path(f"{ob}-wal"), Path(f"{ob}-shm")):
            assert mode(p) == 0o600, (p, oct(mode(p)))
        sock = cfg.rebaseline.admin_socket
        assert stat.S_ISSOCK(os.lstat(sock).st_mode)
        assert mode(sock) == 0o600, oct(mode(sock))
    finally:
        daemon.stop()


def test_an_existing_wider_outbox_is_narrowed(tmp_path: Path, broker: Broker,
                                              upstream_broker: Broker) -> None:
    """An outbox file left 0644 by an older run is made 0600 at start."""
    cfg_path = write_config(tmp_path / "watchkeep.yaml", broker.port, upstream_broker.port,
                            [asset_doc("P-1", None)])
    cfg = load_config(cfg_path)
    cfg.state_dir.mkdir(parents=True)
    cfg.outbox.path.touch()
    os.chmod(cfg.outbox.path, 0o644)
    daemon = Daemon(cfg, logger=logging.getLogger("watchkeep.test"))
    daemon.start()
    try:
        assert mode(cfg.outbox.path) == 0o600
    finally:
        daemon.stop()
