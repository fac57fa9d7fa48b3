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

import json
import logging
import os
import shutil
import subprocess
import sys
import threading
import uuid
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from enum import StrEnum
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from prometheus_client import CollectorRegistry
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

from agent.config.rebaseline import FAR_FACTOR, MAX_WINDOWS, RebaselineConfig
from agent.core.detector import State
from agent.core.events import EventType, Source, make_event, rfc3339
from agent.core.windows.closed import ClosedWindow
from agent.errors import WatchkeepError
from agent.learning.rebaseline import MIN_NEW_WINDOWS, RebaselineError
from agent.learning.worker import JOB_JSON, RESULT_JSON, WINDOWS_NPZ, write_json
from agent.models.bundle import Bundle, load_bundle
from agent.models.store import ModelStore, read_rehearsal
from agent.ops.admin import AdminServer, Peer
from agent.ops.logs import kv
from agent.pipeline.messages import Kind, OutMessage
from agent.pipeline.runtime import DEFAULT_MODE, AssetRuntime, check_bundle_fits, feature_layout
from agent.pipeline.tick import Sink

if TYPE_CHECKING:
    from agent.daemon import Daemon

UNKNOWN_MODES = ("unknown", "")
# The worker runs numpy on one core: OpenBLAS/MKL/OpenMP would otherwise start a thread
# per core and compete with detection.
ONE_THREAD = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


class Phase(StrEnum):
    COLLECTING = "collecting"
    TRAINING = "training"


@dataclass
class Job:
    """One rebaseline in progress (mutable; guarded by the manager's lock)."""

    request_id: str
    asset: str
    mode: str  # the pipeline mode whose windows are collected
    slot_mode: str  # the model store slot of the bundle serving that mode
    target: int
    reason: str
    who: dict[str, Any]
    accept_shift: bool
    base_version: int
    feature_names: tuple[str, ...]
    requested_s: float
    phase: Phase = Phase.COLLECTING
    rows: list[np.ndarray] = field(default_factory=list)
    starts: list[float] = field(default_factory=list)
    held_events: int = 0
    holding_raise: bool = False
    held_raise: OutMessage | None = None  # the open raise held back, for the guard
    aborted: str | None = None  # why the learning guard ended the job
    index: np.ndarray | None = None
    proc: subprocess.Popen[bytes] | None = None
    cancelled: bool = False

    def request_json(self) -> dict[str, Any]:
        return {"request_id": self.request_id, "asset": self.asset, "mode": self.mode,
                "windows": self.target, "reason": self.reason, "requested_by": self.who,
                "accept_shift": self.accept_shift}

    def summary(self) -> dict[str, Any]:
        return {"phase": self.phase.value, "mode": self.mode, "collected": len(self.rows),
                "target": self.target, "held_events": self.held_events,
                "base_version": self.base_version, "request_id": self.request_id,
                "reason": self.reason, "requested_by": self.who.get("user"),
                "worker_pid": self.proc.pid if self.proc is not None else None}


