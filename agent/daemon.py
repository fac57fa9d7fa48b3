"""The composition root: builds the real parts and runs start / stop.

Start: load bundles (a bad one fails its asset only) -> outbox (checked; sequence
numbers restored) -> upstream -> pipeline loop -> ingest -> HTTP -> READY=1.
Stop: ingest stops taking messages, the pipeline finishes its tick and runs one
last one, the upstream side delivers what it can in a few seconds, publishes the
offline status and disconnects, the outbox closes, the HTTP server closes.

What runs where: the pipeline loop and its watchdog are agent/ops/loop.py, a reload
agent/ops/reload.py, re-learning agent/learning/manager.py (reaching the pipeline only
through agent/pipeline/control.py), the process's signals agent/ops/run.py.
"""

from __future__ import annotations

import logging
import os
import threading
import time
from collections.abc import Callable, Mapping
from typing import Any

from prometheus_client import CollectorRegistry

from agent import __version__
from agent.config.rebaseline import RebaselineConfig
from agent.config.schema import Config, IngestWorker
from agent.delivery.outbox import Outbox
from agent.delivery.upstream import Upstream
from agent.errors import ConfigError, ConfigProblem
from agent.fsutil import private_dir
from agent.ingest.buffers import Buffers, Ingest, IngestHandler
from agent.ingest.parent import ProcessIngest
from agent.learning.commands import CommandReceiver
from agent.learning.manager import RebaselineManager
from agent.ops.http_server import HttpServer
from agent.ops.logs import kv
from agent.ops.loop import IngestFeedback, LoopLock, PipelineLoop
from agent.ops.metrics import Metrics
from agent.ops.notify import Notifier
from agent.ops.reload import Reloader
from agent.pipeline.builder import build_pipeline, load_runtimes
from agent.pipeline.control import PipelineControl
from agent.pipeline.tick import Pipeline, Sink


