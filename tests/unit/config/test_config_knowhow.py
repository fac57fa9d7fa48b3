"""Config keys of issue 7: spectrum, sensor health, limits, speed channel, modes, ISO zones."""

from __future__ import annotations

import copy
from pathlib import Path
from typing import Any

import pytest

from agent.config.load import Support, parse_config
from agent.errors import ConfigError
from tests.unit.config.config_cases import base_doc

VIB = "assets[1].channels.vib"


def _doc(**vib: Any) -> dict[str, Any]:
    doc = copy.deepcopy(base_doc())
    doc["assets"][1]["channels"]["vib"].update({"unit": "m/s2", **vib})
    return doc


def _problems(doc: dict[str, Any], tmp: Path) -> list[str]:
    with pytest.raises(ConfigError) as info:
        parse_config(doc, tmp)
    return [f"{p.key_path}: expected {p.expected}" for p in info.value.problems]


def test_full_knowhow_config_loads(tmp_path: Path) -> None:
    """Every new key set: typed values, spectral feature names appended to the channel's."""
    doc = _doc(spectrum={"bands_hz": [[10, 500]], "velocity_rms": True, "orders": [1, 2],
                         "envelope_hz": [600, 1100]},
               min=-50, max=50, stale_s=5, flatline_windows=3, max_rate_per_s=1e6,
               limits={"kurtosis": {"alert": 6, "alarm": 9}})
    b = doc["assets"][1]
    b["channels"]["speed"] = {"topic": "fernbrook/aeration/B-201/speed", "rate_hz": 1,
                              "unit": "rpm", "features": ["mean"]}
    b.update(speed_channel="speed",
             modes={"channel": "speed", "hysteresis": 50, "settling_s": 10,
                    "states": {"stopped": {"max": 300, "scored": False},
                               "running": {"min": 300, "settling_s": 20}}},
             iso10816={"group": 1, "support": "flexible", "baseline_mm_s": 2.0})
    a = parse_config(doc, tmp_path).asset("B-201")
    vib = a.channel("vib")
    assert vib.all_features[len(vib.features):] == (
        "band_10_500_hz", "dominant_hz", "dominant_amp", "order_1x_amp", "order_2x_amp",
        "envelope_rms", "velocity_rms_mm_s")
    assert (vib.min_value, vib.max_value, vib.stale_s, vib.flatline_windows) == (-50, 50, 5, 3)
    assert vib.limits[0].feature == "kurtosis" and vib.limits[0].on_delay == 2
    assert a.modes is not None and a.modes.spec("running").settling_s == 20
    assert a.modes.spec("stopped").settling_s == 10 and not a.modes.spec("stopped").scored
    assert a.iso10816 is not None and a.iso10816.support is Support.FLEXIBLE
    assert a.iso10816.channels == ("vib",)


@pytest.mark.parametrize(("vib", "expected"), [
    ({"spectrum": {"bands_hz": [[10, 2000]]}}, f"{VIB}.spectrum.bands_hz[0]: expected [low, "
     "high] in Hz with 0 <= low < high <= 1280"),
    ({"spectrum": {"orders": [1]}}, f"{VIB}.spectrum.orders: expected the asset's "
     "speed_channel"),
    ({"unit": "mm/s", "spectrum": {"velocity_rms": True}}, f"{VIB}.spectrum.velocity_rms: "
     "expected an acceleration channel"),
    ({"min": 5, "max": 1}, f"{VIB}.max: expected more than min (5)"),
    ({"flatline_windows": 0}, f"{VIB}.flatline_windows: expected an integer >= 1"),
    ({"limits": {"median": {"alert": 1}}}, f"{VIB}.limits.median: expected a feature this "
     "channel computes"),
    ({"limits": {"rms": {"alert": 3, "alarm": 2}}}, f"{VIB}.limits.rms.alarm: expected at "
     "least alert (3)"),
    ({"limits": {"rms": {"deadband": 1}}}, f"{VIB}.limits.rms: expected at least one of"),
])
def test_broken_channel_keys(vib: dict[str, Any], expected: str, tmp_path: Path) -> None:
    """Each broken key is reported at its key path."""
    doc = _doc(**vib)
    assert any(p.startswith(expected) for p in _problems(doc, tmp_path)), \
        _problems(doc, tmp_path)


def test_broken_modes_and_iso(tmp_path: Path) -> None:
    """Overlapping bands, an unknown mode channel, an unknown group, no velocity channel."""
    doc = _doc()
    doc["assets"][1].update(
        modes={"channel": "nope", "states": {"a": {"max": 10}, "b": {"min": 5}}},
        iso10816={"group": 3, "support": "rigid"})
    got = _problems(doc, tmp_path)
    assert any(p.startswith("assets[1].modes.channel: expected one of the asset's") for p in got)
    assert any(p.startswith("assets[1].modes.states.b: expected a band that does not overlap")
               for p in got)
    assert any(p.startswith("assets[1].iso10816.group: expected machine group 1") for p in got)
    assert any(p.startswith("assets[1].iso10816: expected a channel with spectrum.velocity_rms")
               for p in got)