class LearningMetrics:
    """The rebaseline metrics, computed at scrape time from the manager's state, so an asset
    removed by a reload takes its series with it (registered on the daemon's registry)."""

    def __init__(self, manager: RebaselineManager, r: CollectorRegistry) -> None:
        self.m = manager
        self.held: dict[str, int] = {}
        self.results: dict[tuple[str, str], int] = {}
        r.register(self)

    def describe(self) -> list[Any]:
        return []  # unchecked collector: the names are fixed in collect()

    def collect(self) -> Iterator[Any]:
        assets = {rt.cfg.name: rt for rt in self.m.d.pipeline.runtimes}
        jobs = self.m.jobs()
        learning = GaugeMetricFamily("watchkeep_rebaseline_learning",
                                     "1 while the asset is learning a new normal (collecting "
                                     "or training)", labels=["asset"])
        collected = GaugeMetricFamily("watchkeep_rebaseline_windows_collected",
                                      "New-normal windows collected by the asset's rebaseline",
                                      labels=["asset"])
        for a in assets:
            learning.add_metric([a], 1.0 if a in jobs else 0.0)
            collected.add_metric([a], float(jobs[a]["collected"]) if a in jobs else 0.0)
        held = CounterMetricFamily("watchkeep_rebaseline_held_events",
                                   "Anomaly events held back (not published) while learning",
                                   labels=["asset"])
        for a in assets:
            held.add_metric([a], float(self.held.get(a, 0)))
        results = CounterMetricFamily("watchkeep_rebaseline_results",
                                      "Rebaseline outcomes: accepted, rejected, refused, failed, "
                                      "cancelled, aborted", labels=["asset", "result"])
        for (a, res), n in sorted(self.results.items()):
            if a in assets:
                results.add_metric([a, res], float(n))
        version = GaugeMetricFamily("watchkeep_model_active_version",
                                    "Version of the model serving each of the asset's modes",
                                    labels=["asset", "mode"])
        for a, rt in assets.items():
            for mode, b in _serving(rt).items():
                version.add_metric([a, mode], float(b.meta.version))
        yield from (learning, collected, held, results, version)

    def count_held(self, asset: str) -> None:
        self.held[asset] = self.held.get(asset, 0) + 1

    def count_result(self, asset: str, result: str) -> None:
        self.results[(asset, result)] = self.results.get((asset, result), 0) + 1


class HoldingSink:
    """A Sink in front of the real one: holds back learning assets' anomaly events and marks
    their retained state (see the module docstring)."""

    def __init__(self, inner: Sink, manager: RebaselineManager) -> None:
        self.inner = inner
        self.manager = manager

    def submit(self, msgs: Sequence[OutMessage],
               sequences: Mapping[str, int] | None = None) -> None:
        kept = self.manager.filter(msgs)
        more = self.manager.take_sequences()  # events the guard added (aborted)
        if more:
            sequences = {**(sequences or {}), **more}
        if kept or sequences:
            self.inner.submit(kept, sequences=sequences)


