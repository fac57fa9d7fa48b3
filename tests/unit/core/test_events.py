"""Events: CloudEvents 1.0 structured JSON, RFC 3339 time, stable ids, severity, contributors."""

from __future__ import annotations

import json
import re
import uuid
from datetime import datetime

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from agent.core.events import (
    EventType,
    Severity,
    Source,
    event_id,
    make_event,
    rfc3339,
    severity_for,
    top_contributors,
)

# CloudEvents 1.0 spec, "Required Attributes": id, source, specversion, type (non-empty
# strings, specversion "1.0"); `time` is an RFC 3339 timestamp; `source` + `id` identify
# an event, so a redelivered duplicate keeps its id.
CE_REQUIRED = ("id", "source", "specversion", "type")
# RFC 3339 section 5.6 date-time, restricted to what we write: UTC "Z", milliseconds.
RFC3339_UTC = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}\.\d{3}Z$")

SRC = Source("testworks", "gw1").for_asset("P-101")
WINDOW_END = 1_796_119_210.0  # 2026-12-01T10:00:10Z
DATA = {"asset": "P-101", "score": 3.2, "threshold": 1.0}


def event(etype: EventType = EventType.ANOMALY_RAISED, source: str = SRC,
          id_key: str = "1796119200.000", time_s: float = WINDOW_END) -> dict:
    return make_event(etype, source, "P-101", time_s, DATA, id_key=id_key)


@pytest.mark.parametrize("etype", list(EventType))
def test_every_event_type_is_a_valid_structured_cloudevent(etype: EventType) -> None:
    """Required attributes present and non-empty; JSON round trip is lossless."""
    ev = event(etype)
    for key in CE_REQUIRED:
        assert isinstance(ev[key], str) and ev[key], key
    assert ev["specversion"] == "1.0"
    assert ev["type"] == f"io.watchkeep.{etype.value}"
    assert ev["source"] == "/testworks/gw1/P-101"
    assert ev["subject"] == "P-101"
    assert ev["datacontenttype"] == "application/json"
    assert ev["data"] == DATA
    assert json.loads(json.dumps(ev, allow_nan=False)) == ev
    # CloudEvents attribute names: lower-case letters and digits only.
    assert all(re.fullmatch(r"[a-z0-9]+", k) for k in ev)


@pytest.mark.parametrize(("ts", "text"), [
    (0.0, "1970-01-01T00:00:00.000Z"),
    (1_796_119_200.0, "2026-12-01T10:00:00.000Z"),
    (1_796_119_200.25, "2026-12-01T10:00:00.250Z"),
    (951_825_600.0, "2000-02-29T12:00:00.000Z"),  # leap day
    (1_798_761_599.999, "2026-12-31T23:59:59.999Z"),
])
def test_time_is_rfc3339_utc(ts: float, text: str) -> None:
    """rfc3339 writes UTC with a Z and milliseconds."""
    assert rfc3339(ts) == text
    assert RFC3339_UTC.match(text)


@given(st.floats(min_value=0, max_value=4_102_444_800))  # up to the year 2100
def test_time_parses_back_to_the_same_millisecond(ts: float) -> None:
    """Any time round-trips through RFC 3339 to within a millisecond."""
    text = rfc3339(ts)
    assert RFC3339_UTC.match(text)
    back = datetime.fromisoformat(text.replace("Z", "+00:00"))
    assert back.tzinfo is not None and back.utcoffset().total_seconds() == 0
    assert abs(back.timestamp() - ts) < 1e-3 + 1e-6


def test_event_time_is_the_window_end() -> None:
    """`time` is when the window ended, not when the event was built."""
    assert event()["time"] == "2026-12-01T10:00:10.000Z"


def test_id_is_stable_for_the_same_inputs() -> None:
    """The same event built twice (a redelivery, a replay) has the same id."""
    a, b = event(), event()
    assert a["id"] == b["id"]
    assert uuid.UUID(a["id"]).version == 5
    assert event_id(SRC, EventType.ANOMALY_RAISED, "1796119200.000") == a["id"]


