"""Scenario files: validation with key paths, overrides, labels and the labels file."""

from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any

import pytest

from simulator.errors import ScenarioError
from simulator.scenario import (
    FaultClass,
    Label,
    labels,
    load_scenario,
    parse_scenario,
    read_labels,
    with_overrides,
    write_labels,
)

REPO = Path(__file__).resolve().parents[3]
START = 1_772_438_400.0

BASE: dict[str, Any] = {
    "name": "t", "seed": 5, "start": START, "duration_s": 100,
    "assets": [
        {"name": "P-101", "kind": "pump", "area": "raw-water"},
        {"name": "B-201", "kind": "blower", "area": "aeration", "initial_speed_pct": 0},
    ],
    "timeline": [
        {"at_s": 10, "asset": "B-201", "action": "start", "speed_pct": 90},
        {"at_s": 20, "asset": "P-101", "fault": "imbalance", "ramp_s": 30, "severity": 0.7},
        {"at_s": 30, "asset": "B-201", "sensor_fault": "dropout", "channel": "current",
         "end_s": 40},
    ],
}


def _with(path: str, value: Any) -> dict[str, Any]:
    """BASE with the value at a dotted/indexed path replaced (value ... deletes it)."""
    data = copy.deepcopy(BASE)
    node: Any = data
    parts = path.replace("]", "").replace("[", ".").split(".")
    for p in parts[:-1]:
        node = node[int(p)] if p.isdigit() else node[p]
    last = parts[-1]
    key: Any = int(last) if last.isdigit() else last
    if value is ...:
        del node[key]
    else:
        node[key] = value
    return data


def test_base_parses() -> None:
    """The base scenario is valid and keeps its timeline entries apart by kind."""
    s = parse_scenario(BASE)
    assert [a.name for a in s.assets] == ["P-101", "B-201"]
    assert len(s.mode_changes) == len(s.machine_faults) == len(s.sensor_faults) == 1
    assert s.start_unix == START


@pytest.mark.parametrize(
    ("path", "value", "key_path"),
    [
        ("duration_s", -1, "duration_s"),
        ("duration_s", ..., "duration_s"),
        ("seed", "x", "seed"),
        ("start", "yesterday", "start"),
        ("colour", "red", "colour"),
        ("assets", [], "assets"),
        ("assets[0].kind", "turbine", "assets[0].kind"),
        ("assets[0].name", "P/101", "assets[0].name"),
        ("assets[1].name", "P-101", "assets[1].name"),
        ("assets[0].bearing", {"n_elements": 9, "ball_diameter_in": 2,
                               "pitch_diameter_in": 1}, "assets[0].bearing.ball_diameter_in"),
        ("timeline[0].speed_pct", 500, "timeline[0].speed_pct"),
        ("timeline[0].action", "jog", "timeline[0].action"),
        ("timeline[0].at_s", 100, "timeline[0].at_s"),
        ("timeline[1].severity", 1.5, "timeline[1].severity"),
        ("timeline[1].fault", "gremlins", "timeline[1].fault"),
        ("timeline[1].asset", "X-999", "timeline[1].asset"),
        ("timeline[1].wobble", 1, "timeline[1].wobble"),
        ("timeline[2].channel", "humidity", "timeline[2].channel"),
        ("timeline[2].end_s", 5, "timeline[2].end_s"),
        ("timeline[2].sensor_fault", "haunted", "timeline[2].sensor_fault"),
    ],
)
def test_bad_values_name_their_key_path(path: str, value: Any, key_path: str) -> None:
    """Each invalid value is reported with the key path where it sits."""
    with pytest.raises(ScenarioError) as exc:
        parse_scenario(_with(path, value))
    assert key_path in [p.key_path for p in exc.value.problems], str(exc.value)


def test_every_problem_is_reported_at_once() -> None:
    """Two independent mistakes give two problems in one error."""
    data = _with("seed", -3)
    data["duration_s"] = "long"
    with pytest.raises(ScenarioError) as exc:
        parse_scenario(data)
    assert {p.key_path for p in exc.value.problems} == {"seed", "duration_s"}
    assert "\n" not in str(exc.value)


@pytest.mark.parametrize(
    ("entry", "why"),
    [
        ({"at_s": 5, "asset": "P-101", "action": "start"}, "already running"),
        ({"at_s": 5, "asset": "B-201", "action": "speed", "speed_pct": 50}, "stopped"),
        ({"at_s": 5, "asset": "B-201", "fault": "cavitation"}, "for pumps"),
        ({"at_s": 5, "asset": "P-101", "action": "stop", "fault": "imbalance"}, "exactly one"),
    ],
)
def test_inconsistent_timeline_entries_are_errors(entry: dict[str, Any], why: str) -> None:
    """Starting a running machine, pump-only faults on a blower, mixed entries are rejected."""
    data = copy.deepcopy(BASE)
    data["timeline"].append(entry)
    with pytest.raises(ScenarioError, match=why):
        parse_scenario(data)


