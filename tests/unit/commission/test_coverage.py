"""What a recording covers: slow channels are found and left out; fast ones stay."""

from __future__ import annotations

import numpy as np
import pytest

from agent.commission.autoencoder import block_spread, fit_scaler
from agent.commission.coverage import WindowGeometry, assess, window_geometry
from agent.core.detector_params import DetectorParams


def _windows(samples: np.ndarray, per_window: int) -> np.ndarray:
    w = samples[: samples.size // per_window * per_window].reshape(-1, per_window)
    return np.column_stack([w.mean(axis=1), w.std(axis=1)])


def test_a_creeping_level_is_slow_and_uncovered_and_noise_is_fast() -> None:
    """A temperature creeping one way is slow and uncovered (left out); white noise around
    a level is fast; a level following a cycle seen six times is slow but covered."""
    rng = np.random.default_rng(0)
    t = np.arange(4000.0)
    creep = 60 + 0.001 * t + rng.normal(0, 0.02, t.size)
    noise = 32 + rng.normal(0, 0.2, t.size)
    cycle = 5 + np.sin(2 * np.pi * t / 660) + rng.normal(0, 0.02, t.size)
    x = np.column_stack([_windows(creep, 20), _windows(noise, 20), _windows(cycle, 20)])
    names = ("temp.mean", "temp.std", "flow.mean", "flow.std", "load.mean", "load.std")
    cov = assess(names, x, WindowGeometry(20, 20))
    by = {c.channel: c for c in cov.channels}
    assert by["temp"].slow and not by["temp"].covered
    assert not by["flow"].slow and by["flow"].covered
    assert by["load"].slow and by["load"].covered and by["load"].crossings >= 10
    assert cov.excluded == ("temp.mean", "temp.std")
    assert "temp" in cov.lines()[0] and len(cov.lines()) == 1


def test_geometry_from_the_manifest_or_the_times() -> None:
    """Window length and hop come from the manifest, else from the windows' times."""
    ws = np.arange(0.0, 100.0, 2.0)
    assert window_geometry({"length_s": 10, "hop_s": 2}, ws, ws + 10).per_length == 5
    g = window_geometry({}, ws, ws + 10)
    assert (g.length_s, g.hop_s, g.per_length) == (10.0, 2.0, 5)


def test_spread_floor_on_a_constant_channel() -> None:
    """A feature that never moved gets the floor, so a change at sensor resolution scores
    a bounded z (here 0.01 l/min on 32.0: z = 0.3125), never thousands."""
    x = np.column_stack([np.full(200, 32.0), np.random.default_rng(1).normal(0, 1, 200)])
    sc = fit_scaler(x, floor=block_spread(x))
    assert sc.std[0] == 0.0 and sc.scale[0] == pytest.approx(0.032)
    z = sc.transform(np.array([[32.01, 0.0]]))
    assert abs(z[0, 0]) == pytest.approx(0.3125)


def test_block_spread_floors_a_feature_that_moved_between_stretches() -> None:
    """A feature flat inside each stretch but stepping between them gets its block spread."""
    x = np.repeat(np.arange(10.0), 20)[:, None] * 0.1 + 5.0
    floor = block_spread(x)
    assert floor[0] == pytest.approx(np.std(np.arange(10.0) * 0.1, ddof=1))


@pytest.mark.parametrize(("length", "hop", "want"), [
    (10, 10, (2, 3, 3, 1)), (20, 1, (2, 3, 3, 20)), (10, 4, (2, 3, 3, 3)),
])
def test_raise_rule_strided_over_hopping_windows(length: float, hop: float,
                                                 want: tuple[int, int, int, int]) -> None:
    """k of n independent windows: the n windows are a window length apart."""
    d = DetectorParams().over_windows(length, hop)
    assert (d.raise_k, d.raise_n, d.clear_m, d.stride) == want


@pytest.mark.parametrize(("stride", "above", "raised_at"), [
    (20, [1] * 3 + [0] * 40, None),            # a 3-window spike fills one strided slot
    (20, [1] * 25, 20),                        # held: windows 0 and 20 are both above
    (10, [1] + [0] * 9 + [1] + [0] * 20, 10),  # two separate windows a stride apart
    (10, [1] + [0] * 8 + [1] + [0] * 20, None),  # not a stride apart
    (1, [1, 0, 1], 2),                         # stride 1 is the plain k of n
])
def test_strided_detector(stride: int, above: list[int], raised_at: int | None) -> None:
    """With a stride, 2 of 3 counts only windows a stride apart."""
    from agent.core.detector import Transition, run_detector
    params = DetectorParams(2, 3, 3, stride=stride)
    got = [i for i, t in run_detector(np.array(above, float), 0.5, 0.4, params)
           if t is Transition.RAISED]
    assert got == ([] if raised_at is None else [raised_at])
