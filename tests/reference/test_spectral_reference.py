"""Spectral features against published references: Parseval, scipy.signal.welch, textbook sines."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import welch

from agent.config.load import SpectrumConfig
from agent.core.spectral import band_mask, psd, spectral_features

FS = 2560.0
N = 12800  # 5 s at 2560 Hz: bins 0.2 Hz apart


def _sine(freq_hz: float, amp: float, n: int = N, fs: float = FS, phase: float = 0.3
          ) -> np.ndarray:
    return amp * np.sin(2 * np.pi * freq_hz * np.arange(n) / fs + phase)


def _features(x: np.ndarray, spec: SpectrumConfig, speed_hz: float = np.nan) -> dict[str, float]:
    (row,) = spectral_features([x], [FS], [spec], [speed_hz])
    return dict(zip(spec.feature_names(), row.tolist(), strict=True))


ALL_BANDS = ((0.0, 100.0), (100.0, 640.0), (640.0, 1280.0))


def test_band_energies_satisfy_parseval() -> None:
    """Bands covering 0..fs/2 sum to the windowed time-domain power, and for white noise
    to its variance (Parseval's theorem for the DFT: sum |x w|^2 = (1/N) sum |X|^2)."""
    rng = np.random.default_rng(3)
    x = rng.normal(0.2, 1.5, N)
    f = _features(x, SpectrumConfig(bands_hz=ALL_BANDS))
    total = sum(f[f"band_{int(lo)}_{int(hi)}_hz"] for lo, hi in ALL_BANDS)
    w = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(N) / N)
    d = x - x.mean()
    assert total == pytest.approx(np.sum((d * w) ** 2) / np.sum(w * w), rel=1e-10)
    # Windowed power estimates the variance; for 12800 Gaussian samples within a few %.
    assert total == pytest.approx(np.var(x), rel=0.05)


def test_band_energies_agree_with_scipy_welch() -> None:
    """One Hann segment, no overlap, constant detrend, density scaling: our PSD is
    scipy.signal.welch's, and each band's energy is its sum x df over the same bins."""
    rng = np.random.default_rng(4)
    x = _sine(120.0, 2.0) + _sine(900.0, 0.5) + rng.normal(0, 0.3, N)
    f_ref, p_ref = welch(x, FS, window="hann", nperseg=N, noverlap=0, detrend="constant",
                         scaling="density")
    freqs, p = psd(x[None, :], FS)
    np.testing.assert_allclose(freqs, f_ref)
    np.testing.assert_allclose(p[0], p_ref, rtol=1e-9, atol=1e-15)
    bands = ((10.0, 200.0), (200.0, 1000.0), (1000.0, 1280.0))
    f = _features(x, SpectrumConfig(bands_hz=bands))
    df = f_ref[1] - f_ref[0]
    for lo, hi in bands:
        ref = p_ref[band_mask(f_ref, lo, hi, FS / 2)].sum() * df
        assert f[f"band_{int(lo)}_{int(hi)}_hz"] == pytest.approx(ref, rel=1e-9)


@pytest.mark.parametrize(("freq", "amp"), [(100.0, 1.0), (49.6, 0.4), (297.0, 2.5),
                                           (850.0, 3.0)])
def test_pure_sine_dominant_frequency_and_amplitude(freq: float, amp: float) -> None:
    """An on-bin sine of peak amplitude A at f Hz: dominant_hz = f, dominant_amp = A
    (amplitude spectrum corrected for Hann's coherent gain 0.5, a textbook fact)."""
    f = _features(_sine(freq, amp), SpectrumConfig())
    assert f["dominant_hz"] == pytest.approx(freq, abs=1e-9)
    assert f["dominant_amp"] == pytest.approx(amp, rel=1e-6)


@pytest.mark.parametrize(("freq", "rms_m_s2"), [(100.0, 1.0), (50.0, 2.0), (400.0, 5.0),
                                                (20.0, 0.5)])
