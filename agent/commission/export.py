"""Export a dense network (a list of layers) to ONNX with `onnx.helper`.

The graph is input `x` [N, F] float32 -> Gemm/activation chain -> output `recon`
[N, F]. The IR version and opset are set explicitly, since older runtimes reject
files written with a newer IR (PITFALLS.md), and are returned for `model.json`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

OPSET = 17
IR_VERSION = 8
INPUT_NAME = "x"
OUTPUT_NAME = "recon"
ACTIVATIONS = {"linear": None, "tanh": "Tanh", "relu": "Relu", "sigmoid": "Sigmoid"}


@dataclass(frozen=True)
class DenseLayer:
    """y = act(x @ weight + bias); weight is [in, out]."""

    weight: np.ndarray
    bias: np.ndarray
    activation: str = "linear"


def export_dense(layers: Sequence[DenseLayer], *, doc: str = "watchkeep autoencoder") -> bytes:
    """Serialise the layers as a checked ONNX model and return its bytes."""
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    if not layers:
        raise ValueError("need at least one layer")
    n_in = int(layers[0].weight.shape[0])
    n_out = int(layers[-1].weight.shape[1])
    nodes = []
    inits = []
    prev = INPUT_NAME
    for i, layer in enumerate(layers):
        if layer.activation not in ACTIVATIONS:
            raise ValueError(f"unknown activation {layer.activation!r}")
        w = numpy_helper.from_array(np.asarray(layer.weight, np.float32), f"W{i}")
        b = numpy_helper.from_array(np.asarray(layer.bias, np.float32).reshape(-1), f"B{i}")
        inits += [w, b]
        last = i == len(layers) - 1
        op = ACTIVATIONS[layer.activation]
        gemm_out = OUTPUT_NAME if last and op is None else f"h{i}_lin"
        nodes.append(helper.make_node("Gemm", [prev, f"W{i}", f"B{i}"], [gemm_out]))
        if op is not None:
            act_out = OUTPUT_NAME if last else f"h{i}"
            nodes.append(helper.make_node(op, [gemm_out], [act_out]))
            prev = act_out
        else:
            prev = gemm_out
    graph = helper.make_graph(
        nodes,
        "watchkeep_autoencoder",
        [helper.make_tensor_value_info(INPUT_NAME, TensorProto.FLOAT, ["N", n_in])],
        [helper.make_tensor_value_info(OUTPUT_NAME, TensorProto.FLOAT, ["N", n_out])],
        initializer=inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)],
                              producer_name="watchkeep", doc_string=doc)
    model.ir_version = IR_VERSION
    onnx.checker.check_model(model)
    return bytes(model.SerializeToString())


def forward_numpy(layers: Sequence[DenseLayer], x: np.ndarray) -> np.ndarray:
    """The same network in numpy (float64), for checks against the ONNX export."""
    h = np.asarray(x, np.float64)
    for layer in layers:
        h = h @ np.asarray(layer.weight, np.float64) + np.asarray(layer.bias, np.float64)
        if layer.activation == "tanh":
            h = np.tanh(h)
        elif layer.activation == "relu":
            h = np.maximum(h, 0.0)
        elif layer.activation == "sigmoid":
            h = 1.0 / (1.0 + np.exp(-h))
    return h


def pca_autoencoder(z: np.ndarray, n_components: int) -> list[DenseLayer]:
    """A linear autoencoder from the principal components of standardised rows `z`.

    Encoder V_k, decoder V_k^T: the optimal linear autoencoder of width k (Baldi &
    Hornik 1989). Used for the demo's first models and in tests.
    """
    z = np.asarray(z, np.float64)
    mu = z.mean(axis=0)
    _, _, vt = np.linalg.svd(z - mu, full_matrices=False)
    k = max(1, min(n_components, vt.shape[0]))
    v = vt[:k].T  # [F, k]
    return [DenseLayer(v, -mu @ v, "linear"), DenseLayer(v.T, mu.copy(), "linear")]
