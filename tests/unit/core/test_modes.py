"""Operating modes: bands with hysteresis, codes, settling after a change."""

from __future__ import annotations

import numpy as np
import pytest

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
