"""Signal building blocks (pure, vectorised): speed profiles, vibration, thermal lag.

Vibration is acceleration in m/s² and is the sum of
- running-speed 1× and its harmonics (amplitude ∝ speed², as unbalance force is);
- the vane / blade / lobe pass tone (number of vanes × shaft rate);
- bearing impacts: each defect strike rings the structural resonance as a decaying
  sinusoid, so the defect shows as resonance bursts amplitude-modulated at the defect
  frequency (the reason envelope analysis finds it, and the reason kurtosis rises);
- broadband Gaussian noise.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]


@dataclass(frozen=True)
class SpeedProfile:
    """Speed ratio (actual / rated) as a piecewise-linear function of scenario time."""

    t_s: FloatArray
    ratio: FloatArray

    def at(self, t_s: FloatArray) -> FloatArray:
        return np.interp(t_s, self.t_s, self.ratio)

    def slope(self, t_s: FloatArray) -> FloatArray:
        """d(ratio)/dt in 1/s, the slope of the segment each time falls in."""
        dt = np.diff(self.t_s)
        seg = np.divide(np.diff(self.ratio), dt, out=np.zeros_like(dt), where=dt > 0)
        i = np.clip(np.searchsorted(self.t_s, t_s, side="right") - 1, 0, len(seg) - 1)
        return seg[i] if len(seg) else np.zeros_like(np.asarray(t_s, dtype=np.float64))


def speed_profile(
    initial: float, set_points: Sequence[tuple[float, float]], ramp_per_s: float, end_s: float
) -> SpeedProfile:
    """The drive's speed: it ramps at `ramp_per_s` toward the latest set-point.

    `set_points` are (time, ratio) in time order; the drive starts at `initial`.
    """
    pts_t = [0.0]
    pts_s = [initial]
    cur_t, cur_s, target = 0.0, initial, initial

    def add(t: float, s: float) -> None:
        if t > pts_t[-1]:
            pts_t.append(t)
            pts_s.append(s)
        else:
            pts_s[-1] = s

    for t_next, new_target in [*set_points, (end_s, None)]:
        t_next = max(t_next, cur_t)
        if cur_s != target:
            t_reach = cur_t + abs(target - cur_s) / ramp_per_s
            if t_reach <= t_next:
                cur_t, cur_s = t_reach, target
            else:
                cur_s += math.copysign(ramp_per_s * (t_next - cur_t), target - cur_s)
                cur_t = t_next
            add(cur_t, cur_s)
        if t_next > cur_t:
            cur_t = t_next
            add(cur_t, cur_s)
        if new_target is not None:
            target = new_target
    if pts_t[-1] < end_s:
        add(end_s, cur_s)
    return SpeedProfile(np.asarray(pts_t), np.asarray(pts_s))


def ramp(t_s: FloatArray, onset_s: float, ramp_s: float, end_s: float) -> FloatArray:
    """0 before onset, rising linearly to 1 over `ramp_s`, back to 0 from `end_s` on."""
    t = np.asarray(t_s, dtype=np.float64)
    if ramp_s > 0:
        r = np.clip((t - onset_s) / ramp_s, 0.0, 1.0)
    else:
        r = (t >= onset_s).astype(np.float64)
    return np.where(t < end_s, r, 0.0)


def hash_uniform(k: NDArray[np.int64], salt: int) -> FloatArray:
    """A stateless pseudo-random value in [0, 1) per integer k.

    Per-impact randomness must not depend on where chunk boundaries fall, so it is a
    function of the impact index rather than a draw from a stateful generator
    (splitmix64 finaliser).
    """
    with np.errstate(over="ignore"):
        x = (k.astype(np.uint64) + np.uint64(salt)) * np.uint64(0x9E3779B97F4A7C15)
        x ^= x >> np.uint64(30)
        x *= np.uint64(0xBF58476D1CE4E5B9)
        x ^= x >> np.uint64(27)
        x *= np.uint64(0x94D049BB133111EB)
        x ^= x >> np.uint64(31)
    return (x >> np.uint64(11)).astype(np.float64) / float(1 << 53)


def impact_train(
    defect_phase_cycles: FloatArray, defect_hz: FloatArray, resonance_hz: float,
    decay_s: float, salt: int,
) -> FloatArray:
    """Unit-amplitude resonance bursts, one per defect cycle.

    `defect_phase_cycles` is the running defect phase in cycles (one impact per whole
    cycle), `defect_hz` the instantaneous defect frequency. Each impact's size varies
    by ±30 % (how a rolling element meets a spall varies); the time since the last
    impact is the fractional cycle divided by the defect frequency.
    """
    k = np.floor(defect_phase_cycles)
    frac = defect_phase_cycles - k
    since = np.divide(frac, defect_hz, out=np.full_like(frac, 1e3), where=defect_hz > 1e-6)
    size = 0.7 + 0.6 * hash_uniform(k.astype(np.int64), salt)
    return size * np.exp(-since / decay_s) * np.sin(2 * np.pi * resonance_hz * since)


def thermal_lag(
    initial: float, equilibrium: FloatArray, dt_s: float, tau_s: float
) -> FloatArray:
    """First-order lag T' = (T_eq − T)/τ, sampled every `dt_s`, exact for a held T_eq.

    Returns the temperature at each sample; sample i has relaxed toward equilibrium[i]
    for one step from sample i−1 (sample 0 from `initial`).
    """
    a = math.exp(-dt_s / tau_s)
    out = np.empty_like(np.asarray(equilibrium, dtype=np.float64))
    t = initial
    for i, eq in enumerate(np.asarray(equilibrium, dtype=np.float64).tolist()):
        t = eq + (t - eq) * a
        out[i] = t
    return out
