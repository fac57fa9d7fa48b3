"""inject_raw: faults written into raw messages of each decoder format, planned like the
feature-level injection, and the pipeline rebuilt from a dataset manifest."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from agent.commission.inject import FaultKind, InjectSpec, inject, parse_inject
from agent.commission.inject_raw import (
    ChannelSpec,
    RawFault,
    channel_samples,
    config_from_manifest,
    encode_payload,
    inject_capture,
    parse_raw_inject,
    plan_faults,
)
from agent.config.load import ChannelConfig, parse_config
from agent.core.decode import decode
from agent.errors import DatasetError

T0 = 1_780_000_000.0
LIMITS = {"max_payload_bytes": 262144, "max_skew_s": 300.0}


def _channels() -> dict[str, ChannelConfig]:
    doc = {"site": "s", "gateway": "g", "state_dir": ".", "assets": [{
        "name": "P-1", "channels": {
            "temp": {"topic": "p/temp", "decoder": "json", "rate_hz": 10,
                     "value_field": "reading.v"},
            "vib": {"topic": "p/vib", "decoder": "json-batch", "rate_hz": 100},
            "flow": {"topic": "p/flow", "decoder": "text", "rate_hz": 2},
        }}]}
    a = parse_config(doc, Path(".")).assets[0]
    return {c.name: c for c in a.channels}


def _capture(seed: int = 0) -> list[tuple[float, str, bytes]]:
    """8 s of invented readings in all three formats, in arrival order."""
    rng = np.random.default_rng(seed)
    msgs: list[tuple[float, str, bytes]] = []
    for i in range(80):  # json at 10 Hz with a nested value and a field to keep
        t = T0 + i / 10
        msgs.append((t + 0.01, "p/temp", json.dumps(
            {"ts": t, "reading": {"v": 40 + rng.normal()}, "unit": "C"}).encode()))
    for i in range(80):  # json-batch blocks of 10 samples at 100 Hz, offset to straddle
        t = T0 + 0.05 + i / 10
        vals = np.sin(2 * np.pi * 7 * (t + np.arange(10) / 100)) + rng.normal(0, 0.1, 10)
        msgs.append((t + 0.1, "p/vib", json.dumps(
            {"ts": t, "rate_hz": 100, "values": [round(float(v), 5) for v in vals]}).encode()))
    for i in range(16):  # text at 2 Hz, time is arrival
        msgs.append((T0 + i / 2 + 0.003, "p/flow", f"{12 + rng.normal():.3f}".encode()))
    msgs.sort(key=lambda m: m[0])
    return msgs


def _decoded(msgs, ch):
    smp = channel_samples(msgs, ch, **LIMITS)
    return smp.t, smp.v


SPAN = (T0 + 2.0, T0 + 5.0)


@pytest.mark.parametrize("channel", ["temp", "vib", "flow"])
@pytest.mark.parametrize("kind", list(FaultKind))
def test_each_kind_rewrites_one_channel_inside_the_span(kind: FaultKind, channel: str) -> None:
    """Only the chosen channel's samples inside the span change, as the kind says; every
    other message keeps its bytes; changed payloads decode with their own decoder."""
    chans = _channels()
    ch = chans[channel]
    msgs = _capture()
    fault = RawFault(kind, channel, *SPAN, 3.0, 3.0 * 0.5)
    out, applied = inject_capture(msgs, chans, [fault], seed=4, **LIMITS)
    assert len(applied) == 1 and len(out) == len(msgs)
    for (t0, topic0, p0), (t1, topic1, p1) in zip(msgs, out, strict=True):
        assert (t0, topic0) == (t1, topic1)
        if topic0 != ch.topic:
            assert p1 is p0
    t, before = _decoded(msgs, ch)
    t2, after = _decoded(out, ch)
    np.testing.assert_array_equal(t, t2)
    inside = (t >= SPAN[0]) & (t < SPAN[1])
    np.testing.assert_array_equal(after[~inside], before[~inside])
    delta = after[inside] - before[inside]
    if kind is FaultKind.STEP:
        np.testing.assert_allclose(delta, 1.5, rtol=1e-9)
    elif kind is FaultKind.DRIFT:
        np.testing.assert_allclose(delta, 1.5 * (t[inside] - SPAN[0]) / 3.0, rtol=1e-9,
                                   atol=1e-12)
    elif kind is FaultKind.NOISE:
        assert np.count_nonzero(delta) == delta.size and 0.5 < delta.std() < 3.0
    elif kind is FaultKind.STUCK:
        last = before[t < SPAN[0]][np.argmax(t[t < SPAN[0]])]
        assert np.all(after[inside] == last)
    else:
        assert np.count_nonzero(delta) == 1
        np.testing.assert_allclose(delta[delta != 0], 1.5, rtol=1e-9)
        at = t[inside][delta != 0][0]
        assert applied[0].start_s == at < applied[0].end_s
    # every rewritten message is still in its decoder's format and decodes as the daemon would
    for (t0, _, p0), (_, _, p1) in zip(msgs, out, strict=True):
        if p1 is p0:
            continue
        decode(p1, ch, t0, **LIMITS)
        if ch.decoder.value == "text":
            assert p1.decode("ascii") == repr(float(p1))
        else:
            d0, d1 = json.loads(p0), json.loads(p1)
            assert d1["ts"] == d0["ts"]
            if channel == "temp":
                assert d1["unit"] == "C" and set(d1) == set(d0)
            else:
                assert d1["rate_hz"] == 100 and len(d1["values"]) == len(d0["values"])


def test_batch_straddling_the_span_changes_only_its_samples_inside() -> None:
    """A block half inside the span keeps its samples before the span."""
    chans = _channels()
    msgs = _capture()
    out, _ = inject_capture(msgs, chans, [RawFault(FaultKind.STEP, "vib", *SPAN, 1, 1.0)],
                            **LIMITS)
    j = next(i for i, m in enumerate(msgs) if m[1] == "p/vib"
             and json.loads(m[2])["ts"] == pytest.approx(T0 + 1.95, abs=1e-3))
    v0, v1 = json.loads(msgs[j][2])["values"], json.loads(out[j][2])["values"]
    assert v1[:5] == v0[:5]
    np.testing.assert_allclose(np.subtract(v1[5:], v0[5:]), 1.0)


@pytest.mark.parametrize("kind", [FaultKind.NOISE, FaultKind.SPIKE])
def test_deterministic_for_a_seed(kind: FaultKind) -> None:
    """The same seed writes the same bytes; another seed draws other numbers."""
    chans = _channels()
    msgs = _capture()
    faults = [RawFault(kind, "temp", *SPAN, 3, 1.5), RawFault(kind, "vib", *SPAN, 3, 1.5)]
    a, _ = inject_capture(msgs, chans, faults, seed=1, **LIMITS)
    b, _ = inject_capture(msgs, chans, faults, seed=1, **LIMITS)
    c, _ = inject_capture(msgs, chans, faults, seed=2, **LIMITS)
    assert a == b
    assert a != c


def test_stuck_without_a_value_before_is_dropped() -> None:
    """A stuck event with nothing before it to freeze at is not applied."""
    out, applied = inject_capture(_capture(), _channels(),
                                  [RawFault(FaultKind.STUCK, "temp", T0 - 1, T0 + 1, 0, 0)],
                                  **LIMITS)
    assert applied == [] and out == _capture()


@pytest.mark.parametrize(("decoder_doc", "payload", "values", "expected"), [
    ({"decoder": "json"}, b'{"ts": 5.0, "value": 1}', [2.5], {"ts": 5.0, "value": 2.5}),
    ({"decoder": "json"}, b"7", [0.25], 0.25),  # a bare number stays a bare number
    ({"decoder": "json", "value_field": "a.b"}, b'{"a": {"b": 1, "c": 2}}', [3.0],
     {"a": {"b": 3.0, "c": 2}}),
    ({"decoder": "json-batch", "values_field": "v"}, b'{"ts": 1, "rate_hz": 4, "v": [1, 2]}',
     [0.5, -1e-7], {"ts": 1, "rate_hz": 4, "v": [0.5, -1e-7]}),
])
def test_encode_payload_formats(decoder_doc: dict, payload: bytes, values: list[float],
                                expected: object) -> None:
    """Only the value(s) change; numbers are written exactly."""
    doc = {"site": "s", "gateway": "g", "state_dir": ".", "assets": [{
        "name": "A", "channels": {"x": {"topic": "t/x", "rate_hz": 4, **decoder_doc}}}]}
    ch = parse_config(doc, Path(".")).assets[0].channels[0]
    assert json.loads(encode_payload(payload, ch, np.asarray(values),
                                     max_payload_bytes=1 << 20)) == expected


def test_encode_text() -> None:
    """A text payload becomes the number as ASCII, read back exactly."""
    ch = _channels()["flow"]
    out = encode_payload(b"12.5", ch, np.asarray([0.1 + 0.2]), max_payload_bytes=1024)
    assert float(out) == 0.1 + 0.2 and out == b"0.30000000000000004"


# --- specs and planning ----------------------------------------------------------------

@pytest.mark.parametrize(("text", "spec"), [
    ("step:4", InjectSpec(FaultKind.STEP, 4.0, 30)),
    ("step:4:20:pressure", ChannelSpec(FaultKind.STEP, 4.0, 20, "pressure")),
    ("stuck::10:temp", ChannelSpec(FaultKind.STUCK, 0.0, 10, "temp")),
])
def test_parse_raw_inject(text: str, spec: InjectSpec) -> None:
    """KIND[:SIGMA[:WINDOWS[:CHANNEL]]]; without a channel it is the plain spec."""
    assert parse_raw_inject(text) == spec


@pytest.mark.parametrize("text", ["step:4:20:", "wobble:1:2:x", "step:1:2:3:4"])
def test_parse_raw_inject_refuses(text: str) -> None:
    """A bad spec is refused."""
    with pytest.raises(ValueError):
        parse_raw_inject(text)


def test_plan_places_events_like_the_feature_path() -> None:
    """Same seed, same windows: the raw events span the feature path's event windows."""
    n = 400
    ws = T0 + 10.0 * np.arange(n)
    names = ["a.mean", "a.std", "b.mean", "c.mean"]
    spec = parse_inject("step:3:20")
    _, events = inject(np.zeros((n, 4)), np.ones(4), names, spec, seed=5)
    faults = plan_faults(ws, ws + 10.0, ["a", "b", "c"], {"a": 2.0, "b": 1.0, "c": 0.5},
                         spec, seed=5)
    assert [(f.start_s, f.end_s, f.channel) for f in faults] == \
        [(ws[e.first], ws[e.last] + 10.0, e.channel) for e in events]
    assert all(f.size == 3.0 * {"a": 2.0, "b": 1.0, "c": 0.5}[f.channel] for f in faults)
    named = plan_faults(ws, ws + 10.0, ["a", "b", "c"], {}, ChannelSpec(
        FaultKind.STEP, 3.0, 20, "c"), seed=5)
    assert {f.channel for f in named} == {"c"}
    with pytest.raises(DatasetError, match="channel 'z' is not one the model uses"):
        plan_faults(ws, ws + 10, ["a"], {}, ChannelSpec(FaultKind.STEP, 1, 5, "z"))
    with pytest.raises(DatasetError, match="too few to inject step"):
        plan_faults(ws[:5], ws[:5] + 10, ["a"], {}, spec)


