"""Spectral features of waveform segments, vectorised over segments of equal length.

Every segment is detrended (its mean removed) and windowed with a periodic Hann
window w[n] = 0.5 - 0.5 cos(2 pi n / N) (as `scipy.signal.get_window("hann", N)`),
then transformed with one real FFT per group of segments that share a length and a
sample rate. Scaling, stated once:

* power spectral density, one-sided ("density" scaling of `scipy.signal.welch`):
  P[k] = c_k |X[k]|^2 / (fs * sum(w^2)), c_k = 2 except at DC and Nyquist (1), so
  sum_k P[k] * df = sum((x - mean)^2 w^2) / sum(w^2) (Parseval), the windowed mean
  square, which equals the time-domain variance for a stationary signal;
* amplitude spectrum: A[k] = c_k |X[k]| / sum(w), so an on-bin sine of peak amplitude
  a reads a (Hann's coherent gain 0.5 corrected). Off-bin tones read low by up to
  1.42 dB (Hann scalloping loss), which the features accept.

Features (values in the channel's unit u, frequencies in Hz):

* `band_<lo>_<hi>_hz`  power in lo <= f < hi (hi == fs/2 includes Nyquist), u^2;
* `dominant_hz`, `dominant_amp`  the largest amplitude line above DC and its amplitude;
* `order_<k>x_amp`  the amplitude at k x running speed, the largest of the nearest bin
  and its two neighbours (order tracking by nearest bin; the neighbours absorb the
  speed reading's error); 0 when the machine is stopped (speed <= 0);
* `envelope_rms`  the standard deviation of the Hilbert envelope of the signal
  band-passed (in the frequency domain, unwindowed) to `envelope_hz`: bearing impacts
  ring a structural resonance, so they show as envelope modulation in that band;
* `velocity_rms_mm_s`  velocity RMS over 10 Hz - 1 kHz (the band of ISO 10816-3),
  integrating acceleration in the frequency domain: P_v[k] = P_a[k] / (2 pi f_k)^2,
  v = sqrt(sum P_v df) in m/s, reported in mm/s.

Pure: values in, values out.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from agent.config.schema import SpectrumConfig
from agent.core.features import WorkArrays, stack_rows, work_array

VELOCITY_BAND_HZ = (10.0, 1000.0)  # ISO 10816-3:2009 clause 4 measurement band
MIN_SAMPLES = 8
# Segments per FFT call: as many as make this many samples. The work arrays (about ten
# of them, complex ones twice) then stay a few megabytes: 200 windows of 12,800 samples
# in one call kept ~70 MB of them and were slower (39.6 ms, against 31.9 ms in chunks of 10).
CHUNK_SAMPLES = 1 << 17


def hann(n: int) -> np.ndarray:
    """Periodic Hann window of length n (the DFT-even form used for spectral analysis)."""
    return 0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(n) / n)


def _one_sided(n: int) -> np.ndarray:
    """The factor c_k that folds negative frequencies onto positive ones."""
    c = np.full(n // 2 + 1, 2.0)
    c[0] = 1.0
    if n % 2 == 0:
        c[-1] = 1.0
    return c


def band_mask(freqs: np.ndarray, lo: float, hi: float, nyquist: float) -> np.ndarray:
    """Bins with lo <= f < hi; a band ending at Nyquist includes the Nyquist bin."""
    upper = freqs <= hi if hi >= nyquist else freqs < hi
    return (freqs >= lo) & upper


def psd(x: np.ndarray, fs: float) -> tuple[np.ndarray, np.ndarray]:
    """(freqs, one-sided PSD) of each row of `x` [M, N], scaled as the module says."""
    x = np.atleast_2d(np.asarray(x, dtype=np.float64))
    n = x.shape[1]
    w = hann(n)
    spec = np.fft.rfft((x - x.mean(axis=1, keepdims=True)) * w, axis=1)
    p = (spec.real ** 2 + spec.imag ** 2) * (_one_sided(n) / (fs * float(np.sum(w * w))))
    return np.fft.rfftfreq(n, 1.0 / fs), p


class _Plan:
    """What the features of segments of n samples at fs under one config need besides
    the samples (the window, the bins, the scales, the band weights), made once per
    (n, fs, config): the arithmetic is the same as making them every call."""

    __slots__ = ("a_scale", "df", "freqs", "masks", "nyq", "p_scale", "w", "weight", "width")

    def __init__(self, n: int, fs: float, spec: SpectrumConfig) -> None:
        self.w = hann(n)
        self.freqs = np.fft.rfftfreq(n, 1.0 / fs)
        self.df = fs / n
        self.nyq = fs / 2.0
        c = _one_sided(n)
        self.p_scale = c / (fs * float(np.sum(self.w * self.w)))
        self.a_scale = c / float(np.sum(self.w))
        # The bands' masks as columns, and the velocity weight: the features are their
        # products with the power spectrum, times df (made as they were made per call).
        masks = np.stack([band_mask(self.freqs, lo, hi, self.nyq) for lo, hi in spec.bands_hz]) \
            if spec.bands_hz else None
        self.masks = masks.T.astype(np.float64) if masks is not None else None
        self.weight = None
        if spec.velocity_rms:
            lo, hi = VELOCITY_BAND_HZ
            band = band_mask(self.freqs, lo, min(hi, self.nyq), self.nyq) & (self.freqs > 0)
            self.weight = np.zeros_like(self.freqs)
            self.weight[band] = 1.0 / (2.0 * np.pi * self.freqs[band]) ** 2
        self.width = len(spec.feature_names())


_PLANS: dict[tuple[int, float, SpectrumConfig], _Plan] = {}


def _plan(n: int, fs: float, spec: SpectrumConfig) -> _Plan:
    key = (n, fs, spec)
    got = _PLANS.get(key)
    if got is None:
        if len(_PLANS) > 64:
            _PLANS.clear()
        got = _PLANS[key] = _Plan(n, fs, spec)
    return got


def _group_features(x: np.ndarray, fs: float, spec: SpectrumConfig,
                    speed_hz: np.ndarray, work: WorkArrays | None = None,
                    sums: np.ndarray | None = None) -> np.ndarray:
    """Features of equal-length segments x [M, N] sharing a config: [M, n_features].
    `sums`, when given, is `x.sum(axis=1)` found already: the means are those sums over
    N, as `x.mean(axis=1)` divides them.

    The megabyte intermediates live in `work`'s arrays (fresh ones cost page faults on
    every call, a third of the time at 2,560 Hz x 5 s); the arithmetic is the same."""
    m, n = x.shape
    nf = n // 2 + 1
    pl = _plan(n, float(fs), spec)
    freqs, df = pl.freqs, pl.df
    mean = x.mean(axis=1, keepdims=True) if sums is None else (sums / n)[:, None]
    d = np.subtract(x, mean, out=work_array(work, "sp_d", (m, n)))
    # Windowed in place unless the envelope reads the deviations again: one megabyte
    # array less through the cache, the same products.
    dw = d if spec.envelope_hz is None else work_array(work, "sp_dw", (m, n))
    spec_c = np.fft.rfft(np.multiply(d, pl.w, out=dw), axis=1,
                         out=work_array(work, "sp_c", (m, nf), complex_=True))
    mag = np.abs(spec_c, out=work_array(work, "sp_mag", (m, nf)))
    p = np.multiply(mag, mag, out=work_array(work, "sp_p", (m, nf)))
    p *= pl.p_scale
    amp = np.multiply(mag, pl.a_scale, out=mag)  # the magnitudes are not read again
    out = np.empty((m, pl.width))
    nb = len(spec.bands_hz)
    if pl.masks is not None:
        out[:, :nb] = p @ pl.masks * df
    # The strongest line above DC: `1 + argmax(amp[:, 1:])`, taken over whole rows (an
    # argmax over a column slice copies the array first) with DC, never read again,
    # below every amplitude (ties and NaN: the first, as before).
    amp[:, 0] = -np.inf
    k = np.argmax(amp, axis=1)
    rows = np.arange(m)
    out[:, nb] = freqs[k]
    out[:, nb + 1] = amp[rows, k]
    col = nb + 2
    kmax = amp.shape[1] - 1
    for order in spec.orders:
        target = np.rint(order * speed_hz / df)
        ok = np.isfinite(target) & (speed_hz > 0) & (target <= kmax)
        t = np.clip(np.where(ok, target, 1), 1, kmax).astype(np.int64)
        near = np.stack([amp[rows, np.clip(t + j, 1, kmax)] for j in (-1, 0, 1)])
        out[:, col] = np.where(ok, near.max(axis=0), 0.0)
        col += 1
    if spec.envelope_hz is not None:
        out[:, col] = _envelope_std(d, freqs, spec.envelope_hz, pl.nyq, work)
        col += 1
    if pl.weight is not None:
        ms = (p @ pl.weight) * df * spec.accel_to_m_s2 ** 2
        out[:, col] = np.sqrt(ms) * 1000.0
    return out


def _envelope_std(d: np.ndarray, freqs: np.ndarray, band_hz: tuple[float, float],
                  nyq: float, work: WorkArrays | None) -> np.ndarray:
    """The standard deviation of the Hilbert envelope of each row of `d` (mean removed)
    band-passed to `band_hz`, as `np.abs(np.fft.ifft(analytic)).std(axis=1)`."""
    m, n = d.shape
    raw = np.fft.rfft(d, axis=1, out=work_array(work, "sp_raw", (m, freqs.size), complex_=True))
    analytic = work_array(work, "sp_an", (m, n), complex_=True)
    keep = np.flatnonzero(band_mask(freqs, band_hz[0], band_hz[1], nyq) & (freqs > 0))
    # The analytic signal: positive frequencies doubled, negative ones zero. The band
    # is one run of bins.
    lo, hi = (int(keep[0]), int(keep[-1]) + 1) if keep.size else (0, 0)
    analytic[:, :lo] = 0.0
    np.multiply(raw[:, lo:hi], 2.0, out=analytic[:, lo:hi])
    analytic[:, hi:] = 0.0
    env = np.abs(np.fft.ifft(analytic, axis=1, out=analytic),
                 out=work_array(work, "sp_env", (m, n)))
    # env.std(axis=1), in place (numpy's own steps: mean, deviations, their mean square).
    mean = env.sum(axis=1, keepdims=True)
    mean /= n
    env -= mean
    env *= env
    var = env.sum(axis=1)
    var /= n
    return np.sqrt(var)


def spectral_features(segments: Sequence[np.ndarray], rates_hz: Sequence[float],
                      specs: Sequence[SpectrumConfig], speeds_hz: Sequence[float],
                      work: WorkArrays | None = None) -> list[np.ndarray]:
    """Each segment's features in `specs[i].feature_names()` order.

    `speeds_hz[i]` is the running speed (shaft rate in Hz) during segment i, NaN when
    unknown. Segments are grouped by (length, rate, config) and each group is one FFT
    call (per CHUNK_SAMPLES samples); a segment shorter than MIN_SAMPLES gives NaN (its
    window is never scored).
    """
    flat, starts = spectral_flat(segments, rates_hz, specs, speeds_hz, work)
    return [flat[a:a + len(spec.feature_names())]
            for a, spec in zip(starts.tolist(), specs, strict=True)]


def spectral_rows(x: np.ndarray, fs: float, spec: SpectrumConfig, speeds_hz: np.ndarray,
                  work: WorkArrays | None = None, sums: np.ndarray | None = None
                  ) -> np.ndarray:
    """`spectral_features` of every row of x [M, N] (one rate and config; `speeds_hz`
    per row) as one [M, n_features] matrix, in the chunks `spectral_flat` would cut
    such a group into (the same values). `sums`: `x.sum(axis=1)` when found already
    (each row's sum is the same however many rows are reduced with it)."""
    m, n = x.shape
    if n < MIN_SAMPLES:
        return np.full((m, len(spec.feature_names())), np.nan)
    step = max(1, CHUNK_SAMPLES // n)
    if m <= step:
        return _group_features(x, fs, spec, speeds_hz, work, sums)
    return np.concatenate([_group_features(x[c0:c0 + step], fs, spec,
                                           speeds_hz[c0:c0 + step], work,
                                           None if sums is None else sums[c0:c0 + step])
                           for c0 in range(0, m, step)])


Segment = np.ndarray | tuple[np.ndarray, int]


def spectral_flat(segments: Sequence[Segment], rates_hz: Sequence[float],
                  specs: Sequence[SpectrumConfig], speeds_hz: Sequence[float],
                  work: WorkArrays | None = None) -> tuple[np.ndarray, np.ndarray]:
    """`spectral_features` as one flat array and, per segment, where its features start
    in it (the tick gathers its feature rows from such arrays in one step).

    A segment is an array of samples or `(matrix, r)`, the whole row r of a float64
    matrix: the segments of a chunk that are consecutive rows of one matrix go to the
    FFT as a slice of it instead of being stacked again. The values are the same."""
    starts = np.empty(len(segments), dtype=np.int64)
    parts: list[np.ndarray] = []
    pos = 0
    groups: dict[tuple[int, float, int], list[int]] = {}
    # Equal configs are one group (by their first object); an object seen before is not
    # hashed again.
    canon: dict[SpectrumConfig, SpectrumConfig] = {}
    first_of: dict[int, SpectrumConfig] = {}
    for i, (seg, fs, spec) in enumerate(zip(segments, rates_hz, specs, strict=True)):
        size = seg[0].shape[1] if isinstance(seg, tuple) else seg.size
        if size >= MIN_SAMPLES:
            c = first_of.get(id(spec))
            if c is None:
                c = first_of[id(spec)] = canon.setdefault(spec, spec)
            groups.setdefault((size, float(fs), id(c)), []).append(i)
        else:
            nan = np.full(len(spec.feature_names()), np.nan)
            parts.append(nan)
            starts[i] = pos
            pos += nan.size
    by_id = {id(c): c for c in canon.values()}
    for (n, fs, cid), members in groups.items():
        spec = by_id[cid]
        step = max(1, CHUNK_SAMPLES // n)
        for c0 in range(0, len(members), step):
            idx = members[c0:c0 + step]
            x = _slice_of([segments[i] for i in idx])
            if x is None:
                x = stack_rows([_as_row(segments[i]) for i in idx], "sp_x", work=work)
            sp = np.asarray([speeds_hz[i] for i in idx], dtype=np.float64)
            block = _group_features(x, fs, spec, sp, work)
            parts.append(block.reshape(-1))
            width = block.shape[1]
            starts[idx] = pos + width * np.arange(len(idx))
            pos += block.size
    flat = np.concatenate(parts) if parts else np.empty(0)
    return flat, starts


def _as_row(seg: Segment) -> np.ndarray:
    if isinstance(seg, tuple):
        return seg[0][seg[1]:seg[1] + 1]
    return np.asarray(seg, dtype=np.float64).reshape(1, -1)


def _slice_of(segs: Sequence[Segment]) -> np.ndarray | None:
    """The segments as one slice of a matrix when they are its consecutive whole rows
    (`spectral_flat`), else None."""
    first = segs[0]
    if not isinstance(first, tuple):
        return None
    base, r0 = first
    if base.dtype != np.float64:
        return None
    for j, seg in enumerate(segs):
        if not isinstance(seg, tuple) or seg[0] is not base or seg[1] != r0 + j:
            return None
    return base[r0:r0 + len(segs)]
