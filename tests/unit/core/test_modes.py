"""Operating modes: bands with hysteresis, codes, settling after a change."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.config.load import ModesConfig, ModeSpec
from agent.core.modes import UNKNOWN_MODE, ModeTracker, mode_for_value

BANDS = ModesConfig("speed", (ModeSpec("stopped", max_value=300, scored=False),
                              ModeSpec("reduced", 300, 2700, settling_s=20),
                              ModeSpec("rated", 2700, settling_s=10)), hysteresis=50)


@pytest.mark.parametrize(("value", "current", "mode"), [
    (0, None, "stopped"), (300, None, "reduced"), (2699, None, "reduced"),
    (2700, None, "rated"), (2680, "rated", "rated"),      # within hysteresis: stays
    (2640, "rated", "reduced"), (2740, "reduced", "reduced"), (2760, "reduced", "rated"),
    (float("nan"), "rated", "rated"),
])
def test_bands_with_hysteresis(value: float, current: str | None, mode: str) -> None:
    """A mode is left only when the value is beyond its band by the hysteresis."""
    assert mode_for_value(BANDS, value, current) == mode


def test_codes() -> None:
    """By code: the exact value names the mode; an unknown code is the unknown mode."""
    cfg = ModesConfig("state", (ModeSpec("off", code=0), ModeSpec("run", code=2)), by_code=True)
    assert mode_for_value(cfg, 2.0, None) == "run"
    assert mode_for_value(cfg, 1.0, "run") == UNKNOWN_MODE


def test_settling_after_a_change_but_not_at_start() -> None:
    """The first decision does not settle; a change settles for the new mode's settling_s."""
    tr = ModeTracker(BANDS)
    d = tr.step(np.full(5, 2970.0), 0.0)
    assert (d.mode, d.changed, d.settling, d.scored) == ("rated", False, False, True)
    d = tr.step(np.full(5, 2300.0), 5.0)
    assert (d.mode, d.changed, d.settling) == ("reduced", True, True)
    assert tr.step(np.full(5, 2300.0), 20.0).settling
    assert not tr.step(np.full(5, 2300.0), 25.0).settling  # 5 + 20 s
    assert tr.step(np.empty(0), 30.0).mode == "reduced"     # no samples: keeps the mode
    d = tr.step(np.zeros(5), 35.0)
    assert (d.mode, d.scored) == ("stopped", False)


def _reference_step(tr: dict[str, object], cfg: ModesConfig, values: np.ndarray,
                    start: float) -> tuple[str, bool, bool, bool]:
    """`ModeTracker.step` as it was written before its fast path (state in `tr`)."""
    v = values[np.isfinite(values)] if values.size else values
    cur = tr["mode"]
    assert cur is None or isinstance(cur, str)
    if v.size == 0:
        mode = cur or UNKNOWN_MODE
    elif cfg.by_code:
        mode = mode_for_value(cfg, float(v[-1]), cur)
    else:
        mode = mode_for_value(cfg, float(v.mean()), cur)
    changed = cur is not None and mode != cur
    spec = cfg.spec(mode)
    if changed:
        tr["until"] = start + (spec.settling_s if spec is not None else 0.0)
    tr["mode"] = mode
    until = tr["until"]
    assert isinstance(until, float)
    return mode, changed, start < until, spec is not None and spec.scored


@settings(max_examples=150, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), by_code=st.booleans())
def test_step_keeps_to_the_rules_window_after_window(seed: int, by_code: bool) -> None:
    """`step` (with its shortcut for a value inside the current mode's hysteresis band)
    against the rules written out plainly: the same decisions, window after window, over
    values hovering on band edges, non-finite samples and empty windows."""
    rng = np.random.default_rng(seed)
    cfg = ModesConfig("state", (ModeSpec("off", code=0), ModeSpec("run", code=2)),
                      by_code=True) if by_code else BANDS
    tr = ModeTracker(cfg)
    ref: dict[str, object] = {"mode": None, "until": -np.inf}
    edges = [0.0, 300.0, 2700.0, 1e308]
    for k in range(40):
        n = int(rng.integers(0, 6))
        base = float(rng.choice(edges)) + float(rng.normal(0, 60))
        vals = np.round(base + rng.normal(0, 5, n)) if not by_code else \
            rng.choice([0.0, 2.0, 1.0], n)
        if n and rng.random() < 0.1:
            vals[int(rng.integers(n))] = rng.choice([np.nan, np.inf, -np.inf])
        with np.errstate(over="ignore"):  # the mean of values near 1e308
            d = tr.step(vals, float(k))
            want = _reference_step(ref, cfg, vals, float(k))
        assert (d.mode, d.changed, d.settling, d.scored) == want
        assert tr.mode == ref["mode"]
