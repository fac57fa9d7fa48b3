"""Scenario files: YAML -> frozen, validated objects; ground-truth labels from a scenario.

A scenario names the plant, a seed, an optional start time, a duration, the assets
and a timeline. Each timeline entry is exactly one of: an operating `action`
(start, stop, speed), a machine `fault`, or a `sensor_fault`. Every problem in a file
is reported at once, each naming its key path (e.g. ``timeline[2].severity``).
See ``config/demo/scenario.yaml`` for a documented example.
"""

from __future__ import annotations

import csv
import dataclasses
import datetime as dt
import enum
import io
import json
import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

from agent.fsutil import write_file_atomic
from simulator.errors import Problem, ScenarioError
from simulator.machines import PRESETS, BearingGeometry, MachineKind, MachineSpec, speed_channel

LABELS_SCHEMA_VERSION = 1


class Action(enum.StrEnum):
    START = "start"
    STOP = "stop"
    SPEED = "speed"


class MachineFaultKind(enum.StrEnum):
    IMBALANCE = "imbalance"
    BEARING_OUTER_RACE = "bearing_outer_race"
    CAVITATION = "cavitation"
    CLOGGED_STRAINER = "clogged_strainer"
    MISALIGNMENT = "misalignment"


class SensorFaultKind(enum.StrEnum):
    STUCK = "stuck"
    DRIFT = "drift"
    DROPOUT = "dropout"
    SPIKES = "spikes"


class FaultClass(enum.StrEnum):
    MACHINE = "machine"
    SENSOR = "sensor"


# Faults that only make sense on a liquid pump.
_PUMP_ONLY = {MachineFaultKind.CAVITATION, MachineFaultKind.CLOGGED_STRAINER}


@dataclass(frozen=True)
class AssetSpec:
    """One simulated machine: its tag, plant area, physics and initial speed (0 = stopped)."""

    name: str
    area: str
    machine: MachineSpec
    initial_speed_pct: float


@dataclass(frozen=True)
class ModeChange:
    """An operating action at `at_s` seconds into the scenario."""

    at_s: float
    asset: str
    action: Action
    speed_pct: float  # the new set-point; 0 for stop


@dataclass(frozen=True)
class MachineFault:
    """A machine fault: severity ramps linearly from 0 at onset to `severity` over `ramp_s`."""

    asset: str
    kind: MachineFaultKind
    onset_s: float
    ramp_s: float
    severity: float
    end_s: float | None  # None: lasts to the end of the scenario


@dataclass(frozen=True)
class SensorFault:
    """A sensor fault on one channel between `onset_s` and `end_s`.

    `magnitude` (channel units) is the full drift offset or the spike height; a drift
    reaches it after `ramp_s`; spikes arrive at `rate_hz` on average.
    """

    asset: str
    channel: str
    kind: SensorFaultKind
    onset_s: float
    end_s: float | None
    ramp_s: float
    magnitude: float
    rate_hz: float


@dataclass(frozen=True)
class Scenario:
    """A validated scenario. `start_unix` None means "now", chosen by whoever runs it."""

    name: str
    plant: str
    site_name: str
    seed: int
    start_unix: float | None
    duration_s: float
    ambient_c: float
    ambient_swing_c: float
    assets: tuple[AssetSpec, ...]
    mode_changes: tuple[ModeChange, ...]
    machine_faults: tuple[MachineFault, ...]
    sensor_faults: tuple[SensorFault, ...]

    def asset(self, name: str) -> AssetSpec:
        for a in self.assets:
            if a.name == name:
                return a
        raise KeyError(name)

    def topic(self, asset: AssetSpec, channel: str) -> str:
        """The topic an asset's channel publishes on: ``<plant>/<area>/<asset>/<sensor>``."""
        return f"{self.plant}/{asset.area}/{asset.name}/{channel}"


@dataclass(frozen=True)
class Label:
    """Ground truth for one injected fault, in absolute (simulated) unix seconds."""

    asset: str
    kind: str
    fault_class: FaultClass
    channel: str | None  # the faulty sensor, for sensor faults
    start: float
    end: float
    severity: float | None  # machine faults: final severity in [0, 1]


