"""`watchkeep discover`'s analysis (pure): payload shapes, rates, proposals, the starter config."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest
import yaml

from agent.cli.main import main
from agent.commission.discover import (
    Discovery,
    Proposal,
    Shape,
    median_rate,
    nice_rate,
    parse_payload,
    per_second,
    propose,
)
from agent.commission.discover_render import group_assets, render_config, render_table
from agent.config.load import Decoder, parse_config

T0 = 1_790_000_000.0  # an arbitrary unix time (2026-09)


@pytest.mark.parametrize(("payload", "shape", "fields"), [
    (b"21.5", Shape.PLAIN_NUMBER, {}),
    (b" -3e2\n", Shape.PLAIN_NUMBER, {}),
    (b'{"ts": 1, "value": 2}', Shape.JSON_SCALAR, {"ts": 1.0, "value": 2.0}),
    (b'{"m": {"temp": 3.5}, "ok": true}', Shape.JSON_SCALAR, {"m.temp": 3.5}),
    (b'{"ts": 1, "rate_hz": 100, "values": [1, 2, 3]}', Shape.JSON_BLOCK,
     {"ts": 1.0, "rate_hz": 100.0}),
    (b"[1, 2]", Shape.OTHER, {}),
    (b"on", Shape.OTHER, {}),
    (b"nan", Shape.OTHER, {}),
    (b'{"state": "running"}', Shape.OTHER, {}),
    (b'{"ok": true}', Shape.OTHER, {}),  # a bool is not a number
    (b'{"v": [1, "x"]}', Shape.OTHER, {}),
    (b"\xff\xfe", Shape.OTHER, {}),
])
def test_payload_shapes(payload: bytes, shape: Shape, fields: dict[str, float]) -> None:
    """Each payload gets its shape and the numeric fields (dotted paths) it holds."""
    p = parse_payload(payload)
    assert p.shape is shape
    assert p.numbers == fields


@pytest.mark.parametrize(("measured", "nice"), [
    (0.998, 1.0), (9.98, 10.0), (10.15, 10.0), (2560.3, 2560.0), (1 / 59.5, 1 / 60),
    (0.5, 0.5), (3.33, 3.33), (12.7, 12.7), (0.7, 0.7), (1 / 80.6, 1 / 81),
])
def test_nice_rate(measured: float, nice: float) -> None:
    """Within 2% of a whole number of Hz (or of seconds per sample) it is rounded to it."""
    assert nice_rate(measured) == pytest.approx(nice)


def test_rates_from_times() -> None:
    """(n - 1) over the span; the median interval ignores one lost message."""
    times = [0.0, 0.1, 0.2, 0.3, 0.5, 0.6]
    assert per_second(times) == pytest.approx(5 / 0.6)
    assert median_rate(times) == pytest.approx(10.0)
    assert per_second([1.0]) is None and median_rate([]) is None


def feed(msgs: list[tuple[float, bytes]], topic: str = "plant/area/P-1/x") -> Proposal:
    d = Discovery()
    d.add_all((t, topic, p) for t, p in msgs)
    return propose(d.topics[topic])


def json_msgs(n: int, rate: float, make: Any) -> list[tuple[float, bytes]]:
    return [(T0 + i / rate + 0.003 * (i % 3), json.dumps(make(T0 + i / rate, i)).encode())
            for i in range(n)]


def test_json_scalar_with_the_default_fields() -> None:
    """ts + value at 5 Hz: decoder json, the rate from the timestamps, nothing rejected."""
    p = feed(json_msgs(50, 5.0, lambda t, i: {"ts": t, "value": 20 + i}))
    assert (p.shape, p.decoder, p.sample_rate_hz) == (Shape.JSON_SCALAR, Decoder.JSON, 5.0)
    assert p.settings == {"ts_field": "ts", "value_field": "value"}
    assert (p.first_value, p.last_value) == (20.0, 69.0)
    assert not any("WARNING" in n or "guessed" in n for n in p.notes)


def test_json_scalar_with_other_names_is_guessed_and_said_so() -> None:
    """A time field, a counter and one of two values: named, and the guess noted."""
    p = feed(json_msgs(30, 2.0, lambda t, i: {"time": t, "seq": 100 + i,
                                              "d": {"temp_c": 40.0 + i, "rh": 50}}))
    assert p.settings == {"ts_field": "time", "seq_field": "seq", "value_field": "d.rh"}
    assert any("guessed 'd.rh' as the value; other numeric fields: d.temp_c" in n
               for n in p.notes)
    assert p.sample_rate_hz == 2.0


def test_millisecond_timestamps_fall_back_to_arrival_time() -> None:
    """A `ts` in ms is not unix seconds: arrival time is used, and the decoder agrees."""
    p = feed(json_msgs(20, 1.0, lambda t, i: {"ts": t * 1000, "value": i}))
    assert p.settings["ts_field"] == "arrival_time"
    assert any("arrival time is used" in n for n in p.notes)
    assert not any("WARNING" in n for n in p.notes)
    assert p.sample_rate_hz == 1.0


def test_block_rate_from_its_field_or_from_the_blocks() -> None:
    """A block's sample rate is its rate field, or samples over the blocks' time span."""
    with_field = feed(json_msgs(20, 10.0, lambda t, i: {"ts": t, "rate_hz": 1280,
                                                        "values": [0.1] * 128}))
    assert (with_field.decoder, with_field.sample_rate_hz) == (Decoder.JSON_BATCH, 1280)
    assert with_field.settings["rate_field"] == "rate_hz"
    assert with_field.msg_rate_hz == pytest.approx(10.0)
    without = feed(json_msgs(20, 4.0, lambda t, i: {"t": t, "samples": [1.0] * 250}))
    assert without.sample_rate_hz == 1000.0
    assert without.settings == {"ts_field": "t", "values_field": "samples"}
    assert any("no sample-rate field" in n for n in without.notes)


def test_plain_numbers_rate_from_arrival() -> None:
    """Plain numbers carry no time: decoder text, the rate from arrival times."""
    p = feed([(T0 + i * 0.1, f"{4.5 + i / 100:.2f}".encode()) for i in range(40)])
    assert (p.shape, p.decoder, p.sample_rate_hz, p.settings) == \
        (Shape.PLAIN_NUMBER, Decoder.TEXT, 10.0, {})
    assert any("arrival times" in n for n in p.notes)


@pytest.mark.parametrize(("msgs", "note"), [
    ([(T0, b"1.0")], "too few messages (1)"),
    ([(T0 + i, b"running") for i in range(5)], "not numbers watchkeep can decode"),
    ([(T0 + i, b'{"ts": %f}' % (T0 + i)) for i in range(5)], "besides the timestamp 'ts'"),
])
def test_unusable_topics(msgs: list[tuple[float, bytes]], note: str) -> None:
    """A topic without numbers, or with one message, is not proposed as a channel."""
    p = feed(msgs)
    assert not p.usable and any(note in n for n in p.notes)


def test_sparkplug_topics_are_pointed_to_their_decoder() -> None:
    """Protobuf on a Sparkplug B topic is not guessed at: the note names the decoder."""
    p = feed([(T0 + i, b"\x08\x96\x01\x12\x05") for i in range(5)],
             topic="spBv1.0/fernbrook-dosing/DDATA/dosing-gw/C-301")
    note = "a Sparkplug B topic: configure it by hand with decoder sparkplug-b"
    assert not p.usable and any(note in n for n in p.notes)


def test_mixed_payloads_and_rejected_samples_are_noted() -> None:
    """The most common shape wins; payloads the decoder refuses give a WARNING."""
    msgs = json_msgs(10, 1.0, lambda t, i: {"ts": t, "value": i})
    msgs += [(T0 + 10 + i, b'{"value": "n/a"}') for i in range(4)]
    p = feed(msgs)
    assert p.decoder is Decoder.JSON
    assert any(n.startswith("mixed payloads (10 json scalar, 4 other)") for n in p.notes)
    assert any("WARNING: 4 of 8 sample messages were rejected" in n and "wrong_type" in n
               for n in p.notes)


def proposal(topic: str, rate: float = 1.0) -> Proposal:
    return Proposal(topic, Shape.JSON_SCALAR, 10, rate, rate, Decoder.JSON,
                    {"value_field": "value"}, ("value",), 1.0, 2.0, ())


@pytest.mark.parametrize(("topics", "assets"), [
    (["f/raw/P-1/vib", "f/raw/P-1/temp", "f/raw/P-2/vib"],
     {"P-1": ["temp", "vib"], "P-2": ["vib"]}),
    (["a/x/P1/v", "b/x/P1/v"], {"a-x-P1": ["v"], "b-x-P1": ["v"]}),
    (["line 1/pump (a)/flow rate"], {"pump_a": ["flow_rate"]}),
    (["solo"], {"unsorted": ["solo"]}),
])
def test_grouping_by_topic_prefix(topics: list[str], assets: dict[str, list[str]]) -> None:
    """Assets from the topic prefix (more levels where two end alike), valid names."""
    groups = group_assets([proposal(t) for t in topics])
    assert {g.name: [c for c, _ in g.channels] for g in groups} == assets


def test_starter_config_loads_with_the_config_loader(tmp_path: Path) -> None:
    """The written YAML passes the loader: channels, rates, fields; slow assets get longer
    windows; unusable topics are listed as comments."""
    d = Discovery()
    d.add_all((T0 + i / 5, "f/raw/P-1/temp", json.dumps({"ts": T0 + i / 5, "value": i}).encode())
              for i in range(20))
    d.add_all((T0 + i * 60, "f/tank/T-1/level", b"%d" % i) for i in range(3))
    d.add_all((T0 + i, "f/raw/P-1/state", b"on") for i in range(3))
    props = [propose(s) for s in d.topics.values()]
    text = render_config(props, broker_host="127.0.0.1", broker_port=1883, duration_s=120)
    cfg = parse_config(yaml.safe_load(text), tmp_path)
    p1 = cfg.asset("P-1")
    assert p1.bundle is None and p1.window.length_s == 10
    assert (p1.channel("temp").decoder, p1.channel("temp").rate_hz) == (Decoder.JSON, 5.0)
    t1 = cfg.asset("T-1")
    assert t1.channel("level").rate_hz == pytest.approx(1 / 60) and t1.window.length_s == 300
    assert "#   f/raw/P-1/state: other, 3 messages" in text
    assert "# site: guessed" in text and cfg.site == "f"
    table = render_table(props).splitlines()
    assert table[0].split()[:3] == ["TOPIC", "MSG/S", "SHAPE"]
    assert [r.split()[0] for r in table[1:]] == ["f/raw/P-1/state", "f/raw/P-1/temp",
                                                 "f/tank/T-1/level"]


def test_discover_refuses_a_bad_broker_argument(capsys: pytest.CaptureFixture[str]) -> None:
    """A malformed --broker is one line naming the option, exit 2."""
    assert main(["discover", "--broker", "localhost:notaport", "--duration", "1"]) == 2
    assert "--broker: expected HOST:PORT" in capsys.readouterr().err
