"""Fuzz targets `bundle-json` and `bundle-onnx`: a model bundle directory through
`agent.models.bundle.load_bundle`, with one of its two files fuzzed and the other a
valid one (a PCA autoencoder trained here, as tests/helpers.py trains them).

Input: the fuzzed file's bytes (`model.json` or `model.onnx`). The contract (DESIGN.md
"Model bundle", bundle.py): a checked `Bundle` that scores a row finitely, or a
`BundleError` (which fails that asset alone, agent/daemon.py `load_asset_bundle`);
never another exception, which would stop the daemon's start-up for every asset.
"""

from __future__ import annotations

import functools
import json
import math
import shutil
from pathlib import Path
from typing import Any

import numpy as np
from hypothesis import strategies as st

from agent.errors import BundleError
from agent.models.bundle import MODEL_JSON, MODEL_ONNX, Bundle, load_bundle
from tests.fuzz.common import awkward_numbers, json_values, scratch_dir
from tests.fuzz.harness import Target, check


@functools.cache
def valid() -> tuple[bytes, bytes]:
    """(model.json, model.onnx) of a valid bundle."""
    from tests.helpers import train_pca_bundle

    tmp = scratch_dir("bundle-src")
    path = train_pca_bundle(tmp / "b", "P-1", seed=3)
    out = (path / MODEL_JSON).read_bytes(), (path / MODEL_ONNX).read_bytes()
    shutil.rmtree(tmp, ignore_errors=True)
    return out


@functools.cache
def _dir() -> Path:
    return scratch_dir("bundle")


def check_bundle(meta: bytes, model: bytes) -> None:
    d = _dir()
    (d / MODEL_JSON).write_bytes(meta)
    (d / MODEL_ONNX).write_bytes(model)
    try:
        b = load_bundle(d)
    except BundleError as exc:
        check(isinstance(exc.reason, str) and exc.reason != "", f"BundleError {exc!r}")
        return
    check(isinstance(b, Bundle), f"load_bundle gave {b!r}")
    n = b.n_features
    _, err = b.score(np.asarray(b.meta.scaler_mean)[None, :])
    check(err.shape == (1, n) and bool(np.all(np.isfinite(err))), "non-finite error at the mean")
    check(math.isfinite(b.meta.threshold) and 0 < b.meta.clear_threshold <= b.meta.threshold,
          f"thresholds {b.meta.threshold!r}, {b.meta.clear_threshold!r}")


def one_input_json(data: bytes) -> None:
    check_bundle(data, valid()[1])


def one_input_onnx(data: bytes) -> None:
    check_bundle(valid()[0], data)


def _other_models() -> list[bytes]:
    """ONNX graphs other than a Gemm chain: an identity-like Add, a fixed batch size, two
    outputs, a float64 input."""
    from onnx import TensorProto, helper, numpy_helper

    meta = json.loads(valid()[0])
    n = len(meta["feature_names"])

    def model(in_shape: list[Any], elem: int = TensorProto.FLOAT, outs: int = 1) -> bytes:
        zero = numpy_helper.from_array(np.zeros((1, n), np.float32), "zero")
        nodes = [helper.make_node("Add", ["x", "zero"], ["recon"])]
        outputs = [helper.make_tensor_value_info("recon", TensorProto.FLOAT, ["N", n])]
        if outs == 2:
            nodes.append(helper.make_node("Identity", ["recon"], ["copy"]))
            outputs.append(helper.make_tensor_value_info("copy", TensorProto.FLOAT, ["N", n]))
        g = helper.make_graph(nodes, "g", [helper.make_tensor_value_info("x", elem, in_shape)],
                              outputs, [zero])
        m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
        m.ir_version = 8
        return m.SerializeToString()

    return [model(["N", n]), model([4, n]), model(["N", n], outs=2),
            model(["N", n], TensorProto.DOUBLE)]


def seeds_json() -> list[bytes]:
    meta = json.loads(valid()[0])
    out = [valid()[0]]
    for k in ("threshold", "scaler", "feature_names", "onnx", "format_version"):
        broken = dict(meta)
        del broken[k]
        out.append(json.dumps(broken).encode())
    return out


def seeds_onnx() -> list[bytes]:
    return [valid()[1], *_other_models()]


def _set(doc: Any, path: tuple[Any, ...], value: Any) -> Any:
    import copy

    doc = copy.deepcopy(doc)
    node = doc
    try:
        for k in path[:-1]:
            node = node[k]
        node[path[-1]] = value
    except (KeyError, IndexError, TypeError):  # an earlier edit replaced what held it
        pass
    return doc


def strategy_json() -> Any:
    """model.json with one or two fields (or list items) awkward: huge integers,
    non-finite numbers, wrong types, wrong lengths."""
    meta = json.loads(valid()[0])
    n = len(meta["feature_names"])
    paths: list[tuple[Any, ...]] = [(k,) for k in meta]
    paths += [("scaler", "mean"), ("scaler", "scale"), ("scaler", "mean", 0),
              ("scaler", "scale", n - 1), ("feature_names", 0), ("onnx", "input"),
              ("onnx", "output"), ("score", "function"), ("calibration", "quantile")]
    value = st.one_of(awkward_numbers, json_values, st.sampled_from([2**1024, -(10**400)]),
                      st.lists(awkward_numbers, min_size=n, max_size=n),
                      st.sampled_from(["x", "recon", "mse", "watchkeep-bundle", ""]))

    @st.composite
    def doc(draw: Any) -> bytes:
        d = meta
        for _ in range(draw(st.integers(1, 2))):
            d = _set(d, draw(st.sampled_from(paths)), draw(value))
        return json.dumps(d, allow_nan=True).encode()

    return st.one_of(doc(), json_values.map(lambda v: json.dumps(v).encode()),
                     st.binary(max_size=32))


def strategy_onnx() -> Any:
    """The valid model with bytes flipped, cut or inserted (protobuf fields, tensor
    data); byte mutation is what fits a binary format, so atheris does most here."""
    models = seeds_onnx()

    @st.composite
    def mutated(draw: Any) -> bytes:
        b = bytearray(draw(st.sampled_from(models)))
        for _ in range(draw(st.integers(1, 4))):
            i = draw(st.integers(0, len(b) - 1))
            how = draw(st.sampled_from(["flip", "cut", "insert"]))
            if how == "flip":
                b[i] = draw(st.integers(0, 255))
            elif how == "cut":
                del b[i:i + draw(st.integers(1, 16))]
            else:
                b[i:i] = draw(st.binary(min_size=1, max_size=8))
            if not b:
                break
        return bytes(b)

    return st.one_of(mutated(), st.binary(max_size=64))


TARGETS = {
    "bundle-json": Target("bundle-json", one_input_json, seeds_json, strategy_json,
                          examples=120, max_len=65536),
    "bundle-onnx": Target("bundle-onnx", one_input_onnx, seeds_onnx, strategy_onnx,
                          examples=80, max_len=65536),
}
