"""One pipeline tick: cut due windows -> judge -> features -> inference -> detectors -> sink.

`Pipeline.tick(now)` does all the work of a tick and touches no clock, socket or
file itself: samples come from the ingest buffers, messages go to the injected
sink (the outbox) in one batch per tick. The loop that calls it lives in the
daemon. Every asset takes the same way through a tick, in stages that each run for
all the tick's windows at once:

1. **cut**: every due window of every asset, under the assets' locks, in one call
   (`close_inboxes` -> `close_many`: the usual case, exactly the next tumbling window
   with rows in step, is cut for all such assets together as rows of one matrix per
   segment length);
2. **judge** (`judge.py`): staleness (when a channel can have gone stale) and liveness,
   then per window sensor health and the operating mode with settling, only for the
   assets and channels that have them -> `sensor.fault` / `sensor.recovered`;
3. **features** (`featurize.py`): time-domain features of all the tick's windows in
   one pass per segment length, spectral ones in one FFT per group of segments;
4. **limits** (`judge.py`): static limits and ISO 10816-3 zones -> `limit.exceeded`,
   with or without a model;
5. **inference** (`infer.py`): the windows that are scored, planned once per set of
   models and batched across assets;
6. **detectors and messages** (`emit.py`), per window in time order per asset.

Skipped windows are counted in `watchkeep_windows_skipped_total` with reasons
`no_data`, `sensor_fault`, `incomplete`, `unknown_mode`, `not_scored`, `settling`,
`no_model` and `model_error`, first match wins. Each stage is contained per asset: when
a stage raises for the batch it runs again asset by asset, and only the asset that
raises fails (counted, reported in /readyz and /status; `all_failing` when every
asset that has had work fails).
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Mapping, Sequence
from operator import attrgetter, is_, itemgetter
from typing import Any, Protocol, cast

import numpy as np

from agent.config.load import Config
from agent.core.decode import Reason
from agent.core.features import WorkArrays
from agent.core.timebase import Step
from agent.core.windows.assembler import AssembleResult
from agent.core.windows.closed import ClosedWindow
from agent.ingest.buffers import AssetInbox, Buffers, close_inboxes
from agent.models.bundle import Bundle
from agent.ops.logs import RateLimited, kv
from agent.ops.metrics import Metrics
from agent.pipeline.contain import contained
from agent.pipeline.emit import AssetMetrics, Emitter, TickStats
from agent.pipeline.featurize import Extremes, feature_rows
from agent.pipeline.health_batch import Prejudged
from agent.pipeline.infer import Item, Scored, Scorer
from agent.pipeline.judge import Judge, Pending
from agent.pipeline.messages import OutMessage
from agent.pipeline.runtime import AssetRuntime
from agent.pipeline.status import asset_status

_ITEM_ROW, _ROW = itemgetter(1), attrgetter("row")  # of an `Item`, of a `Pending`
STALE_MARGIN_S = 1e-6

__all__ = ["Pipeline", "Sink", "TickStats", "WindowObserver", "WindowWanted"]


class Sink(Protocol):
    """Takes one tick's messages; `sequences` are the assets' event sequence numbers
    after the tick (only those that changed), stored with the messages."""

    def submit(self, msgs: Sequence[OutMessage],
               sequences: Mapping[str, int] | None = None) -> None: ...


WindowObserver = Callable[[str, str, ClosedWindow, np.ndarray, tuple[str, ...]], None]
# Whether the observer wants an asset's windows now (asked per window; None: always).
WindowWanted = Callable[[str], bool]


class Pipeline:
    """The per-tick work for all assets."""

    def __init__(self, cfg: Config, buffers: Buffers, sink: Sink, metrics: Metrics,
                 logger: logging.Logger, runtimes: list[AssetRuntime], *,
                 observer: WindowObserver | None = None,
                 observes: WindowWanted | None = None) -> None:
        """`observer` gets every scoreable window with its feature row; `observes(asset)`
        says whether it wants an asset's windows now (without it, it wants all)."""
        self.cfg, self.buffers, self.sink, self.metrics = cfg, buffers, sink, metrics
        self.log = logger
        self.runtimes = runtimes
        self.observer, self.observes = observer, observes
        self._m = {rt.cfg.name: AssetMetrics.of(metrics, rt.cfg.name) for rt in runtimes}
        self._m_at = [self._m[rt.cfg.name] for rt in runtimes]
        self._per_asset(runtimes)
        self.emit = Emitter(cfg, metrics, logger, self._m)
        self._work = WorkArrays()  # the feature passes' reusable arrays (pipeline thread)
        self.judge = Judge(metrics, logger, buffers, self.emit, cfg.ingest.startup_grace_s)
        # Ingest writes each asset's samples straight into its runtime's assembler.
        self._inboxes: list[AssetInbox] = []
        for rt, bufs in zip(runtimes, buffers.by_asset, strict=True):
            inbox = bufs[0].inbox
            if inbox.assembler is not rt.assembler:
                with inbox.lock:  # a fresh runtime: its buffers have had no samples yet
                    inbox.assembler = rt.assembler
            self._inboxes.append(inbox)
        # What each tick asks of every asset before taking any lock (`tick`).
        self._screen = [(rt.assembler, ib) for rt, ib in zip(runtimes, self._inboxes,
                                                              strict=True)]
        # Per asset, the time from which one of its channels can be stale (`Judge.stale`;
        # -inf: judge at the next tick; inf: an asset without `stale_s`).
        self._stale_wake = np.array([-np.inf if rt.layout.stale_channels else np.inf
                                     for rt in runtimes], dtype=np.float64)
        # Per asset, whether one of its channels was stale, or had never published, when
        # last judged: only a sample's arrival changes that, and when is not known
        # ahead, so such an asset is judged at every visit.
        self._stale_held = [False] * len(runtimes)
        # Staleness is judged every tick while this is true. A replay or an offline
        # record turns it off for the ticks after the data has ended (the end of a
        # recording is not every sensor going silent).
        self.judge_stale = True
        self._unstarted = [rt for rt in runtimes if rt.started_s is None]
        # Indices of the assets the last tick visited: only their next window can have
        # moved (the daemon recomputes ingest's wake-up times for these alone).
        self.last_due: list[int] = []
        # Containment (issue 20): the assets whose work failed in this tick, and whether
        # every asset that has had work is failing now (the daemon's health and
        # watchdog follow it).
        self._failed_now: set[str] = set()
        self.all_failing = False
        self._n_worked = sum(1 for rt in runtimes if rt.worked)
        self._n_failing = sum(1 for rt in runtimes if rt.error is not None)
        self._errlog = RateLimited(logger)
        self._extremes: Extremes = {}  # what sensor health found of the tick's rows
        self._wake: set[int] | None = None  # assets whose staleness is due (`_due`)
        self._ahead = metrics.messages_rejected.labels(Reason.AHEAD.value)
        for rt in runtimes:
            rt.shown_threshold = rt.shown_anomalous = None
            self._publish_model_gauges(rt)
        self.scorer = Scorer(metrics, logger, self._all_bundles)

    def _per_asset(self, runtimes: list[AssetRuntime]) -> None:
        """What the stages read of each asset by its position, fixed with its runtime."""
        self._closed_at = [m.closed for m in self._m_at]
        # Whether it has health or modes to judge (`_judge_windows`), channels to go stale.
        self._judged = [bool(rt.layout.checked) or rt.modes is not None for rt in runtimes]
        self._stale_at = [bool(rt.layout.stale_channels) for rt in runtimes]
        # For the scoring stages: its name, and whether it has limits or velocity
        # gauges (`Judge.limits`).
        self._names = [rt.cfg.name for rt in runtimes]
        self._limited = [bool(rt.limits or rt.layout.velocity_at) for rt in runtimes]
        # (models, mode, bundle, positions) of its last window (`Models` is replaced whole)
        self._serving: list[tuple[Any, ...]] = [(None, "", None, None)] * len(runtimes)

    def _all_bundles(self) -> list[Bundle]:
        return [b for rt in self.runtimes
                for b in (rt.models.asset_bundle, *rt.models.mode_bundles.values())
                if b is not None]

    def _publish_model_gauges(self, rt: AssetRuntime) -> None:
        shown = rt.models.shown
        self.metrics.model_loaded.labels(rt.cfg.name).set(1 if shown else 0)
        if shown is not None:
            self._m[rt.cfg.name].threshold.set(shown.meta.threshold)

    def _skip(self, rt: AssetRuntime, reason: str, n: int = 1) -> None:
        if n:
            self.metrics.windows_skipped.labels(rt.cfg.name, reason).inc(n)

    def _failed(self, rt: AssetRuntime, stage: str, exc: BaseException) -> None:
        """One asset's work failed at `stage` in this tick: count it, remember it for
        health and status, log it (rate-limited per asset and stage); the other
        assets' work goes on."""
        name = rt.cfg.name
        detail = f"{type(exc).__name__}: {exc}"[:200]
        self.metrics.asset_errors.labels(name, stage).inc()
        if rt.error is None:
            self.metrics.asset_failing.labels(name).set(1)
            self._n_failing += 1
        rt.error = (stage, detail)
        rt.errors += 1
        self._failed_now.add(name)
        self._errlog.warning(f"asset_error:{name}:{stage}", "asset failed in a tick; the "
                             "other assets go on", asset=name, stage=stage, error=detail)

    def _clock_steps(self, rt: AssetRuntime, steps: list[tuple[int, Step]]) -> None:
        """A channel's time-base guard accepted a jump ahead (agent/core/timebase.py)."""
        for ci, st in steps:
            ch = rt.cfg.channels[ci].name
            self.metrics.clock_steps.labels(rt.cfg.name, ch).inc()
            self.log.warning(kv("channel time base jumped ahead; accepted as its new time "
                                "base", asset=rt.cfg.name, channel=ch,
                                jump_s=round(st.jump_s, 3)))

    def _set_coverage(self, rt: AssetRuntime, cov: float) -> None:
        """The asset's coverage and its gauge (after this, `rt.shown_coverage` is what
        `rt.coverage` holds: the tick calls it only when a window's coverage differs)."""
        rt.coverage = cov
        if cov != rt.shown_coverage:
            self.metrics.coverage.labels(rt.cfg.name).set(cov)
            rt.shown_coverage = cov

    def _due(self, now: float) -> list[int]:
        """The assets with something to do at `now`: a window due
        (`WindowAssembler.due`), late samples, refused or stepped times or liveness
        notes to count, or a channel that can have gone stale since the asset's last
        visit (`Judge.stale` says from when).

        Read without the assets' locks: ingest only ever moves a sample time or an
        arrival forward and adds to the counts, so a stale read here is the same as
        the sample arriving just after this tick (the next tick, which ingest wakes,
        takes it); what is closed is decided again under the locks."""
        due = [ai for ai, (asm, ib) in enumerate(self._screen)
               if asm.due(now) or ib.late or ib.liveness or ib.ahead or ib.steps]
        self._wake = None
        if self.judge_stale:
            # A margin for rounding: a visit a little early changes nothing.
            self._wake = set(np.flatnonzero(self._stale_wake <= now + STALE_MARGIN_S).tolist())
            if self._wake:
                due = sorted(self._wake.union(due))
        return due

    def tick(self, now: float) -> TickStats:
        """Run one tick at wall-clock time `now` (seconds).

        Only assets with something to do are visited (`_due`). An asset skipped here is
        left exactly as a full close would leave it, so a tick in which a few windows
        close costs about as much as those few windows.
        """
        out, stats = self.emit.start_tick()
        if self._unstarted:
            for rt in self._unstarted:
                if rt.started_s is None:
                    rt.started_s = now
            self._unstarted = []
        due = self.last_due = self._due(now)
        runtimes = self.runtimes
        self._failed_now = set()
        self._extremes = {}
        for ai in due:
            if self._inboxes[ai].liveness:  # Sparkplug deaths and births, before windows
                try:
                    self.judge.liveness(runtimes[ai], self._inboxes[ai].take_liveness(), now)
                except Exception as exc:
                    self._failed(runtimes[ai], "health", exc)
        pending = self._cut_and_judge(due, now, stats)
        if pending:
            self._score(pending)
        self._account(due)
        if out:
            seqs = self.emit.moved  # the assets whose events moved their sequence numbers
            if seqs:
                self.sink.submit(out, sequences=dict(seqs))
            else:
                self.sink.submit(out)
            stats.messages = len(out)
        return stats

    def _cut_and_judge(self, due: list[int], now: float, stats: TickStats) -> list[Pending]:
        """Cut every due window (one call for all assets), count what the cut found, and
        judge each window's health and mode: here for an asset with nothing to judge but
        completeness, in `_judge_windows` for the rest (their places kept in order)."""
        runtimes, judged, closed = self.runtimes, self._judged, self._closed_at
        notes: list[tuple[int, list[tuple[int, Step]]]] = []
        results, lates = close_inboxes([self._inboxes[ai] for ai in due], now, notes)
        failed = self._failed_now
        pending: list[Pending | None] = []
        wins: list[tuple[AssetRuntime, ClosedWindow]] = []
        at: list[int] = []  # where each of `wins` goes in `pending`
        ais: list[int] = []  # and its asset's position
        n_closed = 0
        # The assets whose staleness is judged now (`_cut_notes` says when).
        held, wake = self._stale_held, self._wake
        for ai, res, late, (ahead, steps) in zip(due, results, lates, notes, strict=True):
            rt = runtimes[ai]
            if (late or ahead or steps or res.error is not None or res.empty_skipped
                    or (wake is not None and (held[ai] or ai in wake))) \
                    and not self._cut_notes(ai, rt, res, late, ahead, steps, now):
                continue
            windows = res.windows
            if not windows:
                continue
            n_closed += len(windows)
            closed[ai].value += len(windows)  # PlainSeries.inc, without the call
            if judged[ai]:
                for w in windows:
                    wins.append((rt, w))
                    at.append(len(pending))
                    ais.append(ai)
                    pending.append(None)
            elif not (failed and rt.cfg.name in failed):
                for w in windows:
                    rt.empty_streak = 0  # a window closed: its coverage is the asset's
                    if w.min_coverage != rt.shown_coverage:  # else shown and held already
                        self._set_coverage(rt, w.min_coverage)
                    pending.append(Pending(rt, w, rt.mode, (), None if w.complete
                                           else "incomplete", None, ai))
        stats.windows_closed += n_closed
        if wins:
            self._judge_windows(wins, pending, at, ais)
        if failed or wins:  # an asset failing at its second window drops its first too
            return [p for p in pending
                    if p is not None and not (failed and p.rt.cfg.name in failed)]
        return cast(list[Pending], pending)  # no place left empty

    def _cut_notes(self, ai: int, rt: AssetRuntime, res: AssembleResult, late: int, ahead: int,
                   steps: list[tuple[int, Step]], now: float) -> bool:
        """What the cut found besides windows (late and refused samples, clock steps, an
        error, windows without data) and the asset's staleness; whether its windows go
        on through the tick."""
        if late:
            self._m_at[ai].late.inc(late)
        if ahead:
            self._ahead.inc(ahead)
        if steps:
            self._clock_steps(rt, steps)
        if res.error is not None:
            self._failed(rt, "windows", res.error)
            with self._inboxes[ai].lock:  # start afresh on the next samples
                rt.assembler.reset()
            return False
        try:
            if self._stale_at[ai] and self.judge_stale and (
                    self._stale_held[ai] or self._stale_wake[ai] <= now + STALE_MARGIN_S):
                # Before the wake time no channel can have turned stale: judging
                # then would change nothing (`Judge.stale`).
                self._stale_wake[ai] = self.judge.stale(rt, ai, now)
                bufs = self.buffers.by_asset[ai]
                self._stale_held[ai] = any(rt.health[ci].stale or not bufs[ci].last_arrival
                                           for ci in rt.layout.stale_channels)
            if res.empty_skipped:
                self._skip(rt, "no_data", res.empty_skipped)
                rt.empty_streak += res.empty_skipped
                if not res.windows:
                    self._set_coverage(rt, 0.0)
        except Exception as exc:
            self._failed(rt, "health", exc)
            return False
        return True

    def _judge_windows(self, wins: list[tuple[AssetRuntime, ClosedWindow]],
                       pending: list[Pending | None], at: list[int], ais: list[int]) -> None:
        """Sensor health (quiet channels judged together first) and modes of the closed
        windows of assets with checks or modes (`ais` their positions), each into its
        place `at` in `pending` (left None when its asset fails)."""
        judge = self.judge
        failed = self._failed_now
        try:
            pre: Prejudged | None = judge.prejudge(wins, failed)
        except Exception:  # each window's own check_window decides which asset fails
            pre = None
        if pre is not None:
            self._extremes = pre.extremes
        window = judge.window
        for wi, (rt, w) in enumerate(wins):
            if failed and rt.cfg.name in failed:
                continue
            rt.empty_streak = 0  # a window closed: its coverage is the asset's
            if w.min_coverage != rt.shown_coverage:  # else shown and held already
                self._set_coverage(rt, w.min_coverage)
            try:
                p = pending[at[wi]] = window(rt, w, pre, wi)
                p.ai = ais[wi]
            except Exception as exc:
                self._failed(rt, "health", exc)

    def _account(self, due: list[int]) -> None:
        """After the tick's work: which assets work again, and whether all fail."""
        failed = self._failed_now
        runtimes = self.runtimes
        # Nothing to note while every asset has worked and none is failing (an asset
        # failing in this tick is counted failing).
        for ai in due if self._n_worked < len(runtimes) or self._n_failing else ():
            rt = runtimes[ai]
            if not rt.worked:
                rt.worked = True
                self._n_worked += 1
            if rt.error is not None and rt.cfg.name not in failed:
                rt.error = None
                self._n_failing -= 1
                self.metrics.asset_failing.labels(rt.cfg.name).set(0)
                self.log.info(kv("asset works again", asset=rt.cfg.name))
        # Every asset that has had work is failing: the tick failed for everyone.
        self.all_failing = 0 < self._n_worked == self._n_failing

    # -- features, limits, scoring ------------------------------------------------------

    def _score(self, pending: list[Pending]) -> None:
        """Features, limits, inference and detectors of the tick's windows. Each stage
        runs for all windows at once; when it raises, it runs again asset by asset and
        only the asset that raises fails (`_failed`), the others go on."""
        todo = [p for p in pending if p.w.complete]
        table = self._rows(todo) if todo else None
        items = self._items(pending)
        if items:  # the rows as one matrix to the scorer if every one is scored, in order
            whole = len(items) == len(todo) and all(map(is_, map(_ITEM_ROW, items),
                                                        map(_ROW, todo)))
            self._detect(items, pending, self._scores(items, pending, table if whole else None))

    def _items(self, pending: list[Pending]) -> list[Item]:
        """Limits of every window with a feature row; the windows to score, keyed by
        their position in `pending`, with their rows and models."""
        failed = self._failed_now
        items: list[Item] = []
        observer, observes = self.observer, self.observes
        skip, limits = self._skip, self.judge.limits
        names, limited, serving = self._names, self._limited, self._serving
        for key, p in enumerate(pending):
            ai = p.ai
            if failed and names[ai] in failed:
                continue
            rt = p.rt
            try:
                row = p.row
                if row is not None and limited[ai]:
                    limits(p, row)
                if p.reason is not None:
                    skip(rt, p.reason)
                    continue
                assert row is not None
                if observer is not None and (observes is None or observes(names[ai])):
                    lay = rt.layout
                    observer(names[ai], p.mode, p.w, row[lay.record_index], lay.record_names)
                models, mode, bundle, index = serving[ai]
                if models is not rt.models or mode != p.mode:
                    bundle, index = rt.models.for_mode(p.mode)
                    serving[ai] = (rt.models, p.mode, bundle, index)
                if bundle is None:
                    skip(rt, "no_model")
                    continue
                items.append((key, row, bundle, index))
            except Exception as exc:
                self._failed(rt, "features", exc)
        return items

    def _detect(self, items: list[Item], pending: list[Pending], got: Scored) -> None:
        """Step detectors in window order, so an asset's windows are judged in time
        order (`Emitter.scored`)."""
        self.emit.scored([pending[it[0]] for it in items], [it[2] for it in items], got,
                         self._failed_now, self._model_error,
                         lambda rt, exc: self._failed(rt, "detector", exc))

    def _model_error(self, rt: AssetRuntime) -> None:
        self._skip(rt, "model_error")

    def _rows(self, todo: list[Pending]) -> np.ndarray | None:
        """Every window's feature row into its `row`; contained per asset. Returns the
        matrix of them (row j todo[j]'s) when one pass made them as one."""
        table: list[np.ndarray] = []

        def work(part: Sequence[Pending]) -> None:
            t0 = time.perf_counter()
            rows = feature_rows(part, self._work, self._extremes)
            self.metrics.feature_seconds.observe(time.perf_counter() - t0)
            for p, r in zip(part, rows, strict=True):
                p.row = r
            if part is todo and isinstance(rows, np.ndarray):
                table.append(rows)

        contained(todo, lambda p: p.rt, work, lambda rt, exc: self._failed(rt, "features", exc))
        return table[0] if table else None

    def _scores(self, items: list[Item], pending: list[Pending],
                table: np.ndarray | None) -> Scored:
        """The scorer's answer for `items` (`table`: their rows as one matrix, or None),
        contained per asset: the items of an asset whose inference raised are not `ok`."""
        def model_error(key: int, detail: str) -> None:
            rt = pending[key].rt
            if detail:
                self.log.error(kv("model failed", asset=rt.cfg.name, error=detail))
            self._model_error(rt)

        parts: list[tuple[Sequence[Item], Scored]] = []
        contained(items, lambda it: pending[it[0]].rt,
                  lambda part: parts.append((part, self.scorer.scores(
                      part, model_error, rows=table if part is items else None))),
                  lambda rt, exc: self._failed(rt, "inference", exc))
        return Scored.of_parts(items, parts)

    def status(self) -> dict[str, Any]:
        """Per-asset status for `/status` and `watchkeep status`."""
        return {"site": self.cfg.site, "gateway": self.cfg.gateway,
                "assets": [asset_status(rt) for rt in self.runtimes]}
