"""Re-learning in the running daemon: requests, the learning state, the worker, the swap.

Life of a rebaseline for one asset (at most one at a time per asset):

    idle --request--> collecting --N windows--> training --verdict--> idle
                          |                          |
                          +--cancel / stop-----------+--> idle (nothing changed)

- **Request** (admin socket; `watchkeep rebaseline`): checked against the running
  model (it must be the `active` link of a slot in the model store, with a rehearsal
  set). Logged and published as `model.rebaseline` {phase: requested|refused} with who
  (from the kernel's peer credentials) and why (`--reason`).
- **Collecting**: the pipeline's window observer hands over every scoreable window;
  those in the requested mode are kept (the model's feature columns). The asset keeps
  scoring with the old model. **Anomaly events are held back**: `anomaly.raised` (and
  the `anomaly.cleared` that would end a held raise) are *not published*; each is
  logged with `held=true` and counted (`watchkeep_rebaseline_held_events_total`, and
  `held_events` in the state topic and the outcome event). A held event still used up
  its per-asset sequence number, so consumers see a gap there, explained by that count.
  Every asset's retained state message carries `"learning": {...}` meanwhile, and
  `/status` shows it. Sensor, limit and other events pass untouched.
  **The learning guard** (issue 20): a new normal the verdict could accept has its
  median old-model score under `max_shift` x threshold. An anomaly whose score reaches
  `FAR_FACTOR` (3) x `max_shift` x threshold (30 x by default) cannot be that: it is not
  held. A raise that far is published as it is; while a held raise is open, the first
  window that far publishes the held `anomaly.raised` (its own id, time and sequence).
  Learning then ends (`model.rebaseline` {phase: aborted}, the reason with the score),
  unless the request said `accept_shift` (a shift that large was announced): then the
  anomaly is published and learning goes on. Either way the alarm is never muted.
- **Training**: in `python -m agent.learning.worker` at nice 10 with one BLAS
  thread (agent/learning/worker.py); this module only waits for it. Windows keep
  being scored with the old model and anomaly events stay held until the verdict.
- **Verdict**: accepted -> the new version is activated in the store (atomic link
  switch), loaded and warmed, and swapped into the asset's runtime with the pipeline
  loop paused between ticks (detector reset), older versions pruned, and
  `model.updated` published with old and new version and the validation figures.
  Refused / rejected / failed (the worker died: no result) -> `model.rebaseline` with
  the reasons and figures; the active version was never touched.

Rollback switches the link back (`--to vN`, default the version before the active
one), loads and swaps it the same way and publishes `model.updated` {action:
rollback}. A model file is bytes: the same version gives the same scores.
"""

from __future__ import annotations

import logging
import shutil
import subprocess
import sys
import threading
import time
import uuid
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from prometheus_client import CollectorRegistry

from agent.config.rebaseline import FAR_FACTOR, RebaselineConfig
from agent.core.events import EventType, rfc3339
from agent.errors import WatchkeepError
from agent.learning.holding import Holding, HoldingSink
from agent.learning.jobs import REQUESTED, Job, Phase, Result, brief
from agent.learning.metrics import LearningMetrics
from agent.learning.ports import Pausable, RunningAssets, Sink
from agent.learning.rebaseline import RebaselineError
from agent.learning.slots import Slots
from agent.learning.training import Trainer, TrainingResult, WorkerTrainer
from agent.models.bundle import Bundle
from agent.models.store import ModelStore
from agent.ops.admin import AdminServer, AdminVerb, Peer
from agent.ops.logs import kv
from agent.pipeline.messages import Kind, OutMessage

if TYPE_CHECKING:
    from agent.core.windows.closed import ClosedWindow