# --------------------------------------------------------------------------- parsing


class _Reader:
    """Collects problems while reading typed values out of plain YAML data."""

    def __init__(self) -> None:
        self.problems: list[Problem] = []

    def bad(self, path: str, expected: str, got: Any = None) -> None:
        self.problems.append(Problem(path, expected, "" if got is None else repr(got)))

    def mapping(self, data: Any, path: str, allowed: set[str]) -> Mapping[str, Any]:
        if not isinstance(data, Mapping):
            self.bad(path or "(top level)", "a mapping", data)
            return {}
        for key in data:
            if key not in allowed:
                self.bad(f"{path}.{key}" if path else str(key), f"one of {sorted(allowed)}",
                         "an unknown key")
        return data

    def number(self, data: Mapping[str, Any], key: str, path: str, *, default: Any = ...,
               lo: float | None = None, hi: float | None = None,
               lo_open: bool = False) -> float:
        p = f"{path}.{key}" if path else key
        if key not in data or data[key] is None:
            if default is ...:
                self.bad(p, "a number (required)")
                return math.nan
            return default
        v = data[key]
        if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
            self.bad(p, "a finite number", v)
            return math.nan
        if (lo is not None and (v < lo or (lo_open and v == lo))) or (
            hi is not None and v > hi
        ):
            rng = f"{'(' if lo_open else '['}{lo if lo is not None else '-inf'}, "
            rng += f"{hi if hi is not None else 'inf'}]"
            self.bad(p, f"a number in {rng}", v)
        return float(v)

    def string(self, data: Mapping[str, Any], key: str, path: str, *,
               default: str | None = None) -> str:
        p = f"{path}.{key}" if path else key
        v = data.get(key)
        if v is None:
            if default is None:
                self.bad(p, "a string (required)")
                return ""
            return default
        if not isinstance(v, str) or not v.strip():
            self.bad(p, "a non-empty string", v)
            return ""
        if any(c in v for c in "/#+") or v != v.strip():
            self.bad(p, "a name without '/', '#', '+' or surrounding spaces", v)
        return v

    def choice(self, value: Any, enum_type: type[enum.StrEnum], path: str) -> Any:
        try:
            return enum_type(value)
        except ValueError:
            self.bad(path, f"one of {[e.value for e in enum_type]}", value)
            return None


def _parse_start(r: _Reader, data: Mapping[str, Any]) -> float | None:
    v = data.get("start")
    if v is None:
        return None
    if isinstance(v, bool):
        r.bad("start", "an ISO 8601 time, unix seconds or null", v)
        return None
    if isinstance(v, int | float):
        return float(v)
    if isinstance(v, str):
        try:
            v = dt.datetime.fromisoformat(v.replace("Z", "+00:00"))
        except ValueError:
            r.bad("start", "an ISO 8601 time, unix seconds or null", v)
            return None
    if isinstance(v, dt.date) and not isinstance(v, dt.datetime):
        v = dt.datetime(v.year, v.month, v.day)
    if isinstance(v, dt.datetime):
        # YAML parses unquoted timestamps itself; a naive one is taken as UTC.
        if v.tzinfo is None:
            v = v.replace(tzinfo=dt.UTC)
        return v.timestamp()
    r.bad("start", "an ISO 8601 time, unix seconds or null", v)
    return None


_ASSET_KEYS = {"name", "kind", "area", "initial_speed_pct", "rated_speed_rpm", "vanes", "bearing",
               "speed_sensor"}
_BEARING_KEYS = {"n_elements", "ball_diameter_in", "pitch_diameter_in", "contact_angle_deg"}


