"""`watchkeep run`: the daemon in the foreground, its main thread waiting for signals.

SIGHUP reloads (on the main thread, not inside the handler); SIGTERM and SIGINT drain
and stop, then `run_daemon` returns 0 (`Daemon.stop` is bounded: about 15 s at most).
Every `STATUS_EVERY_S` the one-line summary `systemctl status` shows is refreshed.
"""

from __future__ import annotations

import logging
import os
import signal
import threading
import time
from collections.abc import Mapping
from typing import Any

from agent.config.schema import Config
from agent.daemon import Daemon
from agent.ops.heap import freeze_heap
from agent.ops.logs import kv

# Test hook, read only by `run_daemon`: after this many seconds the pipeline loop stops
# ticking, as a hung model or a deadlock would, so tests can see WATCHDOG=1 stop.
TEST_WEDGE_ENV = "WATCHKEEP_TEST_WEDGE_AFTER_S"
STATUS_EVERY_S = 10.0  # how often STATUS= (systemctl status) is refreshed


def status_line(daemon: Daemon) -> str:
    """The one-line summary systemd shows in `systemctl status`."""
    rts = daemon.pipeline.runtimes
    loaded = sum(1 for rt in rts if rt.models.shown is not None)
    anomalous = sum(1 for rt in rts if rt.state.value == "anomalous")
    local = "up" if daemon.ingest.connected.is_set() else "down"
    up = "up" if daemon.upstream.connected.is_set() else "down"
    return (f"{len(rts)} assets, {loaded} models loaded, {anomalous} anomalous; "
            f"local broker {local}, upstream {up}")


def _install_test_hooks(daemon: Daemon, env: Mapping[str, str], logger: logging.Logger) -> None:
    wedge = env.get(TEST_WEDGE_ENV, "")
    if not wedge:
        return
    logger.warning(kv("test hook armed: the pipeline will wedge", after_s=wedge))
    timer = threading.Timer(float(wedge), daemon.loop.wedged.set)
    timer.daemon = True
    timer.start()


def run_daemon(cfg: Config, logger: logging.Logger) -> int:
    """`watchkeep run`: start; SIGHUP reloads (on this, the main thread); SIGTERM/SIGINT
    drain and stop, then return 0 (`Daemon.stop` is bounded: about 15 s at most)."""
    wake = threading.Event()
    stop = threading.Event()
    hup = threading.Event()

    def _on_stop(signum: int, frame: Any) -> None:
        logger.info(kv("signal received", signal=signal.Signals(signum).name))
        stop.set()
        wake.set()

    def _on_hup(signum: int, frame: Any) -> None:
        hup.set()  # the reload itself runs in the loop below, not inside the handler
        wake.set()

    signal.signal(signal.SIGTERM, _on_stop)
    signal.signal(signal.SIGINT, _on_stop)
    signal.signal(signal.SIGHUP, _on_hup)
    daemon = Daemon(cfg, logger=logger)
    daemon.start()
    freeze_heap()
    _install_test_hooks(daemon, os.environ, logger)
    next_status = time.monotonic() + STATUS_EVERY_S
    try:
        while not stop.is_set():
            wake.wait(1.0)
            wake.clear()
            if stop.is_set():
                break
            if hup.is_set():
                hup.clear()
                logger.info(kv("signal received", signal="SIGHUP"))
                daemon.reload()
            if time.monotonic() >= next_status:
                daemon.notifier.status(status_line(daemon))
                next_status = time.monotonic() + STATUS_EVERY_S
    finally:
        daemon.stop()
    return 0
