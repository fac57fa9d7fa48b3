"""The composition root: builds the real parts and runs start / stop.

Start: load bundles (a bad one fails its asset only) -> outbox (checked; sequence
numbers restored) -> upstream -> pipeline loop -> ingest -> HTTP -> READY=1.
Stop: ingest stops taking messages, the pipeline finishes its tick and runs one
last one, the upstream side delivers what it can in a few seconds, publishes the
offline status and disconnects, the outbox closes, the HTTP server closes.
"""

from __future__ import annotations

import gc
import logging
import math
import os
import signal
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Mapping
from contextlib import contextmanager
from typing import Any

from prometheus_client import CollectorRegistry

from agent import __version__
from agent.config.load import AssetConfig, Config, IngestWorker
from agent.delivery.outbox import Outbox
from agent.delivery.upstream import Upstream
from agent.errors import BundleError, ConfigError, ConfigProblem
from agent.fsutil import private_dir
from agent.ingest.buffers import Buffers, Ingest, IngestHandler
from agent.ingest.parent import ProcessIngest
from agent.learning.commands import CommandReceiver
from agent.learning.manager import RebaselineManager
from agent.models.bundle import Bundle, load_bundle
from agent.ops.logs import kv
from agent.ops.metrics import HttpServer, Metrics, TickGauges
from agent.ops.notify import MAX_WATCHDOG_INTERVAL_S, Notifier
from agent.ops.reload import Reloader
from agent.pipeline.runtime import AssetRuntime
from agent.pipeline.tick import Pipeline, Sink


def load_asset_bundle(asset: AssetConfig, logger: logging.Logger
                      ) -> tuple[Bundle | None, str | None]:
    """The asset's bundle, or the reason it has none (logged, never raised)."""
    if asset.bundle is None:
        return None, None
    try:
        b = load_bundle(asset.bundle)
    except BundleError as exc:
        logger.error(kv("model bundle rejected; the asset runs without a model",
                        asset=asset.name, error=str(exc)))
        return None, str(exc)
    logger.info(kv("model loaded", asset=asset.name, model=b.meta.model_id,
                   version=b.meta.version, features=b.n_features))
    return b, None


