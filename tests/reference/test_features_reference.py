"""Features against published references: scipy.stats, numpy, and textbook signal facts."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from agent.core.features import FEATURE_INDEX, block_features, segment_features


def col(rows: np.ndarray, name: str) -> np.ndarray:
    return rows[:, FEATURE_INDEX[name]]


def one(x: np.ndarray, name: str) -> float:
    return float(segment_features([x])[0, FEATURE_INDEX[name]])


def random_segments(seed: int) -> list[np.ndarray]:
    """Segments of different lengths, levels and shapes, as one tick might close."""
    rng = np.random.default_rng(seed)
    segs = []
    for n in (2, 3, 7, 50, 100, 333, 1000, 4096):
        segs += [rng.normal(40.0, 0.3, n), rng.uniform(-1, 1, n) * 9.8,
                 rng.exponential(2.0, n), rng.standard_t(3, n) + 5.0,
                 rng.lognormal(0.0, 1.0, n) - 1.0]
    return segs


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_moments_match_scipy_stats_and_numpy(seed: int) -> None:
    """Source: scipy.stats.skew(bias=True) and scipy.stats.kurtosis(fisher=False, bias=True)
    (Pearson, population moments); numpy mean, std(ddof=0), min, max, ptp,
    sqrt(mean(x**2)) for RMS and max|x| / RMS for the crest factor."""
    segs = random_segments(seed)
    rows = segment_features(segs)
    ref = {
        "mean": [np.mean(s) for s in segs],
        "std": [np.std(s, ddof=0) for s in segs],
        "min": [np.min(s) for s in segs],
        "max": [np.max(s) for s in segs],
        "rms": [np.sqrt(np.mean(s ** 2)) for s in segs],
        "peak_to_peak": [np.ptp(s) for s in segs],
        "crest_factor": [np.max(np.abs(s)) / np.sqrt(np.mean(s ** 2)) for s in segs],
        "skewness": [stats.skew(s, bias=True) for s in segs],
        "kurtosis": [stats.kurtosis(s, fisher=False, bias=True) for s in segs],
    }
    for name, want in ref.items():
        np.testing.assert_allclose(col(rows, name), want, rtol=1e-9, atol=1e-12,
                                   err_msg=name)
    # The row-wise pass the daemon takes for full-length blocks, against the same
    # references (segments of one length stacked as a matrix).
    for n in (7, 100, 4096):
        block = np.vstack([s for s in segs if s.size == n])
        rows_b = block_features(block)
        for name, fn in (("mean", np.mean), ("std", np.std), ("min", np.min),
                         ("max", np.max), ("peak_to_peak", np.ptp)):
            np.testing.assert_allclose(col(rows_b, name), [fn(s) for s in block],
                                       rtol=1e-9, atol=1e-12, err_msg=name)
        np.testing.assert_allclose(col(rows_b, "rms"), [np.sqrt(np.mean(s ** 2)) for s in block],
                                   rtol=1e-9)
        np.testing.assert_allclose(col(rows_b, "skewness"),
                                   [stats.skew(s, bias=True) for s in block],
                                   rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(col(rows_b, "kurtosis"),
                                   [stats.kurtosis(s, fisher=False, bias=True) for s in block],
                                   rtol=1e-9, atol=1e-12)


def test_large_offset_is_numerically_stable() -> None:
    """A temperature of 60 +- 0.01 (and a level of 1e5 +- 0.01): spread and shape
    features still match scipy.stats / numpy, which use deviations from the mean.
    Summing raw powers instead would lose the spread to cancellation."""
    rng = np.random.default_rng(7)
    for level in (60.0, 1e5):
        x = level + rng.normal(0.0, 0.01, 2000)
        assert one(x, "std") == pytest.approx(np.std(x), rel=1e-7)
        assert one(x, "skewness") == pytest.approx(stats.skew(x, bias=True), rel=1e-5,
                                                   abs=1e-6)
        assert one(x, "kurtosis") == pytest.approx(
            stats.kurtosis(x, fisher=False, bias=True), rel=1e-6)
        assert one(x, "peak_to_peak") == pytest.approx(np.ptp(x), rel=1e-9)
        assert one(x, "mean") == pytest.approx(np.mean(x), rel=1e-14)


def _sine(amplitude: float, periods: int = 10, per_period: int = 200) -> np.ndarray:
    i = np.arange(periods * per_period)
    return amplitude * np.sin(2 * np.pi * i / per_period)  # samples land on the peaks


@pytest.mark.parametrize("amplitude", [1.0, 3.5, 250.0])
def test_sine_rms_crest_skewness_kurtosis(amplitude: float) -> None:
    """Textbook: a sine of amplitude A has RMS A/sqrt(2), crest factor sqrt(2), skewness 0
    and (Pearson) kurtosis 1.5; over whole periods sampled on the peaks, exactly."""
    x = _sine(amplitude)
    assert one(x, "rms") == pytest.approx(amplitude / math.sqrt(2), rel=1e-12)
    assert one(x, "crest_factor") == pytest.approx(math.sqrt(2), rel=1e-12)
    assert one(x, "kurtosis") == pytest.approx(1.5, rel=1e-12)
    assert abs(one(x, "skewness")) < 1e-10
    assert one(x, "peak_to_peak") == pytest.approx(2 * amplitude, rel=1e-12)


@pytest.mark.parametrize("amplitude", [1.0, 42.0])
def test_square_wave_rms_crest_kurtosis(amplitude: float) -> None:
    """Textbook: a square wave of amplitude A has RMS A, crest factor 1, kurtosis 1."""
    i = np.arange(10 * 200)
    x = np.where(i % 200 < 100, amplitude, -amplitude)  # +A half the period, -A the other
    assert one(x, "rms") == pytest.approx(amplitude, rel=1e-12)
    assert one(x, "crest_factor") == pytest.approx(1.0, rel=1e-12)
    assert one(x, "kurtosis") == pytest.approx(1.0, rel=1e-9)


def test_triangle_wave_crest_factor() -> None:
    """Textbook: a triangle wave has crest factor sqrt(3) (large-n limit)."""
    per = 4000
    phase = np.arange(10 * per) % per / per
    x = 1.0 - 4.0 * np.abs(phase - 0.5)  # -1 .. 1
    assert one(x, "crest_factor") == pytest.approx(math.sqrt(3), rel=1e-4)


def test_uniform_noise_kurtosis() -> None:
    """Textbook: uniform noise has kurtosis 1.8 (Pearson); checked within four standard
    errors, taking the Gaussian figure sqrt(24/n) as a generous bound."""
    n = 100_000
    x = np.random.default_rng(3).uniform(-5, 5, n)
    assert abs(one(x, "kurtosis") - 1.8) < 4 * math.sqrt(24 / n)
    assert abs(one(x, "skewness")) < 4 * math.sqrt(6 / n)  # SE of skewness ~ sqrt(6/n)


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_gaussian_noise_kurtosis_is_three(seed: int) -> None:
    """Textbook: Gaussian noise has kurtosis 3 (Fisher 0); the standard error of the sample
    kurtosis is about sqrt(24/n), so allow four of them. The Gaussian crest factor is not
    asserted: it grows with n."""
    n = 50_000
    x = np.random.default_rng(seed).normal(10.0, 2.0, n)
    assert abs(one(x, "kurtosis") - 3.0) < 4 * math.sqrt(24 / n)
    assert abs(one(x, "skewness")) < 4 * math.sqrt(6 / n)
    assert one(x, "std") == pytest.approx(2.0, rel=0.02)
