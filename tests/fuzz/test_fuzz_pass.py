"""The short fuzz pass of `make test`: every target's seeds through its oracle, then a
fixed number of Hypothesis examples of its structured inputs (derandomized: the same
examples each run, so CI is reproducible; `make fuzz` explores, see DEVELOPERS.md).

`WATCHKEEP_FUZZ_EXAMPLES=<factor>` multiplies the examples (e.g. 20 for a longer
Hypothesis run), and `WATCHKEEP_FUZZ_RANDOM=1` draws new ones each run.
"""

from __future__ import annotations

import os

import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from tests.fuzz import harness

FACTOR = float(os.environ.get("WATCHKEEP_FUZZ_EXAMPLES", "1"))
RANDOM = os.environ.get("WATCHKEEP_FUZZ_RANDOM") == "1"


@pytest.mark.parametrize("name", list(harness.MODULES))
def test_seeds_hold(name: str) -> None:
    """Every seed (real payloads, configs, bundles, requests) passes its target's oracle."""
    target = harness.load(name)
    seeds = list(target.seeds())
    assert seeds
    for data in seeds:
        target.one_input(data)


@pytest.mark.parametrize("name", list(harness.MODULES))
def test_structured_inputs_hold(name: str) -> None:
    """Hypothesis' structured inputs of each target pass its oracle."""
    target = harness.load(name)

    # No shrinking: some targets' examples take tens of milliseconds, and a shrink runs
    # thousands; the failing input is printed as drawn (and derandomized runs repeat it).
    @settings(max_examples=max(1, int(target.examples * FACTOR)), derandomize=not RANDOM,
              deadline=None, database=None, phases=[Phase.explicit, Phase.generate],
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                     HealthCheck.filter_too_much])
    @given(st.data())
    def run(data: st.DataObject) -> None:
        target.one_input(data.draw(target.strategy(), label="input"))

    run()