class Daemon:
    """watchkeep's running parts for one config."""

    def __init__(self, cfg: Config, *, logger: logging.Logger | None = None,
                 registry: CollectorRegistry | None = None,
                 env: Mapping[str, str] | None = None,
                 clock: Callable[[], float] = time.time,
                 sink_factory: Callable[[Upstream], Sink] | None = None) -> None:
        self._cfg = cfg
        self.log = logger or logging.getLogger("watchkeep")
        self.registry = registry or CollectorRegistry()
        self.metrics = Metrics(self.registry)
        self.env = dict(os.environ if env is None else env)
        self.clock = clock
        self.notifier = Notifier(self.env)
        self.metrics.info.info({"version": __version__})
        self._sink_factory = sink_factory
        self._stopped = threading.Event()
        self._reloader: Reloader | None = None
        self._loop: PipelineLoop | None = None
        self.http: HttpServer | None = None
        self.rebaseline_worker_env: dict[str, str] = {}  # extra env for the training worker
        self.commands: CommandReceiver | None = None

    # What runs now: the loop's (a reload replaces it as a whole).

    @property
    def loop(self) -> PipelineLoop:
        if self._loop is None:
            raise RuntimeError("the daemon has not started")
        return self._loop

    @property
    def cfg(self) -> Config:
        return self._loop.current.cfg if self._loop is not None else self._cfg

    @property
    def pipeline(self) -> Pipeline:
        return self.loop.current.pipeline

    @property
    def handler(self) -> IngestHandler[Buffers]:
        return self.loop.current.handler

    @property
    def buffers(self) -> Buffers:
        return self.loop.current.buffers

    def _rebaseline_settings(self) -> RebaselineConfig:
        cfg = self.cfg
        return cfg.rebaseline or RebaselineConfig.defaults(cfg.state_dir)

    def start(self) -> None:
        cfg = self._cfg
        try:
            private_dir(cfg.state_dir)  # 0700 when made here, whatever the umask
        except OSError as exc:
            raise ConfigError([ConfigProblem(
                "state_dir", "a directory watchkeep can create and write",
                f"{cfg.state_dir} ({exc.strerror or exc})")]) from exc
        runtimes = load_runtimes(cfg, self.log)
        self.outbox = Outbox(cfg.outbox, self.metrics, self.log, clock=self.clock).open()
        stored = self.outbox.sequences()
        for rt in runtimes:  # event sequence numbers continue across restarts
            rt.sequence = stored.get(rt.cfg.name, rt.sequence)
        self.upstream = Upstream(cfg, self.outbox, self.metrics, self.log, clock=self.clock)
        sink: Sink = self._sink_factory(self.upstream) if self._sink_factory else self.outbox
        # Re-learning holds back a learning asset's anomaly events in front of the sink and
        # collects its new-normal windows from the observer; it sees the running assets
        # through PipelineControl and pauses the loop to swap a model.
        lock = LoopLock()
        self.rebaseline = RebaselineManager(
            PipelineControl(lambda: self.pipeline, self.metrics), lock,
            settings=self._rebaseline_settings, state_dir=cfg.state_dir,
            registry=self.registry, logger=self.log, clock=self.clock,
            worker_env=self.rebaseline_worker_env)
        sink = self.rebaseline.wrap_sink(sink)
        if self.rebaseline.cfg.mqtt_commands:  # agent/learning/commands.py; off by default
            self.commands = CommandReceiver(
                cfg.topic_prefix, self.rebaseline.request,
                assets=lambda: [rt.cfg.name for rt in self.pipeline.runtimes],
                enabled=lambda: self.rebaseline.cfg.mqtt_commands,
                registry=self.registry, logger=self.log)
            self.upstream.accept_commands(self.commands.topic_filter, self.commands.offer)
        running = build_pipeline(cfg, runtimes, sink, self.metrics, self.log,
                                 observer=self.rebaseline.observe,
                                 observes=self.rebaseline.collecting)
        # A child process stamps arrivals with the wall clock: a daemon built on another
        # clock (the demo's and some tests' simulated time) keeps ingest in a thread.
        in_child = cfg.ingest.worker is IngestWorker.PROCESS and self.clock is time.time
        self.ingest: Ingest | ProcessIngest = (ProcessIngest if in_child else Ingest)(
            cfg, running.handler, self.metrics, self.log, clock=self.clock)
        self._loop = PipelineLoop(running, self.metrics, self.notifier, self.log,
                                  clock=self.clock, lock=lock)
        self._loop.after_tick = IngestFeedback(self._loop)
        if cfg.http.enabled:
            # Bound before any broker is contacted: a port in use stops the start-up
            # before an "online" status could be published.
            self.http = HttpServer(cfg.http.host, cfg.http.port, self.registry,
                                   healthy=self.healthy, ready=self.ready, status=self.status,
                                   before_scrape=self._before_scrape,
                                   max_connections=cfg.http.max_connections,
                                   request_timeout_s=cfg.http.request_timeout_s)
        self._start_threads()
        loaded = sum(1 for rt in runtimes if rt.models.shown is not None)
        self.log.info(kv("watchkeep started", version=__version__, assets=len(runtimes),
                         models=loaded,
                         http=f"{cfg.http.host}:{self.http.port}" if self.http else "off"))
        self.notifier.ready(f"{len(runtimes)} assets, {loaded} models loaded")

    def _start_threads(self) -> None:
        if self.commands is not None:
            self.commands.start()
        self.upstream.start()
        self.loop.start()
        self.ingest.start()
        if self.http is not None:
            self.http.start()
        self.rebaseline.start()

    def _before_scrape(self) -> None:
        self.handler.flush_counts()
        self.loop.gauges.refresh_ages(self.clock())

    def healthy(self) -> tuple[bool, str]:
        return self.loop.healthy()

    def reload(self) -> bool:
        """SIGHUP: apply the config file and bundles now on disk, or keep the running ones
        (the contract is in agent/ops/reload.py). Call from one thread at a time."""
        if self._reloader is None:
            self._reloader = Reloader(self.loop, self.ingest, self.metrics, self.notifier,
                                      self.log, clock=self.clock)
        return self._reloader.reload().ok

    def ready(self) -> tuple[bool, str]:
        if self._stopped.is_set():
            return False, "stopping"
        if not self.ingest.connected.is_set():
            return False, "local broker not connected"
        missing = [rt.cfg.name for rt in self.pipeline.runtimes
                   if rt.cfg.bundle is not None and rt.models.shown is None]
        if missing:
            return False, "models not loaded: " + ", ".join(missing)
        failing = self.loop.failing()
        if failing:
            return False, "asset errors: " + failing
        return True, "ready"

    def status(self) -> dict[str, Any]:
        doc = self.pipeline.status()
        doc["version"] = __version__
        doc["local_connected"] = self.ingest.connected.is_set()
        doc["upstream_connected"] = self.upstream.connected.is_set()
        doc["upstream"] = self.upstream.status()
        doc["outbox"] = self.outbox.status()
        self.rebaseline.annotate(doc)
        return doc

    def stop(self) -> None:
        """Drain and stop; safe to call more than once."""
        if self._stopped.is_set():
            return
        self._stopped.set()
        self.notifier.stopping()
        self.log.info("watchkeep stopping")
        if self.commands is not None:
            self.commands.stop()
        self.rebaseline.stop()
        self.ingest.stop()
        self.loop.stop()
        self.handler.flush_counts()  # the last ticks' counts (the flush is rate-limited)
        self.upstream.stop()
        self.outbox.close()
        if self.http is not None:
            self.http.stop()
        self.log.info("watchkeep stopped")

