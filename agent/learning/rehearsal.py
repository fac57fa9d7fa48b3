"""The rehearsal set: a bounded uniform sample of the windows a model has learnt, kept
with each version in the model store, so that re-learning can check (and train on) what
the model knew before (agent/learning/rebaseline.py)."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from agent.errors import RebaselineError


@dataclass(frozen=True)
class Rehearsal:
    """A bounded uniform sample of the windows a model has learnt (raw feature rows)."""

    features: np.ndarray  # [R, F] float64
    feature_names: tuple[str, ...]
    n_seen: int  # windows the sample stands for

    @property
    def size(self) -> int:
        return int(self.features.shape[0])


def reservoir(x: np.ndarray, names: Sequence[str], size: int, *, seed: int = 0,
              start: Rehearsal | None = None) -> Rehearsal:
    """Continue reservoir sampling (Algorithm R, Vitter 1985) over rows `x`.

    Each of the `start.n_seen + len(x)` windows ends up in the sample with the same
    probability `size / n_seen`; with no `start` this is a fresh sample of `x`.
    """
    x = np.asarray(x, np.float64)
    if start is not None and tuple(start.feature_names) != tuple(names):
        raise RebaselineError("the rehearsal set's features differ from the new windows'")
    keep = [] if start is None else list(start.features)
    seen = 0 if start is None else start.n_seen
    rng = np.random.default_rng([seed, 0x4EA5])
    for row in x:
        seen += 1
        if len(keep) < size:
            keep.append(row)
        else:
            j = int(rng.integers(0, seen))
            if j < size:
                keep[j] = row
    feats = np.stack(keep) if keep else np.empty((0, len(names)))
    return Rehearsal(feats, tuple(names), seen)
