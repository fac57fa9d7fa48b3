"""The re-learning manager through its protocols: requests, collecting, holding, the guard,
verdicts, cancel, rollback and the admin verbs, with small fakes of the running assets,
the loop and the trainer, and a real model store with a real bundle."""

from __future__ import annotations

import json
import logging
import os
import threading
import time
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from prometheus_client import CollectorRegistry

from agent.config.rebaseline import FAR_FACTOR, MIN_NEW_WINDOWS, RebaselineConfig
from agent.core.detector_params import DetectorParams
from agent.core.events import EventType
from agent.learning.holding import far_ratio, with_learning
from agent.learning.jobs import Job, Result
from agent.learning.manager import RebaselineManager
from agent.learning.ports import OpenAnomaly
from agent.learning.rebaseline import Rehearsal
from agent.learning.training import Started, TrainingResult
from agent.models.bundle import MODEL_JSON, MODEL_ONNX, Bundle, load_bundle
from agent.models.store import ModelStore
from agent.ops.admin import AdminVerb, Peer
from agent.pipeline.messages import Kind, OutMessage
from tests.helpers import feature_names, train_pca_bundle

ASSET = "P-1"
PEER = Peer(os.getuid(), os.getgid(), os.getpid())


class FakeAssets:
    """`RunningAssets` over plain dicts; events are JSON of their data."""

    def __init__(self, bundles: dict[str, Bundle]) -> None:
        self.bundles = bundles  # asset -> its (asset-level) bundle
        self.modes: dict[str, str] = {a: "default" for a in bundles}
        self.open: dict[str, OpenAnomaly] = {}
        self.sequence: dict[str, int] = dict.fromkeys(bundles, 0)
        self.installed: list[tuple[str, str, int]] = []

    def names(self) -> list[str]:
        return list(self.bundles)

    def has(self, asset: str) -> bool:
        return asset in self.bundles

    def mode_now(self, asset: str) -> str:
        return self.modes[asset]

    def serving(self, asset: str, mode: str) -> Bundle | None:
        return self.bundles[asset]

    def serving_modes(self, asset: str) -> dict[str, Bundle]:
        return {"default": self.bundles[asset]} if asset in self.bundles else {}

    def fits(self, asset: str, bundle: Bundle) -> str | None:
        return None

    def detector(self, asset: str) -> DetectorParams:
        return DetectorParams()

    def open_anomaly(self, asset: str) -> OpenAnomaly | None:
        return self.open.get(asset)

    def install(self, asset: str, mode: str, bundle: Bundle) -> None:
        self.bundles[asset] = bundle
        self.open.pop(asset, None)
        self.installed.append((asset, mode, bundle.meta.version))

    def event(self, asset: str, etype: EventType, data: Mapping[str, Any], id_key: str,
              kind: Kind, time_s: float) -> tuple[OutMessage, int]:
        self.sequence[asset] += 1
        seq = self.sequence[asset]
        doc = {"type": etype.full, "data": {**data, "sequence": seq}}
        return OutMessage(f"p/assets/{asset}/events", json.dumps(doc).encode(), kind,
                          asset=asset, event=etype, event_id=f"{id_key}#{seq}"), seq


class FakeLoop:
    """`Pausable`: a lock, and how often it was taken."""

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.pauses = 0

    @contextmanager
    def paused(self) -> Iterator[None]:
        with self.lock:
            self.pauses += 1
            yield


class Sink:
    def __init__(self) -> None:
        self.msgs: list[OutMessage] = []
        self.sequences: dict[str, int] = {}

    def submit(self, msgs: Sequence[OutMessage],
               sequences: Mapping[str, int] | None = None) -> None:
        self.msgs.extend(msgs)
        self.sequences.update(sequences or {})

    def events(self) -> list[dict[str, Any]]:
        return [json.loads(m.payload) for m in self.msgs if m.kind is not Kind.STATE]

    def phases(self) -> list[str]:
        return [e["data"].get("phase") or e["data"].get("action") for e in self.events()]


