"""The metric families table and the typed attributes of `Metrics` agree."""

from __future__ import annotations

from prometheus_client import CollectorRegistry

from agent.ops.metrics import FAMILIES, Metrics


def test_every_family_is_a_typed_attribute_and_every_attribute_a_family() -> None:
    """`Metrics` declares one annotation per row of `FAMILIES`, and no other."""
    assert [f.attr for f in FAMILIES] == list(Metrics.__annotations__)


def test_family_names_and_attributes_are_unique() -> None:
    """No metric name or attribute appears twice."""
    assert len({f.name for f in FAMILIES}) == len(FAMILIES)
    assert len({f.attr for f in FAMILIES}) == len(FAMILIES)


def test_each_family_is_built_on_the_given_registry() -> None:
    """Every family's samples come from the registry the `Metrics` was built on."""
    reg = CollectorRegistry()
    m = Metrics(reg)
    names = {metric.name for metric in reg.collect()}
    for f in FAMILIES:
        assert getattr(m, f.attr) is not None
        assert f.name.removesuffix("_total") in names
