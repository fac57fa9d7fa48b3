"""Reload (SIGHUP): re-read the config file and model bundles, swap in what changed.

Contract:
- The new config is loaded and checked in full, and every new or changed bundle is
  loaded and warmed up, *before* anything is swapped; the running pipeline keeps
  ticking meanwhile.
- Per asset: one whose config (channels, window, detector, bundle path) is equal and
  whose bundle files have the same digest keeps its `AssetRuntime` object — open
  windows, detector state, sequence numbers — and its sample buffers. A changed or
  added asset gets a fresh runtime (empty windows, detector normal). A removed asset
  is dropped and its metric series removed.
- An asset whose bundle had already failed and whose config is unchanged is retried;
  if it still fails it keeps running without a model (as at start) — a fault that
  was already there does not block other changes.
- Rejected, with nothing changed: a config that does not load, a new or changed
  asset whose bundle does not load or does not fit, or a change to a key that needs
  a restart (brokers, HTTP, outbox, identity, state dir). Each rejection is logged
  with its reason and counted in `watchkeep_config_reloads_total{result="failure"}`;
  `watchkeep_config_last_reload_successful` goes to 0 until a reload succeeds.
- The swap happens with the pipeline loop paused between ticks (its lock held), so a
  tick never sees half of the old and half of the new runtimes.
"""

from __future__ import annotations

import hashlib
import logging
import time
from collections.abc import Callable, Iterable, Mapping
from contextlib import AbstractContextManager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

from agent.config.load import load_config
from agent.config.schema import AssetConfig, Config
from agent.errors import BundleError, WatchkeepError
from agent.ingest.buffers import Buffers, ChannelBuffer, IngestHandler, asset_buffers
from agent.models.bundle import MODEL_JSON, MODEL_ONNX, Bundle, load_bundle
from agent.ops.heap import thaw_heap
from agent.ops.logs import kv
from agent.ops.metrics import Metrics
from agent.pipeline.builder import Running, build_pipeline, new_runtime
from agent.pipeline.runtime import AssetRuntime, check_bundle_fits


class Loop(Protocol):
    """The pipeline loop as a reload needs it: what runs now, held between two ticks,
    replaced as a whole."""

    @property
    def current(self) -> Running: ...

    def paused(self) -> AbstractContextManager[None]: ...

    def swap(self, running: Running) -> None: ...


class Reconfigurable(Protocol):
    """Ingest: samples decoded from now on go to `handler`; subscriptions follow `cfg`."""

    def reconfigure(self, cfg: Config, handler: IngestHandler[Any]) -> None: ...


class Notify(Protocol):
    """systemd's notification socket (agent/ops/notify.py)."""

    def reloading(self) -> bool: ...

    def ready(self, status: str = "") -> bool: ...


# Top-level config keys a running daemon cannot take over: they name the sockets,
# files and identity it was started with.
RESTART_KEYS = ("site", "gateway", "topic_prefix", "state_dir", "local_broker",
                "upstream_broker", "outbox", "http")


class ReloadRejected(WatchkeepError):
    """A new config or bundle that cannot replace the running one."""


@dataclass(frozen=True)
class AssetPlan:
    """What a reload does to each asset, by name (pure result of `plan_assets`)."""

    kept: tuple[str, ...] = ()
    changed: tuple[str, ...] = ()
    added: tuple[str, ...] = ()
    removed: tuple[str, ...] = ()
    retried: tuple[str, ...] = ()  # unchanged config, bundle failed before: load again

    def summary(self) -> str:
        parts = [f"{k} {','.join(v)}" for k, v in (
            ("kept", self.kept), ("changed", self.changed), ("added", self.added),
            ("removed", self.removed), ("retried", self.retried)) if v]
        return "; ".join(parts) or "no assets"


@dataclass(frozen=True)
class ReloadResult:
    ok: bool
    message: str
    plan: AssetPlan | None = None


@dataclass(frozen=True)
class AssetNow:
    """What the running daemon has for one asset: its config, and its bundle's digest
    (None: no bundle configured; "" : configured but not loaded)."""

    cfg: AssetConfig
    digest: str | None


def bundle_digest(path: Path | None) -> str | None:
    """The digest `load_bundle` records (sha256 of model.onnx then model.json) of the
    files now on disk; None without a bundle, "" when the files cannot be read."""
    if path is None:
        return None
    try:
        h = hashlib.sha256((path / MODEL_ONNX).read_bytes())
        h.update((path / MODEL_JSON).read_bytes())
    except OSError:
        return ""
    return h.hexdigest()


def restart_required(old: Config, new: Config) -> list[str]:
    """Top-level keys whose change a reload cannot apply (compared as loaded values)."""
    return [k for k in RESTART_KEYS if getattr(old, k) != getattr(new, k)]


def plan_assets(running: Mapping[str, AssetNow], new: Iterable[AssetConfig],
                new_digests: Mapping[str, str | None]) -> AssetPlan:
    """Sort assets into kept / changed / added / removed / retried. Pure."""
    kept: list[str] = []
    changed: list[str] = []
    added: list[str] = []
    retried: list[str] = []
    seen: set[str] = set()
    for a in new:
        seen.add(a.name)
        now = running.get(a.name)
        if now is None:
            added.append(a.name)
        elif now.cfg != a:
            changed.append(a.name)
        elif now.digest == "":
            retried.append(a.name)
        elif now.digest != new_digests.get(a.name):
            changed.append(a.name)
        else:
            kept.append(a.name)
    removed = [n for n in running if n not in seen]
    return AssetPlan(tuple(kept), tuple(changed), tuple(added), tuple(removed), tuple(retried))