class RebaselineManager:
    """Owns the learning state of every asset of one daemon (module docstring).

    It reaches the rest of the daemon only through what it is given: `assets` (the
    running assets by name), `loop` (pausing the pipeline between ticks), `settings`
    (the `rebaseline:` section now in force, which a reload may change), the state
    directory for job files, a registry for its metrics and a clock for its events."""

    def __init__(self, assets: RunningAssets, loop: Pausable, *,
                 settings: Callable[[], RebaselineConfig], state_dir: Path,
                 registry: CollectorRegistry, logger: logging.Logger,
                 clock: Callable[[], float] = time.time, trainer: Trainer | None = None,
                 python: str = sys.executable,
                 worker_env: Mapping[str, str] | None = None) -> None:
        self.assets = assets
        self.loop = loop
        self._settings = settings
        self.state_dir = state_dir
        self.log = logger
        self.clock = clock
        self.worker_env = dict(worker_env or {})  # read at each worker start (tests add to it)
        self.trainer: Trainer = trainer or WorkerTrainer(python, self.worker_env)
        self.slots = Slots(assets, settings)
        self._jobs: dict[str, Job] = {}
        self.metrics = LearningMetrics(assets, self.jobs, registry)
        self.last: dict[str, dict[str, Any]] = {}
        self._threads: list[threading.Thread] = []
        self._lock = threading.Lock()
        self._stopping = threading.Event()
        self.admin: AdminServer | None = None
        self._inner: Sink | None = None
        self._sequences: dict[str, int] = {}  # set by `filter`, taken by the sink
        self._holding = Holding(self._jobs, lambda: FAR_FACTOR * self.cfg.max_shift,
                                self._guard, self.metrics.count_held, logger)

    # -- wiring ---------------------------------------------------------------------------

    @property
    def cfg(self) -> RebaselineConfig:
        return self._settings()

    @property
    def store(self) -> ModelStore:
        return self.slots.store

    def wrap_sink(self, sink: Sink) -> HoldingSink:
        """The sink the pipeline should use: `sink` behind the holding of learning assets'
        anomaly events; the manager's own events go to `sink` directly."""
        self._inner = sink
        return HoldingSink(sink, self.filter, self.take_sequences)

    def start(self) -> None:
        if self.cfg.enabled:
            admin = AdminServer(self.cfg.admin_socket, self.handle, self.log)
            try:
                admin.start()
            except (OSError, WatchkeepError) as exc:  # detection runs on without it
                self.log.error(kv("admin interface not started; rebaseline and rollback are "
                                  "unavailable", socket=str(self.cfg.admin_socket),
                                  error=str(exc)))
                return
            self.admin = admin

    def stop(self) -> None:
        """Stop taking requests; end any worker (its job is dropped, nothing changes)."""
        self._stopping.set()
        if self.admin is not None:
            self.admin.stop()
        with self._lock:
            procs = [j.proc for j in self._jobs.values() if j.proc is not None]
        for p in procs:
            if p.poll() is None:
                p.terminate()
        for t in self._threads:
            t.join(10.0)

    # -- the pipeline side (pipeline thread, loop lock held) -----------------------------

    def collecting(self, asset: str) -> bool:
        """Whether `observe` wants the asset's windows now (a job collecting for it): the
        pipeline asks per window. Read without the lock, as a dict read is atomic;
        `observe` decides again under it."""
        job = self._jobs.get(asset)
        return job is not None and job.phase is Phase.COLLECTING

    def observe(self, asset: str, mode: str, w: ClosedWindow, row: np.ndarray,
                names: tuple[str, ...]) -> None:
        """The pipeline's window observer: keeps the windows a collecting job wants."""
        with self._lock:
            job = self._jobs.get(asset)
            if job is None or job.phase is not Phase.COLLECTING or mode != job.mode:
                return
            if not job.collect(row, names, w.start):
                return
            job.phase = Phase.TRAINING
        self.log.info(kv("rebaseline: windows collected, training", asset=asset,
                         mode=job.mode, windows=job.target, request=job.request_id))
        t = threading.Thread(target=self._train, args=(job,), daemon=True,
                             name=f"watchkeep-rebaseline-{asset}")
        self._threads = [x for x in self._threads if x.is_alive()] + [t]
        t.start()

    def filter(self, msgs: Sequence[OutMessage]) -> list[OutMessage]:
        """The messages to publish of one tick (agent/learning/holding.py)."""
        with self._lock:
            return self._holding.filter(msgs)

    def _guard(self, job: Job, ratio: float, out: list[OutMessage]) -> None:
        """An anomaly `ratio` x threshold during learning was published; end learning
        unless the request announced a shift (lock held, pipeline thread)."""
        line = FAR_FACTOR * self.cfg.max_shift
        self.log.warning(kv("anomaly far past the learning guard published while learning",
                            asset=job.asset, score_ratio=round(ratio, 1), guard=line,
                            request=job.request_id, accept_shift=job.accept_shift))
        if job.accept_shift:
            return
        job.aborted = (f"an anomaly at {ratio:.3g} x the threshold while learning (over "
                       f"{FAR_FACTOR:g} x max_shift = {line:g} x): a fault, not a new normal")
        job.cancelled = True
        self._jobs.pop(job.asset, None)
        if job.proc is not None and job.proc.poll() is None:
            job.proc.terminate()
        if not self.assets.has(job.asset):
            return
        data = {**job.request_json(), "held_events": job.held_events, "figures": {},
                "phase": Result.ABORTED, "reasons": [job.aborted],
                "model_version": job.base_version}
        msg, seq = self._event_message(job.asset, EventType.MODEL_REBASELINE, data,
                                       Result.ABORTED, Kind.EVENT)
        out.append(msg)
        self._sequences[job.asset] = seq
        self.metrics.count_result(job.asset, Result.ABORTED)
        self.last[job.asset] = job.last(Result.ABORTED, [job.aborted])
        self.log.warning(kv("rebaseline aborted", asset=job.asset, request=job.request_id,
                            reasons=job.aborted))

    def take_sequences(self) -> dict[str, int]:
        """Sequence numbers of the events `filter` added (for the sink's submit)."""
        with self._lock:
            got, self._sequences = self._sequences, {}
        return got

    # -- requests (admin thread) -------------------------------------------------------

    def handle(self, req: dict[str, Any], peer: Peer) -> dict[str, Any]:
        """One admin socket request (`AdminVerb`)."""
        verb = req.get("verb")
        who = peer.as_json()
        self.log.info(kv("admin request", verb=verb, asset=req.get("asset"), user=who["user"],
                         pid=who["pid"], reason=req.get("reason")))
        known = next((v for v in AdminVerb if v.value == verb), None)
        asset = str(req.get("asset", ""))
        try:
            if known is AdminVerb.REBASELINE:
                return self.request(req, who)
            if known is AdminVerb.CANCEL:
                return self.cancel(asset, who)
            if known is AdminVerb.ROLLBACK:
                return self.rollback(asset, req.get("mode"), req.get("to"), who,
                                     str(req.get("reason") or ""))
            if known is AdminVerb.MODELS:
                return {"ok": True, **self.models(asset)}
            if known is AdminVerb.STATUS:
                return {"ok": True, "assets": self.summaries()}
        except WatchkeepError as exc:
            return {"ok": False, "error": str(exc)}
        return {"ok": False, "error": f"unknown verb {verb!r} "
                                      f"({', '.join(v.value for v in AdminVerb)})"}

    def request(self, req: dict[str, Any], who: dict[str, Any]) -> dict[str, Any]:
        """Start learning, or refuse with the reason (both published for a known asset)."""
        if self._stopping.is_set():
            raise RebaselineError("the daemon is stopping")
        asset = str(req.get("asset", ""))
        self.slots.known(asset)  # unknown assets: logged by `handle`, not published
        reason = str(req.get("reason") or "")[:500]
        accept = bool(req.get("accept_shift", False))
        rid = uuid.uuid4().hex[:12]
        base = {"request_id": rid, "asset": asset, "reason": reason, "requested_by": who,
                "accept_shift": accept}
        try:
            base["mode"] = mode = self.slots.mode(asset, req.get("mode"))
            base["windows"] = target = self.slots.target(req.get("windows"))
            bundle, slot_mode, active = self.slots.base(asset, mode)
            job = Job(rid, asset, mode, slot_mode, target, reason, who, accept, active,
                      bundle.meta.feature_names, self.clock())
            with self.loop.paused(), self._lock:
                if asset in self._jobs:
                    raise RebaselineError(f"asset {asset} is already learning (request "
                                          f"{self._jobs[asset].request_id}); cancel it first")
                self._jobs[asset] = job
                self._emit(asset, EventType.MODEL_REBASELINE,
                           {**base, "phase": REQUESTED, "model_version": active}, REQUESTED)
        except RebaselineError as exc:
            with self.loop.paused():
                self._emit(asset, EventType.MODEL_REBASELINE,
                           {**base, "phase": Result.REFUSED, "reasons": [str(exc)]},
                           Result.REFUSED)
            self.metrics.count_result(asset, Result.REFUSED)
            raise
        self.log.info(kv("rebaseline: learning", asset=asset, mode=mode, windows=target,
                         request=rid, user=who.get("user"), reason=reason))
        return {"ok": True, "request_id": rid, "asset": asset, "mode": mode, "windows": target,
                "base_version": active}

    def cancel(self, asset: str, who: dict[str, Any]) -> dict[str, Any]:
        self.slots.known(asset)
        with self._lock:
            job = self._jobs.get(asset)
            if job is None:
                raise RebaselineError(f"asset {asset} is not learning")
            job.cancelled = True
            proc = job.proc
        if proc is not None and proc.poll() is None:
            proc.terminate()  # the training thread sees the job cancelled and finishes it
            return {"ok": True, "cancelled": job.request_id}
        if job.phase is Phase.COLLECTING:
            self._finish(job, Result.CANCELLED, [f"cancelled by {who.get('user')}"], {}, None)
        return {"ok": True, "cancelled": job.request_id}

    # -- training (its own thread; the work is in the worker process) --------------------

    def _train(self, job: Job) -> None:
        job_dir = self.state_dir / "rebaseline" / job.request_id
        try:
            result = self.trainer.train(job, job_dir, self._job_spec(job),
                                        lambda proc: self._started(job, proc))
        except Exception as exc:
            self.log.exception("rebaseline training failed")
            result = TrainingResult.failed(f"{type(exc).__name__}: {exc}")
        self._trained(job, job_dir, result)

    def _job_spec(self, job: Job) -> dict[str, Any]:
        """The worker's job.json (agent/learning/worker.py)."""
        self.slots.known(job.asset)
        det = self.assets.detector(job.asset)
        c = self.cfg
        store = self.store
        return {"asset": job.asset, "mode": job.slot_mode,
                "store": {"root": str(store.root), "keep": store.keep},
                "base_version": job.base_version,
                "new_version": store.next_version(job.asset, job.slot_mode),
                "request": job.request_json(),
                "settings": {"max_shift": c.max_shift,
                             "false_alarm_budget": c.false_alarm_budget,
                             "rehearsal_tolerance": c.rehearsal_tolerance,
                             "rehearsal_size": c.rehearsal_size},
                "detector": [det.raise_k, det.raise_n, det.clear_m, det.stride]}

    def _started(self, job: Job, proc: subprocess.Popen[bytes]) -> None:
        with self._lock:
            job.proc = proc
        self.log.info(kv("rebaseline worker started", asset=job.asset, pid=proc.pid,
                         request=job.request_id))

    def _trained(self, job: Job, job_dir: Path, result: TrainingResult) -> None:
        """The worker has answered (or failed): finish the job, unless it is moot."""
        if self._stopping.is_set():
            self.log.warning(kv("rebaseline dropped: the daemon is stopping", asset=job.asset))
            return
        if job.aborted is not None:  # the learning guard ended it (published then)
            if result.version is not None:
                self.store.remove_version(job.asset, job.slot_mode, result.version)
            return
        if not self.assets.has(job.asset):
            return  # the asset was removed by a reload meanwhile
        verdict = Result.CANCELLED if job.cancelled else result.verdict
        reasons = ["cancelled"] if job.cancelled else list(result.reasons)
        version = result.version
        if verdict is not Result.ACCEPTED and version is not None:
            self.store.remove_version(job.asset, job.slot_mode, version)
            version = None
        self._finish(job, verdict, reasons, dict(result.figures), version)
        if verdict in (Result.ACCEPTED, Result.REJECTED, Result.REFUSED):
            shutil.rmtree(job_dir, ignore_errors=True)  # failed jobs stay for inspection

    def _finish(self, job: Job, verdict: Result, reasons: list[str],
                figures: dict[str, Any], version: int | None) -> None:
        """End the job: activate and swap in an accepted version, publish the outcome."""
        store = self.store
        bundle = None
        if verdict is Result.ACCEPTED and version is not None:
            try:
                store.activate(job.asset, job.slot_mode, version)
                bundle = self.slots.load_active(job.asset, job.slot_mode)
            except WatchkeepError as exc:
                store.activate(job.asset, job.slot_mode, job.base_version)
                verdict, reasons = Result.FAILED, [f"the new version does not load: {exc}"]
        data = {**job.request_json(), "held_events": job.held_events, "figures": figures,
                "shift_accepted": bool(job.accept_shift and figures.get("shift_exceeded"))}
        with self.loop.paused():
            with self._lock:
                if self._jobs.get(job.asset) is job:
                    self._jobs.pop(job.asset)
            self.slots.known(job.asset)  # a reload may have removed it
            if bundle is not None:
                self._install(job.asset, job.mode, bundle, raise_held=job.holding_raise)
                self._emit(job.asset, EventType.MODEL_UPDATED, {
                    **data, "action": "rebaseline", "model_id": bundle.meta.model_id,
                    "old_version": job.base_version, "new_version": version,
                    "threshold": bundle.meta.threshold,
                    "old_threshold": figures.get("old_threshold")}, "updated")
            else:
                self._emit(job.asset, EventType.MODEL_REBASELINE, {
                    **data, "phase": verdict, "reasons": reasons,
                    "model_version": job.base_version}, verdict)
        self.metrics.count_result(job.asset, verdict)
        pruned = store.prune(job.asset, job.slot_mode) if bundle is not None else []
        self.last[job.asset] = job.last(verdict, reasons, pruned=pruned, figures=figures,
                                        new_version=version if bundle is not None else None)
        log = self.log.info if bundle is not None else self.log.warning
        log(kv(f"rebaseline {verdict}", asset=job.asset, request=job.request_id,
               old=job.base_version, new=version, reasons="; ".join(reasons)))

    def _install(self, asset: str, mode: str, bundle: Bundle, *,
                 raise_held: bool = False) -> None:
        """Swap `bundle` in as the model serving `mode` (loop paused; detector reset). An
        anomaly raised and published before is cleared by an event first (the reset
        would otherwise leave it open upstream for ever)."""
        open_anomaly = self.assets.open_anomaly(asset)
        if open_anomaly is not None and not raise_held:
            old = self.assets.serving(asset, mode)
            data: dict[str, Any] = {
                "asset": asset, "mode": mode, "reason": "model replaced",
                "raised_at": rfc3339(open_anomaly.raised_at) if open_anomaly.raised_at
                else None,
                "peak_score": round(open_anomaly.peak_score, 6),
                "model": ({"id": old.meta.model_id, "version": old.meta.version}
                          if old is not None else None)}
            self._emit(asset, EventType.ANOMALY_CLEARED, data,
                       f"cleared|{uuid.uuid4().hex[:12]}", kind=Kind.ANOMALY)
        self.assets.install(asset, mode, bundle)

    # -- rollback and listing ------------------------------------------------------------

    def rollback(self, asset: str, mode: Any, to: Any, who: dict[str, Any],
                 reason: str) -> dict[str, Any]:
        self.slots.known(asset)
        with self._lock:
            if asset in self._jobs:
                raise RebaselineError(f"asset {asset} is learning; cancel that first")
        m = self.slots.mode(asset, mode)
        current, slot_mode = self.slots.slot(asset, m)
        target, active = self.slots.rollback_target(asset, slot_mode, to)
        store = self.store
        store.activate(asset, slot_mode, target)
        try:
            bundle = self.slots.load_active(asset, slot_mode)
        except WatchkeepError as exc:
            if active is not None:
                store.activate(asset, slot_mode, active)
            raise RebaselineError(f"v{target} does not load, v{active} stays: {exc}") from exc
        with self.loop.paused():
            self.slots.known(asset)
            self._install(asset, m, bundle)
            self._emit(asset, EventType.MODEL_UPDATED, {
                "action": "rollback", "asset": asset, "mode": m, "model_id":
                bundle.meta.model_id, "old_version": current.meta.version,
                "new_version": target, "threshold": bundle.meta.threshold,
                "requested_by": who, "reason": reason}, f"rollback|{uuid.uuid4().hex[:12]}")
        self.log.info(kv("model rolled back", asset=asset, mode=slot_mode,
                         old=current.meta.version, new=target, user=who.get("user")))
        return {"ok": True, "asset": asset, "mode": slot_mode,
                "old_version": current.meta.version, "new_version": target}

    def models(self, asset: str) -> dict[str, Any]:
        self.slots.known(asset)
        listing = self.store.listing(asset)
        return {"asset": asset, "models_dir": str(self.store.root),
                "modes": {m: [v.as_json() for v in vs] for m, vs in listing.items()}}

    def jobs(self) -> dict[str, dict[str, Any]]:
        with self._lock:
            return {a: j.summary() for a, j in self._jobs.items()}

    def summaries(self) -> dict[str, Any]:
        with self._lock:
            return {a: {"learning": self._jobs[a].summary() if a in self._jobs else None,
                        "last_rebaseline": brief(self.last.get(a))}
                    for a in self.assets.names()}

    def annotate(self, status: dict[str, Any]) -> None:
        """Add each asset's learning state and last rebaseline to a `/status` document."""
        s = self.summaries()
        for a in status.get("assets", []):
            a.update(s.get(a.get("asset"), {}))

    # -- events ------------------------------------------------------------------------

    def _emit(self, asset: str, etype: EventType, data: dict[str, Any], key: str, *,
              kind: Kind = Kind.EVENT) -> None:
        """Publish one event of `asset` (call with the pipeline loop paused: the sink and
        the sequence number are the pipeline's)."""
        if self._inner is None:
            return
        msg, seq = self._event_message(asset, etype, data, key, kind)
        self._inner.submit([msg], sequences={asset: seq})

    def _event_message(self, asset: str, etype: EventType, data: dict[str, Any], key: str,
                       kind: Kind) -> tuple[OutMessage, int]:
        """One event of `asset` as a message, with the sequence number it took; its id is
        keyed on the request and `key`."""
        msg, seq = self.assets.event(asset, etype, data, f"{data.get('request_id', '')}|{key}",
                                     kind, self.clock())
        self.log.info(kv("event", type=etype.value, asset=asset, id=msg.event_id,
                         phase=data.get("phase") or data.get("action")))
        return msg, seq
