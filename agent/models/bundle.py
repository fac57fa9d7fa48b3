"""Model bundles: a directory with `model.onnx` and `model.json` (contract in DESIGN.md).

`model.json` keys (format version 1):

    format            "watchkeep-bundle"
    format_version    1
    asset, mode       what the model is for ("default" when the asset has one mode)
    model_id          stable name, e.g. "P-101/default"
    version           integer, grows with every retrain
    feature_names     input order of the model, "<channel>.<feature>"
    scaler            {"mean": [F], "scale": [F]}: the model sees (x - mean) / scale
    score             {"function": "mse"}: mean squared error of standardised features
    threshold         raise level of the score
    clear_threshold   clear level (<= threshold)
    calibration       how the thresholds were set, e.g. {"method": "quantile",
                      "quantile": 0.995, "margin": 1.25, "clear_ratio": 0.8, "n_windows": 400}
    training          {"n_windows": int, "data_sha256": str, ...} summary of the data
    onnx              {"input": name, "output": name, "opset": int, "ir_version": int}
    created           RFC 3339 UTC time
    watchkeep_version the version that wrote the bundle

Any ONNX model whose input is `[N, F]` float32 and whose first output is a
reconstruction `[N, F]` is accepted, so a model trained elsewhere works once its
`model.json` is written. Nothing here unpickles anything.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np

from agent.commission.export import DenseLayer
from agent.errors import BundleError
from agent.fsutil import fsync_dir, replace_dir
from agent.models.dense import dense_layers

FORMAT = "watchkeep-bundle"
FORMAT_VERSION = 1
MODEL_JSON = "model.json"
MODEL_ONNX = "model.onnx"
# Size caps, checked before a file is read (a bundle is read whole into memory, once per
# asset and mode). model.json holds feature names, a scaler and calibration notes: a
# few KB per hundred features, so 16 MiB is thousands of times what a real bundle
# needs and still nothing a gateway misses. model.onnx: watchkeep's dense autoencoders
# are kilobytes to a few MB (weights ~ 4 bytes x features x hidden width); 256 MiB
# admits any model a gateway CPU could score per window and refuses a file that would
# take the daemon's memory (onnxruntime holds a copy or two while it loads).
# Common practice, no source.
MAX_MODEL_JSON_BYTES = 16 * 1024 * 1024
MAX_MODEL_ONNX_BYTES = 256 * 1024 * 1024


@dataclass(frozen=True)
class BundleMeta:
    """The validated contents of `model.json`."""

    asset: str
    mode: str
    model_id: str
    version: int
    feature_names: tuple[str, ...]
    scaler_mean: np.ndarray
    scaler_scale: np.ndarray
    threshold: float
    clear_threshold: float
    calibration: Mapping[str, Any]
    training: Mapping[str, Any]
    onnx_input: str
    onnx_output: str
    created: str
    watchkeep_version: str
    raw: Mapping[str, Any] = field(repr=False, default_factory=dict)


def _need(doc: Mapping[str, Any], key: str, kind: type | tuple[type, ...], path: str) -> Any:
    if key not in doc:
        raise BundleError(path, f"model.json: missing key {key!r}")
    value = doc[key]
    if not isinstance(value, kind) or (isinstance(value, bool) and kind is not bool):
        raise BundleError(path, f"model.json: {key} has the wrong type ({type(value).__name__})")
    return value


def _float(doc: Mapping[str, Any], key: str, path: str) -> float:
    """A number of model.json as a float; an integer past float64's range is refused."""
    try:
        return float(_need(doc, key, (int, float), path))
    except OverflowError:
        raise BundleError(path, f"model.json: {key} is out of range") from None


