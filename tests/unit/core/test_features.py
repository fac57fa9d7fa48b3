"""Features: one row per segment, columns in FEATURES order, independent of grouping."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from agent.config.load import FEATURES
from agent.core.features import FEATURE_INDEX, feature_names, row_extreme, segment_features


def col(row: np.ndarray, name: str) -> float:
    return float(row[FEATURE_INDEX[name]])


def test_columns_follow_the_config_feature_order() -> None:
    """FEATURE_INDEX is FEATURES in order; the block has one column per feature."""
    assert list(FEATURE_INDEX) == list(FEATURES)
    out = segment_features([np.array([1.0, 2.0, 3.0])])
    assert out.shape == (1, len(FEATURES)) and out.dtype == np.float64


@pytest.mark.parametrize(("x", "expected"), [
    # Small cases worked by hand: population moments (ddof=0).
    ([1.0, 3.0], {"mean": 2.0, "std": 1.0, "min": 1.0, "max": 3.0, "rms": np.sqrt(5.0),
                  "peak_to_peak": 2.0, "crest_factor": 3.0 / np.sqrt(5.0),
                  "skewness": 0.0, "kurtosis": 1.0}),
    ([-2.0, 0.0, 2.0], {"mean": 0.0, "std": np.sqrt(8 / 3), "rms": np.sqrt(8 / 3),
                        "peak_to_peak": 4.0, "crest_factor": 2.0 / np.sqrt(8 / 3),
                        "skewness": 0.0, "kurtosis": (32 / 3) / (8 / 3) ** 2}),
    # 0, 0, 0, 4: mean 1, m2 3, m3 (-1-1-1+27)/4 = 6, m4 (1+1+1+81)/4 = 21.
    ([0.0, 0.0, 0.0, 4.0], {"mean": 1.0, "std": np.sqrt(3.0), "rms": 2.0, "crest_factor": 2.0,
                            "skewness": 6.0 / 3.0 ** 1.5, "kurtosis": 21.0 / 9.0}),
    ([-5.0, -1.0], {"min": -5.0, "max": -1.0, "peak_to_peak": 4.0,
                    "crest_factor": 5.0 / np.sqrt(13.0)}),
])
def test_hand_worked_values(x: list[float], expected: dict[str, float]) -> None:
    """Each feature as defined in the module docstring, on cases worked by hand."""
    (row,) = segment_features([np.asarray(x)])
    for name, want in expected.items():
        assert col(row, name) == pytest.approx(want, rel=1e-12, abs=1e-12), name


@pytest.mark.parametrize("x", [[60.0] * 50, [0.0] * 10, [7.25], [-3.0, -3.0]])
def test_flat_or_single_sample_segments_stay_finite(x: list[float]) -> None:
    """Zero variance: std 0, skewness and kurtosis 0 (not NaN); zero RMS: crest 0."""
    (row,) = segment_features([np.asarray(x)])
    assert np.all(np.isfinite(row))
    assert col(row, "std") == 0.0 and col(row, "peak_to_peak") == 0.0
    assert col(row, "skewness") == 0.0 and col(row, "kurtosis") == 0.0
    level = abs(x[0])
    assert col(row, "rms") == pytest.approx(level)
    assert col(row, "crest_factor") == (pytest.approx(1.0) if level else 0.0)


def test_empty_segments_give_nan_rows_and_do_not_shift_others() -> None:
    """An empty segment is a NaN row; its neighbours are unaffected."""
    a, b = np.array([1.0, 2.0, 4.0]), np.array([-1.0, 1.0])
    out = segment_features([np.empty(0), a, np.empty(0), b, np.empty(0)])
    assert out.shape == (5, len(FEATURES))
    assert np.all(np.isnan(out[[0, 2, 4]]))
    np.testing.assert_array_equal(out[1], segment_features([a])[0])
    np.testing.assert_array_equal(out[3], segment_features([b])[0])
    assert segment_features([]).shape == (0, len(FEATURES))
    assert np.all(np.isnan(segment_features([np.empty(0)] * 3)))


def test_integer_and_float32_input_is_computed_in_float64() -> None:
    """Input dtype does not change the result."""
    x = np.array([1, 2, 3, 10], dtype=np.int32)
    np.testing.assert_allclose(segment_features([x]), segment_features([x.astype(float)]),
                               rtol=1e-15)
    y = np.array([0.1, 0.2, 0.7], dtype=np.float32)
    np.testing.assert_allclose(segment_features([y]),
                               segment_features([y.astype(np.float64)]), rtol=1e-15)


segments = st.lists(
    hnp.arrays(np.float64, st.integers(0, 40),
               elements=st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False)),
    min_size=1, max_size=12)


@settings(max_examples=200, deadline=None)
@given(segments, st.data())
def test_features_do_not_depend_on_how_segments_are_grouped(segs: list[np.ndarray],
                                                            data: st.DataObject) -> None:
    """One call over all segments equals any split into several calls, segment by segment."""
    together = segment_features(segs)
    cuts = sorted(set(data.draw(st.lists(st.integers(0, len(segs)), max_size=4))))
    parts = [segment_features(segs[lo:hi])
             for lo, hi in zip([0, *cuts], [*cuts, len(segs)], strict=True) if hi > lo]
    np.testing.assert_allclose(np.concatenate(parts), together, rtol=1e-12, atol=0)
    for i, s in enumerate(segs):
        np.testing.assert_allclose(segment_features([s])[0], together[i], rtol=1e-12, atol=0)


@settings(max_examples=100, deadline=None)
@given(hnp.arrays(np.float64, st.integers(1, 60),
                  # Below ~1e-154 a square is subnormal or 0 and rms loses its digits
                  # (x = 3e-158 gave crest factor 0.9999999988): no sensor reads that.
                  elements=st.floats(-1e3, 1e3, allow_nan=False, allow_infinity=False)
                  .filter(lambda v: v == 0.0 or abs(v) > 1e-150)),
       st.floats(-1e3, 1e3), st.floats(0.01, 100.0))
def test_invariances_of_shape_features(x: np.ndarray, shift: float, scale: float) -> None:
    """std, ptp scale with the signal; skewness and kurtosis ignore shift and scale;
    bounds hold: min <= mean <= max, std <= ptp, crest >= 1 when rms > 0, kurtosis >= 1
    or 0 when flat."""
    (r,) = segment_features([x])
    (r2,) = segment_features([x * scale + shift])
    assert col(r, "min") <= col(r, "mean") + 1e-9 and col(r, "mean") <= col(r, "max") + 1e-9
    assert col(r, "std") <= col(r, "peak_to_peak") + 1e-9
    assert col(r2, "std") == pytest.approx(col(r, "std") * scale, rel=1e-6, abs=1e-9)
    assert col(r2, "peak_to_peak") == pytest.approx(col(r, "peak_to_peak") * scale,
                                                    rel=1e-9, abs=1e-9)
    if col(r, "rms") > 0:
        assert col(r, "crest_factor") >= 1.0 - 1e-12
    if col(r, "std") > 1e-6 * max(1.0, abs(col(r, "mean"))):
        assert col(r, "kurtosis") >= 1.0 - 1e-9  # Pearson's inequality: kurtosis >= 1
        assert col(r2, "skewness") == pytest.approx(col(r, "skewness"), rel=1e-6, abs=1e-6)
        assert col(r2, "kurtosis") == pytest.approx(col(r, "kurtosis"), rel=1e-6)


def test_feature_names_are_channel_dot_feature_in_config_order() -> None:
    """`<channel>.<feature>`, channels then features in the order given."""
    assert feature_names([("temp", ("mean", "std")), ("vib", ("rms",))]) == (
        "temp.mean", "temp.std", "vib.rms")
    assert feature_names([]) == ()


def test_block_features_agree_with_segment_features() -> None:
    """The row-wise pass over full-length blocks gives segment_features' values (only
    the summation order differs): levels, spreads, a flat row, a zero row."""
    from agent.core.features import block_features

    rng = np.random.default_rng(11)
    x = np.vstack([rng.normal(60.0, 0.01, (5, 128)), rng.standard_t(3, (5, 128)) * 9.8,
                   np.full((1, 128), 4.2), np.zeros((1, 128))])
    got, want = block_features(x), segment_features(list(x))
    np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-12)


def test_block_features_compute_only_what_is_needed() -> None:
    from agent.core.features import block_features

    x = np.random.default_rng(12).normal(size=(4, 50))
    full = block_features(x)
    for needed in ({"mean"}, {"kurtosis"}, {"crest_factor"}, {"std", "peak_to_peak"}):
        part = block_features(x, frozenset(needed))
        for name, i in FEATURE_INDEX.items():
            if name in needed:
                np.testing.assert_array_equal(part[:, i], full[:, i])
            elif name != "mean":  # the mean is the base of everything else
                assert np.all(np.isnan(part[:, i])), name


def test_work_arrays_are_reused_and_change_nothing() -> None:
    """A pass in a `WorkArrays` gives the same values as one with fresh arrays, and the
    next pass of no larger size reuses the same memory."""
    from agent.core.features import WorkArrays, block_features, stack_rows

    rng = np.random.default_rng(13)
    parts = [rng.normal(size=(3, 64)), rng.normal(size=(2, 64))]
    work = WorkArrays()
    x = stack_rows(parts, work=work)
    np.testing.assert_array_equal(x, np.vstack(parts))
    np.testing.assert_array_equal(block_features(x, work=work),
                                  block_features(np.vstack(parts)))
    again = stack_rows(parts[::-1], work=work)
    assert np.shares_memory(again, x)


@settings(max_examples=300)
@given(hnp.arrays(np.float64, st.tuples(st.integers(1, 12), st.integers(1, 140)),
                  elements=st.one_of(st.sampled_from([0.0, -0.0, np.nan, np.inf, -np.inf, 1.0,
                                                      -1.0]),
                                     st.floats(-1e6, 1e6))),
       st.booleans())
def test_row_extreme_is_the_row_reduction_bit_for_bit(x: np.ndarray, strided: bool) -> None:
    """`row_extreme` (block_features' min and max) gives `x.min(axis=1)` and
    `x.max(axis=1)` to the bit: signed zeros, NaN and infinities included, on a matrix
    with rows of its own and on a strided view."""
    if strided:
        x = np.repeat(x, 2, axis=1)[:, ::2]
    for op, want in ((np.minimum, x.min(axis=1)), (np.maximum, x.max(axis=1))):
        got = row_extreme(x, op)
        assert got.tobytes() == want.tobytes()


def test_block_features_into_a_given_array_are_the_same() -> None:
    """`out=`: the same values written into the caller's array (whatever it held before:
    NaN again in the columns not needed), and that array returned."""
    from agent.core.features import block_features

    x = np.random.default_rng(14).normal(size=(6, 40))
    for needed in (frozenset({"mean", "kurtosis", "peak_to_peak"}), frozenset(FEATURES)):
        out = np.full((6, len(FEATURES)), 123.0)
        got = block_features(x, needed, out=out)
        assert got is out
        assert got.tobytes() == block_features(x, needed).tobytes()
