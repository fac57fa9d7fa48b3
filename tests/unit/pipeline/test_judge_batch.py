"""The judge's array path across a pipeline swap: a reload builds a new `Pipeline` (and
`Judge`) over the runtimes it keeps, whose channels' health state moves to the new
judge's table; the tick's output goes on exactly as if nothing had been swapped."""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from agent.pipeline.judge import Judge
from agent.pipeline.tick import Pipeline
from tests.unit.pipeline.tick_fleet import T0, build


def _run(tmp: Path, swap_at: int | None, ticks: int = 24) -> tuple[list[Any], Any]:
    pipe, buffers, sink, docs = build(tmp)
    rng = np.random.default_rng(7)
    names = list(docs)
    for tick in range(ticks):
        t = T0 + tick
        for ai, name in enumerate(names):
            for ci, c in enumerate(docs[name]["channels"].values()):
                r = c["rate_hz"]
                ts = t + np.arange(r) / r
                vals = rng.normal(0, 1, r) + (1200.0 if ci == 2 else 20.0 if ci else 0.0)
                if tick % 7 == 3 and ci == 1:
                    vals[r // 2] = 1e4  # out of range: a fault, then a recovery
                if 10 <= tick < 15 and ci == len(docs[name]["channels"]) - 1:
                    vals[:] = 3.0  # flat
                if tick % 5 == 0 and ci == 0:
                    vals *= 8.0  # a burst: limits and zones
                buffers.by_asset[ai][ci].append_block(ts, vals, t + 1.0)
        if tick == swap_at:
            pipe = Pipeline(pipe.cfg, buffers, sink, pipe.metrics,
                            logging.getLogger("swap"), pipe.runtimes)
        pipe.tick(t + 1.0)
    return sink.ticks, pipe.status()


def test_a_new_pipeline_over_kept_runtimes_goes_on_exactly(tmp_path: Path) -> None:
    """Swapping in a new pipeline (as a reload does) changes no message, sequence
    number or status: health, modes and limits carry on from the runtimes."""
    want, want_status = _run(tmp_path / "a", None)
    got, got_status = _run(tmp_path / "b", 12)
    assert got == want
    assert got_status == want_status
    events = [m for per_asset, _ in want for msgs in per_asset.values() for m in msgs
              if "sensor." in m[1] or "limit.exceeded" in m[1]]
    assert events  # the comparison means something


def _run_batched(tmp: Path, per_tick: int, ticks: int = 30) -> tuple[list[Any], Any]:
    """The fleet fed window by window but ticked every `per_tick` windows, so that a
    tick closes several windows of each asset (a tick loop that lagged)."""
    pipe, buffers, sink, docs = build(tmp)
    rng = np.random.default_rng(11)
    names = list(docs)
    for tick in range(ticks):
        t = T0 + tick
        for ai, name in enumerate(names):
            chans = list(docs[name]["channels"].values())
            for ci, c in enumerate(chans):
                r = c["rate_hz"]
                ts = t + np.arange(r) / r
                vals = rng.normal(0, 1, r) + (100.0 * (tick % 20) if ci == 2 else
                                              20.0 if ci else 0.0)
                if tick % 6 == 2 and ci == 1:
                    vals[r // 3] = 1e4
                if 8 <= tick < 13 and ci == len(chans) - 1:
                    vals[:] = 3.0
                if tick % 4 == 1 and ci == 0:
                    vals *= 9.0
                buffers.by_asset[ai][ci].append_block(ts, vals, t + 1.0)
        if tick % per_tick == per_tick - 1:
            pipe.tick(t + 1.0)
    return sink.ticks, pipe.status()


@pytest.mark.parametrize("per_tick", [1, 2, 3])
def test_several_windows_per_tick_judge_as_window_by_window(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, per_tick: int) -> None:
    """Ticks closing several windows of each asset: the array path gives exactly what
    the per-window state machines give alone (`prejudge` failing leaves every channel
    to `check_window`)."""
    want_fast, status_fast = _run_batched(tmp_path / "a", per_tick)

    def broken(*_: Any) -> Any:
        raise RuntimeError("no array path in this run")

    monkeypatch.setattr(Judge, "prejudge", broken)
    want, status = _run_batched(tmp_path / "b", per_tick)
    assert want_fast == want
    assert status_fast == status
    kinds = {m[1].split('"type":"')[1].split('"')[0] for per_asset, _ in want
             for msgs in per_asset.values() for m in msgs if '"type":"' in m[1]}
    assert {"io.watchkeep.sensor.fault", "io.watchkeep.limit.exceeded"} <= kinds