def parse_meta(doc: Mapping[str, Any], path: str) -> BundleMeta:
    """Check a decoded `model.json` and return it as typed values."""
    if doc.get("format") != FORMAT:
        raise BundleError(path, f"model.json: format is not {FORMAT!r}")
    if doc.get("format_version") != FORMAT_VERSION:
        raise BundleError(path, f"model.json: format_version {doc.get('format_version')!r} "
                                f"is not supported (this watchkeep reads {FORMAT_VERSION})")
    names = _need(doc, "feature_names", list, path)
    if not names or not all(isinstance(n, str) and n for n in names):
        raise BundleError(path, "model.json: feature_names must be a non-empty list of names")
    if len(set(names)) != len(names):
        raise BundleError(path, "model.json: feature_names has duplicates")
    scaler = _need(doc, "scaler", dict, path)
    try:
        mean = np.asarray(scaler.get("mean", []), dtype=np.float64)
        scale = np.asarray(scaler.get("scale", []), dtype=np.float64)
    except (TypeError, ValueError, OverflowError):  # Overflow: an integer past float64
        raise BundleError(path, "model.json: scaler mean/scale must be lists of numbers"
                          ) from None
    if mean.shape != (len(names),) or scale.shape != (len(names),):
        raise BundleError(path, f"model.json: scaler mean/scale must have {len(names)} values")
    if not (np.all(np.isfinite(mean)) and np.all(np.isfinite(scale)) and np.all(scale > 0)):
        raise BundleError(path, "model.json: scaler values must be finite, scale > 0")
    score = _need(doc, "score", dict, path)
    if score.get("function") != "mse":
        raise BundleError(path, f"model.json: score function {score.get('function')!r} "
                                "is not supported (only 'mse')")
    threshold = _float(doc, "threshold", path)
    clear = _float(doc, "clear_threshold", path)
    if not (math.isfinite(threshold) and threshold > 0):
        raise BundleError(path, "model.json: threshold must be a positive number")
    if not (math.isfinite(clear) and 0 < clear <= threshold):
        raise BundleError(path, "model.json: clear_threshold must be in (0, threshold]")
    onnx_info = _need(doc, "onnx", dict, path)
    for key, kind in (("mode", str), ("calibration", dict), ("training", dict),
                      ("created", str), ("watchkeep_version", str)):
        if key in doc:
            _need(doc, key, kind, path)
    for key in ("input", "output"):
        if not isinstance(onnx_info.get(key, ""), str):
            raise BundleError(path, f"model.json: onnx.{key} must be a tensor name")
    return BundleMeta(
        asset=str(_need(doc, "asset", str, path)),
        mode=str(doc.get("mode", "default")),
        model_id=str(_need(doc, "model_id", str, path)),
        version=int(_need(doc, "version", int, path)),
        feature_names=tuple(names),
        scaler_mean=mean,
        scaler_scale=scale,
        threshold=threshold,
        clear_threshold=clear,
        calibration=dict(doc.get("calibration", {})),
        training=dict(doc.get("training", {})),
        onnx_input=str(onnx_info.get("input", "")),
        onnx_output=str(onnx_info.get("output", "")),
        created=str(doc.get("created", "")),
        watchkeep_version=str(doc.get("watchkeep_version", "")),
        raw=dict(doc),
    )


def _session_options() -> Any:
    import onnxruntime as ort

    opts = ort.SessionOptions()
    # One thread, no spinning: the gateway's two cores also run the broker (PITFALLS.md).
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    opts.add_session_config_entry("session.intra_op.allow_spinning", "0")
    opts.add_session_config_entry("session.inter_op.allow_spinning", "0")
    # Memory: a gateway holds a session per asset. The RSS growth of 200 sessions of the
    # benches' 40-feature autoencoder, onnxruntime 1.32, 2026-12-02: 30.6 MB with the
    # defaults; 23 MB without the per-session memory arena; 16.7 MB without the arena
    # and with BASIC instead of ALL graph optimisation, with a one-row run no slower
    # (7.6 against 8.8 us). `python -m tests.bench memory` shows it whole. The models are
    # small dense stacks (Gemm, activations): BASIC keeps constant folding and the
    # redundant-node removal; what ALL adds (layout changes, kernel-specific fusions)
    # buys nothing at this size. The arena only pays when tensors are large.
    opts.enable_cpu_mem_arena = False
    opts.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_BASIC
    return opts


