"""Reference checks of the simulator's physics, each naming its source."""

from __future__ import annotations

import json
import math
from functools import cache

import numpy as np
import pytest
from scipy import signal, stats

from simulator.machines import (
    PRESETS,
    BearingGeometry,
    MachineKind,
    affinity,
    defect_orders,
    process_point,
)
from simulator.plant import simulate
from simulator.scenario import Scenario, parse_scenario
from simulator.signals import thermal_lag

START = 1_772_438_400.0  # 2026-03-02T08:00:00Z
FS = 2560.0
PUMP = PRESETS[MachineKind.PUMP]
SHAFT_HZ = PUMP.rated_speed_rpm / 60.0


def _scenario(timeline: list[dict[str, object]], duration_s: float = 20.0) -> Scenario:
    return parse_scenario({
        "seed": 11, "start": START, "duration_s": duration_s,
        "assets": [
            {"name": "P-101", "kind": "pump", "area": "raw-water"},
            {"name": "P-102", "kind": "pump", "area": "raw-water", "initial_speed_pct": 80},
        ],
        "timeline": timeline,
    })


@cache
def _messages(fault: str | None) -> tuple[tuple[float, str, bytes], ...]:
    timeline = [] if fault is None else [{"at_s": 0, "asset": "P-101", "fault": fault}]
    return tuple(simulate(_scenario(timeline)))


def _waveform(fault: str | None, asset: str = "P-101") -> np.ndarray:
    values: list[float] = []
    for _t, topic, payload in _messages(fault):
        if topic == f"fernbrook/raw-water/{asset}/vib":
            values.extend(json.loads(payload)["values"])
    return np.asarray(values)


def _scalars(asset: str, channel: str) -> np.ndarray:
    out = []
    for _t, topic, payload in _messages(None):
        if topic == f"fernbrook/raw-water/{asset}/{channel}":
            text = payload.decode()
            out.append(float(text) if channel == "pressure" else json.loads(text)["value"])
    return np.asarray(out)


# Source: textbook bearing defect formulas, BPFO = (n/2)(1 − (d/D)cos φ),
# BPFI = (n/2)(1 + (d/D)cos φ), FTF = ½(1 − (d/D)cos φ), BSF = (D/2d)(1 − ((d/D)cos φ)²);
# the values below for n=9, d=0.3126 in, D=1.537 in, φ=0 were computed from them.
@pytest.mark.parametrize(
    ("name", "expected"),
    [("bpfo", 3.5848), ("bpfi", 5.4152), ("ftf", 0.3983), ("two_bsf", 4.7134)],
)
def test_bearing_defect_orders_match_textbook_formulas(name: str, expected: float) -> None:
    """Defect frequencies (× shaft rate) for the stated deep-groove geometry."""
    o = defect_orders(BearingGeometry(9, 0.3126, 1.537, 0.0))
    got = 2 * o.bsf if name == "two_bsf" else getattr(o, name)
    assert got == pytest.approx(expected, abs=1e-4)


def test_contact_angle_moves_defect_orders_toward_n_over_2() -> None:
    """cos φ shrinks the d/D term: at 90° BPFO = BPFI = n/2 (textbook formulas)."""
    o = defect_orders(BearingGeometry(9, 0.3126, 1.537, 90.0))
    assert o.bpfo == pytest.approx(4.5) and o.bpfi == pytest.approx(4.5)


# Source: pump affinity laws, flow ∝ N, head ∝ N², shaft power ∝ N³ (any pump handbook).
@pytest.mark.parametrize("ratio", [0.5, 0.8, 1.1])
def test_affinity_laws(ratio: float) -> None:
    """Flow, head and power ratios are N, N², N³ of the speed ratio."""
    q, h, p = affinity(np.array([ratio]))
    assert (q[0], h[0], p[0]) == pytest.approx((ratio, ratio**2, ratio**3))
    pt, rated = process_point(PUMP, np.array([ratio])), process_point(PUMP, np.array([1.0]))
    assert pt.flow[0] / rated.flow[0] == pytest.approx(ratio)
    rise = (pt.pressure[0] - PUMP.inlet_pressure) / (rated.pressure[0] - PUMP.inlet_pressure)
    assert rise == pytest.approx(ratio**2)
    assert pt.power_pu[0] / rated.power_pu[0] == pytest.approx(ratio**3)


