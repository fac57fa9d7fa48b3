"""Machine kinds of the invented plant: their sensors, geometry and process physics (pure).

Each kind is a frozen `MachineSpec` preset; a scenario may override a few of its
fields per asset (rated speed, number of vanes, bearing geometry). The process
functions map a speed ratio (actual / rated speed) to process readings:

- centrifugal pumps and blowers follow the affinity laws: flow ∝ N, head ∝ N²,
  shaft power ∝ N³ (any pump handbook);
- the screw compressor is a positive-displacement machine feeding a receiver held
  near its set pressure: flow ∝ N at roughly constant torque, so power ∝ N.
"""

from __future__ import annotations

import enum
import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]

# Gravity and water density for head -> pressure; 1 bar = 1e5 Pa.
_G_M_S2 = 9.81
_WATER_KG_M3 = 1000.0


class MachineKind(enum.StrEnum):
    PUMP = "pump"
    BLOWER = "blower"
    COMPRESSOR = "compressor"


class Decoder(enum.StrEnum):
    JSON = "json"
    JSON_BATCH = "json-batch"
    TEXT = "text"


@dataclass(frozen=True)
class ChannelSpec:
    """One sensor as published: decoder, sample rate, unit, and printing precision.

    `fault_scale` is the default size (in `unit`) of a drift or spike sensor fault.
    """

    name: str
    decoder: Decoder
    rate_hz: float
    unit: str
    decimals: int
    fault_scale: float


@dataclass(frozen=True)
class BearingGeometry:
    """Rolling-element bearing geometry: n elements of diameter d on pitch diameter D."""

    n_elements: int
    ball_diameter_in: float
    pitch_diameter_in: float
    contact_angle_deg: float = 0.0


@dataclass(frozen=True)
class DefectOrders:
    """Bearing defect frequencies as multiples of the shaft rate."""

    bpfo: float
    bpfi: float
    ftf: float
    bsf: float


def defect_orders(g: BearingGeometry) -> DefectOrders:
    """Textbook bearing defect frequencies (× shaft rate) for a stationary outer race.

    BPFO = (n/2)(1 − (d/D)cos φ), BPFI = (n/2)(1 + (d/D)cos φ),
    FTF = ½(1 − (d/D)cos φ), BSF = (D/2d)(1 − ((d/D)cos φ)²).
    """
    r = g.ball_diameter_in / g.pitch_diameter_in * math.cos(math.radians(g.contact_angle_deg))
    n = g.n_elements
    return DefectOrders(
        bpfo=n / 2 * (1 - r),
        bpfi=n / 2 * (1 + r),
        ftf=0.5 * (1 - r),
        bsf=g.pitch_diameter_in / (2 * g.ball_diameter_in) * (1 - r * r),
    )


@dataclass(frozen=True)
class MachineSpec:
    """Everything the physics needs about one machine kind (SI-ish units, named)."""

    kind: MachineKind
    rated_speed_rpm: float
    vanes: int  # impeller vanes / blower blades / male-rotor lobes: the pass frequency
    bearing: BearingGeometry
    ramp_pct_per_s: float  # drive acceleration / deceleration ramp
    # process at rated speed
    rated_flow: float  # m3/h (pump), Nm3/h (blower, compressor)
    rated_pressure: float  # pressure rise at rated speed, in the pressure channel's unit
    inlet_pressure: float  # pressure reading when stopped
    rated_power_kw: float
    # motor current: magnetising and torque-producing parts at rated load
    magnetising_a: float
    torque_a: float
    accel_torque_pu_s: float  # extra torque (pu of rated) per (pu speed / s) of acceleration
    # vibration, acceleration peak amplitudes in m/s2 at rated speed
    one_x_m_s2: float
    harmonics: tuple[float, ...]  # 2x, 3x, ... relative to 1x
    pass_m_s2: float  # vane / blade / lobe pass
    noise_m_s2: float  # broadband, standard deviation
    resonance_hz: float  # structural resonance excited by bearing impacts
    resonance_decay_s: float
    impact_m_s2: float  # bearing impact amplitude at full defect severity
    # bearing temperature
    temp_rise_c: float  # above ambient at rated load
    thermal_tau_s: float
    defect_heat_c: float  # extra equilibrium rise at full bearing-defect severity
    # scalar channel noise (standard deviations in each channel's unit)
    temp_noise_c: float
    current_noise_a: float
    pressure_noise: float
    flow_noise: float
    channels: tuple[ChannelSpec, ...]