# --- the pipeline from the manifest ----------------------------------------------------

MANIFEST = {"asset": "P-1", "window": {"length_s": 2.0, "hop_s": 1.0, "lateness_s": 0.5,
                                       "timeout_s": 3.0, "min_coverage": 0.7},
            "extra": {"channels": {"temp": {"topic": "p/temp", "decoder": "json",
                                            "rate_hz": 10.0},
                                   "vib": {"topic": "p/vib", "decoder": "json-batch",
                                           "rate_hz": 100.0}}}}


def test_config_from_manifest() -> None:
    """Window settings, channels and their features come back from the manifest."""
    cfg = config_from_manifest(MANIFEST, ["temp.mean", "temp.std", "vib.rms"])
    a = cfg.assets[0]
    assert a.name == "P-1" and a.bundle is None
    assert (a.window.length_s, a.window.hop_s, a.window.min_coverage) == (2.0, 1.0, 0.7)
    assert [(c.name, c.topic, c.decoder.value, c.rate_hz, c.features) for c in a.channels] == [
        ("temp", "p/temp", "json", 10.0, ("mean", "std")),
        ("vib", "p/vib", "json-batch", 100.0, ("rms",))]


@pytest.mark.parametrize(("manifest", "names", "message"), [
    ({"asset": "P-1"}, ["temp.mean"], "no extra.channels"),
    (MANIFEST, ["vib.band_0_50_hz"], "cannot be rebuilt from the manifest"),
    (MANIFEST, ["other.mean"], "cannot be rebuilt from the manifest"),
])
def test_config_from_manifest_refuses(manifest: dict, names: list[str], message: str) -> None:
    """What the manifest cannot say is refused, pointing at --config."""
    with pytest.raises(DatasetError, match=message):
        config_from_manifest(manifest, names)