class FakeTrainer:
    """Answers with `verdict`; an accepted job gets a new version written into the store
    (the base version's files, renumbered), as the worker would."""

    def __init__(self, verdict: Result = Result.REJECTED) -> None:
        self.verdict = verdict
        self.jobs: list[tuple[Job, dict[str, Any]]] = []

    def train(self, job: Job, job_dir: Path, spec: Mapping[str, Any],
              started: Started) -> TrainingResult:
        self.jobs.append((job, dict(spec)))
        job_dir.mkdir(parents=True)
        if self.verdict is not Result.ACCEPTED:
            return TrainingResult(self.verdict, [f"told to say {self.verdict}"], {"shift": 1.0})
        store = ModelStore(spec["store"]["root"], spec["store"]["keep"])
        base = store.version_path(job.asset, job.slot_mode, job.base_version)
        doc = json.loads((base / MODEL_JSON).read_text())
        version = int(spec["new_version"])
        doc["version"] = version
        store.write_version(job.asset, job.slot_mode, version,
                            (base / MODEL_ONNX).read_bytes(), doc, None)
        return TrainingResult(Result.ACCEPTED, [], {"old_threshold": 1.0}, version)


def _rehearsal() -> Rehearsal:
    rng = np.random.default_rng(0)
    return Rehearsal(rng.normal(size=(20, len(feature_names()))), tuple(feature_names()), 60)


