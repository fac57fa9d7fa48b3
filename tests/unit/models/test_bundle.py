"""Model bundles: a good one loads and scores; every kind of bad one fails with a reason."""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from agent.commission.export import DenseLayer, export_dense, pca_autoencoder
from agent.errors import BundleError
from agent.models.bundle import MODEL_JSON, MODEL_ONNX, load_bundle, parse_meta, write_bundle

NAMES = ["temp.mean", "temp.std", "current.mean", "current.std", "pressure.mean"]
F = len(NAMES)


def meta(**over: Any) -> dict[str, Any]:
    doc: dict[str, Any] = {
        "asset": "P-101", "mode": "default", "model_id": "P-101/default", "version": 3,
        "feature_names": NAMES,
        "scaler": {"mean": [40.0, 0.2, 15.0, 0.3, 4.0], "scale": [5.0, 0.05, 4.0, 0.1, 1.0]},
        "score": {"function": "mse"}, "threshold": 2.0, "clear_threshold": 1.6,
        "calibration": {"method": "quantile", "quantile": 0.995, "n_windows": 200},
        "training": {"n_windows": 400, "data_sha256": "0" * 64},
        "onnx": {"input": "x", "output": "recon", "opset": 17, "ir_version": 8},
        "created": "2026-12-01T00:00:00.000Z", "watchkeep_version": "test",
    }
    doc.update(over)
    return doc


def pca_model(width: int = F, seed: int = 0, components: int = 2) -> bytes:
    z = np.random.default_rng(seed).normal(size=(200, width))
    return export_dense(pca_autoencoder(z, components))


