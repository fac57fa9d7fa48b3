"""The `rebaseline:` section's defaults are the ones the rebaseline and model store use."""

from __future__ import annotations

import pytest

from agent import models, rebaseline, rebaseline_config


@pytest.mark.parametrize(("name", "home"), [
    ("DEFAULT_MAX_SHIFT", rebaseline),
    ("DEFAULT_FALSE_ALARM_BUDGET", rebaseline),
    ("DEFAULT_REHEARSAL_TOLERANCE", rebaseline),
    ("DEFAULT_REHEARSAL_SIZE", rebaseline),
    ("MIN_NEW_WINDOWS", rebaseline),
    ("DEFAULT_KEEP", models),
])
def test_config_defaults_match_their_home(name: str, home: object) -> None:
    """Each copied default equals the value in the module that acts on it."""
    assert getattr(rebaseline_config, name) == getattr(home, name)
