"""The plant: turns a scenario into the time-ordered messages its sensors publish (pure).

`simulate(scenario)` generates one second of every asset at a time (vectorised numpy)
and yields ``(t, topic, payload)`` in simulated-time order, where `t` is the
simulated publish time in unix seconds. A vibration block is published when its
last sample is taken (``t = ts + 256 / rate``); a scalar when it is sampled.

Randomness: one `numpy.random.Generator` per asset and channel, seeded from the
scenario seed and the names (not Python's salted `hash`), and each draws the same
amount every second whatever the faults, so a fault changes only what it touches.
"""

from __future__ import annotations

import math
import zlib
from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from simulator.faults import (
    FaultLevels,
    SensorFaultState,
    apply_sensor_faults,
    dropout_mask,
    fault_levels,
)
from simulator.machines import (
    SPEED_NOISE_RPM,
    VIB_BLOCK_SAMPLES,
    ChannelSpec,
    Decoder,
    MachineKind,
    bearing_equilibrium_c,
    defect_orders,
    motor_current,
    process_point,
)
from simulator.scenario import (
    Action,
    AssetSpec,
    MachineFault,
    Scenario,
    SensorFault,
    resolve_start,
)
from simulator.signals import SpeedProfile, impact_train, speed_profile, thermal_lag

FloatArray = NDArray[np.float64]
Message = tuple[float, str, bytes]

CHUNK_S = 1.0
# Water-hammer-like pressure swing when a machine comes up to speed: damped 0.4 Hz,
# 3 s decay, 8 % of the rated pressure rise (an invented transient; no source).
_SURGE_HZ, _SURGE_DECAY_S, _SURGE_PU = 0.4, 3.0, 0.08


def _stream_seed(seed: int, *names: str) -> np.random.SeedSequence:
    return np.random.SeedSequence([seed, *(zlib.crc32(n.encode()) for n in names)])


@dataclass
class _Channel:
    spec: ChannelSpec
    topic: str
    order: int
    rng: np.random.Generator
    fault_rng: np.random.Generator
    faults: tuple[SensorFault, ...]
    fault_state: SensorFaultState = field(default_factory=SensorFaultState)


@dataclass
class _Asset:
    spec: AssetSpec
    profile: SpeedProfile
    faults: tuple[MachineFault, ...]
    surges: tuple[float, ...]  # scenario times at which a start reaches speed
    channels: dict[str, _Channel]
    phases: FloatArray  # random phases of 1x, harmonics and the pass tone
    salt: int
    shaft_cycles: float = 0.0
    temp_c: float = math.nan


def _build_asset(scenario: Scenario, index: int, a: AssetSpec) -> _Asset:
    m = a.machine
    changes = [c for c in scenario.mode_changes if c.asset == a.name]
    profile = speed_profile(
        a.initial_speed_pct / 100.0,
        [(c.at_s, c.speed_pct / 100.0) for c in changes],
        m.ramp_pct_per_s / 100.0,
        scenario.duration_s,
    )
    surges = tuple(
        c.at_s + (c.speed_pct / 100.0) / (m.ramp_pct_per_s / 100.0)
        for c in changes
        if c.action is Action.START
    )
    channels = {}
    for j, ch in enumerate(m.channels):
        channels[ch.name] = _Channel(
            spec=ch,
            topic=scenario.topic(a, ch.name),
            order=index * 16 + j,
            rng=np.random.default_rng(_stream_seed(scenario.seed, a.name, ch.name)),
            fault_rng=np.random.default_rng(
                _stream_seed(scenario.seed, a.name, ch.name, "sensor-fault")
            ),
            faults=tuple(
                f for f in scenario.sensor_faults if f.asset == a.name and f.channel == ch.name
            ),
        )
    # The harmonic phases belong to the machine, not to the run: the same pump keeps its
    # waveform shape (and so its crest factor and kurtosis) whatever the scenario seed,
    # so a model trained on one recording of a machine fits another recording of it.
    rng = np.random.default_rng(_stream_seed(0, scenario.plant, a.name, "phases"))
    return _Asset(
        spec=a,
        profile=profile,
        faults=tuple(f for f in scenario.machine_faults if f.asset == a.name),
        surges=surges,
        channels=channels,
        phases=rng.uniform(0, 2 * np.pi, size=2 + len(m.harmonics)),
        salt=int(rng.integers(0, 2**31)),
    )


def _sample_times(rate_hz: float, t0: float, t1: float) -> FloatArray:
    """Scenario times of the samples k / rate that fall in [t0, t1)."""
    k0, k1 = math.ceil(t0 * rate_hz - 1e-9), math.ceil(t1 * rate_hz - 1e-9)
    return np.arange(k0, k1, dtype=np.float64) / rate_hz


def _ambient(scenario: Scenario, start: float, t: FloatArray) -> FloatArray:
    if scenario.ambient_swing_c == 0.0:
        return np.full_like(t, scenario.ambient_c)
    # Daily swing peaking at 15:00 UTC.
    tod = (start + t) % 86400.0
    return scenario.ambient_c + scenario.ambient_swing_c * np.sin(
        2 * np.pi * (tod - 9 * 3600.0) / 86400.0
    )


