"""The few ONNX protobuf messages the daemon reads and writes, without `import onnx`.

The daemon reads the weights of plain dense models (`dense_layers`) and writes one
batched graph per group of them (`agent/pipeline/batched.py`). The `onnx` package would do
both, but importing it costs a gateway about 17 MB of RSS (its C++ checker comes
along; measured 2026-12-02, onnx 1.20: 74.4 -> 91.7 MB over onnxruntime, numpy,
paho, prometheus-client, yaml, orjson), against a memory goal of 150 MB in all.
protobuf is already loaded by onnxruntime, so these messages cost nothing more.

The messages below are a subset of `onnx/onnx.proto` (proto2, package `onnx`), with
the same field numbers and types; fields left out are skipped on parsing, as protobuf
skips any unknown field. They live in a private descriptor pool, so a process that
also imports `onnx` (the commissioning tools, the tests) sees no clash.
`tests/unit/models/test_onnx_subset.py` checks every field against the installed onnx's
own descriptors and round-trips models through `onnx.checker`.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from google.protobuf import descriptor_pb2, descriptor_pool, message_factory

# TensorProto.DataType values (onnx.proto).
FLOAT = 1
INT64 = 7
DOUBLE = 11

_F = descriptor_pb2.FieldDescriptorProto
_OPT, _REP = _F.LABEL_OPTIONAL, _F.LABEL_REPEATED
_TYPES = {"int64": _F.TYPE_INT64, "int32": _F.TYPE_INT32, "float": _F.TYPE_FLOAT,
          "double": _F.TYPE_DOUBLE, "string": _F.TYPE_STRING, "bytes": _F.TYPE_BYTES}

# message -> (field name, number, type or ".onnx.<Message>", repeated)
_MESSAGES: dict[str, list[tuple[str, int, str, bool]]] = {
    "ModelProto": [("ir_version", 1, "int64", False), ("producer_name", 2, "string", False),
                   ("graph", 7, ".onnx.GraphProto", False),
                   ("opset_import", 8, ".onnx.OperatorSetIdProto", True)],
    "OperatorSetIdProto": [("domain", 1, "string", False), ("version", 2, "int64", False)],
    "GraphProto": [("node", 1, ".onnx.NodeProto", True), ("name", 2, "string", False),
                   ("initializer", 5, ".onnx.TensorProto", True),
                   ("input", 11, ".onnx.ValueInfoProto", True),
                   ("output", 12, ".onnx.ValueInfoProto", True),
                   ("sparse_initializer", 15, ".onnx.SparseTensorProto", True)],
    "NodeProto": [("input", 1, "string", True), ("output", 2, "string", True),
                  ("name", 3, "string", False), ("op_type", 4, "string", False),
                  ("attribute", 5, ".onnx.AttributeProto", True), ("domain", 7, "string", False)],
    "AttributeProto": [("name", 1, "string", False), ("f", 2, "float", False),
                       ("i", 3, "int64", False), ("type", 20, "int32", False)],
    "TensorProto": [("dims", 1, "int64", True), ("data_type", 2, "int32", False),
                    ("float_data", 4, "float", True), ("int64_data", 7, "int64", True),
                    ("name", 8, "string", False), ("raw_data", 9, "bytes", False),
                    ("double_data", 10, "double", True), ("data_location", 14, "int32", False)],
    "SparseTensorProto": [],
    "ValueInfoProto": [("name", 1, "string", False), ("type", 2, ".onnx.TypeProto", False)],
    "TypeProto": [("tensor_type", 1, ".onnx.TypeProto.Tensor", False)],
    "TypeProto.Tensor": [("elem_type", 1, "int32", False),
                         ("shape", 2, ".onnx.TensorShapeProto", False)],
    "TensorShapeProto": [("dim", 1, ".onnx.TensorShapeProto.Dimension", True)],
    "TensorShapeProto.Dimension": [("dim_value", 1, "int64", False),
                                   ("dim_param", 2, "string", False)],
}


def _file() -> descriptor_pb2.FileDescriptorProto:
    fd = descriptor_pb2.FileDescriptorProto(name="watchkeep/onnx_subset.proto",
                                            package="onnx", syntax="proto2")
    made: dict[str, Any] = {}
    for full in _MESSAGES:  # parents come before their nested messages in the table
        parent, _, name = full.rpartition(".")
        msg = (made[parent].nested_type if parent else fd.message_type).add(name=name)
        made[full] = msg
        for fname, number, kind, repeated in _MESSAGES[full]:
            f = msg.field.add(name=fname, number=number, label=_REP if repeated else _OPT)
            if kind.startswith("."):
                f.type, f.type_name = _F.TYPE_MESSAGE, kind
            else:
                f.type = _TYPES[kind]
        if full == "TensorShapeProto.Dimension":  # dim_value and dim_param are a oneof
            msg.oneof_decl.add(name="value")
            for f in msg.field:
                f.oneof_index = 0
    return fd


_POOL = descriptor_pool.DescriptorPool()
_POOL.Add(_file())
_CLASSES = {name: message_factory.GetMessageClass(_POOL.FindMessageTypeByName(f"onnx.{name}"))
            for name in _MESSAGES}
ModelProto: Any = _CLASSES["ModelProto"]
FIELDS = _MESSAGES  # for the test that holds them against onnx's own


def parse_model(data: bytes) -> Any:
    """A ModelProto from serialised bytes (protobuf's DecodeError on garbage)."""
    m = ModelProto()
    m.ParseFromString(data)
    return m


def tensor_array(t: Any) -> np.ndarray | None:
    """An initializer as a numpy array, or None for a kind this subset does not read
    (external data, or a type other than float, double and int64)."""
    if t.data_location != 0:
        return None
    dtype = {FLOAT: np.float32, DOUBLE: np.float64, INT64: np.int64}.get(t.data_type)
    if dtype is None:
        return None
    shape = tuple(int(d) for d in t.dims)
    if t.raw_data:
        flat = np.frombuffer(t.raw_data, dtype=np.dtype(dtype).newbyteorder("<"))
    else:
        vals = {FLOAT: t.float_data, DOUBLE: t.double_data, INT64: t.int64_data}[t.data_type]
        flat = np.asarray(list(vals), dtype=dtype)
    if flat.size != int(np.prod(shape)):
        return None
    return flat.reshape(shape).astype(dtype)


def add_tensor(graph: Any, name: str, arr: np.ndarray) -> None:
    """Append `arr` (float32 or int64) to the graph's initializers as raw data."""
    t = graph.initializer.add(name=name, dims=list(arr.shape),
                              data_type=INT64 if arr.dtype == np.int64 else FLOAT)
    t.raw_data = np.ascontiguousarray(arr, dtype=arr.dtype.newbyteorder("<")).tobytes()


def add_value_info(where: Any, name: str, elem_type: int, dims: list[int | str]) -> None:
    """Append a tensor's name, element type and shape (ints fixed, strings symbolic)."""
    vi = where.add(name=name)
    tt = vi.type.tensor_type
    tt.elem_type = elem_type
    for d in dims:
        if isinstance(d, str):
            tt.shape.dim.add(dim_param=d)
        else:
            tt.shape.dim.add(dim_value=d)
