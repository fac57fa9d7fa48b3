"""Re-learning "normal" after maintenance: the pure core of a rebaseline. No files, no clock.

A rebaseline takes the active model (its dense layers, scaler and calibration), N
windows of the new normal and the model's rehearsal set (a bounded reservoir sample of
the windows it was trained on), and returns either a new model or the reason it is
refused or rejected, always with the figures:

1. **Shift guard.** `shift` = median old-model score of the new windows / old
   threshold. Above `max_shift` the request is refused (no training) unless it says
   `accept_shift`: data far from everything the model knows is more likely a fault than
   a modification, and teaching a fault as normal would blind the detector to it.
2. **Split.** The new windows are split in blocks of consecutive windows (seeded) into
   train / val / calib / test; the rehearsal set the same way (it is unordered, so its
   blocks are just random subsets).
3. **Fine-tune** from the existing weights (not from scratch), in the old scaler's
   units, with Adam on new-train + rehearsal-train mixed, early-stopped on
   new-val + rehearsal-val. Keeping the scaler keeps every feature's sensitivity; the
   rehearsal windows keep what the new windows do not show (other speeds, other
   duties) from being forgotten.
4. **Recalibrate** the threshold on the held-out new-normal calib windows together
   with the held-out rehearsal calib windows, with the old model's quantile, margin and
   clear ratio: a threshold from the new windows alone would be too low for the
   conditions only the rehearsal set holds.
5. **Validation gate.** Accepted only if (a) the false-alarm rate (share of windows
   above the new threshold) on the held-out new-normal *test* windows — never used to
   fit or calibrate — is within `false_alarm_budget`, and (b) the mean score on the
   held-out rehearsal test windows has not grown beyond `rehearsal_tolerance` x the old
   model's. Otherwise rejected with the figures; the old model stays.
6. The new rehearsal set is the old reservoir continued over the new windows
   (Vitter's Algorithm R), so it stays a uniform sample of everything learnt, bounded.

Scores are the daemon's: mean squared error of standardised features. Calibration and
gate scores go through onnxruntime on the exported model (`score_fn`), as the daemon
scores.
"""

from __future__ import annotations

import enum
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from agent.commission.autoencoder import subspace_layers
from agent.commission.calibrate import (
    DEFAULT_CLEAR_RATIO,
    DEFAULT_MARGIN,
    DEFAULT_QUANTILE,
    calibrate,
)
from agent.commission.export import DenseLayer, forward_numpy
from agent.config.rebaseline import (  # the defaults live with the config section, numpy-free
    DEFAULT_FALSE_ALARM_BUDGET,
    DEFAULT_MAX_SHIFT,
    DEFAULT_REHEARSAL_SIZE,
    DEFAULT_REHEARSAL_TOLERANCE,
    MIN_NEW_WINDOWS,
)
from agent.core.detector import DetectorParams, Transition, run_detector
from agent.errors import RebaselineError
from agent.learning.rehearsal import Rehearsal, reservoir

SPLIT = (0.5, 0.15, 0.175, 0.175)  # train, val, calib, test


class Verdict(enum.StrEnum):
    ACCEPTED = "accepted"
    REJECTED = "rejected"  # trained, but failed the validation gate
    REFUSED = "refused"  # not trained: the shift guard


@dataclass(frozen=True)
class Settings:
    """How a rebaseline trains and judges. `train_on_rehearsal=False` exists to show
    what rehearsal is for (fine-tuning on the new windows alone forgets)."""

    max_shift: float = DEFAULT_MAX_SHIFT
    false_alarm_budget: float = DEFAULT_FALSE_ALARM_BUDGET
    rehearsal_tolerance: float = DEFAULT_REHEARSAL_TOLERANCE
    rehearsal_size: int = DEFAULT_REHEARSAL_SIZE
    epochs: int = 300
    batch_size: int = 64
    learning_rate: float = 1e-3
    patience: int = 20
    min_delta: float = 1e-4
    seed: int = 0
    detector: DetectorParams = field(default_factory=DetectorParams)
    train_on_rehearsal: bool = True

    def as_json(self) -> dict[str, Any]:
        return {"max_shift": self.max_shift, "false_alarm_budget": self.false_alarm_budget,
                "rehearsal_tolerance": self.rehearsal_tolerance,
                "rehearsal_size": self.rehearsal_size, "epochs": self.epochs,
                "batch_size": self.batch_size, "learning_rate": self.learning_rate,
                "patience": self.patience, "seed": self.seed,
                "train_on_rehearsal": self.train_on_rehearsal}