@pytest.fixture(scope="module")
def trained(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return train_pca_bundle(tmp_path_factory.mktemp("trained"), ASSET)


class World:
    """A manager over fakes, with a real model store holding v1 of P-1 (active)."""

    def __init__(self, tmp: Path, trained: Path, trainer: FakeTrainer) -> None:
        self.settings = RebaselineConfig(admin_socket=tmp / "admin.sock",
                                         models_dir=tmp / "models",
                                         windows=MIN_NEW_WINDOWS, max_shift=2.0)
        self.store = ModelStore(self.settings.models_dir, self.settings.versions_kept)
        self.store.adopt(ASSET, "default", trained, _rehearsal())
        bundle = load_bundle(self.store.active_link(ASSET, "default"))
        self.assets = FakeAssets({ASSET: bundle, "F-2": bundle})
        self.loop = FakeLoop()
        self.sink = Sink()
        self.trainer = trainer
        self.registry = CollectorRegistry()
        self.mgr = RebaselineManager(self.assets, self.loop, settings=lambda: self.settings,
                                     state_dir=tmp / "state", registry=self.registry,
                                     logger=logging.getLogger("test.learning"),
                                     clock=lambda: 1_700_000_000.0, trainer=trainer)
        self.holding = self.mgr.wrap_sink(self.sink)

    def request(self, **extra: Any) -> dict[str, Any]:
        return self.mgr.handle({"verb": "rebaseline", "asset": ASSET, "reason": "trimmed",
                                **extra}, PEER)

    def feed(self, n: int, mode: str = "default") -> None:
        """n windows of the asset, as the pipeline's observer hands them over."""
        names = tuple(reversed(feature_names()))  # the row's order is not the model's
        for i in range(n):
            if self.mgr.collecting(ASSET):
                self.mgr.observe(ASSET, mode, _Window(float(i)),
                                 np.arange(len(names), dtype=float) + i, names)

    def wait_done(self) -> dict[str, Any]:
        deadline = time.monotonic() + 10
        while ASSET not in self.mgr.last:
            assert time.monotonic() < deadline, "the job did not finish"
            time.sleep(0.01)
        return self.mgr.last[ASSET]

    def sample(self, name: str, **labels: str) -> float | None:
        return self.registry.get_sample_value(name, labels)


class _Window:
    def __init__(self, start: float) -> None:
        self.start = start


@pytest.fixture
def world(tmp_path: Path, trained: Path) -> World:
    return World(tmp_path, trained, FakeTrainer())


def _anomaly(etype: EventType, score: float, asset: str = ASSET) -> OutMessage:
    return OutMessage(f"p/assets/{asset}/events", b'{"x":1}', Kind.ANOMALY, asset=asset,
                      event=etype, event_id=f"{etype.value}-{score}", score=score,
                      threshold=1.0)


def _state(score: float, asset: str = ASSET) -> OutMessage:
    doc = {"asset": asset, "state": "normal", "score": score, "threshold": 1.0}
    return OutMessage(f"p/assets/{asset}/state", json.dumps(doc).encode(), Kind.STATE, 1,
                      True, "k", asset, None, None, score, 1.0)


def test_a_request_starts_collecting_and_is_published(world: World) -> None:
    """The reply names the job; `model.rebaseline` {phase: requested} goes to the sink
    with the asset's sequence number, the loop paused for it."""
    reply = world.request()
    assert reply["ok"] and reply["mode"] == "default" and reply["base_version"] == 1
    assert reply["windows"] == MIN_NEW_WINDOWS
    assert world.sink.phases() == ["requested"]
    assert world.sink.sequences == {ASSET: 1} and world.loop.pauses == 1
    assert world.mgr.collecting(ASSET) and not world.mgr.collecting("F-2")
    assert world.mgr.jobs()[ASSET]["collected"] == 0
    assert world.sample("watchkeep_rebaseline_learning", asset=ASSET) == 1.0


@pytest.mark.parametrize("req, why", [
    ({"windows": 5}, "windows must be an integer"),
    ({"windows": True}, "windows must be an integer"),
    ({"mode": "idle"}, None),  # a mode named: served by the asset's bundle here
])
def test_requests_are_checked(world: World, req: dict[str, Any], why: str | None) -> None:
    """A bad request is refused with its reason, published and counted."""
    reply = world.request(**req)
    if why is None:
        assert reply["ok"]
        return
    assert not reply["ok"] and why in reply["error"]
    assert world.sink.phases() == ["refused"]
    assert world.sample("watchkeep_rebaseline_results_total", asset=ASSET,
                        result="refused") == 1.0
    assert not world.mgr.collecting(ASSET)


def test_unknown_assets_and_verbs_are_answered_not_published(world: World) -> None:
    """Unknown assets and verbs are refused in the reply only."""
    reply = world.mgr.handle({"verb": "rebaseline", "asset": "nope"}, PEER)
    assert not reply["ok"] and "no asset 'nope'" in reply["error"]
    reply = world.mgr.handle({"verb": "dance"}, PEER)
    assert reply == {"ok": False, "error": "unknown verb 'dance' (rebaseline, cancel, "
                                            "rollback, models, status)"}
    assert world.sink.msgs == []


def test_a_second_request_and_an_unknown_mode_are_refused(world: World) -> None:
    """One job per asset; without `mode`, the asset's mode now must be known."""
    assert world.request()["ok"]
    again = world.request()
    assert not again["ok"] and "already learning" in again["error"]
    world.assets.modes[ASSET] = "unknown"
    other = world.mgr.handle({"verb": AdminVerb.REBASELINE, "asset": ASSET}, PEER)
    assert not other["ok"] and "in no known mode now" in other["error"]


def test_a_bundle_outside_the_store_cannot_be_rebaselined(world: World, trained: Path) -> None:
    """The running bundle must be a store version (it is adopted first)."""
    world.assets.bundles[ASSET] = load_bundle(trained)
    reply = world.request()
    assert not reply["ok"] and "not in the model store" in reply["error"]


def test_windows_of_the_job_mode_are_collected_then_trained(world: World) -> None:
    """Only the job's mode counts; at the target the trainer gets the rows in the model's
    feature order; a rejected verdict is published and nothing is installed."""
    world.request()
    world.feed(10, mode="other")
    assert world.mgr.jobs()[ASSET]["collected"] == 0
    world.feed(MIN_NEW_WINDOWS)
    last = world.wait_done()
    (job, spec), = world.trainer.jobs
    names = tuple(reversed(feature_names()))
    first = np.arange(len(names), dtype=float)
    want = first[[names.index(n) for n in feature_names()]]
    np.testing.assert_array_equal(job.rows[0], want)
    assert spec["base_version"] == 1 and spec["new_version"] == 2
    assert spec["settings"]["max_shift"] == 2.0
    assert last["result"] == "rejected" and last["reasons"] == ["told to say rejected"]
    assert world.sink.phases() == ["requested", "rejected"]
    assert world.assets.installed == []
    assert world.store.active_version(ASSET, "default") == 1
    assert world.sample("watchkeep_rebaseline_results_total", asset=ASSET,
                        result="rejected") == 1.0


def test_an_accepted_version_is_activated_and_installed(tmp_path: Path, trained: Path) -> None:
    """The new version becomes active and serves; an open anomaly is cleared first."""
    w = World(tmp_path, trained, FakeTrainer(Result.ACCEPTED))
    w.request()
    w.assets.open[ASSET] = OpenAnomaly(1_699_999_000.0, 3.5)
    w.feed(MIN_NEW_WINDOWS)
    last = w.wait_done()
    assert last["result"] == "accepted" and last["new_version"] == 2
    assert w.store.active_version(ASSET, "default") == 2
    assert w.assets.installed == [(ASSET, "default", 2)]
    types = [e["type"].rsplit(".", 2)[-2:] for e in w.sink.events()]
    assert types == [["model", "rebaseline"], ["anomaly", "cleared"], ["model", "updated"]]
    cleared = w.sink.events()[1]["data"]
    assert cleared["reason"] == "model replaced" and cleared["peak_score"] == 3.5
    assert w.sink.events()[2]["data"]["new_version"] == 2


def test_anomalies_are_held_while_learning_and_states_marked(world: World) -> None:
    """A raise and its clear are held and counted; the state carries `learning`; other
    assets' messages pass untouched."""
    world.request()
    other = _anomaly(EventType.ANOMALY_RAISED, 2.0, asset="F-2")
    out = [_anomaly(EventType.ANOMALY_RAISED, 2.0), other, _state(2.0),
           _anomaly(EventType.ANOMALY_CLEARED, 0.5)]
    world.holding.submit(out)
    kept = world.sink.msgs[1:]  # after the request's event
    assert kept[0] is other
    marked = json.loads(kept[1].payload)
    assert list(marked)[-1] == "learning" and marked["learning"]["held_events"] == 1
    assert len(kept) == 2
    assert world.mgr.jobs()[ASSET]["held_events"] == 2
    assert world.sample("watchkeep_rebaseline_held_events_total", asset=ASSET) == 2.0


def test_an_anomaly_far_past_the_guard_is_published_and_ends_learning(world: World) -> None:
    """A held raise goes out when a later window is far past the guard line; learning is
    aborted with an event whose sequence number reaches the sink."""
    world.request()
    far = FAR_FACTOR * world.settings.max_shift + 1
    world.holding.submit([_anomaly(EventType.ANOMALY_RAISED, 1.5)])
    assert len(world.sink.msgs) == 1
    held = world.mgr._jobs[ASSET].held_raise
    world.holding.submit([_state(far)])
    sent = world.sink.msgs[1:]
    assert sent[0] is held
    assert json.loads(sent[1].payload)["data"]["phase"] == "aborted"
    assert "learning" not in json.loads(sent[2].payload)
    assert world.sink.sequences[ASSET] == 2
    assert not world.mgr.collecting(ASSET)
    assert world.mgr.last[ASSET]["result"] == "aborted"


def test_with_accept_shift_a_far_anomaly_is_published_and_learning_goes_on(
        world: World) -> None:
    """A shift announced with the request does not end learning."""
    world.request(accept_shift=True)
    far = FAR_FACTOR * world.settings.max_shift + 1
    raised = _anomaly(EventType.ANOMALY_RAISED, far)
    world.holding.submit([raised])
    assert world.sink.msgs[-1] is raised
    assert world.mgr.collecting(ASSET)


def test_cancel_while_collecting_is_published(world: World) -> None:
    """Cancelling a collecting job ends it at once, published; a second cancel is refused."""
    world.request()
    reply = world.mgr.handle({"verb": "cancel", "asset": ASSET}, PEER)
    assert reply["ok"]
    assert world.sink.phases() == ["requested", "cancelled"]
    assert world.mgr.last[ASSET]["result"] == "cancelled"
    again = world.mgr.handle({"verb": "cancel", "asset": ASSET}, PEER)
    assert not again["ok"] and "not learning" in again["error"]


def test_rollback_switches_the_active_version_and_installs_it(world: World) -> None:
    """Rollback activates the version before and installs it; a missing one is refused."""
    base = world.store.version_path(ASSET, "default", 1)
    doc = json.loads((base / MODEL_JSON).read_text())
    doc["version"] = 2
    world.store.write_version(ASSET, "default", 2, (base / MODEL_ONNX).read_bytes(), doc, None)
    world.store.activate(ASSET, "default", 2)
    world.assets.bundles[ASSET] = load_bundle(world.store.active_link(ASSET, "default"))
    reply = world.mgr.handle({"verb": "rollback", "asset": ASSET, "reason": "worse"}, PEER)
    assert reply == {"ok": True, "asset": ASSET, "mode": "default", "old_version": 2,
                     "new_version": 1}
    assert world.store.active_version(ASSET, "default") == 1
    assert world.assets.installed == [(ASSET, "default", 1)]
    assert world.sink.phases() == ["rollback"]
    bad = world.mgr.handle({"verb": "rollback", "asset": ASSET, "to": "v7"}, PEER)
    assert not bad["ok"] and "no v7" in bad["error"]


def test_status_and_models_verbs(world: World) -> None:
    """`status` and `models` answer from the jobs and the store; `/status` is annotated."""
    world.request()
    status = world.mgr.handle({"verb": "status"}, PEER)
    assert status["assets"][ASSET]["learning"]["phase"] == "collecting"
    assert status["assets"]["F-2"] == {"learning": None, "last_rebaseline": None}
    models = world.mgr.handle({"verb": "models", "asset": ASSET}, PEER)
    assert [v["version"] for v in models["modes"]["default"]] == [1]
    doc: dict[str, Any] = {"assets": [{"asset": ASSET}]}
    world.mgr.annotate(doc)
    assert doc["assets"][0]["learning"]["target"] == MIN_NEW_WINDOWS


@pytest.mark.parametrize("verdict, want", [
    ("accepted", Result.ACCEPTED), ("rejected", Result.REJECTED), ("refused", Result.REFUSED),
    ("failed", Result.FAILED), ("cancelled", Result.FAILED), ("bogus", Result.FAILED),
    (None, Result.FAILED),
])
def test_the_workers_verdict_is_read_as_a_result(verdict: Any, want: Result) -> None:
    """Only what the worker may say counts; anything else is a failure."""
    got = TrainingResult.from_json({"verdict": verdict, "version": "2"})
    assert got.verdict is want and got.version is None


def test_marking_a_state_message_keeps_its_json() -> None:
    """`learning` is added as the last key; the guard's ratio needs a score over a line."""
    m = _state(0.5)
    marked = json.loads(with_learning(m, {"phase": "collecting"}).payload)
    assert marked == {**json.loads(m.payload), "learning": {"phase": "collecting"}}
    assert far_ratio(7.0, 1.0, 6.0) == 7.0
    assert far_ratio(5.0, 1.0, 6.0) is None and far_ratio(None, 1.0, 6.0) is None
    assert far_ratio(5.0, 0.0, 1.0) is None
