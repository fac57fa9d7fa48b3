"""Re-learning's metrics, computed at scrape time from the manager's state, so an asset a
reload removes takes its series with it (registered on the daemon's registry)."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any

from prometheus_client import CollectorRegistry
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

from agent.learning.jobs import Result
from agent.learning.ports import RunningAssets


class LearningMetrics:
    """`watchkeep_rebaseline_*` and `watchkeep_model_active_version`. `jobs()` gives
    each learning asset's job summary."""

    def __init__(self, assets: RunningAssets, jobs: Callable[[], dict[str, dict[str, Any]]],
                 registry: CollectorRegistry) -> None:
        self.assets = assets
        self.jobs = jobs
        self.held: dict[str, int] = {}
        self.results: dict[tuple[str, str], int] = {}
        registry.register(self)

    def describe(self) -> list[Any]:
        return []  # unchecked collector: the names are fixed in collect()

    def collect(self) -> Iterator[Any]:
        assets = self.assets.names()
        jobs = self.jobs()
        learning = GaugeMetricFamily("watchkeep_rebaseline_learning",
                                     "1 while the asset is learning a new normal (collecting "
                                     "or training)", labels=["asset"])
        collected = GaugeMetricFamily("watchkeep_rebaseline_windows_collected",
                                      "New-normal windows collected by the asset's rebaseline",
                                      labels=["asset"])
        for a in assets:
            learning.add_metric([a], 1.0 if a in jobs else 0.0)
            collected.add_metric([a], float(jobs[a]["collected"]) if a in jobs else 0.0)
        held = CounterMetricFamily("watchkeep_rebaseline_held_events",
                                   "Anomaly events held back (not published) while learning",
                                   labels=["asset"])
        for a in assets:
            held.add_metric([a], float(self.held.get(a, 0)))
        results = CounterMetricFamily("watchkeep_rebaseline_results",
                                      "Rebaseline outcomes: accepted, rejected, refused, failed, "
                                      "cancelled, aborted", labels=["asset", "result"])
        known = set(assets)
        for (a, res), n in sorted(self.results.items()):
            if a in known:
                results.add_metric([a, res], float(n))
        version = GaugeMetricFamily("watchkeep_model_active_version",
                                    "Version of the model serving each of the asset's modes",
                                    labels=["asset", "mode"])
        for a in assets:
            for mode, b in self.assets.serving_modes(a).items():
                version.add_metric([a, mode], float(b.meta.version))
        yield from (learning, collected, held, results, version)

    def count_held(self, asset: str) -> None:
        self.held[asset] = self.held.get(asset, 0) + 1

    def count_result(self, asset: str, result: Result) -> None:
        key = (asset, result.value)
        self.results[key] = self.results.get(key, 0) + 1