# -- layers from ONNX ---------------------------------------------------------------------

def layers_from_onnx(model_bytes: bytes) -> list[DenseLayer]:
    """The dense layers of an ONNX model written by `export_dense` (Gemm + activation
    chain), read back from its initializers; RebaselineError for any other graph."""
    from agent.models.dense import dense_layers

    layers = dense_layers(model_bytes)
    if layers is None:
        raise RebaselineError("the model is not a plain dense network (Gemm chain with "
                              "constant weights); rebaseline can only fine-tune models "
                              "`watchkeep train` made")
    # fine-tuning works in float64
    return [DenseLayer(ly.weight.astype(np.float64), ly.bias.astype(np.float64),
                       ly.activation) for ly in layers]


# -- fine-tuning --------------------------------------------------------------------------

def _act(name: str, h: np.ndarray) -> np.ndarray:
    if name == "tanh":
        return np.tanh(h)
    if name == "relu":
        return np.maximum(h, 0.0)
    if name == "sigmoid":
        return 1.0 / (1.0 + np.exp(-h))
    return h


def _act_grad(name: str, a: np.ndarray) -> np.ndarray:
    """Derivative of the activation, from its output `a`."""
    if name == "tanh":
        return 1.0 - a * a
    if name == "relu":
        return (a > 0).astype(a.dtype)
    if name == "sigmoid":
        return a * (1.0 - a)
    return np.ones_like(a)


def _forward(params: list[list[np.ndarray]], kinds: Sequence[str],
             z: np.ndarray) -> list[np.ndarray]:
    acts = [z]
    h = z
    for (w, b), k in zip(params, kinds, strict=True):
        h = _act(k, h @ w + b)
        acts.append(h)
    return acts


def _mse(params: list[list[np.ndarray]], kinds: Sequence[str], z: np.ndarray) -> float:
    return float(np.mean((_forward(params, kinds, z)[-1] - z) ** 2))


def _grads(params: list[list[np.ndarray]], kinds: Sequence[str],
           z: np.ndarray) -> list[list[np.ndarray]]:
    acts = _forward(params, kinds, z)
    n, f = z.shape
    delta = 2.0 * (acts[-1] - z) / (n * f) * _act_grad(kinds[-1], acts[-1])
    grads: list[list[np.ndarray]] = [[np.empty(0), np.empty(0)] for _ in params]
    for i in range(len(params) - 1, -1, -1):
        grads[i] = [acts[i].T @ delta, delta.sum(axis=0)]
        if i:
            delta = (delta @ params[i][0].T) * _act_grad(kinds[i - 1], acts[i])
    return grads


@dataclass(frozen=True)
class FineTune:
    layers: list[DenseLayer]
    train_loss: float
    val_loss: float
    val_loss_before: float
    best_epoch: int
    epochs_run: int


def is_linear(layers: Sequence[DenseLayer]) -> bool:
    """A linear (PCA) autoencoder as `train` writes it: two linear layers."""
    return len(layers) == 2 and all(ly.activation == "linear" for ly in layers)


def refit_linear(layers: Sequence[DenseLayer], z_train: np.ndarray,
                 z_val: np.ndarray) -> FineTune:
    """Re-learn a linear autoencoder: the principal subspace of the same dimension, refitted
    to the (standardised, old-scaler) training rows. Gradient steps on a linear model
    untie its encoder and decoder and, on a few hundred windows, wander off the subspace
    (the rehearsal score grew 40x in a test); the least-squares subspace of new and
    rehearsal windows together is the exact answer, with the same capacity."""
    z = np.asarray(z_train, np.float64)
    new = subspace_layers(z, int(layers[0].weight.shape[1]))

    def mse(ls: Sequence[DenseLayer], x: np.ndarray) -> float:
        return float(np.mean((forward_numpy(ls, x) - x) ** 2)) if len(x) else 0.0

    return FineTune(layers=new, train_loss=mse(new, z), val_loss=mse(new, z_val),
                    val_loss_before=mse(layers, z_val), best_epoch=0, epochs_run=0)