def test_id_does_not_depend_on_time_or_data() -> None:
    """The id is named by source, type and window; the payload is not part of it."""
    assert event(time_s=WINDOW_END + 5)["id"] == event()["id"]


@pytest.mark.parametrize("changed", [
    {"id_key": "1796119210.000"},  # the next window
    {"id_key": "1796119200.001"},
    {"etype": EventType.ANOMALY_CLEARED},
    {"source": Source("testworks", "gw1").for_asset("P-102")},
    {"source": Source("testworks", "gw2").for_asset("P-101")},
])
def test_id_differs_for_a_different_window_type_or_source(changed: dict) -> None:
    """A different window, type, asset or gateway gives a different id."""
    assert event(**changed)["id"] != event()["id"]


def test_ids_are_unique_over_many_windows() -> None:
    """One id per (type, window) over a day of 10 s windows."""
    ids = {event_id(SRC, t, f"{1796119200 + 10 * i:.3f}")
           for i in range(8640) for t in (EventType.ANOMALY_RAISED, EventType.ANOMALY_CLEARED)}
    assert len(ids) == 2 * 8640


@pytest.mark.parametrize(("score", "threshold", "severity"), [
    (1.01, 1.0, Severity.MINOR),
    (1.99, 1.0, Severity.MINOR),
    (2.0, 1.0, Severity.MAJOR),
    (4.99, 1.0, Severity.MAJOR),
    (5.0, 1.0, Severity.CRITICAL),
    (50.0, 1.0, Severity.CRITICAL),
    (1.0, 0.0, Severity.CRITICAL),
])
def test_severity_bands(score: float, threshold: float, severity: Severity) -> None:
    """Ratio of score to threshold: < 2 minor, < 5 major, else critical (our bands)."""
    assert severity_for(score, threshold) is severity


def test_top_contributors_are_ordered_shares_of_the_error() -> None:
    """The largest squared errors first, each with its share of the total."""
    names = ("temp.mean", "temp.std", "current.mean", "current.std")
    sq = np.array([0.1, 0.2, 3.0, 0.7])
    top = top_contributors(names, sq, k=3)
    assert [c["feature"] for c in top] == ["current.mean", "current.std", "temp.std"]
    assert [c["share"] for c in top] == [0.75, 0.175, 0.05]
    assert top[0]["sq_error"] == 3.0
    everything = top_contributors(names, sq, k=10)
    assert len(everything) == 4
    assert sum(c["share"] for c in everything) == pytest.approx(1.0, abs=1e-3)


def test_top_contributors_with_zero_error_have_zero_shares() -> None:
    """No error at all: shares are 0, not NaN."""
    top = top_contributors(("a", "b"), np.zeros(2))
    assert [c["share"] for c in top] == [0.0, 0.0]
    json.dumps(top, allow_nan=False)


def _rfc3339_by_strftime(ts: float) -> str:
    """rfc3339 as first written (strftime), the text it must keep."""
    from datetime import UTC

    dt = datetime.fromtimestamp(ts, tz=UTC)
    return dt.strftime("%Y-%m-%dT%H:%M:%S.") + f"{dt.microsecond // 1000:03d}Z"


@given(st.one_of(st.floats(-6e10, 2.5e11, allow_nan=False),
                 st.integers(-6 * 10**10, 2 * 10**11).map(lambda s: s + 0.9995),
                 st.integers(0, 4 * 10**9).map(float),
                 st.sampled_from([0.0, -0.0005, 0.0005, 0.9999995, -30610224000.0,
                                  -30610224000.001, 253402300799.999])))
def test_rfc3339_is_the_strftime_text(ts: float) -> None:
    """rfc3339 writes what strftime wrote, for every time datetime can hold: years
    below 1000 and milliseconds rounded up to the next second included."""
    try:
        want = _rfc3339_by_strftime(ts)
    except (OverflowError, OSError, ValueError):
        with pytest.raises((OverflowError, OSError, ValueError)):
            rfc3339(ts)
        return
    assert rfc3339(ts) == want