def _parse_asset(r: _Reader, raw: Any, path: str) -> AssetSpec | None:
    d = r.mapping(raw, path, _ASSET_KEYS)
    if not d:
        return None
    name = r.string(d, "name", path)
    area = r.string(d, "area", path)
    kind = r.choice(d.get("kind"), MachineKind, f"{path}.kind")
    initial = r.number(d, "initial_speed_pct", path, default=100.0, lo=0.0, hi=110.0)
    if kind is None:
        return None
    machine = PRESETS[kind]
    overrides: dict[str, Any] = {}
    if "rated_speed_rpm" in d:
        overrides["rated_speed_rpm"] = r.number(d, "rated_speed_rpm", path, lo=60.0, hi=12000.0)
    if "vanes" in d:
        v = d["vanes"]
        if isinstance(v, bool) or not isinstance(v, int) or not 1 <= v <= 64:
            r.bad(f"{path}.vanes", "an integer in [1, 64]", v)
        else:
            overrides["vanes"] = v
    if "bearing" in d:
        bp = f"{path}.bearing"
        b = r.mapping(d["bearing"], bp, _BEARING_KEYS)
        n = b.get("n_elements")
        if isinstance(n, bool) or not isinstance(n, int) or not 3 <= n <= 60:
            r.bad(f"{bp}.n_elements", "an integer in [3, 60]", n)
            n = 3
        ball = r.number(b, "ball_diameter_in", bp, lo=0.0, lo_open=True)
        pitch = r.number(b, "pitch_diameter_in", bp, lo=0.0, lo_open=True)
        angle = r.number(b, "contact_angle_deg", bp, default=0.0, lo=0.0, hi=45.0)
        if ball >= pitch:
            r.bad(f"{bp}.ball_diameter_in", "less than pitch_diameter_in", ball)
        overrides["bearing"] = BearingGeometry(n, ball, pitch, angle)
    if "speed_sensor" in d:
        if not isinstance(d["speed_sensor"], bool):
            r.bad(f"{path}.speed_sensor", "true or false", d["speed_sensor"])
        elif d["speed_sensor"]:
            # The drive's speed reading (json, 1 Hz, rpm) as one more channel.
            overrides["channels"] = (*machine.channels, speed_channel())
    machine = dataclasses.replace(machine, **overrides)
    return AssetSpec(name=name, area=area, machine=machine, initial_speed_pct=initial)


_ENTRY_KINDS = ("action", "fault", "sensor_fault")
_ACTION_KEYS = {"at_s", "asset", "action", "speed_pct"}
_FAULT_KEYS = {"at_s", "asset", "fault", "ramp_s", "severity", "end_s"}
_SENSOR_KEYS = {"at_s", "asset", "sensor_fault", "channel", "end_s", "ramp_s", "magnitude",
                "rate_hz"}


