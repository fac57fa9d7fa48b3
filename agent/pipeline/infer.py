"""Inference for a tick's windows: planned once per set of models, batched across assets.

`Scorer.scores(items)` scores every window handed to it: the feature rows gathered into
each model's inputs, standardised by each model's scaler, reconstructed (models in a
batched group in one onnxruntime call per group, the rest one by one), and the squared
errors and their mean returned per window. What the gathering, the scalers and the runs
need is planned once per sequence of (model, feature positions) and kept while the
models stay (the same assets close windows tick after tick). A batched call that
raises falls back to each model's own run; a model that raises fails its windows only.
The arithmetic is `Bundle.score`'s, row by row.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from agent.models.bundle import Bundle
from agent.ops.logs import kv
from agent.ops.metrics import Metrics
from agent.pipeline.batched import BatchedModels

# One window to score: (its key, its full feature row, the model, the model's positions
# in the row). Results come back by key.
Item = tuple[int, np.ndarray, Bundle, np.ndarray]
Result = tuple[float, np.ndarray, Bundle]


@dataclass(eq=False, slots=True)
class _Plan:
    """How rows of one sequence of (model, positions) are scored: the positions (`index`
    when all rows share them), the stacked scalers, the batched runs (group, rows,
    slots) and the rows whose models run alone. Holding the index arrays keeps their
    ids, the key the plan is found by, their own."""

    bundles: list[Bundle]
    indices: list[np.ndarray]
    index: np.ndarray | None
    mean: np.ndarray
    scale: np.ndarray
    runs: list[tuple[int, slice | np.ndarray, np.ndarray]]
    alone: list[int]


class Scorer:
    """Scores windows with their models; rebuilt groups when the models change."""

    def __init__(self, metrics: Metrics, logger: logging.Logger,
                 all_bundles: Callable[[], list[Bundle]]) -> None:
        self.metrics = metrics
        self.log = logger
        self._all_bundles = all_bundles
        self._plans: dict[tuple[int, ...], _Plan] = {}
        self.batched: BatchedModels
        self._stale = False
        self.rebuild()

    def rebuild(self) -> None:
        """Group every model the runtimes now hold (after a model swap, at start)."""
        bundles = self._all_bundles()
        self.batched = BatchedModels(bundles, self.log)
        self._stale = False
        self._plans.clear()
        if self.batched.n_models:
            self.log.info(kv("batched inference", models=self.batched.n_models,
                             groups=len(self.batched.groups), of=len(bundles)))

    def scores(self, items: Sequence[Item], on_error: Callable[[int, str], None]
               ) -> dict[int, Result]:
        """(score, squared errors, model) of every item, by key. `on_error(key, detail)`
        is told of each window whose model failed (left out of the result); `detail` is
        the error for a model's first failed window of the tick, "" for the rest."""
        t1 = time.perf_counter()
        results: dict[int, Result] = {}
        by_width: dict[int, list[Item]] = {}
        for it in items:
            by_width.setdefault(it[3].size, []).append(it)
        for group in by_width.values():
            plan = self._plan(group)
            if plan.index is not None:
                x = np.stack([it[1] for it in group])[:, plan.index]
            else:
                x = np.stack([it[1][it[3]] for it in group])
            z = ((x - plan.mean) / plan.scale).astype(np.float32)
            recon = np.empty_like(z)
            alone = list(plan.alone)
            for gi, pos, slots in plan.runs:
                try:
                    recon[pos] = self.batched.groups[gi].run(z[pos], slots)
                except Exception as exc:  # the models' own runs decide which asset fails
                    self.log.error(kv("batched inference failed; running the models one by "
                                      "one", n=len(slots), error=str(exc)[:200]))
                    alone.extend(np.arange(len(group))[pos].tolist())
            ok = np.ones(len(group), dtype=bool)
            if alone:
                self._run_alone(sorted(alone), plan.bundles, group, z, recon, ok, on_error)
            err = (z - recon).astype(np.float64) ** 2
            scores = err.mean(axis=1).tolist()
            for j, it in enumerate(group):
                if ok[j]:
                    results[it[0]] = (scores[j], err[j], it[2])
        self.metrics.inference_seconds.observe(time.perf_counter() - t1)
        if self._stale:  # after the timing: a rebuild is not this tick's inference
            self.rebuild()
        return results

    def _run_alone(self, alone: Sequence[int], bundles: Sequence[Bundle], group: Sequence[Item],
                   z: np.ndarray, recon: np.ndarray, ok: np.ndarray,
                   on_error: Callable[[int, str], None]) -> None:
        """Reconstruct rows `alone` of `z` into `recon`, each by its own model; a model
        that raises fails its rows only: they are marked in `ok` and reported."""
        failed: dict[int, str] = {}
        for j in alone:
            b = bundles[j]
            if id(b) in failed:
                ok[j] = False
                on_error(group[j][0], "")  # told once per model and tick
                continue
            try:
                b.reconstruct_row(z[j], recon[j])
            except Exception as exc:  # a model failing at run time fails its asset only
                failed[id(b)] = str(exc)[:200]
                ok[j] = False
                on_error(group[j][0], failed[id(b)])

    def _plan(self, group: Sequence[Item]) -> _Plan:
        """How to score `group`'s rows together, remembered while their models stay."""
        key = tuple([id(it[2]) for it in group] + [id(it[3]) for it in group])
        plan = self._plans.get(key)
        if plan is not None:
            return plan
        bs = [it[2] for it in group]
        indices = [it[3] for it in group]
        first = indices[0].tobytes()
        size = group[0][1].size
        same = all(i.tobytes() == first for i in indices[1:]) and \
            all(it[1].size == size for it in group)
        runs: dict[int, tuple[list[int], list[int]]] = {}
        alone: list[int] = []
        for j, b in enumerate(bs):
            got = self.batched.slot_of(b)
            if got is None:
                alone.append(j)
                if not self.batched.considered(b):  # swapped in since the build
                    self._stale = True
            else:
                js, slots = runs.setdefault(got[0], ([], []))
                js.append(j)
                slots.append(got[1])
        plan = _Plan(bs, indices, indices[0] if same else None,
                     np.stack([b.meta.scaler_mean for b in bs]),
                     np.stack([b.meta.scaler_scale for b in bs]),
                     [(gi, slice(None) if len(js) == len(bs) else np.asarray(js, np.int64),
                       np.asarray(slots, np.int64)) for gi, (js, slots) in runs.items()],
                     alone)
        if len(self._plans) > 16:
            self._plans.clear()
        self._plans[key] = plan
        return plan
