"""Reference checks for the commissioning toolkit, each naming its source."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx.reference import ReferenceEvaluator
from scipy.stats import rankdata
from sklearn.metrics import roc_auc_score

from agent.commission.autoencoder import TrainConfig, fit_autoencoder
from agent.commission.calibrate import calibrate
from agent.commission.dataset import write_dataset
from agent.commission.export import export_dense, forward_numpy
from agent.commission.judging import rank_average, roc_auc
from agent.commission.train import train_bundle
from agent.models.bundle import load_bundle

F = 40
NAMES = [f"ch{i // 5}.f{i % 5}" for i in range(F)]


def _windows(n: int, seed: int) -> np.ndarray:
    # Invented test data: 4 latent factors mixed nonlinearly into 40 features + 5 % noise;
    # the mixing matrix is fixed so every call describes the same "machine".
    mix = np.random.default_rng(1234).normal(size=(4, F))
    rng = np.random.default_rng(seed)
    lat = rng.normal(size=(n, 4))
    return 10.0 + 3.0 * (np.tanh(lat @ mix / 2.0) + 0.05 * rng.normal(size=(n, F)))


@pytest.fixture(scope="module")
def fitted():
    x = _windows(600, 0)
    fit = fit_autoencoder(x[:500], x[500:], TrainConfig(epochs=40, seed=0))
    z = fit.scaler.transform(_windows(200, 1)).astype(np.float32)
    return fit, z


def test_onnx_export_matches_numpy_and_onnxruntime(fitted) -> None:
    """Source: onnxruntime (the runtime the daemon uses) vs our float64 numpy forward pass
    of the same trained layers; they must agree to 1e-5."""
    fit, z = fitted
    model = export_dense(fit.layers)
    sess = ort.InferenceSession(model, providers=["CPUExecutionProvider"])
    got = sess.run(None, {"x": z})[0]
    np.testing.assert_allclose(got, forward_numpy(fit.layers, z), rtol=1e-5, atol=1e-5)


def test_onnx_export_matches_reference_evaluator(fitted) -> None:
    """Source: onnx.reference.ReferenceEvaluator, the ONNX project's executable
    specification of the operators; our export must give forward_numpy's output."""
    fit, z = fitted
    model = onnx.load_from_string(export_dense(fit.layers))
    onnx.checker.check_model(model)
    assert model.ir_version == 8 and model.opset_import[0].version == 17
    got = ReferenceEvaluator(model).run(None, {"x": z})[0]
    np.testing.assert_allclose(got, forward_numpy(fit.layers, z), rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize(("q", "margin", "clear_ratio"), [
    (0.995, 1.25, 0.8), (0.99, 1.0, 0.5), (1.0, 1.1, 0.9), (0.9, 2.0, 0.3)])
def test_threshold_is_numpy_quantile_times_margin(q: float, margin: float,
                                                  clear_ratio: float) -> None:
    """Source: numpy.quantile (default 'linear' method, Hyndman & Fan type 7)."""
    s = np.random.default_rng(4).gamma(2.0, 0.01, size=437)
    c = calibrate(s, quantile=q, margin=margin, clear_ratio=clear_ratio)
    assert c.threshold == np.quantile(s, q) * margin
    assert c.clear_threshold == min(c.threshold, max(clear_ratio * c.threshold, np.median(s)))
    assert c.clear_threshold >= np.median(s) or c.clear_threshold == c.threshold
    assert c.n_windows == 437


def test_trained_bundle_threshold_from_its_held_out_scores(tmp_path: Path) -> None:
    """The threshold is recomputed from the held-out windows' scores through
    agent.models.bundle.load_bundle (the daemon's scoring): those windows are the last in time
    (forward validation), and calibrate_tail on their scores with the settings in
    model.json gives the bundle's threshold; a pot-gpd tail's level is checked against
    scipy.stats.genpareto (source: its ppf)."""
    from scipy import stats

    from agent.commission.tail import calibrate_tail

    t = 1.75e9 + 10.0 * np.arange(700)
    x = _windows(700, 2)
    write_dataset(tmp_path / "ds", x, NAMES, t, t + 10, ["run"] * 700, asset="P-101")
    report = train_bundle(tmp_path / "ds", tmp_path / "b", epochs=20)
    doc = json.loads((tmp_path / "b" / "model.json").read_text())
    ca = report.calib_index
    np.testing.assert_array_equal(ca, np.arange(700 - len(ca), 700))  # the last windows
    scores, _ = load_bundle(tmp_path / "b").score(x[ca])
    cal = doc["calibration"]
    det = cal["detector"]
    again = calibrate_tail(scores, length_s=10, hop_s=10, raise_k=det["raise_k"],
                           raise_n=det["raise_n"],
                           budget_per_week=cal["false_alarm_budget_per_week"],
                           margin=cal["margin"], clear_ratio=cal["clear_ratio"])
    assert doc["threshold"] == pytest.approx(again.threshold, rel=1e-6)
    assert cal["n_windows"] == len(ca)
    if cal["method"] == "pot-gpd":
        g = cal["gpd"]
        level = g["u"] + stats.genpareto.ppf(1 - cal["target_exceedance_per_window"] / g["zeta"],
                                              g["xi"], 0, g["sigma"])
        assert doc["threshold"] == pytest.approx(level * cal["margin"], rel=1e-6)
    else:
        assert doc["threshold"] == pytest.approx(float(scores.max()) * cal["margin"], rel=1e-6)
    assert doc["training"]["split"]["calib"] == len(ca)


def _auc_cases():
    rng = np.random.default_rng(11)
    cases = []
    for n, ties in ((50, False), (300, True), (1000, False), (37, True)):
        y = rng.random(n) < 0.3
        s = rng.normal(size=n) + 1.2 * y
        if ties:
            s = np.round(s, 0)  # heavy ties: a handful of distinct values
        cases.append((s, y))
    cases.append((np.ones(20), np.arange(20) % 2 == 0))  # every score tied
    return cases


@pytest.mark.parametrize(("scores", "labels"), _auc_cases())
def test_roc_auc_matches_sklearn(scores: np.ndarray, labels: np.ndarray) -> None:
    """Source: sklearn.metrics.roc_auc_score (trapezoidal ROC area, ties included)."""
    assert roc_auc(scores, labels) == pytest.approx(roc_auc_score(labels, scores), abs=1e-12)


def test_rank_average_matches_scipy() -> None:
    """Source: scipy.stats.rankdata(method='average')."""
    x = np.round(np.random.default_rng(5).normal(size=500), 1)
    np.testing.assert_array_equal(rank_average(x), rankdata(x, method="average"))
