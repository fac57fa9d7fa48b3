"""Time-domain features, vectorised over many segments at once.

A *segment* is one channel's samples in one window. All segments closed in a tick
are concatenated and reduced together with `np.add.reduceat`, so the cost per tick
is a handful of numpy passes whatever the number of assets.

Definitions (population moments, as `scipy.stats` with bias=True):
    mean, std (ddof=0), min, max, rms = sqrt(mean(x^2)), peak_to_peak = max - min,
    crest_factor = max|x| / rms, skewness = m3 / m2^1.5,
    kurtosis = m4 / m2^2 (Pearson: a Gaussian gives 3, a sine 1.5).
`block_features` computes the same for equal-length segments given as the rows of
one matrix (the common case: every channel delivered what its rate promises), with
reductions along rows instead of `reduceat`, and only the features asked for.

A segment with zero variance has skewness 0 and kurtosis 0 (undefined moments are
reported as 0 rather than NaN, so the model input stays finite; sensor health flags
a flat channel separately). A zero-RMS segment has crest factor 0.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from agent.config.schema import FEATURES

FEATURE_INDEX = {name: i for i, name in enumerate(FEATURES)}


def segment_features(segments: Sequence[np.ndarray]) -> np.ndarray:
    """Every feature of every segment: [len(segments), len(FEATURES)] float64.

    Empty segments give a row of NaN (the caller never scores them).
    """
    n = len(segments)
    out = np.full((n, len(FEATURES)), np.nan)
    if n == 0:
        return out
    lengths = np.fromiter((s.size for s in segments), dtype=np.int64, count=n)
    nonempty = lengths > 0
    if not nonempty.any():
        return out
    segs = [np.asarray(s, dtype=np.float64) for s, ok in zip(segments, nonempty, strict=True)
            if ok]
    lens = lengths[nonempty]
    x = np.concatenate(segs)
    starts = np.zeros(lens.size, dtype=np.int64)
    np.cumsum(lens[:-1], out=starts[1:])
    cnt = lens.astype(np.float64)
    mean = np.add.reduceat(x, starts) / cnt
    # Central moments from deviations about each segment's own mean: summing raw
    # powers would lose all precision for a temperature of 60 +- 0.01.
    d = x - np.repeat(mean, lens)
    d2 = d * d
    m2 = np.add.reduceat(d2, starts) / cnt
    m3 = np.add.reduceat(d2 * d, starts) / cnt
    m4 = np.add.reduceat(d2 * d2, starts) / cnt
    mn = np.minimum.reduceat(x, starts)
    mx = np.maximum.reduceat(x, starts)
    ms = np.add.reduceat(x * x, starts) / cnt
    rms = np.sqrt(ms)
    peak = np.maximum(np.abs(mn), np.abs(mx))
    std = np.sqrt(m2)
    # A variance below ~1e-24 of the squared level is rounding noise, not signal.
    flat = m2 <= (1e-12 * np.maximum(np.abs(mean), 1e-300)) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        skew = np.where(flat, 0.0, m3 / np.where(flat, 1.0, m2) ** 1.5)
        kurt = np.where(flat, 0.0, m4 / np.where(flat, 1.0, m2) ** 2)
        crest = np.where(rms > 0, peak / np.where(rms > 0, rms, 1.0), 0.0)
    cols = {
        "mean": mean, "std": std, "min": mn, "max": mx, "rms": rms,
        "peak_to_peak": mx - mn, "crest_factor": crest, "skewness": skew, "kurtosis": kurt,
    }
    block = np.empty((lens.size, len(FEATURES)))
    for name, i in FEATURE_INDEX.items():
        block[:, i] = cols[name]
    out[nonempty] = block
    return out


ALL_FEATURES = frozenset(FEATURES)


class WorkArrays:
    """Reusable work arrays for the feature passes of one pipeline (use from one thread
    at a time). Fresh megabyte temporaries cost page faults on every call: with them the
    passes below are several times slower. Without one, each pass makes its own."""

    def __init__(self) -> None:
        self._bufs: dict[str, np.ndarray] = {}

    def get(self, name: str, shape: tuple[int, int]) -> np.ndarray:
        """The work array `name` as `shape` (valid until the next `get` of that name)."""
        size = shape[0] * shape[1]
        b = self._bufs.get(name)
        if b is None or b.size < size:
            b = self._bufs[name] = np.empty(max(size, 2 * (b.size if b is not None else 0)))
        return b[:size].reshape(shape)


def work_array(work: WorkArrays | None, name: str, shape: tuple[int, int], *,
               complex_: bool = False) -> np.ndarray:
    """The work array `name` of `work` as `shape` (a fresh one without `work`); a
    complex one is held as pairs of floats."""
    dtype = np.complex128 if complex_ else np.float64
    if work is None:
        return np.empty(shape, dtype=dtype)
    if not complex_:
        return work.get(name, shape)
    return work.get(name, (shape[0], 2 * shape[1])).view(np.complex128)


def stack_rows(parts: Sequence[np.ndarray], buffer: str = "x", *,
               work: WorkArrays | None = None) -> np.ndarray:
    """Matrices of equal width stacked into one, in the work array `buffer` of `work`
    (valid until its next use): the input of one `block_features` pass. A single part
    comes back as it is."""
    if len(parts) == 1:
        return parts[0]
    width = parts[0].shape[1]
    n = sum(p.shape[0] for p in parts)
    return np.concatenate(parts, out=work_array(work, buffer, (n, width)))


def block_features(x: np.ndarray, needed: frozenset[str] = ALL_FEATURES, *,
                   work: WorkArrays | None = None, out: np.ndarray | None = None,
                   extremes: tuple[np.ndarray, np.ndarray] | None = None,
                   sums: np.ndarray | None = None) -> np.ndarray:
    """The features of each row of `x` [segments, samples] (all rows full length):
    [segments, len(FEATURES)] float64, NaN in the columns not in `needed`; written into
    `out` when given (of that shape: a caller's reusable array, not fresh memory the
    first write into faults in each time), else into a new array. `extremes`, when
    given, are `x.min(axis=1)` and `x.max(axis=1)` found already (the tick's sensor
    health reads them of the same rows): not reduced again. `sums`, when given, is
    `x.sum(axis=1)` found already (the spectral pass divides the same sums for its means).

    The same definitions as `segment_features` (agreement to rounding is tested).
    """
    n, length = x.shape
    if out is None:
        out = np.full((n, len(FEATURES)), np.nan)
    else:
        out.fill(np.nan)
    if n == 0 or length == 0:
        return out
    x = np.asarray(x, dtype=np.float64)
    inv = 1.0 / length
    cols: dict[str, np.ndarray] = {}
    mean = (x.sum(axis=1) if sums is None else sums) * inv
    cols["mean"] = mean
    if needed & {"std", "skewness", "kurtosis"}:
        # Central moments from deviations about each row's own mean (see segment_features).
        d = np.subtract(x, mean[:, None], out=work_array(work, "d", x.shape))
        # Squared in place unless skewness reads d again: one array less to go through
        # the cache.
        d2 = np.multiply(d, d, out=work_array(work, "d2", x.shape) if "skewness" in needed
                         else d)
        m2 = d2.sum(axis=1) * inv
        flat = m2 <= (1e-12 * np.maximum(np.abs(mean), 1e-300)) ** 2
        safe = np.where(flat, 1.0, m2)
        cols["std"] = np.sqrt(m2)
        if "skewness" in needed:
            m3 = np.einsum("ij,ij->i", d2, d) * inv
            cols["skewness"] = np.where(flat, 0.0, m3 / safe ** 1.5)
        if "kurtosis" in needed:
            m4 = np.einsum("ij,ij->i", d2, d2) * inv
            cols["kurtosis"] = np.where(flat, 0.0, m4 / (safe * safe))
    if needed & {"min", "max", "peak_to_peak", "crest_factor"}:
        mn, mx = extremes if extremes is not None else \
            (row_extreme(x, np.minimum), row_extreme(x, np.maximum))
        cols["min"], cols["max"], cols["peak_to_peak"] = mn, mx, mx - mn
    if needed & {"rms", "crest_factor"}:
        rms = np.sqrt(np.einsum("ij,ij->i", x, x) * inv)
        cols["rms"] = rms
        if "crest_factor" in needed:
            peak = np.maximum(np.abs(cols["min"]), np.abs(cols["max"]))
            cols["crest_factor"] = np.where(rms > 0, peak / np.where(rms > 0, rms, 1.0), 0.0)
    for name in needed:
        out[:, FEATURE_INDEX[name]] = cols[name]
    return out


def row_extreme(x: np.ndarray, op: np.ufunc) -> np.ndarray:
    """`op.reduce(x, axis=1)` (`np.minimum` or `np.maximum`: `x.min(axis=1)`,
    `x.max(axis=1)`) of a matrix with rows, the same floats.

    Along short rows numpy's row reduction pays its setup per row (a 100-sample row: about
    60 ns, its work a few); `reduceat` over the flat samples runs the rows in one loop,
    twice as fast for [1600, 100]. The extreme of a row is one of its samples whatever the
    order it is found in, except the sign of a zero (-0.0 and 0.0 compare equal) and which
    NaN: rows whose extreme is zero or NaN are reduced again the usual way."""
    n, length = x.shape
    if not x.flags.c_contiguous:
        return op.reduce(x, axis=1)
    got = op.reduceat(x.reshape(-1), np.arange(0, n * length, length))
    again = np.flatnonzero(~(np.abs(got) > 0.0))
    if again.size:
        got[again] = op.reduce(x[again], axis=1)
    return got


def feature_names(channels: Sequence[tuple[str, Sequence[str]]]) -> tuple[str, ...]:
    """`<channel>.<feature>` names in config order, for (channel, features) pairs."""
    return tuple(f"{c}.{f}" for c, feats in channels for f in feats)