def test_unquoted_yaml_timestamp_and_null_start(tmp_path: Path) -> None:
    """YAML's own timestamps are accepted as UTC; a null start means 'choose at run time'."""
    p = tmp_path / "s.yaml"
    p.write_text("duration_s: 10\nstart: 2026-03-02T08:00:00Z\n"
                 "assets: [{name: P-1, kind: pump, area: a}]\n")
    assert load_scenario(p).start_unix == START
    p.write_text("duration_s: 10\nstart: null\nassets: [{name: P-1, kind: pump, area: a}]\n")
    assert load_scenario(p).start_unix is None


@pytest.mark.parametrize(
    ("text", "match"),
    [("duration_s: [1\n", "valid YAML"), ("- 1\n- 2\n", "a mapping")],
)
def test_unreadable_files_give_one_error(tmp_path: Path, text: str, match: str) -> None:
    """Broken YAML and non-mapping documents are ScenarioErrors naming the file."""
    p = tmp_path / "s.yaml"
    p.write_text(text)
    with pytest.raises(ScenarioError, match=match) as exc:
        load_scenario(p)
    assert str(p) in str(exc.value)


def test_missing_file_is_a_scenario_error(tmp_path: Path) -> None:
    """A missing file is reported, not raised as a bare OSError."""
    with pytest.raises(ScenarioError, match="readable"):
        load_scenario(tmp_path / "nope.yaml")


@pytest.mark.parametrize("name", ["scenario.yaml", "normal.yaml"])
def test_shipped_demo_scenarios_load(name: str) -> None:
    """The demo and the hour of normal operation load; normal has no faults."""
    s = load_scenario(REPO / "config" / "demo" / name)
    assert {a.name for a in s.assets} == {"P-101", "P-102", "B-201", "C-301"}
    if name == "normal.yaml":
        assert s.duration_s == 3600 and not s.machine_faults and not s.sensor_faults
    else:
        assert s.machine_faults and s.sensor_faults
        assert {f.asset for f in s.machine_faults}.isdisjoint(f.asset for f in s.sensor_faults)


def test_labels_match_the_scenario() -> None:
    """One label per fault with absolute start and end, clipped to the scenario's end."""
    got = labels(parse_scenario(BASE))
    assert got == [
        Label("P-101", "imbalance", FaultClass.MACHINE, None, START + 20, START + 100, 0.7),
        Label("B-201", "dropout", FaultClass.SENSOR, "current", START + 30, START + 40, None),
    ]


def test_labels_need_a_start_time() -> None:
    """Without a start in the scenario the caller must give one."""
    s = parse_scenario(_with("start", None))
    with pytest.raises(ScenarioError, match="start"):
        labels(s)
    assert labels(s, start_unix=0.0)[0].start == 20.0


def test_overrides_and_scaled_timeline() -> None:
    """A shorter duration drops late entries, or scales the whole story when asked."""
    s = parse_scenario(BASE)
    short = with_overrides(s, duration_s=25, seed=9)
    assert short.seed == 9 and [lb.kind for lb in labels(short)] == ["imbalance"]
    scaled = with_overrides(s, duration_s=50, scale_timeline=True)
    assert [(lb.start - START, lb.end - START) for lb in labels(scaled)] == [(10, 50), (15, 20)]
    assert scaled.machine_faults[0].ramp_s == 15
    with pytest.raises(ScenarioError):
        with_overrides(s, duration_s=0)


@pytest.mark.parametrize("suffix", [".json", ".csv"])
def test_labels_file_roundtrip(tmp_path: Path, suffix: str) -> None:
    """Labels written as JSON or CSV read back unchanged; no temp files are left."""
    s = parse_scenario(BASE)
    path = tmp_path / f"labels{suffix}"
    write_labels(path, labels(s), s)
    assert read_labels(path) == labels(s)
    assert [p.name for p in tmp_path.iterdir()] == [path.name]
    if suffix == ".json":
        doc = json.loads(path.read_text())
        assert doc["schema_version"] == 1 and doc["seed"] == 5
        assert set(doc["labels"][0]) == {"asset", "kind", "fault_class", "channel", "start",
                                         "end", "severity"}
    else:
        assert path.read_text().splitlines()[0] == (
            "asset,kind,fault_class,channel,start,end,severity")