def _vibration(a: _Asset, ch: _Channel, t: FloatArray, lev: FaultLevels) -> FloatArray:
    m = a.spec.machine
    fs = ch.spec.rate_hz
    s = a.profile.at(t)
    fr = s * m.rated_speed_rpm / 60.0
    cycles = a.shaft_cycles + (np.cumsum(fr) - fr) / fs
    a.shaft_cycles += float(fr.sum()) / fs
    ang = 2 * np.pi * cycles
    s2 = s * s
    mis = lev.misalignment
    one_x = m.one_x_m_s2 * s2
    vib = one_x * (1 + 4.0 * lev.imbalance + 0.5 * mis) * np.sin(ang + a.phases[0])
    for h, rel in enumerate(m.harmonics, start=2):
        grow = 1 + (6.0 if h == 2 else 2.0) * mis
        vib += one_x * rel * grow * np.sin(h * ang + a.phases[h - 1])
    vib += m.pass_m_s2 * s2 * (1 + 0.5 * lev.cavitation) * np.sin(
        m.vanes * ang + a.phases[-1]
    )
    if lev.bearing.any():
        bpfo = defect_orders(m.bearing).bpfo
        vib += m.impact_m_s2 * lev.bearing * s * impact_train(
            bpfo * cycles, bpfo * fr, m.resonance_hz, m.resonance_decay_s, a.salt
        )
    noise = ch.rng.standard_normal(t.shape)
    # Cavitation: bubble collapse is broadband and bursty; the burst envelope is drawn
    # per 0.1 s block so its randomness costs the same every second.
    bursts = np.repeat(
        np.abs(ch.rng.standard_normal(math.ceil(len(t) / VIB_BLOCK_SAMPLES))),
        VIB_BLOCK_SAMPLES,
    )[: len(t)]
    level = m.noise_m_s2 * (
        0.15 + 0.85 * s2 + 0.3 * lev.bearing * s + 5.0 * lev.cavitation * s2 * (0.5 + bursts)
    )
    return vib + level * noise


def _fast_channels(
    a: _Asset, t: FloatArray, lev: FaultLevels
) -> dict[str, FloatArray]:
    """Current and pressure at their (equal) sample times."""
    m = a.spec.machine
    s = a.profile.at(t)
    pp = process_point(m, s, restriction=lev.strainer)
    torque = pp.torque_pu * (1 - 0.05 * lev.cavitation) * (1 + 0.02 * lev.misalignment)
    torque = torque + m.accel_torque_pu_s * a.profile.slope(t) * (s > 0.0)
    cur_ch = a.channels["current"]
    current = motor_current(m, s, torque)
    current += cur_ch.rng.standard_normal(t.shape) * m.current_noise_a * (
        1 + 3.0 * lev.cavitation
    ) * (s > 0.0)
    pr_ch = a.channels["pressure"]
    pressure = m.inlet_pressure + (pp.pressure - m.inlet_pressure) * (1 - 0.08 * lev.cavitation)
    for ts in a.surges:
        dt = t - ts
        pressure += np.where(
            dt > 0,
            _SURGE_PU * m.rated_pressure * np.exp(-np.maximum(dt, 0) / _SURGE_DECAY_S)
            * np.sin(2 * np.pi * _SURGE_HZ * dt),
            0.0,
        )
    z = pr_ch.rng.standard_normal((2, len(t)))
    pressure += z[0] * m.pressure_noise
    pressure += z[1] * 0.06 * m.rated_pressure * lev.cavitation * s * s
    return {"current": current, "pressure": pressure}


def _flow(a: _Asset, t: FloatArray, lev: FaultLevels) -> FloatArray:
    m = a.spec.machine
    s = a.profile.at(t)
    flow = process_point(m, s, restriction=lev.strainer).flow * (1 - 0.10 * lev.cavitation)
    return flow + a.channels["flow"].rng.standard_normal(t.shape) * m.flow_noise * (s > 0.0)


def _temperature(
    a: _Asset, scenario: Scenario, start: float, t: FloatArray, lev: FaultLevels
) -> FloatArray:
    m = a.spec.machine
    s = a.profile.at(t)
    power = process_point(m, s, restriction=lev.strainer).power_pu
    eq = bearing_equilibrium_c(m, _ambient(scenario, start, t), s, power, lev.bearing)
    eq = eq + 5.0 * lev.misalignment * s
    if math.isnan(a.temp_c):
        a.temp_c = float(eq[0]) if len(eq) else scenario.ambient_c
    ch = a.channels["bearing_temp"]
    temp = thermal_lag(a.temp_c, eq, 1.0 / ch.spec.rate_hz, m.thermal_tau_s)
    if len(temp):
        a.temp_c = float(temp[-1])
    return temp + ch.rng.standard_normal(t.shape) * m.temp_noise_c


def _num(x: float) -> str:
    return str(int(x)) if float(x).is_integer() else repr(float(x))


