"""The plant generator: payload contracts, ordering, determinism, faults and modes."""

from __future__ import annotations

import collections
import hashlib
import json
from functools import cache
from typing import Any

import numpy as np
import pytest

from simulator.config import watchkeep_assets
from simulator.errors import ScenarioError
from simulator.plant import simulate
from simulator.scenario import Scenario, parse_scenario
from simulator.signals import speed_profile

START = 1_772_438_400.0
ALL_ASSETS = [
    {"name": "P-101", "kind": "pump", "area": "raw-water"},
    {"name": "B-201", "kind": "blower", "area": "aeration"},
    {"name": "C-301", "kind": "compressor", "area": "utilities"},
]
Msg = tuple[float, str, bytes]


def _scenario(timeline: list[dict[str, Any]] | None = None, *, duration_s: float = 6.0,
              seed: int = 1, assets: list[dict[str, Any]] | None = None) -> Scenario:
    return parse_scenario({"seed": seed, "start": START, "duration_s": duration_s,
                           "assets": assets or ALL_ASSETS, "timeline": timeline or []})


@cache
def _run(key: str) -> tuple[Msg, ...]:
    """Cached runs of named scenarios (each generated once per test session)."""
    specs: dict[str, Scenario] = {
        "plain": _scenario(),
        "plain_seed2": _scenario(seed=2),
        "stuck": _scenario([{"at_s": 2, "asset": "P-101", "sensor_fault": "stuck",
                             "channel": "current", "end_s": 4}]),
        "dropout": _scenario([{"at_s": 2, "asset": "B-201", "sensor_fault": "dropout",
                               "channel": "vib", "end_s": 4}]),
        "drift": _scenario([{"at_s": 0, "asset": "C-301", "sensor_fault": "drift",
                             "channel": "pressure", "magnitude": 2.0, "ramp_s": 0}]),
        "spikes": _scenario([{"at_s": 0, "asset": "P-101", "sensor_fault": "spikes",
                              "channel": "current", "magnitude": 50, "rate_hz": 2}]),
        "imbalance": _scenario([{"at_s": 0, "asset": "P-101", "fault": "imbalance"}]),
        "misalignment": _scenario([{"at_s": 0, "asset": "P-101", "fault": "misalignment"}]),
        "cavitation": _scenario([{"at_s": 0, "asset": "P-101", "fault": "cavitation"}]),
        "strainer": _scenario([{"at_s": 0, "asset": "P-101", "fault": "clogged_strainer"}]),
    }
    return tuple(simulate(specs[key]))


def _series(msgs: tuple[Msg, ...], topic_end: str) -> tuple[np.ndarray, np.ndarray]:
    """(ts, values) of a scalar channel; vib concatenates its blocks."""
    ts, vals = [], []
    for _t, topic, payload in msgs:
        if not topic.endswith(topic_end):
            continue
        text = payload.decode()
        if text.startswith("{"):
            d = json.loads(text)
            if "values" in d:
                ts.extend(d["ts"] + np.arange(len(d["values"])) / d["rate_hz"])
                vals.extend(d["values"])
            else:
                ts.append(d["ts"])
                vals.append(d["value"])
        else:
            ts.append(_t)
            vals.append(float(text))
    return np.asarray(ts), np.asarray(vals)


def _digest(msgs: tuple[Msg, ...]) -> str:
    h = hashlib.sha256()
    for t, topic, payload in msgs:
        h.update(repr(t).encode() + topic.encode() + payload)
    return h.hexdigest()


def test_messages_are_in_time_order_with_expected_counts() -> None:
    """Six seconds: 60 vib blocks, 60 current/pressure, 6 temperature (and flow) readings."""
    msgs = _run("plain")
    times = [m[0] for m in msgs]
    assert times == sorted(times)
    counts = collections.Counter(m[1] for m in msgs)
    assert counts["fernbrook/raw-water/P-101/vib"] == 60
    assert counts["fernbrook/raw-water/P-101/current"] == 60
    assert counts["fernbrook/aeration/B-201/pressure"] == 60
    assert counts["fernbrook/utilities/C-301/bearing_temp"] == 6
    assert counts["fernbrook/raw-water/P-101/flow"] == 6
    assert len(counts) == 5 + 4 + 4


def test_payloads_follow_the_input_contract() -> None:
    """json has ts+value, json-batch ts+rate_hz+256 values, text is one number."""
    decoders = {ch["topic"]: ch for a in watchkeep_assets(_scenario())
                for ch in a["channels"].values()}
    for t, topic, payload in _run("plain"):
        ch = decoders[topic]
        text = payload.decode("ascii")
        if ch["decoder"] == "json-batch":
            d = json.loads(text)
            assert set(d) == {"ts", "rate_hz", "values"} and d["rate_hz"] == ch["rate_hz"]
            assert len(d["values"]) == 256
            assert t == pytest.approx(d["ts"] + 0.1)  # published when the block is complete
        elif ch["decoder"] == "json":
            d = json.loads(text)
            assert set(d) == {"ts", "value"} and d["ts"] == pytest.approx(t)
        else:
            float(text)
            assert not text.startswith("{")
        assert START <= t <= START + 6.0


