"""The aligned tick hands its feature rows to the scorer as the one matrix they are
(`Pipeline._score`: only when every window's row is scored, in order); the scorer then
takes it instead of stacking the rows again. The tick's messages must be those of the
stacked rows to the byte, and the matrix must not be handed over when some window's
row is not scored."""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from prometheus_client import CollectorRegistry

from agent.config.load import parse_config
from agent.ingest.buffers import Buffers
from agent.models.bundle import load_bundle
from agent.ops.metrics import Metrics
from agent.pipeline.infer import Scorer
from agent.pipeline.messages import OutMessage
from agent.pipeline.runtime import AssetRuntime
from agent.pipeline.tick import Pipeline
from tests.unit.pipeline.tick_fleet import _bundle

TD = ["mean", "std", "rms", "peak_to_peak", "kurtosis"]
CHANNELS = ("a", "b", "c")


class _Sink:
    def __init__(self) -> None:
        self.ticks: list[list[tuple[str, bytes]]] = []

    def submit(self, msgs: list[OutMessage], **_: Any) -> None:
        self.ticks.append([(m.topic, m.payload) for m in msgs])


def _run(tmp: Path, without_model: set[str], stack: bool,
         monkeypatch: pytest.MonkeyPatch) -> tuple[list[list[tuple[str, bytes]]], list[bool]]:
    """Ticks of five plain assets (those in `without_model` have none): their messages,
    and per scorer call whether it was handed the rows as a matrix. `stack`: the
    scorer is never handed it (the rows stacked again, as before)."""
    names = [f"{c}.{f}" for c in CHANNELS for f in TD]
    assets = [f"P{i}" for i in range(5)]
    doc = {"site": "s", "gateway": "g", "state_dir": str(tmp / "state"),
           "assets": [{"name": a, "window": {"length_s": 1.0, "lateness_s": 0.0,
                                             "timeout_s": 0.5},
                       **({} if a in without_model else
                          {"bundle": str(_bundle(tmp, a, "default", names, i, None))}),
                       "channels": {c: {"topic": f"t/{a}/{c}", "decoder": "json-batch",
                                        "rate_hz": 20, "features": TD} for c in CHANNELS}}
                      for i, a in enumerate(assets)]}
    cfg = parse_config(doc, tmp)
    buffers = Buffers(cfg)
    sink = _Sink()
    pipe = Pipeline(cfg, buffers, sink, Metrics(CollectorRegistry()), logging.getLogger("t"),
                    [AssetRuntime.build(a, None if a.bundle is None else load_bundle(a.bundle),
                                        None) for a in cfg.assets])
    handed: list[bool] = []
    wrong: list[int] = []  # calls handed a matrix that is not the items' rows
    real = Scorer.scores

    def scores(self: Scorer, items: Any, on_error: Any, *, rows: Any = None) -> Any:
        # Told, not asserted here: the tick would contain an exception (per asset).
        if rows is not None and not (len(rows) == len(items) and all(
                np.array_equal(rows[j], it[1], equal_nan=True) for j, it in enumerate(items))):
            wrong.append(len(handed))
        handed.append(rows is not None)
        return real(self, items, on_error, rows=None if stack else rows)

    monkeypatch.setattr(Scorer, "scores", scores)
    rng = np.random.default_rng(7)
    for k in range(12):
        for ai in range(len(assets)):
            for ci in range(len(CHANNELS)):
                ts = k + np.arange(20) / 20
                burst = 6.0 if k in (6, 7, 8) and ai == 1 else 1.0
                buffers.by_asset[ai][ci].append_block(ts, rng.normal(0, burst, 20), k + 1.0)
        pipe.tick(k + 2.0)
    monkeypatch.undo()
    assert not wrong
    assert not pipe.metrics.registry.get_sample_value("watchkeep_asset_errors_total")
    return sink.ticks, handed


@pytest.mark.parametrize("without_model", [set(), {"P2"}])
def test_the_scorer_takes_the_rows_matrix_and_says_the_same(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, without_model: set[str]) -> None:
    """Every tick's messages equal those of the rows stacked again; the matrix goes to
    the scorer on the aligned ticks, and never when an asset without a model leaves its
    window's row unscored."""
    got, handed = _run(tmp_path / "m", without_model, False, monkeypatch)
    want, _ = _run(tmp_path / "s", without_model, True, monkeypatch)
    assert got == want
    assert sum(len(t) for t in got) >= 40
    assert len(handed) == 12  # one scorer call per tick: nothing failed
    if without_model:
        assert not any(handed)
    else:
        assert sum(handed) >= 8
