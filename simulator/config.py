"""The watchkeep config that matches what a scenario publishes (pure)."""

from __future__ import annotations

from typing import Any

from simulator.scenario import Scenario


def watchkeep_assets(scenario: Scenario) -> list[dict[str, Any]]:
    """The ``assets:`` section of a watchkeep config for the scenario's plant.

    One dict per asset: ``{"name": ..., "channels": {<sensor>: {"topic", "decoder",
    "rate_hz", "unit"}}}``, channels in publishing order. Sensor faults do not change
    it: a faulty sensor still has its topic.
    """
    out: list[dict[str, Any]] = []
    for a in scenario.assets:
        channels: dict[str, dict[str, Any]] = {}
        for ch in a.machine.channels:
            rate: float | int = int(ch.rate_hz) if float(ch.rate_hz).is_integer() else ch.rate_hz
            channels[ch.name] = {
                "topic": scenario.topic(a, ch.name),
                "decoder": str(ch.decoder),
                "rate_hz": rate,
                "unit": ch.unit,
            }
        out.append({"name": a.name, "channels": channels})
    return out