def test_assets_section_matches_what_is_published() -> None:
    """watchkeep_assets lists exactly the published topics, with only the contract keys."""
    assets = watchkeep_assets(_scenario())
    assert [a["name"] for a in assets] == ["P-101", "B-201", "C-301"]
    topics = {ch["topic"] for a in assets for ch in a["channels"].values()}
    assert topics == {m[1] for m in _run("plain")}
    for a in assets:
        assert set(a) == {"name", "channels"}
        for ch in a["channels"].values():
            assert set(ch) == {"topic", "decoder", "rate_hz", "unit"}
            assert ch["decoder"] in {"json", "json-batch", "text"}
    p101 = assets[0]["channels"]
    assert p101["vib"] == {"topic": "fernbrook/raw-water/P-101/vib", "decoder": "json-batch",
                           "rate_hz": 2560, "unit": "m/s2"}
    assert p101["pressure"]["decoder"] == "text"


def test_same_seed_is_byte_identical_and_another_seed_differs() -> None:
    """Output is a pure function of scenario, seed and start."""
    again = tuple(simulate(_scenario()))
    assert again == _run("plain")
    assert _digest(_run("plain_seed2")) != _digest(_run("plain"))
    assert [m[1] for m in _run("plain_seed2")] == [m[1] for m in _run("plain")]


def test_start_time_only_shifts_timestamps() -> None:
    """The same scenario started an hour later has the same values, an hour later."""
    later = list(simulate(_scenario(), start_unix=START + 3600))
    first = _run("plain")
    assert [m[0] + 3600 for m in first] == pytest.approx([m[0] for m in later])
    _, v1 = _series(first, "P-101/vib")
    _, v2 = _series(tuple(later), "P-101/vib")
    assert np.array_equal(v1, v2)


def test_a_fault_does_not_change_other_assets() -> None:
    """Per-asset generators: a fault on P-101 leaves B-201's messages identical."""
    plain = [m for m in _run("plain") if "B-201" in m[1]]
    faulty = [m for m in _run("imbalance") if "B-201" in m[1]]
    assert plain == faulty


def test_missing_start_is_an_error() -> None:
    """simulate needs a start from the scenario or the caller."""
    s = parse_scenario({"duration_s": 1, "assets": ALL_ASSETS[:1]})
    with pytest.raises(ScenarioError, match="start"):
        next(iter(simulate(s)))
    assert next(iter(simulate(s, start_unix=0.0)))[0] == 0.0


def test_partial_final_block_is_dropped() -> None:
    """A 1.05 s scenario has 10 whole vib blocks and 11 current readings."""
    counts = collections.Counter(
        m[1] for m in simulate(_scenario(duration_s=1.05, assets=ALL_ASSETS[:1])))
    assert counts["fernbrook/raw-water/P-101/vib"] == 10
    assert counts["fernbrook/raw-water/P-101/current"] == 11


# ---------------------------------------------------------------- sensor faults


def test_stuck_sensor_holds_its_last_value() -> None:
    """Between onset and end the current reading does not change; outside it does."""
    ts, v = _series(_run("stuck"), "P-101/current")
    inside = (ts >= START + 2) & (ts < START + 4)
    assert np.unique(v[inside]).size == 1
    assert v[inside][0] == v[~inside & (ts < START + 2)][-1]
    assert np.unique(v[ts >= START + 4]).size > 5


def test_dropout_publishes_nothing_in_its_window() -> None:
    """No vib block of B-201 starts inside the dropout; other channels carry on."""
    ts, _ = _series(_run("dropout"), "B-201/vib")
    assert not ((ts >= START + 2) & (ts < START + 4)).any()
    assert len(ts) == 40 * 256
    tc, _ = _series(_run("dropout"), "B-201/current")
    assert len(tc) == 60


def test_drift_adds_its_offset() -> None:
    """A step drift of 2 bar moves the compressor's pressure by 2 bar, nothing else."""
    _, plain = _series(_run("plain"), "C-301/pressure")
    _, drifted = _series(_run("drift"), "C-301/pressure")
    assert drifted - plain == pytest.approx(np.full(len(plain), 2.0), abs=2e-3)


def test_spikes_are_isolated_outliers() -> None:
    """Spikes of ±25..50 A arrive about twice a second on an otherwise unchanged channel."""
    _, plain = _series(_run("plain"), "P-101/current")
    _, spiky = _series(_run("spikes"), "P-101/current")
    diff = np.abs(spiky - plain)
    hits = diff > 1e-6
    assert 3 <= hits.sum() <= 30
    assert (diff[hits] >= 25 - 1e-6).all() and (diff[hits] <= 50 + 1e-6).all()


# ---------------------------------------------------------------- machine faults


