"""The judge's array path across a pipeline swap: a reload builds a new `Pipeline` (and
`Judge`) over the runtimes it keeps, whose channels' health state moves to the new
judge's table; the tick's output goes on exactly as if nothing had been swapped."""

from __future__ import annotations

import logging
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from agent.pipeline.judge import Judge
from agent.pipeline.tick import Pipeline
from tests.unit.pipeline.tick_fleet import T0, build


def _feed(buffers: Any, docs: dict[str, Any], rng: np.random.Generator, tick: int, *,
          speed: Callable[[int], float], spike: tuple[int, int, int],
          flat: tuple[int, int], burst: tuple[int, int, float]) -> None:
    """One window of every channel of the fleet at `tick`: noise around each channel's
    level (`speed(tick)` on the third), an out-of-range spike on the second every
    spike[0] ticks (phase spike[1], at sample r // spike[2]), the last channel flat in
    [flat[0], flat[1]), and a burst on the first every burst[0] ticks (phase burst[1],
    times burst[2]): faults, recoveries, limits and zones."""
    t = T0 + tick
    for ai, name in enumerate(docs):
        chans = list(docs[name]["channels"].values())
        for ci, c in enumerate(chans):
            r = c["rate_hz"]
            ts = t + np.arange(r) / r
            vals = rng.normal(0, 1, r) + (speed(tick) if ci == 2 else 20.0 if ci else 0.0)
            if tick % spike[0] == spike[1] and ci == 1:
                vals[r // spike[2]] = 1e4
            if flat[0] <= tick < flat[1] and ci == len(chans) - 1:
                vals[:] = 3.0
            if tick % burst[0] == burst[1] and ci == 0:
                vals *= burst[2]
            buffers.by_asset[ai][ci].append_block(ts, vals, t + 1.0)


def _run(tmp: Path, swap_at: int | None, ticks: int = 24) -> tuple[list[Any], Any]:
    pipe, buffers, sink, docs = build(tmp)
    rng = np.random.default_rng(7)
    for tick in range(ticks):
        _feed(buffers, docs, rng, tick, speed=lambda _: 1200.0, spike=(7, 3, 2),
              flat=(10, 15), burst=(5, 0, 8.0))
        if tick == swap_at:
            pipe = Pipeline(pipe.cfg, buffers, sink, pipe.metrics,
                            logging.getLogger("swap"), pipe.runtimes)
        pipe.tick(T0 + tick + 1.0)
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
    for tick in range(ticks):
        _feed(buffers, docs, rng, tick, speed=lambda k: 100.0 * (k % 20), spike=(6, 2, 3),
              flat=(8, 13), burst=(4, 1, 9.0))
        if tick % per_tick == per_tick - 1:
            pipe.tick(T0 + tick + 1.0)
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