def _vib() -> ChannelSpec:
    # 2560 Hz in 256-sample blocks: 0.1 s per message keeps a 2-core gateway comfortable.
    return ChannelSpec("vib", Decoder.JSON_BATCH, 2560.0, "m/s2", 4, 2.0)


def _temp() -> ChannelSpec:
    return ChannelSpec("bearing_temp", Decoder.JSON, 1.0, "degC", 2, 8.0)


def _current(scale: float) -> ChannelSpec:
    return ChannelSpec("current", Decoder.JSON, 10.0, "A", 2, scale)


def speed_channel() -> ChannelSpec:
    """The drive's speed reading in rpm, 1 Hz: published only by assets whose scenario
    entry sets `speed_sensor: true` (so plants without one publish what they always did)."""
    return ChannelSpec("speed", Decoder.JSON, 1.0, "rpm", 1, 100.0)


# Standard deviation of the drive's speed reading, rpm (an invented figure, no source).
SPEED_NOISE_RPM = 1.5

VIB_BLOCK_SAMPLES = 256

# The reference geometry used in the reference tests: n=9, d=0.3126 in, D=1.537 in, φ=0.
PUMP_BEARING = BearingGeometry(9, 0.3126, 1.537, 0.0)

PRESETS: dict[MachineKind, MachineSpec] = {
    MachineKind.PUMP: MachineSpec(
        kind=MachineKind.PUMP,
        rated_speed_rpm=2970.0,
        vanes=6,
        bearing=PUMP_BEARING,
        ramp_pct_per_s=10.0,
        rated_flow=400.0,
        rated_pressure=45.0 * _WATER_KG_M3 * _G_M_S2 / 1e5,  # 45 m head in bar
        inlet_pressure=0.3,
        rated_power_kw=55.0,
        magnetising_a=35.0,
        torque_a=93.7,
        accel_torque_pu_s=3.0,
        one_x_m_s2=0.4,
        harmonics=(0.35, 0.12),
        pass_m_s2=0.6,
        noise_m_s2=0.25,
        resonance_hz=850.0,
        resonance_decay_s=0.0015,
        impact_m_s2=9.0,
        temp_rise_c=30.0,
        thermal_tau_s=900.0,
        defect_heat_c=20.0,
        temp_noise_c=0.05,
        current_noise_a=0.4,
        pressure_noise=0.01,
        flow_noise=2.0,
        channels=(
            _vib(),
            _temp(),
            _current(15.0),
            ChannelSpec("pressure", Decoder.TEXT, 10.0, "bar", 3, 1.0),
            ChannelSpec("flow", Decoder.JSON, 1.0, "m3/h", 1, 40.0),
        ),
    ),
    MachineKind.BLOWER: MachineSpec(
        kind=MachineKind.BLOWER,
        rated_speed_rpm=2980.0,
        vanes=12,
        bearing=BearingGeometry(8, 0.969, 4.035, 0.0),
        ramp_pct_per_s=5.0,
        rated_flow=5200.0,
        rated_pressure=600.0,  # mbar
        inlet_pressure=0.0,
        rated_power_kw=90.0,
        magnetising_a=50.0,
        torque_a=152.0,
        accel_torque_pu_s=4.0,
        one_x_m_s2=0.5,
        harmonics=(0.3, 0.1),
        pass_m_s2=0.4,
        noise_m_s2=0.3,
        resonance_hz=1020.0,
        resonance_decay_s=0.0012,
        impact_m_s2=8.0,
        temp_rise_c=35.0,
        thermal_tau_s=1200.0,
        defect_heat_c=18.0,
        temp_noise_c=0.05,
        current_noise_a=0.6,
        pressure_noise=1.5,
        flow_noise=0.0,
        channels=(
            _vib(),
            _temp(),
            _current(20.0),
            ChannelSpec("pressure", Decoder.TEXT, 10.0, "mbar", 1, 80.0),
        ),
    ),
    MachineKind.COMPRESSOR: MachineSpec(
        kind=MachineKind.COMPRESSOR,
        rated_speed_rpm=2970.0,
        vanes=4,
        bearing=BearingGeometry(12, 0.5, 2.2, 0.0),
        ramp_pct_per_s=10.0,
        rated_flow=360.0,
        rated_pressure=0.5,  # receiver rises ~0.5 bar above its floor at full flow
        inlet_pressure=6.5,  # receiver pressure with the compressor idle (other sources)
        rated_power_kw=37.0,
        magnetising_a=24.0,
        torque_a=63.6,
        accel_torque_pu_s=2.5,
        one_x_m_s2=0.35,
        harmonics=(0.4, 0.15),
        pass_m_s2=0.9,
        noise_m_s2=0.35,
        resonance_hz=780.0,
        resonance_decay_s=0.0018,
        impact_m_s2=8.0,
        temp_rise_c=40.0,
        thermal_tau_s=800.0,
        defect_heat_c=20.0,
        temp_noise_c=0.05,
        current_noise_a=0.3,
        pressure_noise=0.01,
        flow_noise=0.0,
        channels=(
            _vib(),
            _temp(),
            _current(12.0),
            ChannelSpec("pressure", Decoder.JSON, 10.0, "bar", 3, 1.0),
        ),
    ),
}


