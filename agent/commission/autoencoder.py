"""A dense autoencoder in pure numpy: standardise, fit with Adam, stop early.

Pure: values in, values out; no files, no clock. The network is
tanh hidden layers and a linear output, trained to reproduce standardised feature
rows under mean squared error, and returned as `list[DenseLayer]` so that
`agent.commission.export.export_dense` serialises it unchanged.

Default widths for F features: `[h, b, h]` with `h = max(4, F // 2)` and
`b = min(F - 1, max(2, F // 4))`. Why: a machine's features are strongly redundant
(the rms, peak and band levels of one channel move together, and channels move
together with load and speed), so normal rows live near a low-dimensional surface.
A bottleneck of a quarter of the inputs is well below F, so the network cannot learn
the identity and must learn those correlations — a window that breaks them
reconstructs badly. One wider layer on each side lets the surface bend (a linear
bottleneck would be PCA). For 40 features this is 40-20-10-20-40, 2,090 parameters,
about 9 KB of ONNX (common practice for small tabular autoencoders, no source).
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from agent.commission.export import DenseLayer, forward_numpy

STD_FLOOR_ABS = 1e-6
# A feature that barely moves in normal data (a setpoint, a quantised temperature, a
# flow reading that sat on one value) must not give z-scores in the thousands for a
# change at sensor resolution: a floor of 0.1 % of the feature's magnitude keeps such
# features meaningful but bounded (1 % was tried: it hid a pump's 1.5 % flow drop).
# `block_spread` adds a floor from the recording itself.
STD_FLOOR_REL = 1e-3


@dataclass(frozen=True)
class Scaler:
    """z = (x - mean) / scale, with scale = max(std, floors)."""

    mean: np.ndarray
    scale: np.ndarray
    std: np.ndarray  # the raw population standard deviation, before the floor

    def transform(self, x: np.ndarray) -> np.ndarray:
        return (np.asarray(x, np.float64) - self.mean) / self.scale


def fit_scaler(x: np.ndarray, *, floor_abs: float = STD_FLOOR_ABS,
               floor_rel: float = STD_FLOOR_REL, floor: np.ndarray | None = None) -> Scaler:
    """Per-feature mean and floored standard deviation of rows `x` [N, F]; `floor`, if
    given, is a further per-feature floor (see `block_spread`)."""
    x = np.asarray(x, np.float64)
    mean = x.mean(axis=0)
    std = x.std(axis=0)
    scale = np.maximum(std, np.maximum(floor_abs, floor_rel * np.abs(mean)))
    if floor is not None:
        scale = np.maximum(scale, np.asarray(floor, np.float64))
    return Scaler(mean=mean, scale=scale, std=std)


def block_spread(x: np.ndarray, blocks: int = 10) -> np.ndarray:
    """The spread of a recording's block means: rows `x` [N, F] in time order cut into
    `blocks` equal runs, the standard deviation of their means per feature.

    A floor for the scaler: a feature that held still inside each stretch of the
    recording but moved between stretches has a within-window spread far below its
    real normal movement; standardised by it, its first change would own the score."""
    x = np.asarray(x, np.float64)
    b = min(blocks, x.shape[0])
    if b < 2:
        return np.zeros(x.shape[1])
    means = np.stack([part.mean(axis=0) for part in np.array_split(x, b)])
    return np.asarray(means.std(axis=0, ddof=1))


def default_widths(n_features: int) -> list[int]:
    """Hidden widths `[h, b, h]` for `n_features` inputs (see the module docstring)."""
    if n_features < 2:
        raise ValueError("an autoencoder needs at least 2 features")
    b = min(n_features - 1, max(2, n_features // 4))
    h = max(4, n_features // 2)
    return [h, b, h]


@dataclass(frozen=True)
class TrainConfig:
    """How to fit. `patience` epochs without a relative val-loss gain of `min_delta` stop."""

    widths: tuple[int, ...] | None = None
    epochs: int = 300
    batch_size: int = 64
    learning_rate: float = 2e-3
    beta1: float = 0.9
    beta2: float = 0.999
    eps: float = 1e-8
    weight_decay: float = 0.0
    patience: int = 25
    min_delta: float = 1e-4
    seed: int = 0

    def __post_init__(self) -> None:
        if self.epochs < 1 or self.batch_size < 1 or self.patience < 1:
            raise ValueError("epochs, batch_size and patience must be >= 1")
        if not self.learning_rate > 0 or self.weight_decay < 0:
            raise ValueError("learning_rate must be > 0 and weight_decay >= 0")
        if self.widths is not None and (not self.widths or min(self.widths) < 1):
            raise ValueError("widths must be a non-empty list of positive integers")


@dataclass(frozen=True)
class FitResult:
    """The fitted network (best validation epoch) and how training went."""

    layers: list[DenseLayer]
    scaler: Scaler
    widths: tuple[int, ...]
    train_loss: float
    val_loss: float
    best_epoch: int
    epochs_run: int
    stopped_early: bool
    history: list[tuple[float, float]] = field(repr=False, default_factory=list)

    @property
    def n_params(self) -> int:
        return sum(int(layer.weight.size + layer.bias.size) for layer in self.layers)


def _init(sizes: Sequence[int], rng: np.random.Generator) -> list[list[np.ndarray]]:
    # Glorot/Xavier uniform (Glorot & Bengio 2010), the usual choice for tanh layers.
    params = []
    for n_in, n_out in itertools.pairwise(sizes):
        limit = np.sqrt(6.0 / (n_in + n_out))
        params.append([rng.uniform(-limit, limit, (n_in, n_out)), np.zeros(n_out)])
    return params


def _forward(params: list[list[np.ndarray]], z: np.ndarray) -> list[np.ndarray]:
    """Activations of every layer, input first; hidden tanh, output linear."""
    acts = [z]
    h = z
    last = len(params) - 1
    for i, (w, b) in enumerate(params):
        h = h @ w + b
        if i != last:
            h = np.tanh(h)
        acts.append(h)
    return acts


def _mse(params: list[list[np.ndarray]], z: np.ndarray) -> float:
    return float(np.mean((_forward(params, z)[-1] - z) ** 2))


def _grads(params: list[list[np.ndarray]], z: np.ndarray,
           weight_decay: float) -> list[list[np.ndarray]]:
    acts = _forward(params, z)
    n, f = z.shape
    delta = 2.0 * (acts[-1] - z) / (n * f)  # d mean((y - z)^2) / dy
    grads: list[list[np.ndarray]] = [[np.empty(0), np.empty(0)] for _ in params]
    for i in range(len(params) - 1, -1, -1):
        w = params[i][0]
        grads[i] = [acts[i].T @ delta + weight_decay * w, delta.sum(axis=0)]
        if i:
            delta = (delta @ w.T) * (1.0 - acts[i] ** 2)  # tanh' = 1 - tanh^2
    return grads


def _to_layers(params: list[list[np.ndarray]]) -> list[DenseLayer]:
    last = len(params) - 1
    return [DenseLayer(w.copy(), b.copy(), "linear" if i == last else "tanh")
            for i, (w, b) in enumerate(params)]


def fit_autoencoder(x_train: np.ndarray, x_val: np.ndarray,
                    config: TrainConfig = TrainConfig(), *,
                    scale_floor: np.ndarray | None = None) -> FitResult:
    """Fit on raw feature rows `x_train`, early-stop on `x_val`; same seed -> same weights.

    The scaler is fitted on `x_train` only. Adam (Kingma & Ba 2015) on mini-batches
    reshuffled every epoch from one seeded generator; the weights of the epoch with the
    lowest validation loss are returned.
    """
    x_train = np.asarray(x_train, np.float64)
    x_val = np.asarray(x_val, np.float64)
    if x_train.ndim != 2 or x_val.ndim != 2 or x_train.shape[1] != x_val.shape[1]:
        raise ValueError("x_train and x_val must be [N, F] with the same F")
    if len(x_train) < 2 or len(x_val) < 1:
        raise ValueError("need at least 2 training rows and 1 validation row")
    f = x_train.shape[1]
    widths = tuple(config.widths) if config.widths is not None else tuple(default_widths(f))
    scaler = fit_scaler(x_train, floor=scale_floor)
    z_tr = scaler.transform(x_train)
    z_va = scaler.transform(x_val)
    rng = np.random.default_rng(config.seed)
    params = _init([f, *widths, f], rng)
    m = [[np.zeros_like(p) for p in layer] for layer in params]
    v = [[np.zeros_like(p) for p in layer] for layer in params]
    best = (_mse(params, z_va), 0, [[p.copy() for p in layer] for layer in params])
    history: list[tuple[float, float]] = []
    step = 0
    since_best = 0
    epoch = 0
    n = len(z_tr)
    bs = min(config.batch_size, n)
    for epoch in range(1, config.epochs + 1):
        order = rng.permutation(n)
        for start in range(0, n, bs):
            batch = z_tr[order[start:start + bs]]
            g = _grads(params, batch, config.weight_decay)
            step += 1
            c1 = 1.0 - config.beta1 ** step
            c2 = 1.0 - config.beta2 ** step
            for li, layer in enumerate(params):
                for pi, p in enumerate(layer):
                    gi = g[li][pi]
                    m[li][pi] = config.beta1 * m[li][pi] + (1.0 - config.beta1) * gi
                    v[li][pi] = config.beta2 * v[li][pi] + (1.0 - config.beta2) * gi * gi
                    p -= config.learning_rate * (m[li][pi] / c1) / (
                        np.sqrt(v[li][pi] / c2) + config.eps)
        val = _mse(params, z_va)
        history.append((_mse(params, z_tr), val))
        if val < best[0] * (1.0 - config.min_delta):
            best = (val, epoch, [[p.copy() for p in layer] for layer in params])
            since_best = 0
        else:
            since_best += 1
            if since_best >= config.patience:
                break
    best_params = best[2]
    return FitResult(
        layers=_to_layers(best_params), scaler=scaler, widths=widths,
        train_loss=_mse(best_params, z_tr), val_loss=best[0], best_epoch=best[1],
        epochs_run=epoch, stopped_early=epoch < config.epochs, history=history)


def reconstruction_scores(layers: Sequence[DenseLayer], scaler: Scaler,
                          x: np.ndarray) -> np.ndarray:
    """Score per row in numpy: mean squared error of the standardised features."""
    z = scaler.transform(x)
    return np.mean((forward_numpy(layers, z) - z) ** 2, axis=1)


# The share of the standardised variance a linear model keeps: the usual rule for the
# number of principal components (Jolliffe, "Principal Component Analysis", 2nd ed.,
# 6.1.1, which gives 70-90 %; the upper end, so faults off the normal subspace show).
PCA_VARIANCE = 0.90


def subspace_layers(z: np.ndarray, k: int, vt: np.ndarray | None = None) -> list[DenseLayer]:
    """The k-dimensional principal subspace of rows `z` as two linear layers:
    recon = (z - c) P P^T + c, i.e. layer 1: z @ P - c @ P; layer 2: h @ P^T + c
    (`vt`: the right singular vectors of z - c when already computed)."""
    c = z.mean(axis=0)
    if vt is None:
        _, _, vt = np.linalg.svd(z - c, full_matrices=False)
    p = vt[:k].T
    return [DenseLayer(p.copy(), -(c @ p)), DenseLayer(p.T.copy(), c.copy())]


def fit_pca(x_train: np.ndarray, x_val: np.ndarray, *,
            scale_floor: np.ndarray | None = None,
            variance: float = PCA_VARIANCE) -> FitResult:
    """A linear autoencoder: the principal subspace of the standardised `x_train`.

    encode z -> z @ P (k components keeping `variance` of the variance), decode
    -> (z @ P) @ P.T; as two linear Gemm layers it exports and scores exactly like the
    dense network, and its score is the SPE (Q statistic) divided by F. Cheap and hard
    to over-fit on the few hundred near-duplicate windows of a short recording.
    """
    scaler = fit_scaler(x_train, floor=scale_floor)
    z_tr = scaler.transform(x_train)
    z_va = scaler.transform(x_val)
    n_f = z_tr.shape[1]
    _, s, vt = np.linalg.svd(z_tr - z_tr.mean(axis=0), full_matrices=False)
    var = s ** 2
    total = float(var.sum())
    k = n_f - 1 if total <= 0 else int(np.searchsorted(np.cumsum(var) / total, variance) + 1)
    k = max(1, min(k, n_f - 1))
    layers = subspace_layers(z_tr, k, vt)

    def lin_mse(z: np.ndarray) -> float:
        return float(np.mean((forward_numpy(layers, z) - z) ** 2))

    return FitResult(layers=layers, scaler=scaler, widths=(k,), train_loss=lin_mse(z_tr),
                     val_loss=lin_mse(z_va), best_epoch=0, epochs_run=0, stopped_early=False)