def graph_model(build: Callable[[], tuple[list[Any], list[Any]]], *, in_width: Any = F,
                out_width: Any = F, in_type: int = TensorProto.FLOAT,
                batch: Any = "N", extra_inputs: int = 0) -> bytes:
    """A hand-built ONNX model: input x [batch, in_width] -> nodes -> recon."""
    nodes, inits = build()
    inputs = [helper.make_tensor_value_info("x", in_type, [batch, in_width])]
    inputs += [helper.make_tensor_value_info(f"x{i}", in_type, [batch, in_width])
               for i in range(extra_inputs)]
    graph = helper.make_graph(
        nodes, "test_model", inputs,
        [helper.make_tensor_value_info("recon", TensorProto.FLOAT, [batch, out_width])],
        initializer=inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model.SerializeToString()


def const(name: str, value: Any, dtype: Any = np.float32) -> Any:
    return numpy_helper.from_array(np.asarray(value, dtype=dtype), name)


def make(tmp_path: Path, model: bytes, doc: dict[str, Any] | None = None,
         name: str = "P-101") -> Path:
    return write_bundle(tmp_path / name, model, meta() if doc is None else doc)


def reason(path: Path) -> str:
    with pytest.raises(BundleError) as info:
        load_bundle(path)
    assert info.value.path == str(path)
    assert str(info.value).startswith(f"model bundle {path}: ")
    return info.value.reason


# --- a good bundle ---------------------------------------------------------------------

def test_a_good_bundle_loads_with_its_metadata(tmp_path: Path) -> None:
    """A PCA autoencoder bundle loads; metadata is typed; the digest covers both files."""
    b = load_bundle(make(tmp_path, pca_model()))
    m = b.meta
    assert (m.asset, m.mode, m.model_id, m.version) == ("P-101", "default", "P-101/default", 3)
    assert m.feature_names == tuple(NAMES) and b.n_features == F
    assert (m.threshold, m.clear_threshold) == (2.0, 1.6)
    assert (m.onnx_input, m.onnx_output) == ("x", "recon")
    assert len(b.digest) == 64 and int(b.digest, 16) >= 0
    other = load_bundle(make(tmp_path, pca_model(seed=1), name="other"))
    assert other.digest != b.digest


def test_reconstruct_is_batched_float32(tmp_path: Path) -> None:
    """reconstruct takes any batch size N (also 1) and float64 input."""
    b = load_bundle(make(tmp_path, pca_model()))
    for n in (1, 7, 500):
        z = np.random.default_rng(n).normal(size=(n, F))
        out = b.reconstruct(z)
        assert out.shape == (n, F) and out.dtype == np.float32


def test_score_is_the_mse_of_standardised_features(tmp_path: Path) -> None:
    """Bundle.score = mean over features of ((x - mean) / scale - recon)^2, per row."""
    b = load_bundle(make(tmp_path, pca_model()))
    m = meta()
    mean, scale = np.array(m["scaler"]["mean"]), np.array(m["scaler"]["scale"])
    x = mean + scale * np.random.default_rng(3).normal(size=(64, F)) * 2
    scores, sq = b.score(x)
    z = ((x - mean) / scale).astype(np.float32)
    recon = b.reconstruct(z).astype(np.float64)
    want_sq = (z.astype(np.float64) - recon) ** 2
    np.testing.assert_allclose(sq, want_sq, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(scores, want_sq.mean(axis=1), rtol=1e-6, atol=1e-9)
    assert scores.shape == (64,) and sq.shape == (64, F)


def test_write_bundle_replaces_an_old_bundle_whole(tmp_path: Path) -> None:
    """Writing over a bundle leaves the new one and no temp or old directories."""
    make(tmp_path, pca_model(), meta(version=1))
    make(tmp_path, pca_model(seed=2), meta(version=2))
    assert load_bundle(tmp_path / "P-101").meta.version == 2
    assert sorted(p.name for p in tmp_path.iterdir()) == ["P-101"]
    doc = json.loads((tmp_path / "P-101" / MODEL_JSON).read_text())
    assert doc["format"] == "watchkeep-bundle" and doc["format_version"] == 1


# --- files ------------------------------------------------------------------------------

def test_not_a_directory(tmp_path: Path) -> None:
    f = tmp_path / "model.onnx"
    f.write_bytes(pca_model())
    assert reason(f) == "is not a directory"
    assert reason(tmp_path / "nowhere") == "is not a directory"


def test_missing_model_json(tmp_path: Path) -> None:
    p = make(tmp_path, pca_model())
    (p / MODEL_JSON).unlink()
    assert reason(p) == "model.json is missing"


def test_missing_model_onnx(tmp_path: Path) -> None:
    p = make(tmp_path, pca_model())
    (p / MODEL_ONNX).unlink()
    assert reason(p) == "model.onnx is missing"


@pytest.mark.parametrize(("text", "expected"), [
    ("{not json", "model.json is not valid JSON"),
    ("", "model.json is not valid JSON"),
    ('{"format": "watchkeep-bundle",', "model.json is not valid JSON"),
    ("[1, 2, 3]", "model.json is not a JSON object"),
    ('"hello"', "model.json is not a JSON object"),
])
def test_bad_json(tmp_path: Path, text: str, expected: str) -> None:
    p = make(tmp_path, pca_model())
    (p / MODEL_JSON).write_text(text)
    assert reason(p).startswith(expected)


def test_model_json_not_utf8(tmp_path: Path) -> None:
    p = make(tmp_path, pca_model())
    (p / MODEL_JSON).write_bytes(b"\xff\xfe{\x00")
    assert reason(p).startswith("model.json is not valid JSON")


# --- model.json contents ------------------------------------------------------------------

REQUIRED = ["feature_names", "scaler", "score", "threshold", "clear_threshold", "onnx",
            "asset", "model_id", "version"]


@pytest.mark.parametrize("key", REQUIRED)
def test_missing_keys_are_named(key: str) -> None:
    """Each required key, when missing, is named in the reason."""
    doc = {"format": "watchkeep-bundle", "format_version": 1, **meta()}
    del doc[key]
    with pytest.raises(BundleError) as info:
        parse_meta(doc, "b")
    assert info.value.reason == f"model.json: missing key {key!r}"


@pytest.mark.parametrize(("over", "expected"), [
    ({"format": "other"}, "format is not 'watchkeep-bundle'"),
    ({"format_version": 2}, "format_version 2 is not supported"),
    ({"feature_names": "temp.mean"}, "feature_names has the wrong type (str)"),
    ({"feature_names": []}, "feature_names must be a non-empty list"),
    ({"feature_names": ["a", 3, "c", "d", "e"]}, "feature_names must be a non-empty list"),
    ({"feature_names": ["a", "a", "b", "c", "d"]}, "feature_names has duplicates"),
    ({"scaler": {"mean": [0.0] * 4, "scale": [1.0] * 5}}, "must have 5 values"),
    ({"scaler": {"mean": [0.0] * 5}}, "must have 5 values"),
    ({"scaler": {"mean": [0.0] * 5, "scale": [1.0, 1.0, 0.0, 1.0, 1.0]}}, "scale > 0"),
    ({"scaler": {"mean": [0.0] * 5, "scale": [1.0] * 4 + [-1.0]}}, "scale > 0"),
    ({"scaler": {"mean": [math.nan] + [0.0] * 4, "scale": [1.0] * 5}}, "must be finite"),
    ({"scaler": [0.0, 1.0]}, "scaler has the wrong type (list)"),
    ({"score": {"function": "mae"}}, "score function 'mae' is not supported"),
    ({"threshold": "2.0"}, "threshold has the wrong type (str)"),
    ({"threshold": True}, "threshold has the wrong type (bool)"),
    ({"threshold": 0.0, "clear_threshold": 0.0}, "threshold must be a positive number"),
    ({"threshold": -1.0}, "threshold must be a positive number"),
    ({"threshold": math.inf}, "threshold must be a positive number"),
    ({"clear_threshold": 2.5}, "clear_threshold must be in (0, threshold]"),
    ({"clear_threshold": 0}, "clear_threshold must be in (0, threshold]"),
    ({"version": "3"}, "version has the wrong type (str)"),
    ({"asset": 101}, "asset has the wrong type (int)"),
    ({"onnx": "x"}, "onnx has the wrong type (str)"),
    ({"onnx": {"input": 0}}, "onnx.input must be a tensor name"),
    # Wrong types in optional keys or inside the scaler are BundleErrors too, not a
    # ValueError that would escape the daemon's per-asset error handling.
    ({"scaler": {"mean": ["a"] * 5, "scale": [1.0] * 5}}, "must be lists of numbers"),
    ({"scaler": {"mean": "abc", "scale": [1.0] * 5}}, "must be lists of numbers"),
    ({"calibration": "quantile"}, "calibration has the wrong type (str)"),
    ({"training": [1, 2]}, "training has the wrong type (list)"),
    ({"mode": 3}, "mode has the wrong type (int)"),
    ({"created": 1796119200}, "created has the wrong type (int)"),
    # Integers past float64's range (JSON allows them): an OverflowError escaped
    # parse_meta; found by the bundle-json fuzz target.
    ({"threshold": 2**1024}, "threshold is out of range"),
    ({"clear_threshold": -(10**400)}, "clear_threshold is out of range"),
    ({"scaler": {"mean": [0.0] * 5, "scale": -(10**400)}}, "must be lists of numbers"),
    ({"scaler": {"mean": [2**1024] + [0.0] * 4, "scale": [1.0] * 5}},
     "must be lists of numbers"),
])
def test_bad_values_give_a_clear_reason(over: dict[str, Any], expected: str) -> None:
    doc = {"format": "watchkeep-bundle", "format_version": 1, **meta(**over)}
    with pytest.raises(BundleError) as info:
        parse_meta(doc, "b")
    assert expected in info.value.reason, info.value.reason


def test_bad_model_json_fails_load_bundle_too(tmp_path: Path) -> None:
    """load_bundle runs the same checks on the file it reads."""
    p = make(tmp_path, pca_model(), meta(clear_threshold=9.0))
    assert "clear_threshold" in reason(p)


# --- the ONNX model -----------------------------------------------------------------------

def test_input_width_that_does_not_match_the_feature_list(tmp_path: Path) -> None:
    """A model for F+1 features with F feature names is refused, naming both."""
    p = make(tmp_path, pca_model(width=F + 1))
    r = reason(p)
    assert "shape" in r and f"[N, {F}]" in r and f"{F} feature names" in r, r
    assert str(F + 1) in r


@pytest.mark.parametrize("content", [b"", b"not an onnx model at all\n",
                                     json.dumps(meta()).encode(), bytes(range(256)) * 8])
def test_a_file_that_is_not_onnx(tmp_path: Path, content: bytes) -> None:
    p = make(tmp_path, content)
    assert reason(p).startswith("model.onnx is not a loadable ONNX model"), reason(p)


def test_a_dimension_name_that_is_not_utf8(tmp_path: Path) -> None:
    """A symbolic dimension whose name is not UTF-8 (protobuf keeps the bytes; onnxruntime
    raised UnicodeDecodeError when the input's shape was read, which escaped load_bundle):
    found by the bundle-onnx fuzz target, which flipped a bit of the 'N' below."""
    def build():
        return [helper.make_node("Identity", ["x"], ["recon"])], []

    model = graph_model(build, batch="N")
    assert model.count(b"\x12\x01N") == 2  # dim_param "N" of the input and the output
    p = make(tmp_path, model.replace(b"\x12\x01N", b"\x12\x01\xce", 1))
    assert reason(p).startswith("model.onnx declares an input or output whose name or "
                                "dimension is not UTF-8 text"), reason(p)


def test_input_that_is_not_float32(tmp_path: Path) -> None:
    def build():
        return [helper.make_node("Cast", ["x"], ["recon"], to=TensorProto.FLOAT)], []

    p = make(tmp_path, graph_model(build, in_type=TensorProto.DOUBLE))
    assert "tensor(double), expected tensor(float)" in reason(p)


def test_more_than_one_input(tmp_path: Path) -> None:
    def build():
        return [helper.make_node("Add", ["x", "x0"], ["recon"])], []

    p = make(tmp_path, graph_model(build, extra_inputs=1))
    assert reason(p) == "the model has 2 inputs, expected 1"


def test_input_names_must_agree(tmp_path: Path) -> None:
    p = make(tmp_path, pca_model(), meta(onnx={"input": "features", "output": "recon"}))
    assert "names input 'features'" in reason(p)
    q = make(tmp_path, pca_model(), meta(onnx={"input": "x", "output": "y"}), name="q")
    assert "names output 'y'" in reason(q)


def test_output_shape_differs_from_input_shape(tmp_path: Path) -> None:
    """A model mapping F features to F-1 outputs is not a reconstruction."""
    rng = np.random.default_rng(0)
    layers = [DenseLayer(rng.normal(size=(F, F - 1)), np.zeros(F - 1))]
    p = make(tmp_path, export_dense(layers))
    r = reason(p)
    assert r.startswith("the model's output has shape [2, 4] for input [2, 5]"), r


def test_output_shape_differs_even_when_declared_dynamic(tmp_path: Path) -> None:
    """The probe catches a mismatch the declared shapes do not show."""
    def build():
        return [helper.make_node("Concat", ["x", "x"], ["recon"], axis=1)], []

    p = make(tmp_path, graph_model(build, out_width="M"))
    assert "output has shape [2, 10] for input [2, 5]" in reason(p)


@pytest.mark.parametrize("case", ["log_of_negative", "div_by_zero", "sqrt_of_negative"])
def test_non_finite_output_is_refused(tmp_path: Path, case: str) -> None:
    """A model that gives NaN or Inf on the probe batch fails the check."""
    def build():
        if case == "log_of_negative":  # log(x - 2) for x in {0, 1}: NaN
            return ([helper.make_node("Sub", ["x", "two"], ["shifted"]),
                     helper.make_node("Log", ["shifted"], ["recon"])],
                    [const("two", 2.0)])
        if case == "div_by_zero":  # 0/0 = NaN, 1/0 = Inf
            return [helper.make_node("Div", ["x", "zero"], ["recon"])], [const("zero", 0.0)]
        return ([helper.make_node("Sub", ["x", "two"], ["shifted"]),
                 helper.make_node("Sqrt", ["shifted"], ["recon"])],
                [const("two", 2.0)])

    p = make(tmp_path, graph_model(build))
    assert reason(p) == "the model gives non-finite output on a probe batch"


def test_a_fixed_batch_size_is_refused(tmp_path: Path) -> None:
    """Inference is batched: a model declared for exactly one row fails the probe."""
    def build():
        return [helper.make_node("Identity", ["x"], ["recon"])], []

    p = make(tmp_path, graph_model(build, batch=1))
    assert reason(p) == ("model input 'x' has a fixed batch size 1; windows are scored in "
                         "batches, so the first dimension must be dynamic")


def test_a_dynamic_width_model_that_reconstructs_is_accepted(tmp_path: Path) -> None:
    """Any [N, F] -> [N, F] float32 model is accepted, e.g. one trained elsewhere."""
    def build():
        return [helper.make_node("Identity", ["x"], ["recon"])], []

    b = load_bundle(make(tmp_path, graph_model(build, in_width="F", out_width="F")))
    scores, _ = b.score(np.asarray([meta()["scaler"]["mean"]]))
    assert scores.tolist() == [0.0]


def test_reconstruct_row_is_reconstruct_one_row_at_a_time(tmp_path: Path) -> None:
    """The I/O-bound one-row run gives `reconstruct`'s output bit for bit, also when
    several threads use the bundle at once."""
    import threading

    b = load_bundle(make(tmp_path, pca_model()))
    z = np.random.default_rng(4).normal(size=(300, F)).astype(np.float32)
    want = b.reconstruct(z)
    got = np.empty_like(z)
    for i in range(z.shape[0]):
        b.reconstruct_row(z[i], got[i])
    np.testing.assert_array_equal(got, want)

    outs = [np.empty_like(z) for _ in range(3)]

    def work(out: np.ndarray) -> None:
        for i in range(z.shape[0]):
            b.reconstruct_row(z[i], out[i])

    threads = [threading.Thread(target=work, args=(o,)) for o in outs]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    for o in outs:
        np.testing.assert_array_equal(o, want)


# --- size caps (issue 20, finding 6: a 150 MB model.json was read without a cap) ------


@pytest.mark.parametrize(("name", "size", "cap_mib"), [
    (MODEL_JSON, 16 * 2**20 + 1, 16),
    (MODEL_JSON, 150 * 10**6, 16),
    (MODEL_ONNX, 256 * 2**20 + 1, 256),
])
def test_oversized_files_are_refused_before_they_are_read(tmp_path: Path, name: str,
                                                           size: int, cap_mib: int) -> None:
    """A model.json over 16 MiB or a model.onnx over 256 MiB: a clear BundleError (the
    file is sparse: its size is looked at, never its content)."""
    p = make(tmp_path, pca_model())
    with open(p / name, "r+b") as f:
        f.truncate(size)
    why = reason(p)
    assert why == (f"{name} is {size / 2**20:.1f} MiB, more than the {cap_mib} MiB a "
                   f"bundle's {name} may be"), why


def test_the_caps_are_16_and_256_mib() -> None:
    """The caps themselves: 16 MiB and 256 MiB."""
    from agent.models.bundle import MAX_MODEL_JSON_BYTES, MAX_MODEL_ONNX_BYTES

    assert (MAX_MODEL_JSON_BYTES, MAX_MODEL_ONNX_BYTES) == (16 * 2**20, 256 * 2**20)


def test_deeply_nested_model_json_is_not_valid_json(tmp_path: Path) -> None:
    """Nesting past the parser's depth is a BundleError, not a RecursionError."""
    p = make(tmp_path, pca_model())
    (p / MODEL_JSON).write_text("[" * 100_000 + "]" * 100_000)
    assert reason(p).startswith(f"{MODEL_JSON} is not valid JSON")