@dataclass(frozen=True)
class ProcessPoint:
    """Process readings at a speed ratio (arrays of the same shape as the speed)."""

    flow: FloatArray
    pressure: FloatArray  # absolute reading in the pressure channel's unit
    torque_pu: FloatArray  # load torque, per unit of rated torque
    power_pu: FloatArray  # shaft power, per unit of rated power


def affinity(speed_ratio: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Affinity laws for a centrifugal machine: (flow, head, power) ratios = (s, s², s³)."""
    s = np.asarray(speed_ratio, dtype=np.float64)
    return s, s * s, s * s * s


def process_point(
    spec: MachineSpec,
    speed_ratio: FloatArray,
    *,
    restriction: FloatArray | float = 0.0,
) -> ProcessPoint:
    """Steady process readings at `speed_ratio`.

    `restriction` in [0, 1] is a suction-side restriction (a clogging strainer): it
    cuts flow and the pressure rise, and with them the shaft power, by up to 30 %, 45 %
    and 40 % (an invented but monotone model: common practice, no source).
    """
    s = np.clip(np.asarray(speed_ratio, dtype=np.float64), 0.0, None)
    r = np.asarray(restriction, dtype=np.float64)
    if spec.kind is MachineKind.COMPRESSOR:
        flow = spec.rated_flow * s
        pressure = spec.inlet_pressure + spec.rated_pressure * s
        torque = np.where(s > 0.02, 1.0, s / 0.02)
        power = torque * s
        return ProcessPoint(flow, pressure, torque, power)
    q, h, p = affinity(s)
    flow = spec.rated_flow * q * (1.0 - 0.30 * r)
    pressure = spec.inlet_pressure + spec.rated_pressure * h * (1.0 - 0.45 * r)
    power = p * (1.0 - 0.40 * r)
    # torque = power / speed; 0/0 at standstill is 0.
    torque = np.divide(power, s, out=np.zeros_like(power), where=s > 1e-9)
    return ProcessPoint(flow, pressure, torque, power)


def motor_current(
    spec: MachineSpec, speed_ratio: FloatArray, torque_pu: FloatArray
) -> FloatArray:
    """Motor current: magnetising and torque parts add in quadrature; zero at standstill.

    On a variable-speed drive the magnetising current is roughly constant while the
    drive runs, and the torque-producing current is proportional to torque.
    """
    s = np.asarray(speed_ratio, dtype=np.float64)
    on = np.clip(s / 0.02, 0.0, 1.0)
    it = spec.torque_a * np.asarray(torque_pu, dtype=np.float64)
    return on * np.sqrt(spec.magnetising_a**2 + it * it)


def bearing_equilibrium_c(
    spec: MachineSpec, ambient_c: FloatArray | float, speed_ratio: FloatArray,
    power_pu: FloatArray, defect_severity: FloatArray | float = 0.0,
) -> FloatArray:
    """Equilibrium bearing temperature: ambient + friction (∝ speed) + load heat + defect.

    Defect heat grows with the square of severity so it shows late in the fault's life.
    """
    s = np.asarray(speed_ratio, dtype=np.float64)
    sev = np.asarray(defect_severity, dtype=np.float64)
    rise = spec.temp_rise_c * (0.4 * s + 0.6 * np.asarray(power_pu, dtype=np.float64))
    return np.asarray(ambient_c, dtype=np.float64) + rise + spec.defect_heat_c * sev * sev * s
