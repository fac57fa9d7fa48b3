"""Batched inference across assets (agent/pipeline/batched.py) against each model's own run.

References: each bundle's own onnxruntime session (`Bundle.reconstruct`), the `onnx`
package's reference evaluator (`onnx.reference`) on the batched graph, and
`forward_numpy` (float64) for the layers read back. Tolerances are float32
rounding (common practice, no source).
"""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
import onnx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from agent.commission.export import ACTIVATIONS, DenseLayer, export_dense, forward_numpy
from agent.models.bundle import Bundle, load_bundle, write_bundle
from agent.models.dense import dense_layers
from agent.pipeline.batched import MAX_PARAMS, BatchedModels, batched_model, n_params

F = 6


def _layers(rng: np.random.Generator, sizes: list[int], acts: list[str]) -> list[DenseLayer]:
    return [DenseLayer(rng.normal(size=(a, b)) / np.sqrt(a), rng.normal(size=b) * 0.1, act)
            for a, b, act in zip(sizes[:-1], sizes[1:], acts, strict=True)]


def _bundle(tmp: Path, name: str, model: bytes, n: int = F) -> Bundle:
    meta = {"asset": name, "mode": "default", "model_id": f"{name}/default", "version": 1,
            "feature_names": [f"c.f{i}" for i in range(n)],
            "scaler": {"mean": [0.0] * n, "scale": [1.0] * n},
            "score": {"function": "mse"}, "threshold": 1.0, "clear_threshold": 0.5,
            "onnx": {"input": "x", "output": "recon"}}
    return load_bundle(write_bundle(tmp / name, model, meta))


@settings(max_examples=40, deadline=None)
@given(sizes=st.lists(st.integers(1, 9), min_size=1, max_size=3),
       acts=st.lists(st.sampled_from(sorted(ACTIVATIONS)), min_size=3, max_size=3),
       seed=st.integers(0, 2**32 - 1))
def test_dense_layers_reads_back_what_export_dense_wrote(sizes: list[int], acts: list[str],
                                                         seed: int) -> None:
    rng = np.random.default_rng(seed)
    layers = _layers(rng, [F, *sizes, F], (acts * 2)[:len(sizes) + 1])
    back = dense_layers(export_dense(layers))
    assert back is not None and len(back) == len(layers)
    for got, want in zip(back, layers, strict=True):
        assert got.activation == want.activation
        np.testing.assert_array_equal(got.weight, want.weight.astype(np.float32))
        np.testing.assert_array_equal(got.bias, want.bias.astype(np.float32))


def _graph(nodes: list, inits: list, inputs: list[str] = ("x",), outputs: list[str] = ("y",)
           ) -> bytes:
    g = helper.make_graph(
        nodes, "g",
        [helper.make_tensor_value_info(i, TensorProto.FLOAT, ["N", F]) for i in inputs],
        [helper.make_tensor_value_info(o, TensorProto.FLOAT, ["N", F]) for o in outputs],
        initializer=inits)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    m.ir_version = 8
    return m.SerializeToString()


_W = numpy_helper.from_array(np.eye(F, dtype=np.float32), "W")
_B = numpy_helper.from_array(np.zeros(F, dtype=np.float32), "B")


@pytest.mark.parametrize("model", [
    _graph([helper.make_node("MatMul", ["x", "W"], ["m"]),
            helper.make_node("Add", ["m", "B"], ["y"])], [_W, _B]),
    _graph([helper.make_node("Gemm", ["x", "W", "B"], ["y"], transB=1)], [_W, _B]),
    _graph([helper.make_node("Gemm", ["x", "W", "B"], ["y"], alpha=2.0)], [_W, _B]),
    _graph([helper.make_node("Gemm", ["x", "W", "B"], ["y"])], [_B], inputs=["x", "W"]),
    _graph([helper.make_node("Gemm", ["x", "W", "B"], ["g"]),
            helper.make_node("Exp", ["g"], ["y"])], [_W, _B]),
    _graph([helper.make_node("Gemm", ["x", "W", "B"], ["y"]),
            helper.make_node("Relu", ["y"], ["z"])], [_W, _B], outputs=["y", "z"]),
    b"not an onnx model at all",
], ids=["matmul-add", "transB", "alpha", "weights-as-input", "other-activation",
        "two-outputs", "garbage"])
def test_dense_layers_declines_other_graphs(model: bytes) -> None:
    assert dense_layers(model) is None