class PipelineLoop:
    """Ticks the pipeline every `tick_s` on its own thread; the watchdog follows it."""

    def __init__(self, pipeline: Pipeline, tick_s: float, metrics: Metrics,
                 notifier: Notifier, logger: logging.Logger,
                 clock: Callable[[], float] = time.time) -> None:
        self.pipeline = pipeline
        self.tick_s = tick_s
        self.metrics = metrics
        self.notifier = notifier
        self.log = logger
        self.clock = clock
        self.last_tick_mono = time.monotonic()
        # When a tick last did its work for at least one asset (not raised, and not
        # failed for every asset that has work): /healthz and the watchdog follow it.
        self.last_ok_mono = self.last_tick_mono
        self.tick_ok = True
        self.ticks = 0
        self.wedged = threading.Event()  # a test hook: wedges the loop to test the watchdog
        self.gauges = TickGauges(metrics, started_s=clock())
        self.watchdog_every_s = notifier.watchdog_interval_s or MAX_WATCHDOG_INTERVAL_S
        self._stop = threading.Event()
        # Set by ingest when a sample closes a window, so the tick runs at once instead of
        # at the next `tick_s` (the window's latency is then not the tick period).
        self.wake = threading.Event()
        self.after_tick: Callable[[], None] | None = None
        self._lock = threading.Lock()
        self._thread = threading.Thread(target=self._run, name="watchkeep-pipeline",
                                        daemon=True)

    def start(self) -> None:
        self._thread.start()

    @contextmanager
    def paused(self) -> Iterator[None]:
        """Hold the loop between two ticks (reload swaps the runtimes in here)."""
        with self._lock:
            yield

    def stop(self, timeout_s: float = 10.0) -> None:
        self._stop.set()
        self.wake.set()
        self.wedged.clear()
        self._thread.join(timeout_s)
        self.tick_once()  # flush windows whose samples arrived before ingest stopped

    def tick_once(self) -> None:
        with self._lock:
            t0 = time.perf_counter()
            try:
                self.pipeline.tick(self.clock())
                ok = not self.pipeline.all_failing
            except Exception:
                self.log.exception("pipeline tick failed")
                self.metrics.callback_errors.labels("pipeline").inc()
                ok = False
            self.metrics.tick_seconds.observe(time.perf_counter() - t0)
            try:
                self.gauges.update(self.pipeline, self.clock())
            except Exception:  # metrics must never stop the pipeline
                self.log.exception("updating tick gauges failed")
            self.metrics.ticks.inc()
            self.last_tick_mono = time.monotonic()
            self.tick_ok = ok
            if ok:
                self.last_ok_mono = self.last_tick_mono
            self.ticks += 1
            if self.after_tick is not None:
                try:
                    self.after_tick()
                except Exception:
                    self.log.exception("after-tick hook failed")

    def _run(self) -> None:
        next_at = time.monotonic()
        last_wd = 0.0
        while not self._stop.is_set():
            while self.wedged.is_set() and not self._stop.is_set():
                time.sleep(0.05)
            now = time.monotonic()
            self.metrics.tick_lag.set(max(0.0, now - next_at))
            self.tick_once()
            # Only a tick that did its work keeps systemd's watchdog fed: a loop that
            # ticks but fails for every asset is restarted like a wedged one.
            if self.tick_ok and now - last_wd >= self.watchdog_every_s:
                self.notifier.watchdog()
                last_wd = now
            next_at += self.tick_s
            if next_at < time.monotonic() - self.tick_s:
                next_at = time.monotonic()  # fell behind: do not burst to catch up
            if self.wake.wait(max(0.0, next_at - time.monotonic())):
                self.wake.clear()
                next_at = time.monotonic()  # woken early: the regular beat restarts here


def freeze_heap() -> None:
    """Move everything alive now (config, runtimes, model sessions, imported modules)
    out of the cyclic garbage collector's reach (`gc.freeze`, which walks nothing): a
    full collection then walks only what was made since, instead of every object of
    the process. Without it the pipeline bench slows by a fifth to a third as full
    collections come round. `watchkeep run` calls it once the daemon has started (not
    `Daemon.start`: a process running many daemons, a test run, would keep its old
    cycles forever); a reload undoes it (`thaw_heap`) so the replaced runtimes can be
    collected."""
    gc.freeze()


def thaw_heap() -> None:
    """Give the collector back everything `freeze_heap` hid (after a reload replaced
    runtimes; from then on full collections walk the whole heap again)."""
    gc.unfreeze()


# How often the pipeline thread moves ingest's plain counts into the Prometheus
# counters (a loop over every channel): ticks can follow each other within
# milliseconds when many windows close at once.
_FLUSH_EVERY_S = 0.5