def _parse_timeline(
    r: _Reader, raw: Any, assets: dict[str, AssetSpec], duration_s: float
) -> tuple[list[ModeChange], list[MachineFault], list[SensorFault]]:
    changes: list[ModeChange] = []
    faults: list[MachineFault] = []
    sensors: list[SensorFault] = []
    if raw is None:
        return changes, faults, sensors
    if not isinstance(raw, list):
        r.bad("timeline", "a list of entries", raw)
        return changes, faults, sensors
    for i, entry in enumerate(raw):
        path = f"timeline[{i}]"
        if not isinstance(entry, Mapping):
            r.bad(path, "a mapping", entry)
            continue
        present = [k for k in _ENTRY_KINDS if k in entry]
        if len(present) != 1:
            r.bad(path, "exactly one of 'action', 'fault', 'sensor_fault'",
                  ", ".join(present) or "none")
            continue
        allowed = {"action": _ACTION_KEYS, "fault": _FAULT_KEYS,
                   "sensor_fault": _SENSOR_KEYS}[present[0]]
        d = r.mapping(entry, path, allowed)
        at = r.number(d, "at_s", path, lo=0.0)
        if at >= duration_s:
            r.bad(f"{path}.at_s", f"a time before duration_s ({duration_s:g})", at)
        asset_name = r.string(d, "asset", path)
        asset = assets.get(asset_name)
        if asset is None and asset_name:
            r.bad(f"{path}.asset", f"one of the assets {sorted(assets)}", asset_name)
        end = r.number(d, "end_s", path, default=None, lo=0.0)
        if end is not None and end <= at:
            r.bad(f"{path}.end_s", "a time after at_s", end)
        if present[0] == "action":
            action = r.choice(d.get("action"), Action, f"{path}.action")
            default = 0.0 if action is Action.STOP else (100.0 if action is Action.START else ...)
            speed = r.number(d, "speed_pct", path, default=default, lo=0.0, hi=110.0)
            if action is Action.STOP and speed != 0.0:
                r.bad(f"{path}.speed_pct", "0 or absent for a stop", speed)
            if action in (Action.START, Action.SPEED) and speed < 10.0:
                r.bad(f"{path}.speed_pct", "at least 10 for a start or speed change", speed)
            if action is not None:
                changes.append(ModeChange(at, asset_name, action, speed))
        elif present[0] == "fault":
            kind = r.choice(d.get("fault"), MachineFaultKind, f"{path}.fault")
            ramp = r.number(d, "ramp_s", path, default=0.0, lo=0.0)
            sev = r.number(d, "severity", path, default=1.0, lo=0.0, hi=1.0)
            if kind in _PUMP_ONLY and asset is not None and asset.machine.kind is not (
                MachineKind.PUMP
            ):
                r.bad(f"{path}.fault", f"a fault a {asset.machine.kind} can have "
                      f"({kind} is for pumps)", str(kind))
            if kind is not None:
                faults.append(MachineFault(asset_name, kind, at, ramp, sev, end))
        else:
            kind = r.choice(d.get("sensor_fault"), SensorFaultKind, f"{path}.sensor_fault")
            channel = r.string(d, "channel", path)
            spec = None
            if asset is not None:
                names = [c.name for c in asset.machine.channels]
                if channel and channel not in names:
                    r.bad(f"{path}.channel", f"one of {asset.name}'s channels {names}", channel)
                else:
                    spec = next((c for c in asset.machine.channels if c.name == channel), None)
            scale = spec.fault_scale if spec is not None else 1.0
            life = (end if end is not None else duration_s) - at
            ramp = r.number(d, "ramp_s", path,
                            default=life if kind is SensorFaultKind.DRIFT else 0.0, lo=0.0)
            mag = r.number(d, "magnitude", path, default=scale)
            rate = r.number(d, "rate_hz", path, default=0.5, lo=0.0, lo_open=True)
            if kind is not None:
                sensors.append(SensorFault(asset_name, channel, kind, at, end, ramp, mag, rate))
    _check_actions(r, changes, assets)
    return changes, faults, sensors


def _check_actions(r: _Reader, changes: list[ModeChange], assets: dict[str, AssetSpec]) -> None:
    """A speed change needs a running machine; a start a stopped one (else it is a typo)."""
    running = {name: a.initial_speed_pct > 0 for name, a in assets.items()}
    for c in sorted(changes, key=lambda c: c.at_s):
        if c.asset not in running:
            continue
        if c.action is Action.START and running[c.asset]:
            r.bad("timeline", f"{c.asset} stopped before its start at {c.at_s:g} s",
                  "already running")
        if c.action in (Action.STOP, Action.SPEED) and not running[c.asset]:
            r.bad("timeline", f"{c.asset} running at {c.at_s:g} s for '{c.action}'",
                  "stopped (use action: start)")
        running[c.asset] = c.action is not Action.STOP


_TOP_KEYS = {"name", "plant", "site_name", "seed", "start", "duration_s", "ambient_c",
             "ambient_swing_c", "assets", "timeline"}