def test_simulated_pumps_follow_affinity_laws() -> None:
    """Published flow and pressure rise of a pump at 80 % vs 100 % give 0.8 and 0.64.

    Source: pump affinity laws (any pump handbook); tolerance covers the sensor noise.
    """
    flow = _scalars("P-102", "flow").mean() / _scalars("P-101", "flow").mean()
    rise = (_scalars("P-102", "pressure").mean() - PUMP.inlet_pressure) / (
        _scalars("P-101", "pressure").mean() - PUMP.inlet_pressure
    )
    assert flow == pytest.approx(0.8, rel=0.01)
    assert rise == pytest.approx(0.64, rel=0.01)
    assert _scalars("P-102", "current").mean() < _scalars("P-101", "current").mean()


def test_velocity_spectrum_peaks_at_running_speed() -> None:
    """The velocity spectrum (scipy.signal.welch of acceleration / 2πf) peaks at 1×."""
    for asset, ratio in (("P-101", 1.0), ("P-102", 0.8)):
        f, psd = signal.welch(_waveform(None, asset), fs=FS, nperseg=5120)
        vel = np.where(f > 5, psd / (2 * np.pi * np.maximum(f, 1)) ** 2, 0)
        assert f[np.argmax(vel)] == pytest.approx(SHAFT_HZ * ratio, abs=f[1])


def test_acceleration_spectrum_shows_blade_pass() -> None:
    """A six-vane impeller puts a tone at 6× running speed (vane-pass = vanes × speed)."""
    f, psd = signal.welch(_waveform(None), fs=FS, nperseg=5120)
    band = (f > 150) & (f < 600)
    assert f[band][np.argmax(psd[band])] == pytest.approx(PUMP.vanes * SHAFT_HZ, abs=f[1])


def _envelope_spectrum(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    # Envelope analysis: band-pass around the structural resonance, Hilbert envelope,
    # spectrum of the envelope (scipy.signal butter / filtfilt / hilbert / welch).
    b, a = signal.butter(4, [600, 1200], btype="band", fs=FS)
    env = np.abs(signal.hilbert(signal.filtfilt(b, a, x)))
    return signal.welch(env - env.mean(), fs=FS, nperseg=10240)


def test_envelope_spectrum_peaks_at_bpfo_under_outer_race_defect() -> None:
    """Outer-race impacts give the envelope spectrum its peak at BPFO; healthy has none."""
    bpfo_hz = 3.5848 * SHAFT_HZ  # textbook BPFO order for the pump's bearing (see above)
    f, faulty = _envelope_spectrum(_waveform("bearing_outer_race"))
    _, healthy = _envelope_spectrum(_waveform(None))
    band = (f > 20) & (f < 400)
    assert f[band][np.argmax(faulty[band])] == pytest.approx(bpfo_hz, abs=2 * f[1])
    at = np.argmin(np.abs(f - bpfo_hz))
    assert faulty[at] > 100 * np.median(faulty[band])
    assert faulty[at] > 100 * healthy[at]


def test_kurtosis_rises_under_outer_race_defect() -> None:
    """Impacts make the waveform heavy-tailed (scipy.stats.kurtosis, Fisher: Gaussian 0)."""
    healthy = stats.kurtosis(_waveform(None))
    faulty = stats.kurtosis(_waveform("bearing_outer_race"))
    assert healthy < 0.5  # sines plus Gaussian noise: at most Gaussian-tailed
    assert faulty > healthy + 1.5


def test_thermal_lag_step_response_reaches_63_percent_at_tau() -> None:
    """A first-order lag covers 1 − 1/e of a step in one time constant (textbook)."""
    tau_s = 100.0
    temp = thermal_lag(20.0, np.full(400, 30.0), dt_s=1.0, tau_s=tau_s)
    assert temp[99] == pytest.approx(20.0 + 10.0 * (1 - math.exp(-1)), abs=1e-9)
    assert temp[-1] == pytest.approx(30.0, abs=0.2)