def test_batched_graph_passes_onnx_checker_and_matches_reference_evaluator() -> None:
    rng = np.random.default_rng(3)
    members = [dense_layers(export_dense(_layers(rng, [F, 3, F], ["tanh", "sigmoid"])))
               for _ in range(4)]
    model = batched_model([m for m in members if m is not None])
    parsed = onnx.load_model_from_string(model)
    onnx.checker.check_model(parsed, full_check=True)
    x = rng.normal(size=(7, F)).astype(np.float32)
    slots = np.array([3, 0, 0, 2, 1, 3, 2], np.int64)
    (got,) = ReferenceEvaluator(parsed).run(None, {"x": x, "slot": slots})
    for k, s in enumerate(slots):
        want = forward_numpy([DenseLayer(ly.weight, ly.bias, ly.activation)
                              for ly in members[s] or ()], x[k:k + 1])[0]
        np.testing.assert_allclose(got[k], want, rtol=1e-5, atol=1e-6)


@settings(max_examples=8, deadline=None)
@given(acts=st.lists(st.sampled_from(sorted(ACTIVATIONS)), min_size=2, max_size=2),
       seed=st.integers(0, 2**32 - 1), n_rows=st.integers(1, 30))
def test_batched_run_equals_each_models_own_run(tmp_path_factory: pytest.TempPathFactory,
                                                acts: list[str], seed: int,
                                                n_rows: int) -> None:
    tmp = tmp_path_factory.mktemp("b")
    rng = np.random.default_rng(seed)
    bundles = [_bundle(tmp, f"A{i}", export_dense(_layers(rng, [F, 4, F], acts)))
               for i in range(5)]
    batched = BatchedModels(bundles)
    assert batched.n_models == 5 and len(batched.groups) == 1
    picks = rng.integers(0, 5, size=n_rows)  # repeats: an asset closing two windows
    z = rng.normal(size=(n_rows, F)).astype(np.float32)
    slots = np.array([batched.slot_of(bundles[p])[1] for p in picks], np.int64)
    got = batched.groups[0].run(z, slots)
    for k, p in enumerate(picks):
        np.testing.assert_allclose(got[k], bundles[p].reconstruct(z[k:k + 1])[0],
                                   rtol=1e-5, atol=1e-6)


def test_groups_by_shape_and_leaves_the_rest_alone(tmp_path: Path) -> None:
    rng = np.random.default_rng(1)
    a = [_bundle(tmp_path, f"A{i}", export_dense(_layers(rng, [F, 3, F], ["tanh", "linear"])))
         for i in range(3)]
    b = [_bundle(tmp_path, f"B{i}", export_dense(_layers(rng, [F, 2, F], ["relu", "linear"])))
         for i in range(2)]
    lone = _bundle(tmp_path, "C", export_dense(_layers(rng, [F, 5, F], ["linear", "linear"])))
    other = _bundle(tmp_path, "D", _graph([helper.make_node("MatMul", ["x", "W"], ["m"]),
                                           helper.make_node("Add", ["m", "B"], ["recon"])],
                                          [_W, _B], outputs=["recon"]))
    assert other.dense is None
    batched = BatchedModels([*a, *b, lone, other, a[0]])  # a repeat is counted once
    assert len(batched.groups) == 2 and batched.n_models == 5
    assert batched.slot_of(lone) is None and batched.slot_of(other) is None
    assert all(batched.considered(x) for x in [*a, *b, lone, other])
    assert {batched.slot_of(x)[0] for x in a} != {batched.slot_of(x)[0] for x in b}


def test_a_member_that_does_not_match_its_own_run_runs_alone(
        tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    rng = np.random.default_rng(2)
    bundles = [_bundle(tmp_path, f"A{i}", export_dense(_layers(rng, [F, 3, F],
                                                              ["tanh", "linear"])))
               for i in range(3)]
    bad = bundles[1]
    assert bad.dense is not None
    w0 = bad.dense[0]
    bad.dense = (DenseLayer(w0.weight * 2, w0.bias, w0.activation), *bad.dense[1:])
    with caplog.at_level(logging.WARNING):
        batched = BatchedModels(bundles, logging.getLogger("t"))
    assert batched.slot_of(bad) is None and batched.considered(bad)
    assert batched.slot_of(bundles[0]) is not None and batched.slot_of(bundles[2]) is not None
    assert "differs from its own run" in caplog.text


def test_models_above_the_size_cap_run_alone(tmp_path: Path) -> None:
    rng = np.random.default_rng(4)
    hidden = MAX_PARAMS // (2 * F) + 1  # just over the cap
    big = [_bundle(tmp_path, f"A{i}", export_dense(_layers(rng, [F, hidden, F],
                                                            ["relu", "linear"])))
           for i in range(2)]
    assert big[0].dense is not None and n_params(big[0].dense) > MAX_PARAMS
    batched = BatchedModels(big)
    assert batched.n_models == 0 and not batched.groups
    assert all(batched.considered(b) for b in big)