def fine_tune(layers: Sequence[DenseLayer], z_train: np.ndarray, z_val: np.ndarray,
              s: Settings) -> FineTune:
    """Adam (Kingma & Ba 2015) from the given weights on standardised rows; the epoch with
    the lowest validation loss wins (epoch 0 = the weights as given). Same seed, same
    result."""
    kinds = [layer.activation for layer in layers]
    params = [[np.array(layer.weight, np.float64), np.array(layer.bias, np.float64)]
              for layer in layers]
    m = [[np.zeros_like(p) for p in lp] for lp in params]
    v = [[np.zeros_like(p) for p in lp] for lp in params]
    rng = np.random.default_rng([s.seed, 0xF1E7])
    before = _mse(params, kinds, z_val)
    best = (before, 0, [[p.copy() for p in lp] for lp in params])
    n = len(z_train)
    bs = max(1, min(s.batch_size, n))
    step = since = epoch = 0
    b1, b2, eps = 0.9, 0.999, 1e-8
    for epoch in range(1, s.epochs + 1):
        order = rng.permutation(n)
        for start in range(0, n, bs):
            g = _grads(params, kinds, z_train[order[start:start + bs]])
            step += 1
            c1, c2 = 1.0 - b1 ** step, 1.0 - b2 ** step
            for li, lp in enumerate(params):
                for pi, p in enumerate(lp):
                    gi = g[li][pi]
                    m[li][pi] = b1 * m[li][pi] + (1.0 - b1) * gi
                    v[li][pi] = b2 * v[li][pi] + (1.0 - b2) * gi * gi
                    p -= s.learning_rate * (m[li][pi] / c1) / (np.sqrt(v[li][pi] / c2) + eps)
        val = _mse(params, kinds, z_val)
        if val < best[0] * (1.0 - s.min_delta):
            best = (val, epoch, [[p.copy() for p in lp] for lp in params])
            since = 0
        else:
            since += 1
            if since >= s.patience:
                break
    out = [DenseLayer(w.copy(), b.copy(), k) for (w, b), k in zip(best[2], kinds, strict=True)]
    return FineTune(out, _mse(best[2], kinds, z_train), best[0], before, best[1], epoch)


# -- the whole rebaseline -----------------------------------------------------------------

def split_four(n: int, seed: int, fractions: Sequence[float] = SPLIT,
               block: int = 5) -> list[np.ndarray]:
    """Indices of `n` rows in len(fractions) parts made of whole blocks of `block`
    consecutive rows, assigned at random (seeded); every part gets at least one block."""
    n_blocks = max(len(fractions), -(-n // block))
    blocks = (np.arange(n) * n_blocks) // max(n, 1)
    order = np.random.default_rng([seed, 0x5B11]).permutation(n_blocks)
    counts = [max(1, round(f * n_blocks)) for f in fractions[1:]]
    counts.insert(0, n_blocks - sum(counts))
    if counts[0] < 1:
        raise RebaselineError(f"{n} windows are too few to split for training")
    parts, at = [], 0
    for c in counts:
        chosen = order[at:at + c]
        at += c
        parts.append(np.flatnonzero(np.isin(blocks, chosen)))
    return parts


@dataclass(frozen=True)
class OldModel:
    """What the rebaseline needs of the active model."""

    layers: list[DenseLayer]
    feature_names: tuple[str, ...]
    mean: np.ndarray
    scale: np.ndarray
    threshold: float
    clear_threshold: float
    version: int
    calibration: Mapping[str, Any] = field(default_factory=dict)

    def z(self, x: np.ndarray) -> np.ndarray:
        return (np.asarray(x, np.float64) - self.mean) / self.scale


def numpy_scores(layers: Sequence[DenseLayer], z: np.ndarray) -> np.ndarray:
    """Mean squared reconstruction error per standardised row (float64)."""
    if len(z) == 0:
        return np.empty(0)
    return np.mean((forward_numpy(layers, z) - z) ** 2, axis=1)


@dataclass(frozen=True)
class Outcome:
    """What a rebaseline decided, with every figure (`figures` goes into events)."""

    verdict: Verdict
    reasons: tuple[str, ...]
    figures: dict[str, Any]
    layers: list[DenseLayer] | None = None
    threshold: float | None = None
    clear_threshold: float | None = None
    calibration: dict[str, Any] | None = None
    rehearsal: Rehearsal | None = None


def _r(v: Any) -> float:
    return round(float(v), 6)


def shift_of(old: OldModel, x_new: np.ndarray) -> dict[str, float]:
    """How far the new windows sit from the old model: the median and 90th percentile of
    their old-model scores over the old threshold, and the largest mean shift of any
    feature in old standard deviations (the feature named)."""
    z = old.z(x_new)
    sc = numpy_scores(old.layers, z)
    zmean = np.abs(z.mean(axis=0))
    top = int(np.argmax(zmean))
    return {"shift": _r(np.median(sc) / old.threshold),
            "shift_p90": _r(np.quantile(sc, 0.9) / old.threshold),
            "max_feature_shift_sd": _r(zmean[top]),
            "max_feature_shift": old.feature_names[top]}  # type: ignore[dict-item]


def _check_new(old: OldModel, x_new: np.ndarray) -> np.ndarray:
    x_new = np.asarray(x_new, np.float64)
    if x_new.ndim != 2 or x_new.shape[1] != len(old.feature_names):
        raise RebaselineError("the new windows do not match the model's features")
    if len(x_new) < MIN_NEW_WINDOWS:
        raise RebaselineError(f"only {len(x_new)} new window(s); at least {MIN_NEW_WINDOWS} "
                              "are needed")
    if not np.all(np.isfinite(x_new)):
        raise RebaselineError("the new windows contain non-finite features")
    return x_new


def _refusal(figures: Mapping[str, Any], s: Settings) -> Outcome:
    return Outcome(Verdict.REFUSED, (
        f"the new windows sit {figures['shift']:.3g}x the old threshold from the model "
        f"(max_shift {s.max_shift:g}; largest feature shift "
        f"{figures['max_feature_shift_sd']:.3g} sd in {figures['max_feature_shift']}): "
        "this looks like a fault, not a new normal; inspect the machine, or repeat "
        "with --accept-shift",), dict(figures))


@dataclass(frozen=True)
class _Split:
    """The new windows (standardised) and the rehearsal set split four ways: train,
    validation, calibration, test; `use_reh` whether rehearsal rows join the first three."""

    z_new: np.ndarray
    new: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]
    z_reh: np.ndarray
    reh: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]
    use_reh: bool

    def part(self, i: int) -> np.ndarray:
        """Part `i` of the new windows, with the rehearsal set's when it is used."""
        if self.use_reh:
            return np.concatenate([self.z_new[self.new[i]], self.z_reh[self.reh[i]]])
        return self.z_new[self.new[i]]


