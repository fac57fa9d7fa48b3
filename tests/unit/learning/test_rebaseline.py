"""The pure rebaseline core: reservoir, layers from ONNX, fine-tuning, guard and gate."""

from __future__ import annotations

import numpy as np
import pytest

from agent.commission.autoencoder import TrainConfig, fit_autoencoder
from agent.commission.calibrate import calibrate
from agent.commission.export import export_dense, forward_numpy, pca_autoencoder
from agent.learning.rebaseline import (
    OldModel,
    RebaselineError,
    Settings,
    Verdict,
    layers_from_onnx,
    numpy_scores,
    rebaseline,
    reservoir,
    split_four,
)

NAMES = tuple(f"f{i}" for i in range(6))


def _normal(rng: np.random.Generator, n: int, offset: float = 0.0,
            duty: float = 0.0) -> np.ndarray:
    """Invented correlated rows: two latent factors, six features; `offset` moves f5 alone
    (breaks the correlations), `duty` moves the first factor (a new operating region)."""
    lat = rng.normal(size=(n, 2))
    lat[:, 0] += duty
    mix = np.array([[1, 0.5, 0, 1, 0.3, 0.8], [0, 0.5, 1, -1, 0.7, 0.2]])
    x = lat @ mix + rng.normal(0, 0.05, (n, 6))
    x[:, 5] += offset
    return x


@pytest.fixture(scope="module")
def old() -> OldModel:
    rng = np.random.default_rng(1)
    x = _normal(rng, 600)
    fit = fit_autoencoder(x[:400], x[400:500], TrainConfig(widths=(4, 2, 4), seed=0))
    held = fit.scaler.transform(x[500:])
    cal = calibrate(numpy_scores(fit.layers, held))
    return OldModel(fit.layers, NAMES, fit.scaler.mean, fit.scaler.scale, cal.threshold,
                    cal.clear_threshold, 1, cal.as_json())


def test_reservoir_is_bounded_and_uniform() -> None:
    """Algorithm R keeps `size` rows, each of the stream about equally often (seeded)."""
    hits = np.zeros(100)
    for seed in range(400):
        r = reservoir(np.arange(60, dtype=float)[:, None], ("a",), 10, seed=seed)
        r = reservoir(np.arange(60, 100, dtype=float)[:, None], ("a",), 10, seed=seed + 1,
                      start=r)
        assert r.size == 10 and r.n_seen == 100
        hits[r.features[:, 0].astype(int)] += 1
    # Each row is kept with probability 10/100: 40 of 400 runs; binomial sd ~6.
    assert abs(hits[:60].mean() - 40) < 4 and abs(hits[60:].mean() - 40) < 4
    with pytest.raises(RebaselineError, match="features differ"):
        reservoir(np.zeros((1, 1)), ("b",), 10, start=r)


@pytest.mark.parametrize("kinds", [("tanh", "tanh", "tanh", "linear"), ("linear", "linear"),
                                   ("relu", "sigmoid")])
def test_layers_round_trip_through_onnx(kinds: tuple[str, ...]) -> None:
    """The ONNX initializers give back the exported layers (to float32)."""
    rng = np.random.default_rng(0)
    sizes = [6, 4, 2, 4, 6][: len(kinds) + 1] if len(kinds) > 2 else [6, 3, 6]
    from agent.commission.export import DenseLayer

    layers = [DenseLayer(rng.normal(size=(a, b)), rng.normal(size=b), k)
              for a, b, k in zip(sizes[:-1], sizes[1:], kinds, strict=True)]
    back = layers_from_onnx(export_dense(layers))
    assert [la.activation for la in back] == list(kinds)
    z = rng.normal(size=(5, 6))
    np.testing.assert_allclose(forward_numpy(back, z), forward_numpy(layers, z), atol=1e-5)


def test_pca_bundle_layers_read_back() -> None:
    """A linear PCA autoencoder (no activation nodes) reads back as two linear layers."""
    z = np.random.default_rng(2).normal(size=(50, 6))
    back = layers_from_onnx(export_dense(pca_autoencoder(z, 2)))
    assert [la.activation for la in back] == ["linear", "linear"]


def test_split_four_partitions_in_blocks() -> None:
    """Every row is in exactly one part, each part non-empty, in blocks of consecutive rows."""
    parts = split_four(200, seed=3)
    allidx = np.sort(np.concatenate(parts))
    np.testing.assert_array_equal(allidx, np.arange(200))
    assert all(len(p) >= 5 for p in parts)


def test_new_normal_is_learnt_and_the_gate_passes(old: OldModel) -> None:
    """A moved feature: the old model flags it, the fine-tuned one accepts it; same seed,
    same model."""
    rng = np.random.default_rng(5)
    x_new = _normal(rng, 200, duty=2.5)
    reh = reservoir(_normal(np.random.default_rng(6), 300), NAMES, 256)
    assert np.mean(numpy_scores(old.layers, old.z(x_new)) > old.threshold) > 0.25
    out = rebaseline(old, x_new, reh, Settings(), accept_shift=False)
    assert out.verdict is Verdict.ACCEPTED, out.reasons
    f = out.figures
    assert f["false_alarm_rate"] <= 0.05 and f["rehearsal_ratio"] <= 1.5
    assert out.rehearsal is not None and out.rehearsal.n_seen == 500
    again = rebaseline(old, x_new, reh, Settings(), accept_shift=False)
    assert again.layers is not None and out.layers is not None
    np.testing.assert_array_equal(again.layers[0].weight, out.layers[0].weight)


def test_shift_guard_refuses_far_data_unless_accepted(old: OldModel) -> None:
    """Windows far beyond max_shift are refused before training; accept_shift trains."""
    x_far = _normal(np.random.default_rng(7), 100, offset=50.0)
    reh = reservoir(_normal(np.random.default_rng(8), 100), NAMES, 64)
    out = rebaseline(old, x_far, reh, Settings(), accept_shift=False)
    assert out.verdict is Verdict.REFUSED and out.layers is None
    assert out.figures["shift"] > 10 and out.figures["max_feature_shift"] == "f5"
    forced = rebaseline(old, x_far, reh, Settings(), accept_shift=True)
    assert forced.verdict is not Verdict.REFUSED
    assert forced.figures["accept_shift"] and forced.figures["shift_exceeded"]


def test_gate_rejects_without_rehearsal_set(old: OldModel) -> None:
    """No rehearsal set: forgetting cannot be checked, so the model is rejected."""
    out = rebaseline(old, _normal(np.random.default_rng(9), 100, 0.5), None, Settings(),
                     accept_shift=False)
    assert out.verdict is Verdict.REJECTED
    assert any("no rehearsal set" in r for r in out.reasons)


@pytest.mark.parametrize("x, match", [
    (np.zeros((10, 6)), "at least"),
    (np.zeros((100, 5)), "do not match"),
    (np.full((100, 6), np.nan), "non-finite"),
])
def test_unusable_windows_are_refused(old: OldModel, x: np.ndarray, match: str) -> None:
    """Too few, wrong width or non-finite new windows raise RebaselineError."""
    with pytest.raises(RebaselineError, match=match):
        rebaseline(old, x, None, Settings(), accept_shift=False)