def _encode(
    ch: _Channel, start: float, t: FloatArray, values: FloatArray, scenario_end: float
) -> list[tuple[float, int, str, bytes]]:
    spec = ch.spec
    d = spec.decimals
    keep = dropout_mask(ch.faults, t, scenario_end)
    out: list[tuple[float, int, str, bytes]] = []
    if spec.decoder is Decoder.JSON_BATCH:
        n = VIB_BLOCK_SAMPLES
        body = ",".join([f"%.{d}f"] * n)
        head = '{"ts":%.6f,"rate_hz":' + _num(spec.rate_hz) + ',"values":['
        vals = values.tolist()
        for b in range(len(t) // n):
            if not keep[b * n]:
                continue
            ts = start + float(t[b * n])
            payload = (head % ts) + (body % tuple(vals[b * n : (b + 1) * n])) + "]}"
            out.append((ts + n / spec.rate_hz, ch.order, ch.topic, payload.encode()))
        return out
    fmt = '{"ts":%.6f,"value":%.' + str(d) + "f}" if spec.decoder is Decoder.JSON else (
        "%." + str(d) + "f"
    )
    for ti, v, k in zip(t.tolist(), values.tolist(), keep.tolist(), strict=True):
        if not k:
            continue
        ts = start + ti
        text = fmt % (ts, v) if spec.decoder is Decoder.JSON else fmt % v
        out.append((ts, ch.order, ch.topic, text.encode()))
    return out


def simulate(scenario: Scenario, start_unix: float | None = None) -> Iterator[Message]:
    """Every message the scenario's sensors publish, in simulated publish-time order.

    `start_unix` (else the scenario's `start`) is the simulated time of scenario time 0;
    a `ScenarioError` is raised if neither is set. Output is a pure function of the
    scenario, the seed and the start: the same inputs give byte-identical messages.
    Vibration covers whole 256-sample blocks only, so a duration that is not a
    multiple of 0.1 s drops the final partial block.
    """
    start = resolve_start(scenario, start_unix)
    return _generate(scenario, start)


def _generate(scenario: Scenario, start: float) -> Iterator[Message]:
    assets = [_build_asset(scenario, i, a) for i, a in enumerate(scenario.assets)]
    end = scenario.duration_s
    n_chunks = math.ceil(end / CHUNK_S - 1e-9)
    for c in range(n_chunks):
        t0, t1 = c * CHUNK_S, min((c + 1) * CHUNK_S, end)
        batch: list[tuple[float, int, str, bytes]] = []
        for a in assets:
            for name, values_t in _chunk(a, scenario, start, t0, t1).items():
                ch = a.channels[name]
                t, values = values_t
                values = apply_sensor_faults(
                    values, t, ch.faults, end, ch.fault_state, ch.fault_rng, ch.spec.rate_hz
                )
                batch.extend(_encode(ch, start, t, values, end))
        batch.sort(key=lambda m: (m[0], m[1]))
        for t_pub, _order, topic, payload in batch:
            yield t_pub, topic, payload


def _chunk(
    a: _Asset, scenario: Scenario, start: float, t0: float, t1: float
) -> dict[str, tuple[FloatArray, FloatArray]]:
    out: dict[str, tuple[FloatArray, FloatArray]] = {}
    end = scenario.duration_s
    vib = a.channels["vib"]
    # Whole blocks only: the last block must end by the scenario's end.
    n_blocks_total = math.floor(end * vib.spec.rate_hz / VIB_BLOCK_SAMPLES + 1e-9)
    tv = _sample_times(vib.spec.rate_hz, t0, t1)
    tv = tv[: max(0, n_blocks_total * VIB_BLOCK_SAMPLES - round(t0 * vib.spec.rate_hz))]
    out["vib"] = (tv, _vibration(a, vib, tv, fault_levels(a.faults, tv, end)))
    tf = _sample_times(a.channels["current"].spec.rate_hz, t0, t1)
    fast = _fast_channels(a, tf, fault_levels(a.faults, tf, end))
    out["current"] = (tf, fast["current"])
    out["pressure"] = (tf, fast["pressure"])
    tt = _sample_times(a.channels["bearing_temp"].spec.rate_hz, t0, t1)
    out["bearing_temp"] = (tt, _temperature(a, scenario, start, tt, fault_levels(a.faults, tt,
                                                                                  end)))
    if a.spec.machine.kind is MachineKind.PUMP:
        tq = _sample_times(a.channels["flow"].spec.rate_hz, t0, t1)
        out["flow"] = (tq, _flow(a, tq, fault_levels(a.faults, tq, end)))
    if "speed" in a.channels:
        sp = a.channels["speed"]
        ts_ = _sample_times(sp.spec.rate_hz, t0, t1)
        rpm = a.profile.at(ts_) * a.spec.machine.rated_speed_rpm
        noise = sp.rng.standard_normal(ts_.shape) * SPEED_NOISE_RPM
        out["speed"] = (ts_, np.maximum(rpm + noise * (rpm > 0), 0.0))
    return out
