"""The numpy autoencoder: widths, scaler, gradients, determinism, early stopping."""

from __future__ import annotations

import numpy as np
import pytest

from agent.commission.autoencoder import (
    TrainConfig,
    _grads,
    _init,
    _mse,
    default_widths,
    fit_autoencoder,
    fit_scaler,
    reconstruction_scores,
)
from agent.commission.export import export_dense


def _windows(n: int, seed: int, f: int = 40) -> np.ndarray:
    # Invented test data: 4 latent factors mixed nonlinearly into f features + 5 % noise;
    # the mixing matrix is fixed so every call describes the same "machine".
    mix = np.random.default_rng(1234).normal(size=(4, f))
    rng = np.random.default_rng(seed)
    lat = rng.normal(size=(n, 4))
    return 10.0 + 3.0 * (np.tanh(lat @ mix / 2.0) + 0.05 * rng.normal(size=(n, f)))


@pytest.mark.parametrize(("f", "widths"), [
    (40, [20, 10, 20]), (12, [6, 3, 6]), (4, [4, 2, 4]), (3, [4, 2, 4]), (2, [4, 1, 4]),
])
def test_default_widths(f: int, widths: list[int]) -> None:
    """The bottleneck is well below F (and always below it)."""
    assert default_widths(f) == widths
    assert default_widths(f)[1] < f


def test_default_widths_refuse_one_feature() -> None:
    """One feature cannot be auto-encoded."""
    with pytest.raises(ValueError, match="at least 2 features"):
        default_widths(1)


def test_scaler_floors_constant_features() -> None:
    """A constant feature gets scale 1e-3 x |mean| (or 1e-6), never 0."""
    x = np.column_stack([np.full(10, 50.0), np.zeros(10), np.arange(10.0)])
    s = fit_scaler(x)
    np.testing.assert_allclose(s.scale, [0.05, 1e-6, np.std(np.arange(10.0))])
    assert np.all(np.isfinite(s.transform(x)))


def test_gradients_match_finite_differences() -> None:
    """Backprop equals central differences of the loss (a numerical fact)."""
    rng = np.random.default_rng(3)
    params = _init([6, 4, 2, 4, 6], rng)
    z = rng.normal(size=(9, 6))
    grads = _grads(params, z, weight_decay=0.0)
    eps = 1e-6
    for li, (w, b) in enumerate(params):
        for arr, g in ((w, grads[li][0]), (b, grads[li][1])):
            idx = tuple(rng.integers(0, s) for s in arr.shape)
            arr[idx] += eps
            up = _mse(params, z)
            arr[idx] -= 2 * eps
            down = _mse(params, z)
            arr[idx] += eps
            assert g[idx] == pytest.approx((up - down) / (2 * eps), rel=1e-5, abs=1e-9)


def test_same_seed_same_weights() -> None:
    """A fixed seed gives bit-identical weights; another seed does not."""
    x = _windows(400, 0)
    cfg = TrainConfig(epochs=15, seed=7)
    a = fit_autoencoder(x[:300], x[300:], cfg)
    b = fit_autoencoder(x[:300], x[300:], cfg)
    c = fit_autoencoder(x[:300], x[300:], TrainConfig(epochs=15, seed=8))
    for la, lb in zip(a.layers, b.layers, strict=True):
        np.testing.assert_array_equal(la.weight, lb.weight)
        np.testing.assert_array_equal(la.bias, lb.bias)
    assert export_dense(a.layers) == export_dense(b.layers)
    assert not np.array_equal(a.layers[0].weight, c.layers[0].weight)


def test_learns_the_correlations() -> None:
    """On correlated data the loss falls far below the standardised variance (1.0)."""
    x = _windows(1200, 0)
    fit = fit_autoencoder(x[:1000], x[1000:], TrainConfig(epochs=80, seed=0))
    assert fit.val_loss < 0.1
    assert [layer.activation for layer in fit.layers] == ["tanh", "tanh", "tanh", "linear"]
    assert fit.n_params == 40 * 20 + 20 + 20 * 10 + 10 + 10 * 20 + 20 + 20 * 40 + 40
    s = reconstruction_scores(fit.layers, fit.scaler, x[1000:])
    assert s.mean() == pytest.approx(fit.val_loss, rel=1e-9)


def test_early_stopping_keeps_the_best_epoch() -> None:
    """Training stops after `patience` epochs without gain and returns the best weights."""
    x = _windows(300, 1)
    # a large learning rate makes validation loss stall early
    fit = fit_autoencoder(x[:200], x[200:], TrainConfig(epochs=400, patience=3,
                                                        learning_rate=5e-2, seed=0))
    assert fit.stopped_early and fit.epochs_run < 400
    vals = [v for _, v in fit.history]
    assert fit.best_epoch == int(np.argmin(vals)) + 1
    assert fit.val_loss == pytest.approx(min(vals))
    assert fit.epochs_run - fit.best_epoch >= 3


def test_custom_widths_and_weight_decay() -> None:
    """Widths are honoured; weight decay shrinks the weights."""
    x = _windows(300, 2, f=10)
    plain = fit_autoencoder(x[:250], x[250:], TrainConfig(widths=(6, 3, 6), epochs=20))
    decayed = fit_autoencoder(x[:250], x[250:], TrainConfig(widths=(6, 3, 6), epochs=20,
                                                            weight_decay=0.5))
    assert [layer.weight.shape for layer in plain.layers] == [(10, 6), (6, 3), (3, 6), (6, 10)]
    norm = [sum(float(np.sum(la.weight ** 2)) for la in f.layers) for f in (plain, decayed)]
    assert norm[1] < norm[0]


@pytest.mark.parametrize("kwargs", [{"epochs": 0}, {"learning_rate": 0.0},
                                    {"weight_decay": -1.0}, {"widths": (4, 0, 4)}])
def test_config_refuses_nonsense(kwargs: dict) -> None:
    """Out-of-range settings fail at construction."""
    with pytest.raises(ValueError):
        TrainConfig(**kwargs)
