"""Inference for a tick's windows: planned once per set of models, batched across assets.

`Scorer.scores(items)` scores every window handed to it: the feature rows gathered into
each model's inputs, standardised by each model's scaler, reconstructed (models in a
batched group in one onnxruntime call per group, the rest one by one), and the squared
errors and their mean returned by position (`Scored`), beside each model's threshold.
What the gathering, the scalers and the runs need is planned once per sequence of
(model, feature positions) and kept while the models stay (the same assets close
windows tick after tick). A batched call that raises falls back to each model's own
run; a model that raises fails its windows only. The arithmetic is `Bundle.score`'s, row by row.
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from itertools import repeat
from operator import is_, itemgetter

import numpy as np

from agent.models.bundle import Bundle
from agent.ops.logs import kv
from agent.ops.metrics import Metrics
from agent.pipeline.batched import BatchedModels

_ROW, _BUNDLE, _INDEX = itemgetter(1), itemgetter(2), itemgetter(3)

# One window to score: (its key, its full feature row, the model, the model's positions
# in the row). Results come back by the item's position (`Scored`).
Item = tuple[int, np.ndarray, Bundle, np.ndarray]
# One window's squared errors: row [1] of the matrix [0] (no array view made per window).
SqRow = tuple[np.ndarray, int]


@dataclass(eq=False, slots=True)
class Scored:
    """What the scorer found for a sequence of items, by position in it: each window's
    score (the mean squared error), its squared errors (`SqRow`) and its model's
    threshold; `ok` is None when every item was scored, else False at
    the items whose model failed (their score and errors are placeholders)."""

    score: list[float]
    sq: list[SqRow]
    threshold: np.ndarray
    ok: list[bool] | None = None

    @classmethod
    def empty(cls, n: int) -> Scored:
        """n items, none scored yet (`put` fills them)."""
        return cls([math.nan] * n, [(_NO_ERRORS, 0)] * n, np.full(n, math.nan), [False] * n)

    @classmethod
    def of_parts(cls, items: Sequence[Item], parts: Sequence[tuple[Sequence[Item], Scored]]
                 ) -> Scored:
        """The answer for `items` from the answers for parts of them (keyed alike; the
        items of no part are not scored)."""
        if len(parts) == 1 and parts[0][0] is items:
            return parts[0][1]
        out = cls.empty(len(items))
        at = {it[0]: j for j, it in enumerate(items)}
        for part, got in parts:
            out.put([at[it[0]] for it in part], got)
        return out

    def put(self, at: Sequence[int], part: Scored) -> None:
        """`part`, the answer for the items at positions `at`, into this."""
        assert self.ok is not None
        for j, i in enumerate(at):
            self.score[i] = part.score[j]
            self.sq[i] = part.sq[j]
            self.threshold[i] = part.threshold[j]
            self.ok[i] = part.ok is None or part.ok[j]


_NO_ERRORS = np.empty((1, 0))


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
    threshold: np.ndarray  # each row's model's
    runs: list[tuple[int, slice | np.ndarray, np.ndarray]]
    alone: list[int]


class Scorer:
    """Scores windows with their models; rebuilt groups when the models change."""

    def __init__(self, metrics: Metrics, logger: logging.Logger,
                 all_bundles: Callable[[], list[Bundle]]) -> None:
        self.metrics = metrics
        self.log = logger
        self._all_bundles = all_bundles
        # Per sequence of (model, positions): the positions of each width and its plan;
        # the last sequence scored and its groups.
        self._groups: dict[tuple[int, ...], list[tuple[list[int], _Plan]]] = {}
        self._last: tuple[list[Bundle], list[np.ndarray], list[tuple[list[int], _Plan]]] = \
            ([], [], [])
        self.batched: BatchedModels
        self._stale = False
        self.rebuild()

    def rebuild(self) -> None:
        """Group every model the runtimes now hold (after a model swap, at start)."""
        bundles = self._all_bundles()
        self.batched = BatchedModels(bundles, self.log)
        self._stale = False
        self._groups.clear()
        self._last = ([], [], [])
        if self.batched.n_models:
            self.log.info(kv("batched inference", models=self.batched.n_models,
                             groups=len(self.batched.groups), of=len(bundles)))

    def scores(self, items: Sequence[Item], on_error: Callable[[int, str], None], *,
               rows: np.ndarray | None = None) -> Scored:
        """Score, squared errors and threshold of every item, by position. `on_error(key,
        detail)` is told of each window whose model failed (`ok` False there); `detail`
        is the error for a model's first failed window of the tick, "" for the rest.
        `rows`: the items' rows as one matrix (row j item j's), when the caller has it
        (the aligned tick's features are one): taken instead of stacking them again."""
        t1 = time.perf_counter()
        bundles = list(map(_BUNDLE, items))
        indices = list(map(_INDEX, items))
        last_b, last_i, groups = self._last
        # The same models and positions as last time (the usual tick): no key to build.
        if not (len(bundles) == len(last_b) and all(map(is_, bundles, last_b))
                and all(map(is_, indices, last_i))):
            key = (*map(id, bundles), *map(id, indices))
            got = self._groups.get(key)
            groups = got if got is not None else self._group(key, items, bundles, indices)
            self._last = (bundles, indices, groups)
        if len(groups) == 1:
            out = self._score(groups[0][1], items, on_error, rows)
        else:
            out = Scored.empty(len(items))
            for at, plan in groups:
                out.put(at, self._score(plan, [items[j] for j in at], on_error,
                                        None if rows is None else rows[at]))
        self.metrics.inference_seconds.observe(time.perf_counter() - t1)
        if self._stale:  # after the timing: a rebuild is not this tick's inference
            self.rebuild()
        return out

    def _score(self, plan: _Plan, group: Sequence[Item], on_error: Callable[[int, str], None],
               rows: np.ndarray | None) -> Scored:
        """The items of one width, as `plan` says (`rows`: their rows, or None)."""
        if plan.index is not None:  # rows of one size: np.array stacks them fastest
            x = (np.array(list(map(_ROW, group))) if rows is None else rows)[:, plan.index]
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
        ok = None
        if alone:
            okm = np.ones(len(group), dtype=bool)
            self._run_alone(sorted(alone), plan.bundles, group, z, recon, okm, on_error)
            if not okm.all():
                ok = okm.tolist()
        err = (z - recon).astype(np.float64) ** 2
        return Scored(err.mean(axis=1).tolist(), list(zip(repeat(err), range(len(err)))),
                      plan.threshold, ok)

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

    def _group(self, key: tuple[int, ...], items: Sequence[Item], bundles: list[Bundle],
               indices: list[np.ndarray]) -> list[tuple[list[int], _Plan]]:
        """The items' positions by how many features their models take, each with its
        plan, remembered while their models stay (`key`: the items' models and
        positions)."""
        by_width: dict[int, list[int]] = {}
        for j, ix in enumerate(indices):
            by_width.setdefault(ix.size, []).append(j)
        groups = [(at, self._plan([items[j] for j in at], [bundles[j] for j in at],
                                  [indices[j] for j in at]))
                  for at in by_width.values()]
        if len(self._groups) > 16:
            self._groups.clear()
        self._groups[key] = groups
        return groups

    def _plan(self, group: Sequence[Item], bs: list[Bundle], indices: list[np.ndarray]
              ) -> _Plan:
        """How to score `group`'s rows together (one width of features)."""
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
        return _Plan(bs, indices, indices[0] if same else None,
                     np.stack([b.meta.scaler_mean for b in bs]),
                     np.stack([b.meta.scaler_scale for b in bs]),
                     np.array([b.meta.threshold for b in bs], dtype=np.float64),
                     [(gi, slice(None) if len(js) == len(bs) else np.asarray(js, np.int64),
                       np.asarray(slots, np.int64)) for gi, (js, slots) in runs.items()],
                     alone)
