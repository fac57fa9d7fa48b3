"""Batched inference across assets: one onnxruntime run per tick for a group of models.

Each asset has its own model, and a one-row onnxruntime run costs about 8 us
whatever the model's size (the call, not the arithmetic: a 40-feature autoencoder
is a few thousand multiply-adds). With 200 assets closing a window each, that is
most of a tick. Models that `watchkeep train` writes are plain dense networks (a
chain of Gemm nodes, each optionally followed by Tanh, Relu or Sigmoid); for every
group of such models with the same layer shapes and activations, `BatchedModels`
builds one ONNX graph holding their weights stacked `[M, in, out]`. A run takes the
tick's standardised rows and the model slot of each row, gathers each row's weights
and applies batched MatMul + Add + activation: onnxruntime still does all of the
arithmetic, once per tick instead of once per window (200 rows: about 60 us per
run, 0.3 us per window, onnxruntime 1.32 on this 2-core gateway, 2026-12-02,
`python -m tests.bench pipeline`).

Nothing changes for any other model: a graph of another shape, a model trained
elsewhere, a group of one, a model above `MAX_PARAMS`, a member whose batched output
does not match its own session on the probe rows all keep their per-model run
(`Bundle.reconstruct_row`).
The batched result equals the model's own run to float32 rounding (MatMul + Add
instead of Gemm sum in a different order: at most a few 1e-7 on values of order 1),
which the build checks member by member.
"""

from __future__ import annotations

import logging
from collections.abc import Iterable, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np

from agent.commission.export import ACTIVATIONS, DenseLayer  # numpy only
from agent.models import onnx_subset as ox

if TYPE_CHECKING:
    from agent.models.bundle import Bundle

OPSET = 17  # Unsqueeze/Squeeze take their axes as an input from opset 13
IR_VERSION = 8
# How far a member's batched output may be from its own session's on the probe rows:
# float32 rounding of a different summation order (common practice, no source).
RTOL, ATOL = 1e-4, 1e-5
# Models above this many weights and biases run alone: a run gathers every row's
# weights, and past some size that copy costs more than the per-call overhead that
# batching saves. 200 models, one row each, per window (onnxruntime 1.32, this 2-core
# machine, 2026-12-02): 688 parameters 0.37 us batched against 10.6 us alone; 2,090:
# 1.7 against 16.3; 12,725: 7.3 against 24.6; 50,450: 114 against 37.
MAX_PARAMS = 16_384


def n_params(layers: Sequence[DenseLayer]) -> int:
    """Weights and biases of a dense network."""
    return sum(ly.weight.size + ly.bias.size for ly in layers)


def _signature(layers: Sequence[DenseLayer]) -> tuple[tuple[int, int, str], ...]:
    return tuple((ly.weight.shape[0], ly.weight.shape[1], ly.activation) for ly in layers)


def batched_model(members: Sequence[Sequence[DenseLayer]]) -> bytes:
    """The ONNX graph that runs row k through model `slot[k]` of `members` (all of one
    signature): inputs `x` [K, F] float32 and `slot` [K] int64, output `recon` [K, F]."""
    sig = _signature(members[0])
    m = ox.ModelProto(ir_version=IR_VERSION, producer_name="watchkeep")
    m.opset_import.add(domain="", version=OPSET)
    g = m.graph
    g.name = "watchkeep_batched"
    ox.add_tensor(g, "axis1", np.array([1], np.int64))
    g.node.add(op_type="Unsqueeze", input=["x", "axis1"], output=["h"])  # [K, 1, F]
    prev = "h"
    for i, (_, n_out, act) in enumerate(sig):
        ox.add_tensor(g, f"W{i}", np.stack([ls[i].weight for ls in members]))
        ox.add_tensor(g, f"B{i}", np.stack([ls[i].bias.reshape(1, n_out) for ls in members]))
        g.node.add(op_type="Gather", input=[f"W{i}", "slot"], output=[f"w{i}"])
        g.node.add(op_type="Gather", input=[f"B{i}", "slot"], output=[f"b{i}"])
        g.node.add(op_type="MatMul", input=[prev, f"w{i}"], output=[f"m{i}"])
        g.node.add(op_type="Add", input=[f"m{i}", f"b{i}"], output=[f"a{i}"])
        prev = f"a{i}"
        op = ACTIVATIONS[act]
        if op is not None:
            g.node.add(op_type=op, input=[prev], output=[f"y{i}"])
            prev = f"y{i}"
    g.node.add(op_type="Squeeze", input=[prev, "axis1"], output=["recon"])
    ox.add_value_info(g.input, "x", ox.FLOAT, ["K", sig[0][0]])
    ox.add_value_info(g.input, "slot", ox.INT64, ["K"])
    ox.add_value_info(g.output, "recon", ox.FLOAT, ["K", sig[-1][1]])
    return bytes(m.SerializeToString())