class Bundle:
    """A loaded, checked bundle: `reconstruct` runs the model on standardised features."""

    def __init__(self, path: Path, meta: BundleMeta, session: Any) -> None:
        self.path = path
        self.meta = meta
        self._session = session
        self._input = meta.onnx_input
        self._output = meta.onnx_output
        self.digest = ""
        # The model as events and state messages name it (shared; never mutated).
        self.model_ref = {"id": meta.model_id, "version": meta.version}
        # One-row runs through onnxruntime's I/O binding (see `reconstruct_row`).
        self._row_lock = threading.Lock()
        self._row_in: np.ndarray | None = None
        self._row_out: np.ndarray | None = None
        self._binding: Any = None
        self._row_in_flat = self._row_out_flat = np.zeros(0, dtype=np.float32)
        self._run_bound: Callable[[], Any] | None = None
        self._bind_failed = False
        # The weights of a plain dense network, for batched runs across assets
        # (`agent/pipeline/batched.py`); None for any other graph.
        self.dense: tuple[DenseLayer, ...] | None = None

    @property
    def n_features(self) -> int:
        return len(self.meta.feature_names)

    def standardise(self, x: np.ndarray) -> np.ndarray:
        """Raw feature rows [N, F] -> standardised float32 rows."""
        z = (np.asarray(x, dtype=np.float64) - self.meta.scaler_mean) / self.meta.scaler_scale
        return z.astype(np.float32)

    def reconstruct(self, z: np.ndarray) -> np.ndarray:
        """Standardised rows [N, F] float32 -> the model's reconstruction [N, F] float32."""
        z = np.ascontiguousarray(z, dtype=np.float32)
        out = self._session.run([self._output], {self._input: z})[0]
        return np.asarray(out, dtype=np.float32)

    def reconstruct_row(self, z: np.ndarray, out: np.ndarray) -> None:
        """One standardised row [F] float32 -> its reconstruction, written into `out`.

        The same model run as `reconstruct`, through onnxruntime's I/O binding over an
        input and an output buffer kept with the bundle: about half the per-call cost
        of `run` for a model this small, which is most of a window's inference time.
        A lock per bundle makes it safe from several threads.
        """
        if self._bind_failed:
            out[:] = self.reconstruct(z[None, :])[0]
            return
        with self._row_lock:
            run = self._run_bound
            if run is None:
                try:
                    self._bind_row(z.size)
                except Exception:  # an exotic model or runtime: plain `run` does the job
                    self._bind_failed = True
                    out[:] = self.reconstruct(z[None, :])[0]
                    return
                run = self._run_bound
                assert run is not None
            self._row_in_flat[:] = z
            run()
            out[:] = self._row_out_flat

    def _bind_row(self, n: int) -> None:
        import onnxruntime as ort

        row_in = np.zeros((1, n), dtype=np.float32)
        row_out = np.zeros((1, n), dtype=np.float32)
        binding = self._session.io_binding()
        # The OrtValue wraps row_in's memory: writing the array is writing the input.
        binding.bind_ortvalue_input(self._input, ort.OrtValue.ortvalue_from_numpy(row_in))
        binding.bind_output(self._output, "cpu", 0, np.float32, list(row_out.shape),
                            row_out.ctypes.data)
        self._row_in, self._row_out, self._binding = row_in, row_out, binding
        self._row_in_flat, self._row_out_flat = row_in[0], row_out[0]
        c_session = getattr(self._session, "_sess", None)
        c_binding = getattr(binding, "_iobinding", None)
        if c_session is not None and c_binding is not None:
            # What `InferenceSession.run_with_iobinding` calls, without its Python wrapper
            # (a tenth of a one-row run; its checks are for WebGPU graph capture, and
            # this session runs on the CPU provider only, `load_bundle`).
            self._run_bound = partial(c_session.run_with_iobinding, c_binding, None)
        else:
            self._run_bound = partial(self._session.run_with_iobinding, binding)

    def score(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Raw feature rows -> (score per row, squared error per feature per row)."""
        z = self.standardise(x)
        err = (z - self.reconstruct(z)).astype(np.float64) ** 2
        return err.mean(axis=1), err


def _check_size(bundle: str, path: Path, name: str, cap: int) -> None:
    """BundleError when the file is larger than `cap` (looked at before it is read)."""
    try:
        size = path.stat().st_size
    except OSError as exc:
        raise BundleError(bundle, f"{name} cannot be read ({exc.strerror or exc})") from exc
    if size > cap:
        raise BundleError(bundle, f"{name} is {size / 2**20:.1f} MiB, more than the "
                                  f"{cap // 2**20} MiB a bundle's {name} may be")


def load_bundle(path: str | os.PathLike[str]) -> Bundle:
    """Load and check a bundle; raises BundleError with a clear reason on any fault."""
    p = Path(path)
    sp = str(p)
    if not p.is_dir():
        raise BundleError(sp, "is not a directory")
    meta_path = p / MODEL_JSON
    onnx_path = p / MODEL_ONNX
    if not meta_path.is_file():
        raise BundleError(sp, f"{MODEL_JSON} is missing")
    if not onnx_path.is_file():
        raise BundleError(sp, f"{MODEL_ONNX} is missing")
    _check_size(sp, meta_path, MODEL_JSON, MAX_MODEL_JSON_BYTES)
    _check_size(sp, onnx_path, MODEL_ONNX, MAX_MODEL_ONNX_BYTES)
    try:
        doc = json.loads(meta_path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError, RecursionError) as exc:
        raise BundleError(sp, f"{MODEL_JSON} is not valid JSON ({exc})") from exc
    if not isinstance(doc, dict):
        raise BundleError(sp, f"{MODEL_JSON} is not a JSON object")
    meta = parse_meta(doc, sp)
    model_bytes, session = _open_session(sp, onnx_path)
    meta = _check_io(sp, meta, session)
    n = len(meta.feature_names)
    bundle = Bundle(p, meta, session)
    _probe(sp, bundle, n)
    dense = dense_layers(model_bytes)
    if dense is not None and dense[0].weight.shape[0] == n and dense[-1].weight.shape[1] == n:
        bundle.dense = dense
    h = hashlib.sha256(model_bytes)
    h.update(meta_path.read_bytes())
    bundle.digest = h.hexdigest()
    return bundle


def _open_session(sp: str, onnx_path: Path) -> tuple[bytes, Any]:
    """The model's bytes and an onnxruntime session on them (the daemon's settings)."""
    import onnxruntime as ort

    try:
        model_bytes = onnx_path.read_bytes()
    except OSError as exc:
        raise BundleError(sp, f"{MODEL_ONNX} cannot be read ({exc.strerror or exc})") from exc
    try:
        session = ort.InferenceSession(model_bytes, sess_options=_session_options(),
                                       providers=["CPUExecutionProvider"])
    except Exception as exc:  # onnxruntime raises several unrelated types
        raise BundleError(sp, f"{MODEL_ONNX} is not a loadable ONNX model "
                              f"({type(exc).__name__}: {str(exc).splitlines()[0][:200]})") from exc
    return model_bytes, session


def _check_io(sp: str, meta: BundleMeta, session: Any) -> BundleMeta:
    """The model takes one float [N, F] input with a dynamic batch, named as model.json
    says; returns `meta` with the input and output names filled in."""
    try:  # onnxruntime decodes names and symbolic dimensions as UTF-8 when they are read
        inputs = [(i.name, i.type, list(i.shape)) for i in session.get_inputs()]
        out_names = [o.name for o in session.get_outputs()]
    except UnicodeDecodeError as exc:
        raise BundleError(sp, f"{MODEL_ONNX} declares an input or output whose name or "
                              f"dimension is not UTF-8 text ({exc.reason})") from exc
    if len(inputs) != 1:
        raise BundleError(sp, f"the model has {len(inputs)} inputs, expected 1")
    n = len(meta.feature_names)
    in_name, in_type, in_shape = inputs[0]
    if in_type != "tensor(float)":
        raise BundleError(sp, f"model input {in_name!r} is {in_type}, expected tensor(float)")
    if len(in_shape) != 2 or (isinstance(in_shape[1], int) and in_shape[1] != n):
        raise BundleError(sp, f"model input {in_name!r} has shape {in_shape}, "
                              f"expected [N, {n}] for {n} feature names")
    if isinstance(in_shape[0], int):
        raise BundleError(sp, f"model input {in_name!r} has a fixed batch size "
                              f"{in_shape[0]}; windows are scored in batches, so the first "
                              "dimension must be dynamic")
    if meta.onnx_input and meta.onnx_input != in_name:
        raise BundleError(sp, f"model.json names input {meta.onnx_input!r}, "
                              f"the model's is {in_name!r}")
    out_name = meta.onnx_output or out_names[0]
    if out_name not in out_names:
        raise BundleError(sp, f"model.json names output {out_name!r}, the model has {out_names}")
    return BundleMeta(**{**meta.__dict__, "onnx_input": in_name, "onnx_output": out_name})


def _probe(sp: str, bundle: Bundle, n: int) -> None:
    """A batch of zeros (the training mean) and a batch of ones must give finite [N, F]
    reconstructions; this also warms the session up before READY."""
    for probe in (np.zeros((2, n), np.float32), np.ones((3, n), np.float32)):
        try:
            out = bundle.reconstruct(probe)
        except Exception as exc:
            raise BundleError(sp, f"the model fails on a probe batch of shape {probe.shape} "
                                  f"({type(exc).__name__}: {str(exc).splitlines()[0][:200]})"
                              ) from exc
        if out.shape != probe.shape:
            raise BundleError(sp, f"the model's output has shape {list(out.shape)} for input "
                                  f"{list(probe.shape)}, expected the same shape")
        if not np.all(np.isfinite(out)):
            raise BundleError(sp, "the model gives non-finite output on a probe batch")


def write_bundle(dest: str | os.PathLike[str], model_bytes: bytes, meta: Mapping[str, Any]) -> Path:
    """Write a bundle by temp-and-rename, so a reader never sees half a bundle.

    If `dest` exists it is replaced in two renames (old moved aside, new moved in,
    old removed); a crash in between leaves either the old or the new bundle whole
    plus a `.old-*` directory beside it.
    """
    doc = {"format": FORMAT, "format_version": FORMAT_VERSION, **meta}
    return replace_dir(dest, {MODEL_ONNX: model_bytes,
                              MODEL_JSON: (json.dumps(doc, indent=2) + "\n").encode()})


_fsync_dir = fsync_dir  # kept for callers that imported the old private name