def _split(old: OldModel, x_new: np.ndarray, reh: Rehearsal | None, s: Settings) -> _Split:
    z_new = old.z(x_new)
    n_tr, n_va, n_ca, n_te = split_four(len(z_new), s.seed)
    if reh is not None:
        z_reh = old.z(reh.features)
        r_tr, r_va, r_ca, r_te = split_four(len(z_reh), s.seed + 1, block=1) \
            if len(z_reh) >= 8 else [np.arange(len(z_reh))] * 4
    else:
        z_reh = np.empty((0, z_new.shape[1]))
        r_tr = r_va = r_ca = r_te = np.empty(0, np.int64)
    return _Split(z_new, (n_tr, n_va, n_ca, n_te), z_reh, (r_tr, r_va, r_ca, r_te),
                  s.train_on_rehearsal and reh is not None)


def _rehearsal_check(old: OldModel, ft: FineTune, sp: _Split, has_reh: bool, threshold: float,
                     s: Settings, figures: dict[str, Any], reasons: list[str]) -> None:
    """Does the new model still know the rehearsal set (the conditions trained before)?"""
    r_te = sp.reh[3]
    if has_reh and len(r_te):
        before = float(np.mean(numpy_scores(old.layers, sp.z_reh[r_te])))
        after_s = numpy_scores(ft.layers, sp.z_reh[r_te])
        after = float(np.mean(after_s))
        ratio = after / before if before > 0 else float("inf")
        figures.update({"rehearsal_score_old": _r(before), "rehearsal_score": _r(after),
                        "rehearsal_ratio": _r(ratio) if np.isfinite(ratio) else None,
                        "rehearsal_tolerance": s.rehearsal_tolerance,
                        "rehearsal_false_alarm_rate": _r(np.mean(after_s > threshold))})
        if ratio > s.rehearsal_tolerance:
            reasons.append(f"the score on the rehearsal set grew {ratio:.3g}x (tolerance "
                           f"{s.rehearsal_tolerance:g}): the model would forget what it knew")
    else:
        figures["rehearsal_ratio"] = None
        reasons.append("no rehearsal set: the model cannot be checked for forgetting")


