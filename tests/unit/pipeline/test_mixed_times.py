"""Assets that keep their samples' times and assets that do not, cut together.

The joint cut stacks the windows of every asset with the same segment length into one
matrix, and the timestamps only of the assets whose checks read them. A rate-of-change
check must read its own channel's times whatever other assets share its segment length
and wherever they come in the stack."""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from prometheus_client import CollectorRegistry

from agent.config.load import parse_config
from agent.ingest.buffers import Buffers
from agent.ops.metrics import Metrics
from agent.pipeline.runtime import AssetRuntime
from agent.pipeline.tick import Pipeline

RATE = 20


class _Sink:
    def __init__(self) -> None:
        self.msgs: list[Any] = []

    def submit(self, msgs: Any, **_: Any) -> None:
        self.msgs.extend(msgs)


def _asset(name: str, checked: bool) -> dict[str, Any]:
    ch: dict[str, Any] = {"topic": f"t/{name}/c", "decoder": "json-batch", "rate_hz": RATE,
                          "features": ["mean"]}
    if checked:
        ch["max_rate_per_s"] = 100.0
    return {"name": name, "window": {"length_s": 1.0, "lateness_s": 0.0, "timeout_s": 0.5},
            "channels": {"c": ch}}


def _faults(tmp: Path, order: list[tuple[str, bool]]) -> list[bytes]:
    doc = {"site": "s", "gateway": "g", "state_dir": str(tmp / "state"),
           "assets": [_asset(n, c) for n, c in order]}
    cfg = parse_config(doc, tmp)
    buffers = Buffers(cfg)
    sink = _Sink()
    pipe = Pipeline(cfg, buffers, sink, Metrics(CollectorRegistry()),
                    logging.getLogger("test"), [AssetRuntime.build(a, None, None)
                                                for a in cfg.assets])
    checked = next(i for i, (_, c) in enumerate(order) if c)
    for k in range(8):
        for ai in range(len(order)):
            # The plain assets' samples are stamped far from the checked one's.
            t0 = k + (0.0 if ai == checked else 0.013)
            ts = t0 + np.arange(RATE) / RATE
            v = np.full(RATE, 1.0) + 0.01 * np.arange(RATE)
            if ai == checked and k == 5:
                v[10:] += 20.0  # 20 in 0.05 s: 400 per s, past the 100 per s limit
            buffers.by_asset[ai][0].append_block(ts, v, k + 1.0)
        pipe.tick(k + 1.0)
    return [m.payload for m in sink.msgs if m.event is not None]


@pytest.mark.parametrize("first_plain", [True, False])
def test_a_rate_check_reads_its_own_times_beside_assets_without_times(
        tmp_path: Path, first_plain: bool) -> None:
    order = [("P", False), ("Q", False), ("R", True)] if first_plain else \
        [("R", True), ("P", False), ("Q", False)]
    alone = _faults(tmp_path / "alone", [("R", True)])
    mixed = _faults(tmp_path / "mixed", order)
    assert len(alone) == 1 and b"rate_of_change" in alone[0]
    assert mixed == alone