def parse_scenario(data: Any, source: str = "") -> Scenario:
    """Validate plain data (as loaded from YAML) into a `Scenario`; raise `ScenarioError`."""
    r = _Reader()
    d = r.mapping(data, "", _TOP_KEYS)
    if not d and not r.problems:
        r.bad("(top level)", "a non-empty mapping", data)
    name = r.string(d, "name", "", default="scenario")
    plant = r.string(d, "plant", "", default="fernbrook")
    site_name = d.get("site_name", "Fernbrook water treatment works")
    if not isinstance(site_name, str):
        r.bad("site_name", "a string", site_name)
        site_name = ""
    seed_v = d.get("seed", 0)
    if isinstance(seed_v, bool) or not isinstance(seed_v, int) or seed_v < 0:
        r.bad("seed", "a non-negative integer", seed_v)
        seed_v = 0
    start = _parse_start(r, d)
    duration = r.number(d, "duration_s", "", lo=0.0, lo_open=True, hi=30 * 86400.0)
    ambient = r.number(d, "ambient_c", "", default=15.0, lo=-40.0, hi=60.0)
    swing = r.number(d, "ambient_swing_c", "", default=0.0, lo=0.0, hi=30.0)
    assets: dict[str, AssetSpec] = {}
    raw_assets = d.get("assets")
    if not isinstance(raw_assets, list) or not raw_assets:
        r.bad("assets", "a non-empty list of assets", raw_assets)
        raw_assets = []
    for i, raw in enumerate(raw_assets):
        a = _parse_asset(r, raw, f"assets[{i}]")
        if a is None:
            continue
        if a.name in assets:
            r.bad(f"assets[{i}].name", "a unique asset name", a.name)
        assets[a.name] = a
    dur = duration if math.isfinite(duration) else math.inf
    changes, faults, sensors = _parse_timeline(r, d.get("timeline"), assets, dur)
    if r.problems:
        raise ScenarioError(r.problems, source)
    return Scenario(
        name=name, plant=plant, site_name=site_name, seed=seed_v, start_unix=start,
        duration_s=duration, ambient_c=ambient, ambient_swing_c=swing,
        assets=tuple(assets.values()),
        mode_changes=tuple(sorted(changes, key=lambda c: c.at_s)),
        machine_faults=tuple(faults), sensor_faults=tuple(sensors),
    )


def load_scenario(path: str | os.PathLike[str]) -> Scenario:
    """Read and validate a scenario YAML file; raise `ScenarioError` naming the key path."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as e:
        raise ScenarioError([Problem("(file)", "a readable scenario file", e.strerror or str(e))],
                            str(p)) from None
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as e:
        mark = getattr(e, "problem_mark", None)
        where = f"line {mark.line + 1}" if mark is not None else "(file)"
        raise ScenarioError([Problem(where, "valid YAML", getattr(e, "problem", "") or "")],
                            str(p)) from None
    return parse_scenario(data, str(p))


def with_overrides(
    scenario: Scenario, *, duration_s: float | None = None, seed: int | None = None,
    start_unix: float | None = None, scale_timeline: bool = False,
) -> Scenario:
    """A copy with a new duration, seed or start.

    With `scale_timeline` every timeline time (at, end, ramp) is scaled by the ratio of
    the new duration to the old, so a shortened demo keeps its story; without it,
    timeline entries past the new end never happen.
    """
    changes: dict[str, Any] = {}
    if duration_s is not None:
        if not duration_s > 0:
            raise ScenarioError([Problem("duration_s", "a positive number", repr(duration_s))])
        changes["duration_s"] = float(duration_s)
        if scale_timeline:
            k = float(duration_s) / scenario.duration_s

            def sc(x: float | None) -> float | None:
                return None if x is None else x * k

            changes["mode_changes"] = tuple(
                dataclasses.replace(c, at_s=c.at_s * k) for c in scenario.mode_changes)
            changes["machine_faults"] = tuple(
                dataclasses.replace(f, onset_s=f.onset_s * k, ramp_s=f.ramp_s * k,
                                    end_s=sc(f.end_s)) for f in scenario.machine_faults)
            changes["sensor_faults"] = tuple(
                dataclasses.replace(f, onset_s=f.onset_s * k, ramp_s=f.ramp_s * k,
                                    end_s=sc(f.end_s)) for f in scenario.sensor_faults)
    if seed is not None:
        if seed < 0:
            raise ScenarioError([Problem("seed", "a non-negative integer", repr(seed))])
        changes["seed"] = int(seed)
    if start_unix is not None:
        changes["start_unix"] = float(start_unix)
    return dataclasses.replace(scenario, **changes)


def resolve_start(scenario: Scenario, start_unix: float | None) -> float:
    """The start time to simulate from: the argument, else the scenario's; one is required."""
    if start_unix is not None:
        return float(start_unix)
    if scenario.start_unix is not None:
        return scenario.start_unix
    raise ScenarioError([Problem("start", "a start time (the scenario has none; pass one)")])


