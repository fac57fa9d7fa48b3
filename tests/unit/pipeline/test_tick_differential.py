"""The tick against its oracle: exact messages, sequences, stats, metrics and state.

`tick_fleet.trace` runs a fleet with every kind of check (modes and settling, spectra,
limits and ISO zones, sensor health and staleness, hopping windows, late, short and
missing samples, bursts that raise and clear, a model swapped mid-run) and digests
what every tick handed the sink. The expected digests in tick_golden.json were written
by the two-path pipeline before the one-tick rewrite (issue 22) on the same fleet and
feed; any change in a message byte, a sequence number, a metric or `status()` fails
here, naming the first tick that differs.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tests.unit.pipeline.tick_fleet import GOLDEN, SEEDS, trace


@pytest.mark.parametrize("seed", SEEDS)
def test_the_tick_matches_its_oracle_exactly(tmp_path: Path, seed: int) -> None:
    want = json.loads(GOLDEN.read_text())[str(seed)]
    got = trace(tmp_path, seed)
    first = next((i for i, (a, b) in enumerate(zip(got["ticks"], want["ticks"], strict=True))
                  if a != b), None)
    assert first is None, f"seed {seed}: tick {first} differs from the oracle"
    assert got["events"] == want["events"]
    assert (got["metrics"], got["state"], got["status"]) == \
        (want["metrics"], want["state"], want["status"])
    # The comparison means something: every kind of event happened.
    assert {"io.watchkeep.anomaly.raised", "io.watchkeep.anomaly.cleared",
            "io.watchkeep.limit.exceeded", "io.watchkeep.sensor.fault",
            "io.watchkeep.sensor.recovered"} <= set(got["events"])