def test_velocity_rms_of_a_sine(freq: float, rms_m_s2: float) -> None:
    """Acceleration a (RMS) at f Hz integrates to velocity a / (2 pi f) (textbook: v = a/w).
    1 m/s^2 RMS at 100 Hz = 1.5915 mm/s RMS."""
    x = _sine(freq, rms_m_s2 * np.sqrt(2))
    f = _features(x, SpectrumConfig(velocity_rms=True))
    expected_mm_s = rms_m_s2 / (2 * np.pi * freq) * 1000
    assert f["velocity_rms_mm_s"] == pytest.approx(expected_mm_s, rel=1e-3)
    if freq == 100.0 and rms_m_s2 == 1.0:
        assert f["velocity_rms_mm_s"] == pytest.approx(1.5915, abs=1e-4)


def test_velocity_rms_ignores_lines_outside_10_hz_to_1_khz() -> None:
    """The ISO 10816-3 measurement band is 10 Hz - 1 kHz: a 5 Hz or 1.2 kHz line adds nothing."""
    inside = _sine(100.0, np.sqrt(2))
    outside = _sine(5.0, 3.0) + _sine(1200.0, 3.0)
    a = _features(inside, SpectrumConfig(velocity_rms=True))["velocity_rms_mm_s"]
    b = _features(inside + outside, SpectrumConfig(velocity_rms=True))["velocity_rms_mm_s"]
    assert b == pytest.approx(a, rel=2e-3)


def test_velocity_rms_from_g() -> None:
    """A channel in g is converted with standard gravity 9.80665 m/s^2 (CGPM 1901)."""
    x = _sine(100.0, np.sqrt(2) / 9.80665)
    f = _features(x, SpectrumConfig(velocity_rms=True, accel_to_m_s2=9.80665))
    assert f["velocity_rms_mm_s"] == pytest.approx(1.5915, abs=2e-4)


def test_one_and_two_times_running_speed() -> None:
    """Shaft at 2970 rpm = 49.5 Hz: 1x = 49.5 Hz, 2x = 99 Hz; on-bin amplitudes read back
    exactly (a 10 s window puts both on 0.1 Hz bins)."""
    n = 25600
    x = _sine(49.5, 0.4, n) + _sine(99.0, 0.14, n) + _sine(297.0, 0.6, n)
    (row,) = spectral_features([x], [FS], [SpectrumConfig(orders=(1.0, 2.0))], [2970 / 60])
    f = dict(zip(SpectrumConfig(orders=(1.0, 2.0)).feature_names(), row, strict=True))
    assert f["order_1x_amp"] == pytest.approx(0.4, rel=1e-6)
    assert f["order_2x_amp"] == pytest.approx(0.14, rel=1e-6)
    assert f["dominant_hz"] == pytest.approx(297.0)


def test_orders_are_zero_when_stopped() -> None:
    """A stopped machine (speed 0) has no running-speed lines."""
    f = _features(_sine(50.0, 1.0), SpectrumConfig(orders=(1.0,)), speed_hz=0.0)
    assert f["order_1x_amp"] == 0.0


def test_envelope_sees_impacts_that_rms_barely_does() -> None:
    """Resonance bursts at a defect rate raise the band-passed envelope's spread far more
    than the overall RMS (why envelope analysis finds bearing faults: textbook)."""
    rng = np.random.default_rng(5)
    t = np.arange(N) / FS
    base = _sine(49.5, 0.4) + _sine(297.0, 0.6) + rng.normal(0, 0.25, N)
    since = (t * 177.4) % 1 / 177.4  # 177.4 Hz impacts (BPFO of a 49.5 Hz shaft)
    bursts = 0.8 * np.exp(-since / 0.0015) * np.sin(2 * np.pi * 850 * since)
    spec = SpectrumConfig(envelope_hz=(600.0, 1100.0))
    e0 = _features(base, spec)["envelope_rms"]
    e1 = _features(base + bursts, spec)["envelope_rms"]
    rms0, rms1 = np.std(base), np.std(base + bursts)
    assert e1 / e0 - 1 > 5 * (rms1 / rms0 - 1)
