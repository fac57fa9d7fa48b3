"""What several fuzz targets share: the fixed clock, real payloads from the simulated
plant, the demo config's channels, and Hypothesis strategies of awkward values."""

from __future__ import annotations

import atexit
import functools
import json
import math
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from hypothesis import strategies as st

ROOT = Path(__file__).resolve().parents[2]
DEMO_CONFIG = ROOT / "config" / "demo" / "watchkeep.yaml"
DEMO_SCENARIO = ROOT / "config" / "demo" / "scenario.yaml"
EXAMPLE_CONFIG = ROOT / "config" / "example.yaml"

NOW = 1_796_119_200.0  # 2026-12-01T09:20:00Z: every target's gateway clock
SKEW_S = 300.0  # ingest.max_clock_skew_s, the default
MAX_PAYLOAD_BYTES = 262_144  # ingest.max_payload_bytes, the default


def scratch_dir(prefix: str) -> Path:
    """A new temporary directory, removed when the process ends."""
    path = Path(tempfile.mkdtemp(prefix=f"wk-fuzz-{prefix}-"))
    atexit.register(shutil.rmtree, path, ignore_errors=True)
    return path


@functools.cache
def demo_config() -> Any:
    """The demo plant's daemon config (its bundles need not exist)."""
    from agent.config.load import load_config

    return load_config(DEMO_CONFIG, require_bundles=False)


@functools.cache
def plant_messages(seconds: float = 3.0) -> tuple[tuple[str, bytes], ...]:
    """(topic, payload) of the simulated demo plant, its first `seconds` from NOW - 2 s:
    what the demo's sensors publish, every decoder's real input."""
    from simulator.plant import simulate
    from simulator.scenario import load_scenario, with_overrides

    sc = with_overrides(load_scenario(DEMO_SCENARIO), duration_s=seconds)
    return tuple((topic, payload) for _, topic, payload in simulate(sc, start_unix=NOW - 2.0))


def first_per_topic(n: int = 2) -> Iterator[tuple[str, bytes]]:
    """The first `n` simulated messages of each topic."""
    seen: dict[str, int] = {}
    for topic, payload in plant_messages():
        if seen.get(topic, 0) < n:
            seen[topic] = seen.get(topic, 0) + 1
            yield topic, payload


def json_bytes(doc: Any) -> bytes:
    """JSON text as a publisher might write it (NaN and Infinity literals allowed)."""
    return json.dumps(doc, allow_nan=True).encode()


# Values where number handling goes wrong: non-finite floats, subnormals, integers
# past the float range, bools (an int subclass), numbers as strings, and nothing.
awkward_numbers = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from([0.0, -0.0, 5e-324, -5e-324, 1e308, -1e308, 2.0**53, 1e-300]),
    st.integers(min_value=-(10**400), max_value=10**400),
    st.sampled_from([2**1024, -(2**1024), 10**400, 2**63, -(2**63) - 1]),  # past float64
    st.booleans(), st.none(), st.text(max_size=6), st.just([]), st.just({}),
)
# Times around the gateway clock: near it, past the clock-skew limit either way, absurd.
times = st.one_of(
    st.floats(min_value=-2 * SKEW_S, max_value=2 * SKEW_S).map(lambda d: NOW + d),
    st.floats(min_value=-1.0, max_value=1.0).map(lambda d: NOW + d),
    awkward_numbers,
)
json_scalars = st.one_of(st.none(), st.booleans(), st.integers(), st.floats(), st.text())
json_values = st.recursive(json_scalars, lambda inner: st.one_of(
    st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=8), inner, max_size=4)),
    max_leaves=12)


def finite(x: Any) -> bool:
    return isinstance(x, float) and math.isfinite(x)
