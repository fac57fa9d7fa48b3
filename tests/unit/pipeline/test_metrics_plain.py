"""`PlainFamily` against prometheus_client's own Counter and Gauge.

The pipeline's per-window series are plain floats exported by a collector; a scrape must
not be able to tell: same names, types, HELP, labels and values, counters with their
`_created` series, and series removed by labels as `remove_by_labels` removes them.
"""

from __future__ import annotations

import re

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry, Counter, Gauge, generate_latest

from agent.ops.metrics import Metrics, PlainFamily

ASSETS = ("P-1", "P-2", 'we"ird\\name')
_CREATED = re.compile(r"^(\w+_created\{[^}]*\}) \S+$", re.M)


def _text(reg: CollectorRegistry) -> str:
    # Creation times differ by the microseconds between making the two series.
    return _CREATED.sub(r"\1 T", generate_latest(reg).decode())


ops = st.lists(st.one_of(
    st.tuples(st.just("inc"), st.sampled_from(ASSETS), st.sampled_from([1, 2, 0.5])),
    st.tuples(st.just("set"), st.sampled_from(ASSETS),
              st.sampled_from([0.0, -1.5, 3.25, float("nan"), float("inf")])),
    st.tuples(st.just("remove"), st.sampled_from(ASSETS), st.just(0)),
), max_size=30)


@pytest.mark.parametrize("kind", ["counter", "gauge"])
@settings(max_examples=100, deadline=None)
@given(todo=ops)
def test_a_plain_family_scrapes_as_prometheus_client_would(kind: str, todo) -> None:
    name = "watchkeep_things_total" if kind == "counter" else "watchkeep_thing"
    ours_reg, theirs_reg = CollectorRegistry(), CollectorRegistry()
    ours = PlainFamily(kind, name, "Things, by asset", ["asset"], ours_reg)
    theirs = (Counter if kind == "counter" else Gauge)(name, "Things, by asset", ["asset"],
                                                       registry=theirs_reg)
    for op, asset, n in todo:
        if op == "remove":
            ours.remove_by_labels({"asset": asset})
            theirs.remove_by_labels({"asset": asset})
        elif op == "inc":
            ours.labels(asset).inc(n)
            theirs.labels(asset).inc(n)
        elif kind == "gauge":
            ours.labels(asset).set(n)
            theirs.labels(asset).set(n)
        else:
            ours.labels(asset)  # a counter cannot be set; the series just appears at 0
            theirs.labels(asset)
    assert _text(ours_reg) == _text(theirs_reg)
    for asset in ASSETS:
        want = theirs_reg.get_sample_value(name, {"asset": asset})
        got = ours_reg.get_sample_value(name, {"asset": asset})
        assert (got is None and want is None) or got == want or (got != got and want != want)


def test_the_daemons_plain_series_keep_their_names_types_and_help() -> None:
    reg = CollectorRegistry()
    m = Metrics(reg)
    m.windows_closed.labels("P-1").inc()
    m.windows_scored.labels("P-1").inc(2)
    m.score.labels("P-1").set(0.25)
    text = generate_latest(reg).decode()
    for line in ("# HELP watchkeep_windows_closed_total Windows closed",
                 "# TYPE watchkeep_windows_closed_total counter",
                 'watchkeep_windows_closed_total{asset="P-1"} 1.0',
                 "# HELP watchkeep_windows_scored_total Windows scored by a model",
                 'watchkeep_windows_scored_total{asset="P-1"} 2.0',
                 "# HELP watchkeep_anomaly_score Anomaly score of the last scored window",
                 "# TYPE watchkeep_anomaly_score gauge",
                 'watchkeep_anomaly_score{asset="P-1"} 0.25'):
        assert line in text.splitlines()
    assert reg.get_sample_value("watchkeep_windows_scored_total", {"asset": "P-1"}) == 2.0
    assert m.windows_scored.labels("P-1")._value.get() == 2.0


def test_a_name_taken_twice_is_refused_as_prometheus_client_refuses_it() -> None:
    reg = CollectorRegistry()
    PlainFamily("counter", "watchkeep_x_total", "x", ["asset"], reg)
    with pytest.raises(ValueError):
        Counter("watchkeep_x_total", "x", ["asset"], registry=reg)
    with pytest.raises(ValueError):
        PlainFamily("gauge", "watchkeep_x_created", "x", ["asset"], reg)


def test_wrong_label_counts_are_refused() -> None:
    fam = PlainFamily("gauge", "watchkeep_y", "y", ["asset", "channel"], CollectorRegistry())
    with pytest.raises(ValueError):
        fam.labels("P-1")
