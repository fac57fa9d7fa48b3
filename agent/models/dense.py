"""The weights of a plain dense network, read from its ONNX bytes (`dense_layers`).

What `watchkeep train` writes (a chain of Gemm nodes, each optionally followed by Tanh,
Relu or Sigmoid) is read back as `DenseLayer`s: the bundle keeps them
(`Bundle.dense`) and batched inference (agent/pipeline/batched.py) stacks them, and
re-learning fine-tunes them. Any other graph reads as None. numpy and the ONNX
protobuf subset only (no onnx, no onnxruntime).
"""

from __future__ import annotations

import numpy as np

from agent.commission.export import ACTIVATIONS, DenseLayer  # numpy only
from agent.models import onnx_subset as ox

# ONNX op -> activation name: the inverse of what `export_dense` writes.
ACTIVATION_OPS = {op: name for name, op in ACTIVATIONS.items() if op is not None}


def dense_layers(model_bytes: bytes) -> tuple[DenseLayer, ...] | None:
    """The layers of a plain dense network (weights and biases float32): one graph
    input, a chain of Gemm nodes with constant weights and default attributes, each
    optionally followed by one activation, ending in the graph's first output. None
    for any other graph."""
    try:
        m = ox.parse_model(model_bytes)
    except Exception:  # protobuf's DecodeError, or anything else it finds wrong
        return None
    g = m.graph
    if g.sparse_initializer or not g.output:
        return None
    inits = {t.name: t for t in g.initializer}
    inputs = [v.name for v in g.input if v.name not in inits]
    if len(inputs) != 1:
        return None
    prev, nodes, i = inputs[0], list(g.node), 0
    layers: list[DenseLayer] = []
    while i < len(nodes):
        n = nodes[i]
        if (n.op_type != "Gemm" or n.domain not in ("", "ai.onnx") or len(n.input) != 3
                or n.input[0] != prev or len(n.output) != 1):
            return None
        for a in n.attribute:  # transA/transB 0, alpha/beta 1 (their defaults) only
            if (a.name in ("transA", "transB") and a.i != 0) or \
                    (a.name in ("alpha", "beta") and a.f != 1.0) or \
                    a.name not in ("transA", "transB", "alpha", "beta"):
                return None
        w_t, b_t = inits.get(n.input[1]), inits.get(n.input[2])
        w = ox.tensor_array(w_t) if w_t is not None else None
        b = ox.tensor_array(b_t) if b_t is not None else None
        if w is None or b is None or w.ndim != 2 or w.dtype == np.int64 \
                or b.dtype == np.int64 or b.size != w.shape[1] \
                or b.ndim not in (1, 2) or (b.ndim == 2 and b.shape[0] != 1):
            return None
        act, out = "linear", n.output[0]
        nxt = nodes[i + 1] if i + 1 < len(nodes) else None
        if nxt is not None and nxt.op_type in ACTIVATION_OPS and not nxt.attribute \
                and nxt.domain in ("", "ai.onnx") and list(nxt.input) == [out] \
                and len(nxt.output) == 1:
            act, out = ACTIVATION_OPS[nxt.op_type], nxt.output[0]
            i += 1
        if layers and layers[-1].weight.shape[1] != w.shape[0]:
            return None
        layers.append(DenseLayer(w.astype(np.float32), b.reshape(-1).astype(np.float32),
                                 act))
        prev = out
        i += 1
    if not layers or prev != g.output[0].name or len(g.output) != 1:
        return None
    return tuple(layers)
