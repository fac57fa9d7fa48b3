"""The pipeline loop: the thread that ticks the pipeline, and the watchdog that follows it.

`PipelineLoop` ticks the pipeline it runs now (`current`, a `Running` from
agent/pipeline/builder.py) every `tick_s`, or at once when ingest wakes it because a
sample closed a window. A reload swaps `current` between two ticks (`paused()`, then
`swap`). Only a tick that did its work for at least one asset feeds systemd's watchdog
(WATCHDOG=1) and keeps `/healthz` healthy: a loop that ticks but fails for every asset
is restarted like a wedged one. After each tick `IngestFeedback` moves ingest's counts
into the metrics and tells ingest when each asset's next window closes.
"""

from __future__ import annotations

import logging
import math
import threading
import time
from collections.abc import Callable, Iterable, Iterator
from contextlib import AbstractContextManager, contextmanager

from agent.ingest.buffers import Buffers, IngestHandler
from agent.ops.metrics import Metrics, TickGauges
from agent.ops.notify import MAX_WATCHDOG_INTERVAL_S, Notifier
from agent.pipeline.builder import Running
from agent.pipeline.tick import Pipeline

# How often the pipeline thread moves ingest's plain counts into the Prometheus
# counters (a loop over every channel): ticks can follow each other within
# milliseconds when many windows close at once.
FLUSH_EVERY_S = 0.5


class LoopLock:
    """The lock every tick runs under: holding it (`paused()`) keeps the pipeline loop
    between two ticks. Made before the loop, so that what the loop's pipeline is built
    with (re-learning) can be given it."""

    def __init__(self) -> None:
        self.lock = threading.Lock()

    @contextmanager
    def paused(self) -> Iterator[None]:
        with self.lock:
            yield


class PipelineLoop:
    """Ticks the pipeline every `tick_s` on its own thread; the watchdog follows it."""

    def __init__(self, running: Running, metrics: Metrics, notifier: Notifier,
                 logger: logging.Logger, clock: Callable[[], float] = time.time, *,
                 lock: LoopLock | None = None) -> None:
        self.current = running
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
        self.lock = lock or LoopLock()
        self._thread = threading.Thread(target=self._run, name="watchkeep-pipeline",
                                        daemon=True)

    @property
    def pipeline(self) -> Pipeline:
        return self.current.pipeline

    @property
    def tick_s(self) -> float:
        return self.current.cfg.tick_s

    def start(self) -> None:
        self._thread.start()

    def paused(self) -> AbstractContextManager[None]:
        """Hold the loop between two ticks (reload swaps the runtimes in here)."""
        return self.lock.paused()

    def swap(self, running: Running) -> None:
        """Tick `running` from the next tick on (call inside `paused()`)."""
        self.current = running

    def stop(self, timeout_s: float = 10.0) -> None:
        self._stop.set()
        self.wake.set()
        self.wedged.clear()
        self._thread.join(timeout_s)
        self.tick_once()  # flush windows whose samples arrived before ingest stopped

    def tick_once(self) -> None:
        with self.lock.lock:
            t0 = time.perf_counter()
            pipeline = self.pipeline
            try:
                pipeline.tick(self.clock())
                ok = not pipeline.all_failing
            except Exception:
                self.log.exception("pipeline tick failed")
                self.metrics.callback_errors.labels("pipeline").inc()
                ok = False
            self.metrics.tick_seconds.observe(time.perf_counter() - t0)
            try:
                self.gauges.update(pipeline, self.clock())
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

    def failing(self) -> str:
        """The assets whose work is failing, with the stage: `P-1 (windows), ...`."""
        return ", ".join(f"{rt.cfg.name} ({rt.error[0]})" for rt in self.pipeline.runtimes
                         if rt.error is not None)

    def healthy(self) -> tuple[bool, str]:
        """`/healthz`: the loop ticks, and its last tick did work for some asset."""
        age = time.monotonic() - self.last_tick_mono
        limit = max(5.0, 20 * self.tick_s)
        if age > limit:
            return False, f"pipeline has not ticked for {age:.1f} s"
        failing = self.failing()
        if not self.tick_ok:
            return False, ("pipeline tick failed for every asset: " + failing if failing
                           else "pipeline tick failed")
        if failing:
            return True, f"ok: last tick {age:.2f} s ago; asset errors: {failing}"
        return True, f"ok: last tick {age:.2f} s ago"


class IngestFeedback:
    """The loop's `after_tick`, on the pipeline thread: moves ingest's counts into the
    metrics (at most every `FLUSH_EVERY_S`; a scrape flushes first anyway), and tells
    ingest the sample time that closes each asset's next window (so it can wake the
    loop)."""

    def __init__(self, loop: PipelineLoop) -> None:
        self.loop = loop
        self._flushed_at = -math.inf
        self._close_at_for: IngestHandler[Buffers] | None = None

    def __call__(self) -> None:
        now = time.monotonic()
        handler, pipeline = self.loop.current.handler, self.loop.current.pipeline
        if now - self._flushed_at >= FLUSH_EVERY_S:
            self._flushed_at = now
            handler.flush_counts()
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