# --------------------------------------------------------------------------- labels


def labels(scenario: Scenario, start_unix: float | None = None) -> list[Label]:
    """Ground-truth labels for every fault that begins within the scenario, by start time.

    Times are absolute simulated unix seconds; a fault's end is clipped to the
    scenario's end. Mode changes are not faults and are not labelled.
    """
    t0 = resolve_start(scenario, start_unix)
    dur = scenario.duration_s
    out: list[Label] = []
    for f in scenario.machine_faults:
        if f.onset_s < dur:
            end = min(f.end_s if f.end_s is not None else dur, dur)
            out.append(Label(f.asset, str(f.kind), FaultClass.MACHINE, None,
                             t0 + f.onset_s, t0 + end, f.severity))
    for s in scenario.sensor_faults:
        if s.onset_s < dur:
            end = min(s.end_s if s.end_s is not None else dur, dur)
            out.append(Label(s.asset, str(s.kind), FaultClass.SENSOR, s.channel,
                             t0 + s.onset_s, t0 + end, None))
    out.sort(key=lambda lb: (lb.start, lb.asset, lb.kind))
    return out


_LABEL_FIELDS = ("asset", "kind", "fault_class", "channel", "start", "end", "severity")


def labels_to_json(items: Sequence[Label], scenario: Scenario | None = None) -> str:
    """The labels file as JSON: ``{"schema_version": 1, "scenario": ..., "labels": [...]}``."""
    doc: dict[str, Any] = {"schema_version": LABELS_SCHEMA_VERSION}
    if scenario is not None:
        doc["scenario"] = scenario.name
        doc["seed"] = scenario.seed
    doc["labels"] = [
        {k: (str(v) if isinstance(v, enum.Enum) else v)
         for k, v in dataclasses.asdict(lb).items()}
        for lb in items
    ]
    return json.dumps(doc, indent=2) + "\n"


def labels_to_csv(items: Sequence[Label]) -> str:
    """The labels file as CSV with a header row; empty cells for absent channel/severity."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(_LABEL_FIELDS)
    for lb in items:
        w.writerow([lb.asset, lb.kind, str(lb.fault_class), lb.channel or "",
                    repr(lb.start), repr(lb.end), "" if lb.severity is None else lb.severity])
    return buf.getvalue()


def write_labels(path: str | os.PathLike[str], items: Sequence[Label],
                 scenario: Scenario | None = None) -> None:
    """Write labels as CSV when `path` ends in ``.csv``, else JSON; by temp-and-rename."""
    p = Path(path)
    text = labels_to_csv(items) if p.suffix.lower() == ".csv" else labels_to_json(items, scenario)
    _write_atomic(p, text)


def read_labels(path: str | os.PathLike[str]) -> list[Label]:
    """Read a labels file written by `write_labels` (JSON or CSV)."""
    p = Path(path)
    text = p.read_text(encoding="utf-8")
    rows: list[dict[str, Any]]
    if p.suffix.lower() == ".csv":
        rows = list(csv.DictReader(io.StringIO(text)))
        for row in rows:
            row["start"], row["end"] = float(row["start"]), float(row["end"])
            row["channel"] = row["channel"] or None
            row["severity"] = float(row["severity"]) if row["severity"] else None
    else:
        rows = json.loads(text)["labels"]
    return [Label(r["asset"], r["kind"], FaultClass(r["fault_class"]), r["channel"],
                  float(r["start"]), float(r["end"]), r["severity"]) for r in rows]


def _write_atomic(path: Path, text: str) -> None:
    write_file_atomic(path, text.encode("utf-8"))
