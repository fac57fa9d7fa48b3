"""A stage that raises for one asset's windows fails that asset alone: the features and
inference stages run again asset by asset and every other asset scores as it would
have (the windows and detector stages are held to this by tests/integration/
test_hostile_input.py on a running daemon)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest

import agent.pipeline.tick as tick_mod
from tests.unit.pipeline.tick_fleet import T0, build

LEVEL = {"temp": 50.0, "speed": 1000.0, "current": 20.0}  # the rest: noise about 0


def _feed(buffers: Any, docs: dict[str, Any], k: int) -> None:
    rng = np.random.default_rng(k)
    for ai, doc in enumerate(docs.values()):
        for ci, (name, c) in enumerate(doc["channels"].items()):
            r = c["rate_hz"]
            ts = T0 + k + np.arange(r) / r
            vals = LEVEL.get(name, 0.0) + rng.normal(size=r)
            buffers.by_asset[ai][ci].append_block(ts, vals, T0 + k + 1)


def _scores(tmp: Path, broken: str | None, stage: str,
            monkeypatch: pytest.MonkeyPatch) -> tuple[dict[str, int], dict[str, float]]:
    pipe, buffers, _, docs = build(tmp)
    if broken is not None and stage == "features":
        real = tick_mod.feature_rows

        def rows(todo: Any, work: Any, *rest: Any) -> Any:
            if any(p.rt.cfg.name == broken for p in todo):
                raise RuntimeError("features broken for the test")
            return real(todo, work, *rest)

        monkeypatch.setattr(tick_mod, "feature_rows", rows)
    if broken is not None and stage == "inference":
        real_scores = pipe.scorer.scores

        def scores(items: Any, on_error: Any, **given: Any) -> Any:
            if any(it[2].meta.asset == broken for it in items):
                raise RuntimeError("inference broken for the test")
            return real_scores(items, on_error, **given)

        monkeypatch.setattr(pipe.scorer, "scores", scores)
    for k in range(8):
        _feed(buffers, docs, k)
        pipe.tick(T0 + k + 1.6)
    errors = {rt.cfg.name: rt.errors for rt in pipe.runtimes}
    return errors, {rt.cfg.name: rt.last_score for rt in pipe.runtimes
                    if rt.last_score is not None}


@pytest.mark.parametrize("stage", ["features", "inference"])
def test_a_stage_failing_for_one_asset_fails_it_alone(tmp_path: Path, stage: str,
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    _, want = _scores(tmp_path / "good", None, stage, monkeypatch)
    errors, got = _scores(tmp_path / "bad", "P0", stage, monkeypatch)
    assert errors["P0"] > 0 and sum(v for a, v in errors.items() if a != "P0") == 0
    assert "P0" not in got
    assert {a: s for a, s in want.items() if a != "P0"} == got
    assert len(got) >= 4  # the comparison means something