def _tone_amplitude(values: np.ndarray, freq_hz: float, fs: float = 2560.0) -> float:
    """Peak amplitude of the tone at freq_hz (a Hann-windowed FFT, numpy)."""
    w = np.hanning(len(values))
    spec = np.abs(np.fft.rfft(values * w)) * 2 / w.sum()
    f = np.fft.rfftfreq(len(values), 1 / fs)
    i = np.argmin(np.abs(f - freq_hz))
    return float(spec[i - 2 : i + 3].max())


SHAFT_HZ = 2970 / 60


@pytest.mark.parametrize(
    ("fault", "order", "min_ratio"),
    [("imbalance", 1, 4.0), ("misalignment", 2, 5.0)],
)
def test_imbalance_grows_1x_and_misalignment_grows_2x(
    fault: str, order: int, min_ratio: float
) -> None:
    """Full-severity imbalance multiplies 1× by 5, misalignment 2× by 7."""
    _, plain = _series(_run("plain"), "P-101/vib")
    _, faulty = _series(_run(fault), "P-101/vib")
    ratio = _tone_amplitude(faulty, order * SHAFT_HZ) / _tone_amplitude(plain, order * SHAFT_HZ)
    assert ratio > min_ratio


def test_cavitation_adds_broadband_vibration_and_pressure_fluctuation() -> None:
    """Cavitation raises vibration RMS and the spread and drop of discharge pressure."""
    _, v0 = _series(_run("plain"), "P-101/vib")
    _, v1 = _series(_run("cavitation"), "P-101/vib")
    _, p0 = _series(_run("plain"), "P-101/pressure")
    _, p1 = _series(_run("cavitation"), "P-101/pressure")
    assert v1.std() > 1.5 * v0.std()
    assert p1.std() > 5 * p0.std()
    assert p1.mean() < p0.mean()


def test_clogged_strainer_lowers_pressure_flow_and_current() -> None:
    """A suction restriction cuts discharge pressure, flow and motor current."""
    for channel in ("pressure", "flow", "current"):
        _, plain = _series(_run("plain"), f"P-101/{channel}")
        _, clogged = _series(_run("strainer"), f"P-101/{channel}")
        assert clogged.mean() < 0.95 * plain.mean(), channel


def test_bearing_defect_heats_the_bearing_later() -> None:
    """Bearing temperature climbs only as severity grows (defect heat ∝ severity²)."""
    s = _scenario([{"at_s": 0, "asset": "P-101", "fault": "bearing_outer_race",
                    "ramp_s": 200}], duration_s=600, assets=ALL_ASSETS[:1])
    base = _scenario(duration_s=600, assets=ALL_ASSETS[:1])
    _, hot = _series(tuple(m for m in simulate(s) if m[1].endswith("temp")), "bearing_temp")
    _, cool = _series(tuple(m for m in simulate(base) if m[1].endswith("temp")),
                      "bearing_temp")
    rise = hot - cool
    assert abs(rise[:60].mean()) < 0.1
    assert rise[-60:].mean() > 3.0


# ---------------------------------------------------------------- operating modes


def test_speed_profile_ramps_toward_each_set_point() -> None:
    """The drive ramps at its rate, holds, and follows a set-point change mid-ramp."""
    p = speed_profile(0.0, [(10.0, 1.0), (15.0, 0.5)], ramp_per_s=0.1, end_s=30.0)
    t = np.array([0.0, 10.0, 12.0, 15.0, 16.0, 17.0, 30.0])
    assert p.at(t) == pytest.approx([0.0, 0.0, 0.2, 0.5, 0.5, 0.5, 0.5])
    assert p.slope(np.array([12.0, 20.0])) == pytest.approx([0.1, 0.0])


def test_start_up_ramps_current_and_stop_ends_it() -> None:
    """A stopped blower draws nothing, accelerates with extra current, then stops again."""
    s = _scenario([{"at_s": 2, "asset": "B-201", "action": "start"},
                   {"at_s": 40, "asset": "B-201", "action": "stop"}],
                  duration_s=70, assets=[{**ALL_ASSETS[1], "initial_speed_pct": 0}])
    msgs = tuple(simulate(s))
    ts, cur = _series(msgs, "B-201/current")
    rel = ts - START
    assert (cur[rel < 2] == 0).all()
    assert (cur[rel > 65] == 0).all()
    # Mid-ramp (half speed at 12 s) the static load needs ~63 A; accelerating needs more.
    assert cur[(rel > 11.5) & (rel < 12.5)].mean() > 75
    running = cur[(rel > 30) & (rel < 40)].mean()
    assert running == pytest.approx(160, rel=0.02)  # the blower's rated current
    _, pr = _series(msgs, "B-201/pressure")
    assert pr[(rel > 30) & (rel < 40)].mean() == pytest.approx(600, rel=0.02)
    assert pr[rel < 2].mean() == pytest.approx(0, abs=5)
    _, vib = _series(msgs, "B-201/vib")
    assert vib[: 2 * 2560].std() < 0.2 * vib[30 * 2560 : 40 * 2560].std()