def _held_out(old: OldModel, ft: FineTune, sp: _Split,
              score: Callable[[list[DenseLayer], np.ndarray], np.ndarray], threshold: float,
              clear_threshold: float, s: Settings) -> tuple[float, dict[str, Any]]:
    """The new model on the held-out new windows: its false-alarm rate, and the figures
    of the split, the fine-tuning and the test."""
    n_tr, n_va, n_ca, n_te = sp.new
    test = score(ft.layers, sp.z_new[n_te])
    fa_rate = float(np.mean(test > threshold))
    raised = sum(1 for _, t in run_detector(test, threshold, clear_threshold, s.detector)
                 if t is Transition.RAISED)
    old_test = numpy_scores(old.layers, sp.z_new[n_te])
    r_tr, _, r_ca, r_te = sp.reh
    return fa_rate, {
        "split": {"train": len(n_tr), "val": len(n_va), "calib": len(n_ca), "test": len(n_te),
                  "rehearsal_train": len(r_tr) if sp.use_reh else 0,
                  "rehearsal_calib": len(r_ca) if sp.use_reh else 0,
                  "rehearsal_test": len(r_te)},
        "fine_tune": {"epochs_run": ft.epochs_run, "best_epoch": ft.best_epoch,
                      "val_loss_before": _r(ft.val_loss_before), "val_loss": _r(ft.val_loss),
                      "train_loss": _r(ft.train_loss)},
        "old_threshold": _r(old.threshold), "threshold": _r(threshold),
        "clear_threshold": _r(clear_threshold),
        "old_false_alarm_rate": _r(np.mean(old_test > old.threshold)),
        "false_alarm_rate": _r(fa_rate), "false_alarm_budget": s.false_alarm_budget,
        "raised_on_test": raised,
    }


def rebaseline(old: OldModel, x_new: np.ndarray, rehearsal: Rehearsal | None, s: Settings, *,
               accept_shift: bool,
               score_fn: Callable[[list[DenseLayer], np.ndarray], np.ndarray] | None = None
               ) -> Outcome:
    """Run one rebaseline (module docstring); `x_new` rows are in `old.feature_names` order.

    `score_fn(layers, z)` scores standardised rows as the daemon will (onnxruntime on
    the exported model); numpy's forward pass when not given.
    """
    x_new = _check_new(old, x_new)
    score = score_fn or (lambda layers, z: numpy_scores(layers, z))
    figures: dict[str, Any] = {"old_version": old.version, "n_new": len(x_new),
                               "settings": s.as_json(), "accept_shift": accept_shift}
    figures.update(shift_of(old, x_new))
    over = figures["shift"] > s.max_shift
    figures["shift_exceeded"] = bool(over)
    if over and not accept_shift:
        return _refusal(figures, s)
    reh = rehearsal if rehearsal is not None and rehearsal.size else None
    if reh is not None and tuple(reh.feature_names) != old.feature_names:
        raise RebaselineError("the rehearsal set's features differ from the model's")
    sp = _split(old, x_new, reh, s)
    ft = refit_linear(old.layers, sp.part(0), sp.part(1)) if is_linear(old.layers) else \
        fine_tune(old.layers, sp.part(0), sp.part(1), s)
    cal_z = sp.part(2)
    c = old.calibration
    cal = calibrate(score(ft.layers, cal_z),
                    quantile=float(c.get("quantile", DEFAULT_QUANTILE)),
                    margin=float(c.get("margin", DEFAULT_MARGIN)),
                    clear_ratio=float(c.get("clear_ratio", DEFAULT_CLEAR_RATIO)),
                    min_windows=min(20, len(cal_z)))
    fa_rate, held_out = _held_out(old, ft, sp, score, cal.threshold, cal.clear_threshold, s)
    figures.update(held_out)
    reasons = []
    if fa_rate > s.false_alarm_budget:
        reasons.append(f"false-alarm rate on held-out new-normal windows {fa_rate:.3g} is "
                       f"over the budget {s.false_alarm_budget:g}")
    _rehearsal_check(old, ft, sp, reh is not None, cal.threshold, s, figures, reasons)
    new_reh = reservoir(x_new, old.feature_names, s.rehearsal_size, seed=s.seed,
                        start=reh)
    verdict = Verdict.REJECTED if reasons else Verdict.ACCEPTED
    return Outcome(verdict, tuple(reasons), figures, ft.layers, cal.threshold,
                   cal.clear_threshold, cal.as_json(), new_reh)
