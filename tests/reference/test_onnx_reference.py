"""Exported models against references: the ONNX reference evaluator and a numpy forward pass."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx.reference import ReferenceEvaluator

from agent.commission.export import (
    INPUT_NAME,
    IR_VERSION,
    OPSET,
    OUTPUT_NAME,
    DenseLayer,
    export_dense,
    forward_numpy,
    pca_autoencoder,
)
from agent.models.bundle import load_bundle, write_bundle

F = 6


def training_rows(seed: int = 0, n: int = 400) -> np.ndarray:
    """Standardised rows with two latent factors plus noise, like correlated plant readings."""
    rng = np.random.default_rng(seed)
    latent = rng.normal(size=(n, 2))
    mix = rng.normal(size=(2, F))
    x = latent @ mix + 0.1 * rng.normal(size=(n, F))
    return (x - x.mean(0)) / x.std(0)


def tanh_mlp(seed: int = 1) -> list[DenseLayer]:
    """A small nonlinear autoencoder F -> 4 -> 2 -> 4 -> F with random weights."""
    rng = np.random.default_rng(seed)
    sizes = [F, 4, 2, 4, F]
    acts = ["tanh", "tanh", "tanh", "linear"]
    return [DenseLayer(rng.normal(0, 0.7, (a, b)), rng.normal(0, 0.2, b), act)
            for a, b, act in zip(sizes[:-1], sizes[1:], acts, strict=True)]


MODELS = {
    "pca_linear_autoencoder": lambda: pca_autoencoder(training_rows(), 2),
    "tanh_mlp": tanh_mlp,
    "relu_sigmoid_mlp": lambda: [
        DenseLayer(np.random.default_rng(2).normal(0, 0.5, (F, 3)), np.full(3, 0.1), "relu"),
        DenseLayer(np.random.default_rng(3).normal(0, 0.5, (3, F)), np.zeros(F), "sigmoid")],
}


def bundle_meta() -> dict:
    return {
        "asset": "P-101", "model_id": "P-101/default", "version": 1,
        "feature_names": [f"ch{i}.mean" for i in range(F)],
        "scaler": {"mean": [0.0] * F, "scale": [1.0] * F}, "score": {"function": "mse"},
        "threshold": 1.0, "clear_threshold": 0.8,
        "onnx": {"input": INPUT_NAME, "output": OUTPUT_NAME, "opset": OPSET,
                 "ir_version": IR_VERSION},
    }


@pytest.mark.parametrize("name", list(MODELS))
def test_export_matches_reference_evaluator_numpy_and_onnxruntime(name: str,
                                                                  tmp_path: Path) -> None:
    """Source: onnx.reference.ReferenceEvaluator (the ONNX project's executable spec of the
    operators) and the same network in numpy (float64); onnxruntime through the bundle
    loader must agree with both to 1e-5."""
    layers = MODELS[name]()
    model_bytes = export_dense(layers)
    z = np.random.default_rng(9).normal(size=(257, F)).astype(np.float32)

    ref = ReferenceEvaluator(onnx.load_from_string(model_bytes)).run(None, {INPUT_NAME: z})[0]
    ours_numpy = forward_numpy(layers, z)
    bundle = load_bundle(write_bundle(tmp_path / "b", model_bytes, bundle_meta()))
    ours_ort = bundle.reconstruct(z)

    assert ref.shape == ours_numpy.shape == ours_ort.shape == (257, F)
    np.testing.assert_allclose(ours_ort, ref, rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(ours_numpy, ref, rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(ours_ort, ours_numpy, rtol=1e-5, atol=1e-5)


def test_exported_model_declares_its_versions_and_shapes() -> None:
    """IR version and opset are set explicitly (older runtimes refuse newer IR); the graph
    is x [N, F] float -> recon [N, F] float and passes the ONNX checker."""
    model = onnx.load_from_string(export_dense(tanh_mlp()))
    onnx.checker.check_model(model, full_check=True)
    assert model.ir_version == IR_VERSION
    assert [(o.domain, o.version) for o in model.opset_import] == [("", OPSET)]
    (inp,), (out,) = model.graph.input, model.graph.output
    assert inp.name == INPUT_NAME and out.name == OUTPUT_NAME
    for v in (inp, out):
        assert v.type.tensor_type.elem_type == onnx.TensorProto.FLOAT
        dims = v.type.tensor_type.shape.dim
        assert dims[0].dim_param == "N" and dims[1].dim_value == F


def test_pca_autoencoder_is_the_projection_on_the_principal_subspace() -> None:
    """Source: Baldi & Hornik (1989), the optimal linear autoencoder of width k projects on
    the top-k principal components; checked against numpy's SVD directly, and its
    reconstruction error equals the variance left in the other components."""
    z = training_rows(seed=4)
    k = 2
    layers = pca_autoencoder(z, k)
    mu = z.mean(0)
    _, s, vt = np.linalg.svd(z - mu, full_matrices=False)
    proj = (z - mu) @ vt[:k].T @ vt[:k] + mu
    np.testing.assert_allclose(forward_numpy(layers, z), proj, atol=1e-10)
    mse = ((z - forward_numpy(layers, z)) ** 2).sum() / z.size
    assert mse == pytest.approx((s[k:] ** 2).sum() / z.size, rel=1e-9)
    full = pca_autoencoder(z, F)  # all components: the identity
    np.testing.assert_allclose(forward_numpy(full, z), z, atol=1e-10)


def test_bundle_score_is_numpy_mse_of_standardised_features(tmp_path: Path) -> None:
    """Bundle.score equals, in numpy: z = (x - mean) / scale, recon = forward(z),
    score = mean((z - recon)^2) over features (the DESIGN.md score)."""
    layers = tanh_mlp()
    rng = np.random.default_rng(5)
    mean = rng.normal(50, 10, F)
    scale = rng.uniform(0.1, 3.0, F)
    meta = {**bundle_meta(), "scaler": {"mean": mean.tolist(), "scale": scale.tolist()}}
    bundle = load_bundle(write_bundle(tmp_path / "b", export_dense(layers), meta))
    x = mean + scale * rng.normal(size=(100, F)) * 1.5
    scores, sq = bundle.score(x)
    z = (x - mean) / scale
    want_sq = (z - forward_numpy(layers, z)) ** 2
    np.testing.assert_allclose(sq, want_sq, rtol=1e-4, atol=1e-5)
    np.testing.assert_allclose(scores, want_sq.mean(axis=1), rtol=1e-4, atol=1e-5)