class _Group:
    """One batched session and the bundles it serves, by slot."""

    def __init__(self, session: Any, bundles: list[Bundle]) -> None:
        self.session = session
        self.bundles = bundles

    def run(self, z: np.ndarray, slots: np.ndarray) -> np.ndarray:
        out = self.session.run(None, {"x": z, "slot": slots})[0]
        return np.asarray(out, dtype=np.float32)


class BatchedModels:
    """The batched groups over a set of bundles; `slot_of(bundle)` says where one sits."""

    def __init__(self, bundles: Iterable[Bundle], logger: logging.Logger | None = None,
                 min_group: int = 2) -> None:
        from agent.models.bundle import _session_options

        self.log = logger
        self.groups: list[_Group] = []
        self._where: dict[int, tuple[int, int]] = {}  # id(bundle) -> (group, slot)
        by_sig: dict[tuple[Any, ...], list[Bundle]] = {}
        # Every bundle looked at, held so that its id stays its own while this lives.
        self._seen: dict[int, Bundle] = {}
        for b in bundles:
            if id(b) in self._seen:
                continue
            self._seen[id(b)] = b
            if b.dense is None or n_params(b.dense) > MAX_PARAMS:
                continue
            by_sig.setdefault(_signature(b.dense), []).append(b)
        for members in by_sig.values():
            if len(members) < min_group:
                continue
            try:
                import onnxruntime as ort

                session = ort.InferenceSession(
                    batched_model([b.dense for b in members if b.dense is not None]),
                    sess_options=_session_options(), providers=["CPUExecutionProvider"])
            except Exception as exc:  # keep the per-model runs; nothing is lost
                self._warn("batched model not built; these models run one by one",
                           n=len(members), error=str(exc).splitlines()[0][:200])
                continue
            group = _Group(session, list(members))
            ok = self._check(group)
            gi = len(self.groups)
            self.groups.append(group)
            for slot, b in enumerate(members):
                if ok[slot]:
                    self._where[id(b)] = (gi, slot)

    def _check(self, group: _Group) -> np.ndarray:
        """Which members' batched output matches their own session on probe rows (the
        zero row, i.e. the training mean, and a fixed pseudo-random one)."""
        n = len(group.bundles)
        f = group.bundles[0].n_features
        rng = np.random.default_rng(0x5107)
        probes = np.stack([np.zeros(f), rng.normal(size=f)]).astype(np.float32)
        z = np.concatenate([probes] * n)
        slots = np.repeat(np.arange(n, dtype=np.int64), len(probes))
        ok = np.zeros(n, dtype=bool)
        try:
            got = group.run(z, slots)
        except Exception as exc:
            self._warn("batched model fails on its probe rows; these models run one by one",
                       n=n, error=str(exc).splitlines()[0][:200])
            return ok
        for j, b in enumerate(group.bundles):
            try:
                own = b.reconstruct(probes)
            except Exception:
                continue
            mine = got[j * len(probes):(j + 1) * len(probes)]
            ok[j] = bool(np.all(np.isfinite(mine))
                         and np.allclose(mine, own, rtol=RTOL, atol=ATOL))
            if not ok[j]:
                self._warn("a model's batched output differs from its own run; it runs "
                           "alone", model=b.meta.model_id, path=str(b.path))
        return ok

    def _warn(self, msg: str, **fields: Any) -> None:
        if self.log is not None:
            from agent.ops.logs import kv

            self.log.warning(kv(msg, **fields))

    def slot_of(self, bundle: Bundle) -> tuple[int, int] | None:
        """(group, slot) of a bundle served here, or None."""
        return self._where.get(id(bundle))

    def considered(self, bundle: Bundle) -> bool:
        """Whether the build looked at this bundle (served here or not)."""
        return id(bundle) in self._seen

    @property
    def n_models(self) -> int:
        return len(self._where)
