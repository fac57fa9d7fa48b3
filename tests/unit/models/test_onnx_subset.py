"""The daemon's ONNX protobuf subset against the `onnx` package itself.

Reference: the installed onnx's own generated descriptors (`onnx.onnx_ml_pb2`, from
onnx/onnx.proto) for field numbers and types, `onnx.numpy_helper` for tensors, and
`onnx.checker` (full check, with shape inference) for the graphs we write.
"""

from __future__ import annotations

import numpy as np
import onnx
import pytest
from google.protobuf import descriptor
from onnx import numpy_helper

from agent.models import onnx_subset as ox

_KIND = {"int64": descriptor.FieldDescriptor.TYPE_INT64,
         "int32": descriptor.FieldDescriptor.TYPE_INT32,
         "float": descriptor.FieldDescriptor.TYPE_FLOAT,
         "double": descriptor.FieldDescriptor.TYPE_DOUBLE,
         "string": descriptor.FieldDescriptor.TYPE_STRING,
         "bytes": descriptor.FieldDescriptor.TYPE_BYTES}


def _onnx_descriptor(name: str) -> descriptor.Descriptor:
    d = onnx.onnx_ml_pb2.DESCRIPTOR.message_types_by_name[name.split(".")[0]]
    for part in name.split(".")[1:]:
        d = d.nested_types_by_name[part]
    return d


@pytest.mark.parametrize("message", sorted(ox.FIELDS))
def test_every_field_has_onnx_number_type_and_label(message: str) -> None:
    ref = _onnx_descriptor(message)
    for fname, number, kind, repeated in ox.FIELDS[message]:
        f = ref.fields_by_name[fname]
        assert f.number == number, (message, fname)
        if kind.startswith("."):
            assert f.type == descriptor.FieldDescriptor.TYPE_MESSAGE
            assert f.message_type.full_name == kind[1:], (message, fname)
        elif fname in ("type", "data_type", "elem_type", "data_location"):
            # onnx declares these as enums; on the wire an enum is an int32 varint
            assert f.type in (descriptor.FieldDescriptor.TYPE_ENUM,
                              descriptor.FieldDescriptor.TYPE_INT32), (message, fname)
        else:
            assert f.type == _KIND[kind], (message, fname)
        # protobuf 7 dropped `label` for `is_repeated`
        is_repeated = (f.is_repeated if hasattr(f, "is_repeated")
                       else f.label == descriptor.FieldDescriptor.LABEL_REPEATED)
        assert is_repeated == repeated, (message, fname)


def test_enum_values_used_are_onnx_values() -> None:
    assert ox.FLOAT == onnx.TensorProto.FLOAT
    assert ox.INT64 == onnx.TensorProto.INT64
    assert ox.DOUBLE == onnx.TensorProto.DOUBLE


@pytest.mark.parametrize("arr", [
    np.arange(12, dtype=np.float32).reshape(3, 4) / 7,
    np.linspace(-1, 1, 6).reshape(2, 3),
    np.array([1, -2, 3], dtype=np.int64),
    np.zeros((0, 5), dtype=np.float32),
])
@pytest.mark.parametrize("raw", [True, False])
def test_tensor_array_reads_what_onnx_writes(arr: np.ndarray, raw: bool) -> None:
    t = numpy_helper.from_array(arr, "t")
    if not raw:  # the typed-field form some exporters write
        t = onnx.helper.make_tensor("t", numpy_helper.helper.np_dtype_to_tensor_dtype(arr.dtype),
                                    arr.shape, arr.reshape(-1).tolist())
    model = onnx.helper.make_model(onnx.helper.make_graph([], "g", [], [], initializer=[t]))
    mine = ox.parse_model(model.SerializeToString())
    got = ox.tensor_array(mine.graph.initializer[0])
    assert got is not None
    assert got.dtype == arr.dtype and got.shape == arr.shape
    np.testing.assert_array_equal(got, numpy_helper.to_array(t))


def test_tensor_array_declines_what_it_cannot_read() -> None:
    t = numpy_helper.from_array(np.arange(3, dtype=np.int32), "t")
    model = onnx.helper.make_model(onnx.helper.make_graph([], "g", [], [], initializer=[t]))
    assert ox.tensor_array(ox.parse_model(model.SerializeToString()).graph.initializer[0]) \
        is None


def test_written_tensors_and_value_infos_read_back_with_onnx() -> None:
    m = ox.ModelProto(ir_version=8)
    w = np.arange(6, dtype=np.float32).reshape(2, 3)
    ox.add_tensor(m.graph, "w", w)
    ox.add_tensor(m.graph, "i", np.array([4, 5], np.int64))
    ox.add_value_info(m.graph.input, "x", ox.FLOAT, ["N", 3])
    back = onnx.load_model_from_string(m.SerializeToString())
    np.testing.assert_array_equal(numpy_helper.to_array(back.graph.initializer[0]), w)
    np.testing.assert_array_equal(numpy_helper.to_array(back.graph.initializer[1]), [4, 5])
    dims = back.graph.input[0].type.tensor_type.shape.dim
    assert [dims[0].dim_param, dims[1].dim_value] == ["N", 3]
    assert back.graph.input[0].type.tensor_type.elem_type == onnx.TensorProto.FLOAT


def test_garbage_does_not_parse() -> None:
    with pytest.raises(Exception):  # noqa: B017 - protobuf's DecodeError
        ox.parse_model(b"\xff\xff\xff\xff not a model")


def test_the_daemon_does_not_import_onnx(tmp_path) -> None:  # type: ignore[no-untyped-def]
    """The point of the subset: a daemon loading bundles and building a batched group
    never loads the onnx package and its ~17 MB."""
    import subprocess
    import sys

    from agent.commission.export import export_dense, pca_autoencoder
    from agent.models.bundle import write_bundle

    rng = np.random.default_rng(0)
    names = [f"c.f{i}" for i in range(5)]
    meta = {"asset": "A", "mode": "default", "model_id": "A/default", "version": 1,
            "feature_names": names, "scaler": {"mean": [0.0] * 5, "scale": [1.0] * 5},
            "score": {"function": "mse"}, "threshold": 1.0, "clear_threshold": 0.5,
            "onnx": {"input": "x", "output": "recon"}}
    dirs = [write_bundle(tmp_path / f"b{i}", export_dense(pca_autoencoder(
        rng.normal(size=(50, 5)), 2)), meta) for i in range(2)]
    code = ("import sys\n"
            "import agent.daemon\n"
            "from agent.pipeline.batched import BatchedModels\n"
            "from agent.models.bundle import load_bundle\n"
            f"b = BatchedModels([load_bundle(p) for p in {[str(d) for d in dirs]!r}])\n"
            "assert b.n_models == 2, b.n_models\n"
            "assert 'onnx' not in sys.modules\n"
            "print('ok')\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 0 and out.stdout.strip() == "ok", out.stderr
