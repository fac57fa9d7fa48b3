"""CSV/historian exports as sensor messages (agent/commission/tabular.py)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from agent.commission.tabular import (
    CsvReader,
    TabularError,
    csv_messages,
    parse_column_map,
    parse_time,
    payload_for,
    sniff_delimiter,
)
from agent.config.load import parse_config
from agent.core.decode import decode_message


def _asset(**channels: dict[str, Any]) -> Any:
    chans = channels or {"flow": {"topic": "fb/P-101/flow", "rate_hz": 1},
                         "temp": {"topic": "fb/P-101/temp", "rate_hz": 1}}
    doc = {"site": "fernbrook", "gateway": "gw1",
           "assets": [{"name": "P-101", "channels": chans}]}
    return parse_config(doc, Path(".")).assets[0]


@pytest.mark.parametrize(("text", "fmt", "unix"), [
    ("1709251200", "auto", 1_709_251_200.0),
    ("1709251200.25", "unix", 1_709_251_200.25),
    ("2024-03-01 00:00:00", "auto", 1_709_251_200.0),      # no zone: UTC
    ("2024-03-01T00:00:00.500", "iso", 1_709_251_200.5),
    ("2024-03-01T01:00:00+01:00", "auto", 1_709_251_200.0),
    ("2024-03-01T00:00:00Z", "auto", 1_709_251_200.0),
    ("1709251200250", "unix_ms", 1_709_251_200.25),
])
def test_parse_time(text: str, fmt: str, unix: float) -> None:
    """ISO 8601 (no zone taken as UTC, offsets honoured) and unix seconds."""
    assert parse_time(text, fmt) == unix


@pytest.mark.parametrize(("text", "fmt"), [("01.03.2024 10:00", "auto"), ("nan", "auto"),
                                           ("2024-03-01", "unix"), ("", "iso"),
                                           ("2024-03-01", "unix_ms")])
def test_parse_time_refuses(text: str, fmt: str) -> None:
    with pytest.raises(ValueError):
        parse_time(text, fmt)


@pytest.mark.parametrize(("header", "delim"), [("time,flow,temp", ","), ("time;flow;temp", ";"),
                                               ("time\tflow\ttemp", "\t"), ("time", ",")])
def test_sniff_delimiter(header: str, delim: str) -> None:
    assert sniff_delimiter(header) == delim


@pytest.mark.parametrize("decoder", ["json", "json-batch", "text"])
def test_payloads_decode_to_the_sample(decoder: str) -> None:
    """Each decoder's payload, read by the daemon's own decoder, gives the row's sample;
    dotted field names nest."""
    a = _asset(flow={"topic": "fb/P-101/flow", "rate_hz": 2, "decoder": decoder,
                     "ts_field": "meta.ts", "value_field": "reading.value"})
    ch = a.channels[0]
    t, v = 1_709_251_200.5, 12.345678901234567
    samples, _ = decode_message(payload_for(ch, t, v), ch, t, max_payload_bytes=4096,
                                max_skew_s=300.0)
    if decoder == "json-batch":
        ts, vals = samples.arrays()  # type: ignore[union-attr]
        assert (float(ts[0]), float(vals[0])) == (t, v) and len(vals) == 1
    else:
        assert tuple(samples) == (t, v)  # type: ignore[arg-type]


def test_rows_become_messages(tmp_path: Path) -> None:
    """One message per channel value, in row order, at the row's time; empty and
    unreadable cells are skipped and counted; a decimal comma reads with ';'."""
    p = tmp_path / "e.csv"
    p.write_text("\ufefftimestamp;temp;FT-101 [m3/h];note\n"
                 "2024-03-01 00:00:00;20,5;1,25;a\n"
                 "2024-03-01 00:00:01;;1,5;b\n"
                 "2024-03-01 00:00:02;n/a;inf;c\n"
                 ";;;\n"
                 "2024-03-01 00:00:03;21;2;d\n", encoding="utf-8")
    a = _asset()
    r = CsvReader(a, p, column_map={"flow": "FT-101 [m3/h]"})
    got = [(t - 1_709_251_200.0, topic.rsplit("/", 1)[1], payload)
           for t, topic, payload in r.messages()]
    assert [(t, c) for t, c, _ in got] == [(0, "flow"), (0, "temp"), (1, "flow"), (3, "flow"),
                                           (3, "temp")]
    assert b'"value":20.5' in got[1][2] and b'"value":1.5' in got[2][2]
    assert r.rows == 4 and r.samples == 5
    assert dict(r.skipped) == {"empty": 1, "not_a_number": 1, "non_finite": 1}
    assert r.fraction() == 1.0


@pytest.mark.parametrize(("text", "kwargs", "words"), [
    ("time,flow\n1,2\n", {}, "no column for channel(s) temp (column 'temp')"),
    ("time,flow,temp\n10,1,2\n9,1,2\n", {}, "e.csv:3: time '9' is earlier than the row before"),
    ("time,flow,temp\n10,1,2\nyesterday,1,2\n", {}, "e.csv:3: time column 'time'"),
    ("t,flow,temp\n10,1,2\n", {"time_column": "time"}, "no time column 'time'"),
    ("", {}, "e.csv:1: no header line"),
    ("time,flow,temp\n10,1,2\n", {"column_map": {"pump": "x"}}, "names pump, not channels"),
])
def test_errors_name_the_file_and_line(tmp_path: Path, text: str, kwargs: dict[str, Any],
                                       words: str) -> None:
    p = tmp_path / "e.csv"
    p.write_text(text)
    with pytest.raises(TabularError) as info:
        list(csv_messages(_asset(), p, **kwargs))
    assert words in str(info.value)


@pytest.mark.parametrize(("items", "expect"), [
    (None, {}), (["flow=FT-101"], {"flow": "FT-101"}),
    (["flow = FT 101 [m3/h]", "temp=TT=1"], {"flow": "FT 101 [m3/h]", "temp": "TT=1"}),
])
def test_parse_column_map(items: list[str] | None, expect: dict[str, str]) -> None:
    assert parse_column_map(items) == expect


@pytest.mark.parametrize("item", ["flow", "=x", "flow="])
def test_parse_column_map_refuses(item: str) -> None:
    with pytest.raises(ValueError):
        parse_column_map([item])