def _running(runtimes: Iterable[AssetRuntime]) -> dict[str, AssetNow]:
    out = {}
    for rt in runtimes:
        if rt.cfg.bundle is None:
            digest = None
        else:
            shown = rt.models.shown
            digest = shown.digest if shown is not None else ""
        out[rt.cfg.name] = AssetNow(rt.cfg, digest)
    return out


def _load_fitting(asset: AssetConfig) -> Bundle:
    """The asset's bundle, loaded, warmed up and checked against its features."""
    assert asset.bundle is not None
    b = load_bundle(asset.bundle)
    why = check_bundle_fits(asset, b)
    if why:
        raise BundleError(str(asset.bundle), why)
    return b


@dataclass
class Reloader:
    """Reloads the running pipeline from its config file (`cfg.source`)."""

    loop: Loop
    ingest: Reconfigurable
    metrics: Metrics
    notifier: Notify
    log: logging.Logger
    load: Callable[[Path], Config] = load_config
    clock: Callable[[], float] = time.time
    history: list[ReloadResult] = field(default_factory=list)

    def reload(self) -> ReloadResult:
        """Apply the config file now on disk, or reject it and keep the running one."""
        self.notifier.reloading()
        try:
            result = self._reload()
        except ReloadRejected as exc:
            result = ReloadResult(False, str(exc))
        except Exception as exc:  # an unexpected fault must not take the daemon down
            self.log.exception("reload failed unexpectedly")
            result = ReloadResult(False, f"unexpected {type(exc).__name__}: {exc}")
        m = self.metrics
        if result.ok:
            m.reloads.labels("success").inc()
            m.reload_ok.set(1)
            m.reload_time.set(self.clock())
            self.log.info(kv("config reloaded", plan=result.message))
        else:
            m.reloads.labels("failure").inc()
            m.reload_ok.set(0)
            self.log.error(kv("config reload rejected; the running config stays",
                              error=result.message))
        self.notifier.ready(_status_line(self.loop.current, result))
        self.history.append(result)
        del self.history[:-20]
        return result

    def _reload(self) -> ReloadResult:
        old = self.loop.current.cfg
        if old.source is None:
            raise ReloadRejected("the running config was not read from a file")
        try:
            new = self.load(old.source)
        except WatchkeepError as exc:
            raise ReloadRejected(" ".join(str(exc).split())) from exc
        fixed = restart_required(old, new)
        if fixed:
            raise ReloadRejected(f"changes to {', '.join(fixed)} need a restart "
                                 "(systemctl restart watchkeep)")
        old_rts = {rt.cfg.name: rt for rt in self.loop.current.pipeline.runtimes}
        digests = {a.name: bundle_digest(a.bundle) for a in new.assets}
        plan = plan_assets(_running(old_rts.values()), new.assets, digests)
        # Everything slow and fallible first, with the old pipeline still ticking.
        fresh = self._fresh(new, plan)
        self._swap(new, old_rts, fresh)
        thaw_heap()  # the replaced runtimes must be collectable
        return ReloadResult(True, plan.summary(), plan)

    def _fresh(self, new: Config, plan: AssetPlan) -> dict[str, AssetRuntime]:
        """New runtimes for the changed, added and retried assets (bundles loaded and
        warmed up)."""
        fresh: dict[str, AssetRuntime] = {}
        for a in new.assets:
            if a.name in plan.changed or a.name in plan.added:
                bundle = None
                if a.bundle is not None:
                    try:
                        bundle = _load_fitting(a)
                    except BundleError as exc:
                        raise ReloadRejected(f"asset {a.name}: {exc}") from exc
                fresh[a.name] = new_runtime(a, bundle)
            elif a.name in plan.retried:
                try:
                    fresh[a.name] = new_runtime(a, _load_fitting(a))
                except BundleError as exc:
                    self.log.error(kv("model bundle still rejected; the asset keeps running "
                                      "without a model", asset=a.name, error=str(exc)))
        return fresh

    def _swap(self, new: Config, old_rts: Mapping[str, AssetRuntime],
              fresh: Mapping[str, AssetRuntime]) -> None:
        old = self.loop.current
        old_bufs = {rt.cfg.name: bufs
                    for rt, bufs in zip(old.pipeline.runtimes, old.buffers.by_asset, strict=True)}
        runtimes: list[AssetRuntime] = []
        by_asset: list[list[ChannelBuffer]] = []
        for a in new.assets:
            if a.name in fresh:
                runtimes.append(fresh[a.name])
                by_asset.append(asset_buffers(a))
            else:  # kept, or retried and still failing: the very same objects carry on
                runtimes.append(old_rts[a.name])
                by_asset.append(old_bufs[a.name])
        buffers = Buffers(new)
        buffers.by_asset = by_asset
        with self.loop.paused():
            for name, rt in fresh.items():
                if name in old_rts:  # event sequence numbers go on; consumers order by them
                    rt.sequence = old_rts[name].sequence
            running = build_pipeline(new, runtimes, old.pipeline.sink, self.metrics, self.log,
                                     buffers=buffers, observer=old.pipeline.observer,
                                     observes=old.pipeline.observes)
            # Samples decoded from here on land in the new buffers (kept assets' buffers
            # are the same objects); subscriptions follow the new config.
            self.ingest.reconfigure(new, running.handler)
            self.loop.swap(running)


def _status_line(running: Running, result: ReloadResult) -> str:
    rts = running.pipeline.runtimes
    loaded = sum(1 for rt in rts if rt.models.shown is not None)
    head = "reloaded" if result.ok else "reload rejected (running the previous config)"
    return f"{len(rts)} assets, {loaded} models loaded; {head}"