class Daemon:
    """watchkeep's running parts for one config."""

    def __init__(self, cfg: Config, *, logger: logging.Logger | None = None,
                 registry: CollectorRegistry | None = None,
                 env: Mapping[str, str] | None = None,
                 clock: Callable[[], float] = time.time,
                 sink_factory: Callable[[Upstream], Sink] | None = None) -> None:
        self.cfg = cfg
        self.log = logger or logging.getLogger("watchkeep")
        self.registry = registry or CollectorRegistry()
        self._flushed_at = -math.inf
        self._close_at_for: IngestHandler | None = None
        self.metrics = Metrics(self.registry)
        self.env = dict(os.environ if env is None else env)
        self.clock = clock
        self.notifier = Notifier(self.env)
        self.metrics.info.info({"version": __version__})
        self._sink_factory = sink_factory
        self._stopped = threading.Event()
        self._reloader: Reloader | None = None
        self.http: HttpServer | None = None
        self.rebaseline_worker_env: dict[str, str] = {}  # extra env for the training worker
        self.commands: CommandReceiver | None = None

    def start(self) -> None:
        cfg = self.cfg
        try:
            private_dir(cfg.state_dir)  # 0700 when made here, whatever the umask
        except OSError as exc:
            raise ConfigError([ConfigProblem(
                "state_dir", "a directory watchkeep can create and write",
                f"{cfg.state_dir} ({exc.strerror or exc})")]) from exc
        runtimes = []
        for a in cfg.assets:
            bundle, err = load_asset_bundle(a, self.log)
            rt = AssetRuntime.build(a, bundle, err)
            if rt.bundle_error and not err:
                self.log.error(kv("model bundle rejected; the asset runs without a model",
                                  asset=a.name, error=rt.bundle_error))
            runtimes.append(rt)
        self.buffers = Buffers(cfg)
        self.outbox = Outbox(cfg.outbox, self.metrics, self.log, clock=self.clock).open()
        stored = self.outbox.sequences()
        for rt in runtimes:  # event sequence numbers continue across restarts
            rt.sequence = stored.get(rt.cfg.name, rt.sequence)
        self.upstream = Upstream(cfg, self.outbox, self.metrics, self.log, clock=self.clock)
        sink: Sink = self._sink_factory(self.upstream) if self._sink_factory else self.outbox
        # Re-learning (agent/learning/manager.py): holds back a learning asset's anomaly events in
        # front of the sink and collects its new-normal windows from the observer.
        self.rebaseline = RebaselineManager(self, worker_env=self.rebaseline_worker_env)
        sink = self.rebaseline.wrap_sink(sink)
        if self.rebaseline.cfg.mqtt_commands:  # agent/learning/commands.py; off by default
            self.commands = CommandReceiver(
                cfg.topic_prefix, self.rebaseline.request,
                assets=lambda: [rt.cfg.name for rt in self.pipeline.runtimes],
                enabled=lambda: self.rebaseline.cfg.mqtt_commands,
                registry=self.registry, logger=self.log)
            self.upstream.accept_commands(self.commands.topic_filter, self.commands.offer)
        self.pipeline = Pipeline(cfg, self.buffers, sink, self.metrics, self.log, runtimes,
                                 observer=self.rebaseline.observe,
                                 observes=self.rebaseline.collecting)
        self.handler = IngestHandler(cfg, self.buffers, self.metrics, self.log)
        # A child process stamps arrivals with the wall clock: a daemon built on another
        # clock (the demo's and some tests' simulated time) keeps ingest in a thread.
        in_child = cfg.ingest.worker is IngestWorker.PROCESS and self.clock is time.time
        self.ingest: Ingest | ProcessIngest = (ProcessIngest if in_child else Ingest)(
            cfg, self.handler, self.metrics, self.log, clock=self.clock)
        self.loop = PipelineLoop(self.pipeline, cfg.tick_s, self.metrics, self.notifier,
                                 self.log, clock=self.clock)
        self.loop.after_tick = self._after_tick
        if cfg.http.enabled:
            # Bound before any broker is contacted: a port in use stops the start-up
            # before an "online" status could be published.
            self.http = HttpServer(cfg.http.host, cfg.http.port, self.registry,
                                   healthy=self.healthy, ready=self.ready, status=self.status,
                                   before_scrape=self._before_scrape,
                                   max_connections=cfg.http.max_connections,
                                   request_timeout_s=cfg.http.request_timeout_s)
        if self.commands is not None:
            self.commands.start()
        self.upstream.start()
        self.loop.start()
        self.ingest.start()
        if self.http is not None:
            self.http.start()
        self.rebaseline.start()
        loaded = sum(1 for rt in runtimes if rt.bundle is not None)
        summary = f"{len(runtimes)} assets, {loaded} models loaded"
        self.log.info(kv("watchkeep started", version=__version__, assets=len(runtimes),
                         models=loaded,
                         http=f"{cfg.http.host}:{self.http.port}" if self.http else "off"))
        self.notifier.ready(summary)

    def _before_scrape(self) -> None:
        self.handler.flush_counts()
        self.loop.gauges.refresh_ages(self.clock())

    def _after_tick(self) -> None:
        """On the pipeline thread after every tick: move ingest's counts into the
        metrics (at most every `_FLUSH_EVERY_S`; a scrape flushes first anyway), and
        tell ingest the sample time that closes each asset's next window (so it can
        wake the pipeline loop)."""
        now = time.monotonic()
        if now - self._flushed_at >= _FLUSH_EVERY_S:
            self._flushed_at = now
            self.handler.flush_counts()
        handler, pipeline = self.handler, self.pipeline
        rts = pipeline.runtimes
        if self._close_at_for is not handler or len(handler.close_at) != len(rts):
            # Start-up or a reload: every asset. Then only those the tick visited, as
            # only their next window can have moved (a loop over every asset per tick
            # was a seventh of a busy tick's time at 200 assets).
            self._close_at_for = handler
            handler.close_at = [math.inf] * len(rts)
            todo: Iterable[int] = range(len(rts))
        else:
            todo = pipeline.last_due
        times = handler.close_at
        for ai in todo:
            rt = rts[ai]
            start, w = rt.assembler.next_start, rt.cfg.window
            # One list item store: the network thread reads old or new.
            times[ai] = math.inf if start is None else start + w.length_s + w.lateness_s
        handler.wake = self.loop.wake

    def healthy(self) -> tuple[bool, str]:
        loop = self.loop
        age = time.monotonic() - loop.last_tick_mono
        limit = max(5.0, 20 * self.cfg.tick_s)
        if age > limit:
            return False, f"pipeline has not ticked for {age:.1f} s"
        if not loop.tick_ok:
            failing = self._failing()
            return False, ("pipeline tick failed for every asset: " + failing if failing
                           else "pipeline tick failed")
        failing = self._failing()
        if failing:
            return True, f"ok: last tick {age:.2f} s ago; asset errors: {failing}"
        return True, f"ok: last tick {age:.2f} s ago"

    def _failing(self) -> str:
        """The assets whose work is failing, with the stage: `P-1 (windows), ...`."""
        return ", ".join(f"{rt.cfg.name} ({rt.error[0]})" for rt in self.pipeline.runtimes
                         if rt.error is not None)

    def reload(self) -> bool:
        """SIGHUP: apply the config file and bundles now on disk, or keep the running ones
        (the contract is in agent/ops/reload.py). Call from one thread at a time."""
        if self._reloader is None:
            self._reloader = Reloader(self, clock=self.clock)
        return self._reloader.reload().ok

    def ready(self) -> tuple[bool, str]:
        if self._stopped.is_set():
            return False, "stopping"
        if not self.ingest.connected.is_set():
            return False, "local broker not connected"
        missing = [rt.cfg.name for rt in self.pipeline.runtimes
                   if rt.cfg.bundle is not None and rt.bundle is None]
        if missing:
            return False, "models not loaded: " + ", ".join(missing)
        failing = self._failing()
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


# Test hook, read only by `run_daemon`: after this many seconds the pipeline loop stops
# ticking, as a hung model or a deadlock would, so tests can see WATCHDOG=1 stop.
TEST_WEDGE_ENV = "WATCHKEEP_TEST_WEDGE_AFTER_S"
STATUS_EVERY_S = 10.0  # how often STATUS= (systemctl status) is refreshed


def status_line(daemon: Daemon) -> str:
    """The one-line summary systemd shows in `systemctl status`."""
    rts = daemon.pipeline.runtimes
    loaded = sum(1 for rt in rts if rt.bundle is not None)
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
