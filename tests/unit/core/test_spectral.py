"""Spectral features: names, grouping invariance, short segments, mixed lengths."""

from __future__ import annotations

import numpy as np
import pytest

from agent.config.load import SpectrumConfig
from agent.core.features import ALL_FEATURES, WorkArrays, block_features
from agent.core.spectral import CHUNK_SAMPLES, spectral_features, spectral_rows

SPEC = SpectrumConfig(bands_hz=((10.0, 200.0), (200.0, 1280.0)), velocity_rms=True,
                      orders=(1.0, 2.0), envelope_hz=(600.0, 1100.0))


def test_feature_names() -> None:
    """Names follow the config: bands, dominant line, orders, envelope, velocity."""
    assert SPEC.feature_names() == (
        "band_10_200_hz", "band_200_1280_hz", "dominant_hz", "dominant_amp", "order_1x_amp",
        "order_2x_amp", "envelope_rms", "velocity_rms_mm_s")
    assert SpectrumConfig(bands_hz=((2.5, 7.5),), orders=(0.5,)).feature_names()[:1] == (
        "band_2p5_7p5_hz",)


def test_batched_equals_one_by_one() -> None:
    """Segments of different lengths in one call give what each gives alone."""
    rng = np.random.default_rng(1)
    segs = [rng.normal(size=n) for n in (2560, 2304, 2560, 12800, 2304)]
    speeds = [49.5, 40.0, np.nan, 49.5, 0.0]
    together = spectral_features(segs, [2560.0] * 5, [SPEC] * 5, speeds)
    for seg, sp, row in zip(segs, speeds, together, strict=True):
        (alone,) = spectral_features([seg], [2560.0], [SPEC], [sp])
        np.testing.assert_allclose(row, alone, rtol=1e-12)


def test_work_arrays_change_nothing() -> None:
    """With a pipeline's reusable work arrays (kept between calls of other sizes and
    configs, as the tick keeps them), every value is bit for bit what fresh arrays give;
    the envelope's standard deviation is numpy's `std` of the Hilbert envelope."""
    rng = np.random.default_rng(4)
    work = WorkArrays()
    other = SpectrumConfig(envelope_hz=(0.0, 5000.0))
    for n, spec in ((12800, SPEC), (1024, other), (2304, SPEC), (12800, other)):
        segs = [rng.normal(size=n) for _ in range(3)]
        fresh = spectral_features(segs, [2560.0] * 3, [spec] * 3, [49.5] * 3)
        reused = spectral_features(segs, [2560.0] * 3, [spec] * 3, [49.5] * 3, work)
        for a, b in zip(fresh, reused, strict=True):
            assert np.array_equal(a, b)
    # The envelope as its textbook definition, band-passed 600-1100 Hz in the frequency
    # domain: |analytic signal| (positive frequencies doubled, negative ones zero).
    x = rng.normal(size=2560)
    spec_x = np.fft.fft(x - x.mean())
    f = np.fft.fftfreq(x.size, 1 / 2560.0)
    analytic = np.where((f >= 600.0) & (f < 1100.0), 2.0 * spec_x, 0.0)
    (row,) = spectral_features([x], [2560.0], [SPEC], [49.5], work)
    assert row[SPEC.feature_names().index("envelope_rms")] == pytest.approx(
        np.abs(np.fft.ifft(analytic)).std(), rel=1e-12)


@pytest.mark.parametrize("n", [1024, 1000, 2560])
def test_shared_row_sums_change_no_bit(n: int) -> None:
    """The tick reduces each row's sum once for the time-domain and the spectral means
    (`sums=`): every feature is byte for byte what each pass reducing its own rows
    gives, over more rows than one FFT chunk holds, for strided rows (every second
    row of a matrix), and rows of very different scales."""
    rng = np.random.default_rng(n)
    rows = 2 * (CHUNK_SAMPLES // n) + 5
    base = rng.normal(size=(2 * rows, n)) * rng.uniform(1e-3, 1e4, (2 * rows, 1)) + 7.0
    x = base[1::2]
    sums = base.sum(axis=1)[1::2]
    speeds = rng.uniform(10.0, 60.0, rows)
    for spec in (SPEC, SpectrumConfig(bands_hz=((10.0, 100.0),), velocity_rms=True)):
        own = spectral_rows(x, 2560.0, spec, speeds, WorkArrays())
        shared = spectral_rows(x, 2560.0, spec, speeds, WorkArrays(), sums)
        assert own.tobytes() == shared.tobytes()
    own_td = block_features(base, ALL_FEATURES)
    shared_td = block_features(base, ALL_FEATURES, sums=base.sum(axis=1))
    assert own_td.tobytes() == shared_td.tobytes()


def test_dominant_line_is_the_first_strongest_bin_above_dc() -> None:
    """dominant_hz / dominant_amp are bin `1 + argmax(amp[:, 1:])` of the one-sided
    amplitude spectrum of the windowed, mean-removed rows (numpy's rfft, Hann window),
    byte for byte: random rows, a constant row (every bin 0: the first bin above DC),
    a row with a NaN sample (every bin NaN: the first), a pure line."""
    from agent.core.spectral import hann

    n, fs = 1024, 1024.0
    rng = np.random.default_rng(9)
    x = rng.normal(size=(6, n))
    x[1] = 3.0
    x[2, 17] = np.nan
    x[3] = np.sin(2 * np.pi * 50.0 * np.arange(n) / fs)
    spec = SpectrumConfig(bands_hz=((10.0, 100.0),))
    got = spectral_rows(x, fs, spec, np.full(6, np.nan))
    w = hann(n)
    mag = np.abs(np.fft.rfft((x - x.mean(axis=1, keepdims=True)) * w, axis=1))
    scale = np.full(n // 2 + 1, 2.0)
    scale[0] = scale[-1] = 1.0
    amp = mag * (scale / w.sum())
    k = 1 + np.argmax(amp[:, 1:], axis=1)
    names = spec.feature_names()
    want_hz = np.fft.rfftfreq(n, 1 / fs)[k]
    assert got[:, names.index("dominant_hz")].tobytes() == want_hz.tobytes()
    assert got[:, names.index("dominant_amp")].tobytes() == amp[np.arange(6), k].tobytes()
    assert got[1, names.index("dominant_hz")] == 1.0 and got[3, names.index("dominant_hz")] == 50.0


def test_short_segment_is_nan_and_unknown_speed_is_zero_orders() -> None:
    """Too few samples -> NaN row (never scored); unknown speed -> orders 0."""
    rows = spectral_features([np.ones(3), np.random.default_rng(2).normal(size=512)],
                             [2560.0, 2560.0], [SPEC, SPEC], [49.5, np.nan])
    assert np.isnan(rows[0]).all()
    names = SPEC.feature_names()
    assert rows[1][names.index("order_1x_amp")] == 0.0
    assert np.isfinite(rows[1]).all()