class RebaselineManager:
    """Owns the learning state of every asset of one daemon (module docstring)."""

    def __init__(self, daemon: Daemon, *, python: str = sys.executable,
                 worker_env: Mapping[str, str] | None = None) -> None:
        self.d = daemon
        self.python = python
        self.worker_env = dict(worker_env or {})
        self.log: logging.Logger = daemon.log
        self.metrics = LearningMetrics(self, daemon.registry)
        self.last: dict[str, dict[str, Any]] = {}
        self._jobs: dict[str, Job] = {}
        self._threads: list[threading.Thread] = []
        self._lock = threading.Lock()
        self._stopping = threading.Event()
        self.admin: AdminServer | None = None
        self._inner: Sink | None = None
        self._sequences: dict[str, int] = {}  # set by `filter`, taken by the sink

    # -- wiring ---------------------------------------------------------------------------

    @property
    def cfg(self) -> RebaselineConfig:
        rb = getattr(self.d.cfg, "rebaseline", None)
        return rb if rb is not None else RebaselineConfig.defaults(self.d.cfg.state_dir)

    @property
    def store(self) -> ModelStore:
        return ModelStore(self.cfg.models_dir, self.cfg.versions_kept)

    def wrap_sink(self, sink: Sink) -> HoldingSink:
        self._inner = sink
        return HoldingSink(sink, self)

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
            if job.index is None:
                pos = {n: i for i, n in enumerate(names)}
                job.index = np.asarray([pos[n] for n in job.feature_names], np.int64)
            job.rows.append(np.asarray(row, np.float64)[job.index])
            job.starts.append(float(w.start))
            if len(job.rows) < job.target:
                return
            job.phase = Phase.TRAINING
        self.log.info(kv("rebaseline: windows collected, training", asset=asset,
                         mode=job.mode, windows=job.target, request=job.request_id))
        t = threading.Thread(target=self._train, args=(job,), daemon=True,
                             name=f"watchkeep-rebaseline-{asset}")
        self._threads = [x for x in self._threads if x.is_alive()] + [t]
        t.start()

    def filter(self, msgs: Sequence[OutMessage]) -> list[OutMessage]:
        """The messages to publish of one tick: learning assets' anomaly events held back,
        their state messages marked."""
        with self._lock:
            if not self._jobs:
                return list(msgs)
            out = []
            prefix = self.d.cfg.topic_prefix + "/assets/"
            for m in msgs:
                if m.kind not in (Kind.ANOMALY, Kind.STATE) or not m.topic.startswith(prefix):
                    out.append(m)
                    continue
                asset = m.topic[len(prefix):].rsplit("/", 1)[0]
                job = self._jobs.get(asset)
                if job is None:
                    out.append(m)
                elif m.kind is Kind.STATE:
                    doc = json.loads(m.payload)
                    self._state_past_guard(job, doc, out)
                    if job.aborted is not None:
                        out.append(m)
                        continue
                    doc["learning"] = job.summary()
                    out.append(OutMessage(m.topic, json.dumps(doc, separators=(",", ":"))
                                          .encode(), m.kind, m.qos, m.retain, m.key))
                else:
                    ev = json.loads(m.payload)
                    etype = ev.get("type", "")
                    raised = etype.endswith(EventType.ANOMALY_RAISED.value)
                    cleared = etype.endswith(EventType.ANOMALY_CLEARED.value)
                    far = self._far(ev.get("data", {}))
                    if raised and far is not None:
                        out.append(m)  # past the guard: never held
                        self._guard(job, far, out)
                    elif far is not None and not cleared and job.held_raise is not None:
                        # An escalation of a held raise, past the guard: both go out.
                        out += [job.held_raise, m]
                        job.held_raise, job.holding_raise = None, False
                        self._guard(job, far, out)
                    elif raised or job.holding_raise:
                        # A raise, and what follows it (escalations, its clear), held.
                        job.holding_raise = not cleared
                        if raised or cleared:
                            job.held_raise = m if raised else None
                        job.held_events += 1
                        self.metrics.count_held(asset)
                        self.log.info(kv("event held back while learning", asset=asset,
                                         type=ev.get("type"), id=ev.get("id"), held="true",
                                         score=ev.get("data", {}).get("score")))
                    else:
                        out.append(m)  # clears an anomaly raised (and published) before
            return out

    def _far(self, data: Mapping[str, Any]) -> float | None:
        """score / threshold when it reaches the learning guard's release line, else None."""
        score, threshold = data.get("score"), data.get("threshold")
        if not isinstance(score, (int, float)) or not isinstance(threshold, (int, float)) \
                or threshold <= 0:
            return None
        ratio = float(score) / float(threshold)
        return ratio if ratio >= FAR_FACTOR * self.cfg.max_shift else None

    def _state_past_guard(self, job: Job, doc: Mapping[str, Any], out: list[OutMessage]
                          ) -> None:
        """A window of an asset whose raise is held: far past the guard, the held raise
        goes out (before this state message) and the guard acts."""
        if not job.holding_raise or job.held_raise is None:
            return
        far = self._far(doc)
        if far is None:
            return
        out.append(job.held_raise)
        job.held_raise = None
        job.holding_raise = False
        self._guard(job, far, out)

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
        try:
            rt = self._runtime(job.asset)
        except RebaselineError:
            return
        data = {**job.request_json(), "held_events": job.held_events, "figures": {},
                "phase": "aborted", "reasons": [job.aborted],
                "model_version": job.base_version}
        msg, seq = self._event_message(rt, EventType.MODEL_REBASELINE, data, "aborted",
                                       Kind.EVENT)
        out.append(msg)
        self._sequences[job.asset] = seq
        self.metrics.count_result(job.asset, "aborted")
        self.last[job.asset] = {"request_id": job.request_id, "result": "aborted",
                                "reasons": [job.aborted], "old_version": job.base_version,
                                "new_version": None, "held_events": job.held_events,
                                "pruned": [], "figures": {}}
        self.log.warning(kv("rebaseline aborted", asset=job.asset, request=job.request_id,
                            reasons=job.aborted))

    def take_sequences(self) -> dict[str, int]:
        """Sequence numbers of the events `filter` added (for the sink's submit)."""
        with self._lock:
            got, self._sequences = self._sequences, {}
        return got

    # -- requests (admin thread) -------------------------------------------------------

    def handle(self, req: dict[str, Any], peer: Peer) -> dict[str, Any]:
        verb = req.get("verb")
        who = peer.as_json()
        self.log.info(kv("admin request", verb=verb, asset=req.get("asset"), user=who["user"],
                         pid=who["pid"], reason=req.get("reason")))
        try:
            if verb == "rebaseline":
                return self.request(req, who)
            if verb == "cancel":
                return self.cancel(str(req.get("asset", "")), who)
            if verb == "rollback":
                return self.rollback(str(req.get("asset", "")), req.get("mode"), req.get("to"),
                                     who, str(req.get("reason") or ""))
            if verb == "models":
                return {"ok": True, **self.models(str(req.get("asset", "")))}
            if verb == "status":
                return {"ok": True, "assets": self.summaries()}
        except WatchkeepError as exc:
            return {"ok": False, "error": str(exc)}
        return {"ok": False, "error": f"unknown verb {verb!r} (rebaseline, cancel, rollback, "
                                      "models, status)"}

    def _runtime(self, asset: str) -> AssetRuntime:
        for rt in self.d.pipeline.runtimes:
            if rt.cfg.name == asset:
                return rt
        raise RebaselineError(f"no asset {asset!r} in the running config")

    def _slot(self, rt: AssetRuntime, mode: str) -> tuple[Bundle, str]:
        """The bundle serving `mode` and its slot in the model store."""
        bundle, _ = rt.bundle_for(mode)
        if bundle is None:
            raise RebaselineError(f"asset {rt.cfg.name} has no model for mode {mode!r}: "
                                  "commission it first (record, train)")
        where = self.store.locate(bundle.path)
        if where is None or where[0] != rt.cfg.name:
            raise RebaselineError(
                f"asset {rt.cfg.name}: its bundle {bundle.path} is not in the model store "
                f"{self.cfg.models_dir}; adopt it (watchkeep models --asset {rt.cfg.name} "
                f"--adopt {bundle.path} --dataset DATASET) and point `bundle:` at the "
                "printed active link")
        return bundle, where[1]

    def _mode(self, rt: AssetRuntime, mode: Any) -> str:
        if mode:
            return str(mode)
        if getattr(rt, "modes", None) is None:
            return DEFAULT_MODE
        if rt.mode in UNKNOWN_MODES:
            raise RebaselineError(f"asset {rt.cfg.name} is in no known mode now; name one "
                                  "(--mode)")
        return rt.mode

    def request(self, req: dict[str, Any], who: dict[str, Any]) -> dict[str, Any]:
        """Start learning, or refuse with the reason (both published for a known asset)."""
        if self._stopping.is_set():
            raise RebaselineError("the daemon is stopping")
        asset = str(req.get("asset", ""))
        rt = self._runtime(asset)  # unknown assets: logged above, not published
        reason = str(req.get("reason") or "")[:500]
        accept = bool(req.get("accept_shift", False))
        rid = uuid.uuid4().hex[:12]
        base = {"request_id": rid, "asset": asset, "reason": reason, "requested_by": who,
                "accept_shift": accept}
        try:
            mode = self._mode(rt, req.get("mode"))
            base["mode"] = mode
            n = req.get("windows")
            target = self.cfg.windows if n is None else n
            if isinstance(target, bool) or not isinstance(target, int) or \
                    not MIN_NEW_WINDOWS <= target <= MAX_WINDOWS:
                raise RebaselineError(f"windows must be an integer from {MIN_NEW_WINDOWS} "
                                      f"to {MAX_WINDOWS}, got {str(target)[:40]}")
            base["windows"] = target
            bundle, slot_mode = self._slot(rt, mode)
            active = self.store.active_version(asset, slot_mode)
            if active != bundle.meta.version:
                raise RebaselineError(f"the running model is v{bundle.meta.version} but the "
                                      f"store's active version is v{active}: reload first")
            if read_rehearsal(self.store.version_path(asset, slot_mode, active)) is None:
                raise RebaselineError(f"v{active} of {asset}/{slot_mode} has no rehearsal set, "
                                      "so a rebaseline could forget other conditions; adopt "
                                      "the bundle with its training dataset (--dataset)")
            job = Job(rid, asset, mode, slot_mode, target, reason, who, accept, active,
                      bundle.meta.feature_names, self.d.clock())
            with self.d.loop.paused(), self._lock:
                if asset in self._jobs:
                    raise RebaselineError(f"asset {asset} is already learning (request "
                                          f"{self._jobs[asset].request_id}); cancel it first")
                self._jobs[asset] = job
                self._emit(rt, EventType.MODEL_REBASELINE,
                           {**base, "phase": "requested", "model_version": active}, "requested")
        except RebaselineError as exc:
            with self.d.loop.paused():
                self._emit(rt, EventType.MODEL_REBASELINE,
                           {**base, "phase": "refused", "reasons": [str(exc)]}, "refused")
            self.metrics.count_result(asset, "refused")
            raise
        self.log.info(kv("rebaseline: learning", asset=asset, mode=mode, windows=target,
                         request=rid, user=who.get("user"), reason=reason))
        return {"ok": True, "request_id": rid, "asset": asset, "mode": mode, "windows": target,
                "base_version": active}

    def cancel(self, asset: str, who: dict[str, Any]) -> dict[str, Any]:
        rt = self._runtime(asset)
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
            self._finish(rt, job, "cancelled", [f"cancelled by {who.get('user')}"], {}, None)
        return {"ok": True, "cancelled": job.request_id}

    # -- training (its own thread; the work is in the worker process) --------------------

    def _train(self, job: Job) -> None:
        result: dict[str, Any]
        job_dir = self.d.cfg.state_dir / "rebaseline" / job.request_id
        try:
            job_dir.mkdir(parents=True, exist_ok=True)
            tmp = job_dir / f".{WINDOWS_NPZ}.tmp"
            with open(tmp, "wb") as fh:
                np.savez(fh, features=np.stack(job.rows), window_start=np.asarray(job.starts))
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, job_dir / WINDOWS_NPZ)
            rt = self._runtime(job.asset)
            det = rt.cfg.window_detector
            c = self.cfg
            write_json(job_dir / JOB_JSON, {
                "asset": job.asset, "mode": job.slot_mode,
                "store": {"root": str(self.store.root), "keep": self.store.keep},
                "base_version": job.base_version,
                "new_version": self.store.next_version(job.asset, job.slot_mode),
                "request": job.request_json(),
                "settings": {"max_shift": c.max_shift,
                             "false_alarm_budget": c.false_alarm_budget,
                             "rehearsal_tolerance": c.rehearsal_tolerance,
                             "rehearsal_size": c.rehearsal_size},
                "detector": [det.raise_k, det.raise_n, det.clear_m, det.stride]})
            env = {**os.environ, **ONE_THREAD, **self.worker_env}
            with open(job_dir / "worker.log", "wb") as errf:
                proc = subprocess.Popen([self.python, "-m", "agent.learning.worker",
                                         str(job_dir)], stdin=subprocess.DEVNULL,
                                        stdout=errf, stderr=errf, env=env,
                                        cwd=str(Path(__file__).resolve().parents[2]))
                with self._lock:
                    job.proc = proc
                self.log.info(kv("rebaseline worker started", asset=job.asset, pid=proc.pid,
                                 request=job.request_id))
                code = proc.wait()
            try:
                result = json.loads((job_dir / RESULT_JSON).read_text(encoding="utf-8"))
            except (OSError, ValueError):
                how = f"killed by signal {-code}" if code < 0 else f"exit code {code}"
                result = {"verdict": "failed", "figures": {}, "version": None,
                          "reasons": [f"the training worker ended without a result ({how})"]}
        except Exception as exc:
            self.log.exception("rebaseline training failed")
            result = {"verdict": "failed", "figures": {}, "version": None,
                      "reasons": [f"{type(exc).__name__}: {exc}"]}
        if self._stopping.is_set():
            self.log.warning(kv("rebaseline dropped: the daemon is stopping", asset=job.asset))
            return
        if job.aborted is not None:  # the learning guard ended it (published then)
            version = result.get("version")
            if isinstance(version, int):
                self.store.remove_version(job.asset, job.slot_mode, version)
            return
        try:
            rt = self._runtime(job.asset)
        except RebaselineError:
            return  # the asset was removed by a reload meanwhile
        verdict = "cancelled" if job.cancelled else str(result.get("verdict"))
        reasons = list(result.get("reasons", [])) if not job.cancelled else ["cancelled"]
        version = result.get("version")
        if verdict != "accepted" and isinstance(version, int):
            self.store.remove_version(job.asset, job.slot_mode, version)
            version = None
        self._finish(rt, job, verdict, reasons, dict(result.get("figures", {})), version)
        if verdict in ("accepted", "rejected", "refused"):
            shutil.rmtree(job_dir, ignore_errors=True)  # failed jobs stay for inspection

    def _finish(self, rt: AssetRuntime, job: Job, verdict: str, reasons: list[str],
                figures: dict[str, Any], version: int | None) -> None:
        """End the job: activate and swap in an accepted version, publish the outcome."""
        store = self.store
        bundle = None
        if verdict == "accepted" and version is not None:
            try:
                store.activate(job.asset, job.slot_mode, version)
                bundle = load_bundle(store.active_link(job.asset, job.slot_mode))
                why = check_bundle_fits(rt.cfg, bundle)
                if why:
                    raise RebaselineError(why)
            except WatchkeepError as exc:
                store.activate(job.asset, job.slot_mode, job.base_version)
                verdict, reasons, bundle = "failed", [f"the new version does not load: {exc}"], \
                    None
        data = {**job.request_json(), "held_events": job.held_events, "figures": figures,
                "shift_accepted": bool(job.accept_shift and figures.get("shift_exceeded"))}
        with self.d.loop.paused():
            with self._lock:
                if self._jobs.get(job.asset) is job:
                    self._jobs.pop(job.asset)
            rt = self._runtime(job.asset)  # a reload may have swapped the runtime
            if bundle is not None:
                self._install(rt, job.mode, bundle, raise_held=job.holding_raise)
                self._emit(rt, EventType.MODEL_UPDATED, {
                    **data, "action": "rebaseline", "model_id": bundle.meta.model_id,
                    "old_version": job.base_version, "new_version": version,
                    "threshold": bundle.meta.threshold,
                    "old_threshold": figures.get("old_threshold")}, "updated")
            else:
                self._emit(rt, EventType.MODEL_REBASELINE, {
                    **data, "phase": verdict, "reasons": reasons,
                    "model_version": job.base_version}, verdict)
        self.metrics.count_result(job.asset, verdict)
        pruned = store.prune(job.asset, job.slot_mode) if bundle is not None else []
        self.last[job.asset] = {"request_id": job.request_id, "result": verdict,
                                "reasons": reasons, "old_version": job.base_version,
                                "new_version": version if bundle is not None else None,
                                "held_events": job.held_events, "pruned": pruned,
                                "figures": figures}
        log = self.log.info if bundle is not None else self.log.warning
        log(kv(f"rebaseline {verdict}", asset=job.asset, request=job.request_id,
               old=job.base_version, new=version, reasons="; ".join(reasons)))

    def _install(self, rt: AssetRuntime, mode: str, bundle: Bundle, *,
                 raise_held: bool = False) -> None:
        """Swap `bundle` in as the model serving `mode` (loop paused; detector reset). An
        anomaly raised and published before is cleared by an event first (the reset
        would otherwise leave it open upstream for ever)."""
        if rt.state is State.ANOMALOUS and not raise_held:
            old, _ = rt.bundle_for(mode)
            data: dict[str, Any] = {
                "asset": rt.cfg.name, "mode": mode, "reason": "model replaced",
                "raised_at": rfc3339(rt.raised_at) if rt.raised_at else None,
                "peak_score": round(rt.detector.peak_score, 6),
                "model": ({"id": old.meta.model_id, "version": old.meta.version}
                          if old is not None else None)}
            self._emit(rt, EventType.ANOMALY_CLEARED, data,
                       f"cleared|{uuid.uuid4().hex[:12]}", kind=Kind.ANOMALY)
        mode_bundles: dict[str, Bundle] = getattr(rt, "mode_bundles", {})
        if mode in mode_bundles:
            layout = feature_layout(rt.cfg)
            mode_bundles[mode] = bundle
            rt.mode_index[mode] = np.asarray([layout[n] for n in bundle.meta.feature_names],
                                             np.int64)
            if rt.asset_bundle is None:
                rt.bundle = next(iter(mode_bundles.values()))
            rt.detector.reset()
            rt.raised_at = None
        else:
            rt.set_bundle(bundle, None)
        self.d.metrics.model_loaded.labels(rt.cfg.name).set(1)

    # -- rollback and listing ------------------------------------------------------------

    def rollback(self, asset: str, mode: Any, to: Any, who: dict[str, Any],
                 reason: str) -> dict[str, Any]:
        rt = self._runtime(asset)
        with self._lock:
            if asset in self._jobs:
                raise RebaselineError(f"asset {asset} is learning; cancel that first")
        m = self._mode(rt, mode)
        current, slot_mode = self._slot(rt, m)
        store = self.store
        active = store.active_version(asset, slot_mode)
        versions = store.versions(asset, slot_mode)
        if to is None:
            older = [v for v in versions if active is not None and v < active]
            if not older:
                raise RebaselineError(f"{asset}/{slot_mode} has no version before v{active}")
            target = older[-1]
        else:
            target = int(str(to).lstrip("v"))
            if target not in versions:
                raise RebaselineError(f"{asset}/{slot_mode} has no v{target} (kept: "
                                      f"{', '.join(f'v{v}' for v in versions)})")
        if target == active:
            raise RebaselineError(f"v{target} is already active")
        store.activate(asset, slot_mode, target)
        try:
            bundle = load_bundle(store.active_link(asset, slot_mode))
            why = check_bundle_fits(rt.cfg, bundle)
            if why:
                raise RebaselineError(why)
        except WatchkeepError as exc:
            if active is not None:
                store.activate(asset, slot_mode, active)
            raise RebaselineError(f"v{target} does not load, v{active} stays: {exc}") from exc
        with self.d.loop.paused():
            rt = self._runtime(asset)
            self._install(rt, m, bundle)
            self._emit(rt, EventType.MODEL_UPDATED, {
                "action": "rollback", "asset": asset, "mode": m, "model_id":
                bundle.meta.model_id, "old_version": current.meta.version,
                "new_version": target, "threshold": bundle.meta.threshold,
                "requested_by": who, "reason": reason}, f"rollback|{uuid.uuid4().hex[:12]}")
        self.log.info(kv("model rolled back", asset=asset, mode=slot_mode,
                         old=current.meta.version, new=target, user=who.get("user")))
        return {"ok": True, "asset": asset, "mode": slot_mode,
                "old_version": current.meta.version, "new_version": target}

    def models(self, asset: str) -> dict[str, Any]:
        self._runtime(asset)
        listing = self.store.listing(asset)
        return {"asset": asset, "models_dir": str(self.store.root),
                "modes": {m: [v.as_json() for v in vs] for m, vs in listing.items()}}

    def jobs(self) -> dict[str, dict[str, Any]]:
        with self._lock:
            return {a: j.summary() for a, j in self._jobs.items()}

    def summaries(self) -> dict[str, Any]:
        with self._lock:
            return {rt.cfg.name: {"learning": self._jobs[rt.cfg.name].summary()
                                  if rt.cfg.name in self._jobs else None,
                                  "last_rebaseline": _brief(self.last.get(rt.cfg.name))}
                    for rt in self.d.pipeline.runtimes}

    def annotate(self, status: dict[str, Any]) -> None:
        """Add each asset's learning state and last rebaseline to a `/status` document."""
        s = self.summaries()
        for a in status.get("assets", []):
            a.update(s.get(a.get("asset"), {}))

    # -- helpers ---------------------------------------------------------------------------

    def _emit(self, rt: AssetRuntime, etype: EventType, data: dict[str, Any], key: str, *,
              kind: Kind = Kind.EVENT) -> None:
        """Publish one event for `rt` (call with the pipeline loop paused: the sink and the
        sequence number are the pipeline's)."""
        if self._inner is None:
            return
        msg, seq = self._event_message(rt, etype, data, key, kind)
        self._inner.submit([msg], sequences={rt.cfg.name: seq})

    def _event_message(self, rt: AssetRuntime, etype: EventType, data: dict[str, Any],
                       key: str, kind: Kind) -> tuple[OutMessage, int]:
        """One event of `rt` as a message, with the sequence number it took."""
        rt.sequence += 1
        data = {**data, "sequence": rt.sequence}
        src = Source(self.d.cfg.site, self.d.cfg.gateway).for_asset(rt.cfg.name)
        rid = data.get("request_id", "")
        ev = make_event(etype, src, rt.cfg.name, self.d.clock(), data, id_key=f"{rid}|{key}")
        rt.last_event = {"type": ev["type"], "id": ev["id"], "time": ev["time"]}
        self.d.metrics.events.labels(etype.value).inc()
        self.log.info(kv("event", type=etype.value, asset=rt.cfg.name, id=ev["id"],
                         phase=data.get("phase") or data.get("action")))
        topic = f"{self.d.cfg.topic_prefix}/assets/{rt.cfg.name}/events"
        return OutMessage(topic, json.dumps(ev, separators=(",", ":"),
                                            allow_nan=False).encode(), kind, qos=1), \
            rt.sequence


def _serving(rt: AssetRuntime) -> dict[str, Bundle]:
    out: dict[str, Bundle] = dict(getattr(rt, "mode_bundles", {}))
    asset_bundle = getattr(rt, "asset_bundle", rt.bundle)
    if asset_bundle is not None:
        out.setdefault(DEFAULT_MODE, asset_bundle)
    return out


def _brief(last: dict[str, Any] | None) -> dict[str, Any] | None:
    if last is None:
        return None
    f = last.get("figures", {})
    keep = ("shift", "false_alarm_rate", "rehearsal_ratio", "threshold", "old_threshold")
    return {**{k: v for k, v in last.items() if k != "figures"},
            "figures": {k: f[k] for k in keep if k in f}}


def wait_result(get: Callable[[], dict[str, Any]], asset: str) -> dict[str, Any] | None:
    """The asset's last rebaseline from a status reply once it is no longer learning."""
    s = get().get("assets", {}).get(asset, {})
    if s.get("learning") is None:
        return s.get("last_rebaseline")
    return None
