"""`featurize._aligned` asks its questions of all the tick's windows at once: it must
answer as a walk through every window's blocks and layout does (`_walked`, the check as
it was written before), for the joint cut's windows and for orders and subsets of them
that are not rows of one matrix in window order."""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from prometheus_client import CollectorRegistry

from agent.config.load import parse_config
from agent.ingest.buffers import Buffers
from agent.ops.metrics import Metrics
from agent.pipeline import featurize
from agent.pipeline.runtime import AssetRuntime
from agent.pipeline.tick import Pipeline
from tests.helpers import rates_doc, rows_both_ways

FEATS = ["mean", "std", "rms", "kurtosis"]


class _Sink:
    def submit(self, msgs, **_) -> None:  # type: ignore[no-untyped-def]
        pass


def _walked(todo: Any) -> featurize._Aligned | None:
    """The aligned check window by window (featurize before 2026-12-04)."""
    first = todo[0].w.blocks
    bases = [b.base for b in first if b.base is not None]
    if not first or len(bases) != len(first):
        return None
    rows = [len(b.chans) for b in first]
    at = [0] * len(first)
    lay0 = todo[0].rt.layout
    tmpl = featurize.template(lay0)
    needs: set[frozenset[str]] = set()
    for p in todo:
        blocks = p.w.blocks
        if len(blocks) != len(at):
            return None
        for b, blk in enumerate(blocks):
            if blk.base is not bases[b] or blk.row0 != at[b] or not blk.uniform:
                return None
            at[b] += rows[b]
        lay = p.rt.layout
        if featurize.template(lay) is not tmpl or lay.speed_index != lay0.speed_index:
            return None
        needs.add(lay.td_needed)
    if any(a != base.shape[0] for a, base in zip(at, bases, strict=True)):
        return None
    return featurize._Aligned(tuple(bases), tuple(rows), tmpl, lay0, frozenset().union(*needs))


def _todos(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, rates: dict[str, tuple[float, ...]],
           feats: dict[str, list[str]]) -> list[list[Any]]:
    """The windows handed to `_aligned` by a few ticks of a fleet of `rates` (per asset
    its channels' rates), each asset's channels wanting `feats.get(asset, FEATS)`."""
    cfg = parse_config(rates_doc(tmp_path / "state", rates, feats, FEATS), tmp_path)
    buffers = Buffers(cfg)
    pipe = Pipeline(cfg, buffers, _Sink(), Metrics(CollectorRegistry()),
                    logging.getLogger("test"), [AssetRuntime.build(a, None, None)
                                               for a in cfg.assets])
    seen: list[list[Any]] = []
    real = featurize._aligned
    monkeypatch.setattr(featurize, "_aligned", lambda todo: seen.append(list(todo)) or real(todo))
    rng = np.random.default_rng(3)
    for k in range(5):
        for ai, rs in enumerate(rates.values()):
            for ci, r in enumerate(rs):
                ts = k + np.arange(int(r)) / r
                buffers.by_asset[ai][ci].append_block(ts, rng.normal(size=ts.size), k + 1.0)
        pipe.tick(k + 2.0)
    monkeypatch.setattr(featurize, "_aligned", real)
    return seen


def _same(got: featurize._Aligned | None, want: featurize._Aligned | None) -> None:
    assert (got is None) == (want is None)
    if got is not None and want is not None:
        assert all(a is b for a, b in zip(got.bases, want.bases, strict=True))
        assert (got.rows, got.tmpl, got.lay, got.needed) == \
            (want.rows, want.tmpl, want.lay, want.needed)


@pytest.mark.parametrize(("rates", "feats"), [
    ({"A": (20.0, 20.0), "B": (20.0, 20.0), "C": (20.0, 20.0)}, {}),
    ({"A": (20.0, 8.0, 20.0), "B": (20.0, 8.0, 20.0), "C": (20.0, 8.0, 20.0)},
     {"B": ["kurtosis", "min"]}),
    ({"A": (20.0, 20.0), "B": (20.0, 20.0, 20.0)}, {}),  # laid out apart
])
def test_aligned_answers_as_the_walk_through_every_window(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, rates: dict[str, tuple[float, ...]],
        feats: dict[str, list[str]]) -> None:
    """The tick's windows, and reorderings, subsets and repeats of them."""
    todos = _todos(tmp_path, monkeypatch, rates, feats)
    assert len(todos) >= 4
    aligned = 0
    for todo in todos:
        n = len(todo)
        variants = [todo, todo[::-1], todo[1:], todo[:-1], [*todo, todo[-1]],
                    [todo[0], *todo], [*todo[:1], *todo[2:]]]
        if n > 1:
            variants.append([todo[i] for i in (1, 0, *range(2, n))])
        for v in filter(None, variants):
            _same(featurize._aligned(v), _walked(v))
            _same(featurize._aligned(v), _walked(v))  # the layouts' answer remembered
        aligned += featurize._aligned(todo) is not None
    assert aligned >= (0 if "B" in rates and len(rates["B"]) != len(rates["A"]) else 4)


def test_aligned_rows_without_spectra_are_the_general_paths(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The aligned tick without spectra (its gather index kept from tick to tick while
    the template and the number of windows stay) gives the general path's rows bit for
    bit, ticks of two fleets of other sizes and layouts taken in turn."""
    fleets = [_todos(tmp_path / "a", monkeypatch, {"A": (20.0, 20.0), "B": (20.0, 20.0),
                                                   "C": (20.0, 20.0)}, {}),
              _todos(tmp_path / "b", monkeypatch, {"A": (20.0, 8.0, 20.0),
                                                   "B": (20.0, 8.0, 20.0)},
                     {"B": ["kurtosis", "min", "skewness"]})]
    taken = 0
    for todos in zip(*fleets, strict=False):
        for todo in (*todos, *todos[::-1]):
            taken += rows_both_ways(todo, monkeypatch)[1] is not None
    assert taken >= 12
