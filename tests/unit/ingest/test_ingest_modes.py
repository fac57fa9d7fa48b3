"""The same messages through thread-mode ingest and through the ingest child's batches
(over a real pipe, applied by `ProcessIngest`) land in the windows bit for bit alike,
with the same counts; and what the child imports stays free of numpy."""

from __future__ import annotations

import json
import logging
import multiprocessing as mp
import pickle
import subprocess
import sys
import threading
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
from prometheus_client import CollectorRegistry

from agent.config.load import load_config, parse_config
from agent.ingest.buffers import Buffers, Ingest, IngestHandler, close_inboxes
from agent.ingest.child import _Generation, _Sender, errors_delta
from agent.ingest.parent import ProcessIngest
from agent.ingest.protocol import Bye, Data
from agent.ops.metrics import Metrics

T0 = 0.1234567  # small times: a last-bit difference in k / rate would show in the sum
CONFIG_DIR = Path(__file__).resolve().parents[3] / "config"
HEAVY = ("numpy", "prometheus_client", "onnxruntime", "onnx", "scipy", "sklearn")


def _config() -> Any:
    doc = {"site": "s", "gateway": "g", "state_dir": "/tmp/unused",
           "ingest": {"max_clock_skew_s": 1e9},
           "assets": [{"name": "F-1", "window": {"length_s": 1.0, "lateness_s": 0.0},
                       "channels": {
                           "acc": {"topic": "t/F-1/acc", "decoder": "json-batch",
                                   "rate_hz": 300.0, "features": ["rms"]},
                           "acc2": {"topic": "t/F-1/acc2", "decoder": "json-batch",
                                    "rate_hz": 7.3, "features": ["rms"]},
                           "temp": {"topic": "t/F-1/temp", "rate_hz": 3.0}}}]}
    return parse_config(doc, Path("."))


def _messages() -> list[tuple[str, bytes, float]]:
    rng = np.random.default_rng(7)
    out = []
    t = T0
    for b in range(30):  # blocks of odd sizes and rates (inexact sample spacings)
        n = int(rng.integers(1, 90))
        vals = rng.normal(0, 3, n).tolist()
        out.append(("t/F-1/acc", json.dumps({"ts": t, "rate_hz": 299.7 + 0.013 * b,
                                             "values": vals}).encode(), t + 0.01))
        out.append(("t/F-1/acc2", json.dumps({"ts": t, "values": vals[:3]}).encode(), t))
        out.append(("t/F-1/temp", json.dumps({"ts": t, "value": vals[0]}).encode(), t))
        t += n / 300.0 + (0.05 if b == 11 else 0.0)  # one gap
    out.append(("t/F-1/acc", b'{"values": [1, NaN]}', t))  # rejected
    return out


def _windows(buffers: Buffers) -> list[tuple[float, list[list[int]], list[list[int]]]]:
    results, _ = close_inboxes([chans[0].inbox for chans in buffers.by_asset], T0 + 1e4)
    return [(w.start, [np.asarray(t).view(np.int64).tolist() for t in w.timestamps],
             [np.asarray(v).view(np.int64).tolist() for v in w.values])
            for r in results for w in r.windows]


def _counts(m: Metrics) -> list[tuple[str, str, float]]:
    return sorted((s.name, repr(sorted(s.labels.items())), s.value)
                  for f in m.registry.collect()
                  if f.name in ("watchkeep_samples", "watchkeep_sample_gaps",
                                "watchkeep_messages_rejected", "watchkeep_messages_received")
                  for s in f.samples if s.name.endswith("_total"))


def test_thread_and_process_ingest_fill_the_windows_alike() -> None:
    """Timestamps and values bit for bit, and every count, are the same either way."""
    cfg, log = _config(), logging.getLogger("watchkeep.test.modes")
    msgs = _messages()

    m_thread = Metrics(CollectorRegistry())
    b_thread = Buffers(cfg)
    thread = IngestHandler(cfg, b_thread, m_thread, log)
    for topic, payload, arrival in msgs:
        thread.handle(topic, payload, arrival)
    thread.flush_counts()

    m_proc = Metrics(CollectorRegistry())
    b_proc = Buffers(cfg)
    daemon_side = ProcessIngest(cfg, IngestHandler(cfg, b_proc, m_proc, log), m_proc, log)
    ours, theirs = mp.Pipe(duplex=True)
    child = _Generation(0, cfg, _Sender(theirs), threading.Event(), log)
    for topic, payload, arrival in msgs:
        child.handler.handle(topic, payload, arrival)
    child.batch.flush()
    counts = child.counts()
    data = 0
    while ours.poll(0.5):
        msg = ours.recv()
        assert isinstance(msg, Data)
        daemon_side._apply(msg)
        data += 1
    assert data >= 1 and counts is not None
    daemon_side._apply_counts(counts)
    daemon_side.handler.flush_counts()

    windows = _windows(b_thread)
    assert len(windows) >= 5
    assert _windows(b_proc) == windows
    assert _counts(m_proc) == _counts(m_thread)
    assert any(s[0] == "watchkeep_sample_gaps_total" and s[2] == 1 for s in _counts(m_proc))


def _fresh_python(code: str, stdin: bytes = b"") -> list[str]:
    """The top-level packages a fresh interpreter holds after running `code`."""
    out = subprocess.run(
        [sys.executable, "-c", code + "\nimport sys\n"
         "print(' '.join(sorted({m.partition('.')[0] for m in sys.modules})))"],
        input=stdin, capture_output=True, check=True, timeout=60)
    return out.stdout.decode().split()


def test_child_modules_import_without_numpy() -> None:
    """The ingest child's module, and every module it needs, bring no numpy along."""
    mods = _fresh_python("import agent.ingest.child, agent.core.routing, agent.ops.logs, "
                         "agent.errors, agent.core.sparkplug")
    assert "paho" in mods and "agent" in mods
    assert not set(HEAVY) & set(mods)


def test_unpickling_a_full_config_imports_no_numpy() -> None:
    """Every class inside Config (the example uses every key) unpickles without numpy."""
    cfg = load_config(CONFIG_DIR / "example.yaml")
    assert cfg.rebaseline is not None
    mods = _fresh_python("import pickle, sys\ncfg = pickle.loads(sys.stdin.buffer.read())\n"
                         "assert cfg.assets and cfg.rebaseline is not None",
                         stdin=pickle.dumps(cfg))
    assert "agent" in mods and not set(HEAVY) & set(mods)


def test_child_callback_errors_reach_the_daemons_counter() -> None:
    """An exception in the child's on_message is counted there and handed on as a delta."""
    cfg, log = _config(), logging.getLogger("watchkeep.test.modes")
    ours, theirs = mp.Pipe(duplex=True)
    child = _Generation(0, cfg, _Sender(theirs), threading.Event(), log)
    ingest = Ingest(cfg, child.handler, None, log)

    def broken(topic: str, payload: bytes, arrival: float) -> None:
        raise RuntimeError("a bug in the handler")

    child.handler.handle = broken  # type: ignore[method-assign]
    for _ in range(2):
        ingest._on_message(None, None, mqtt.MQTTMessage(topic=b"t/F-1/temp"))  # type: ignore[arg-type]
    sender = _Sender(theirs)
    for msg in (errors_delta(ingest._errors), errors_delta(ingest._errors), Bye()):
        if msg is not None:
            sender.send(msg)
    m = Metrics(CollectorRegistry())
    daemon_side = ProcessIngest(cfg, IngestHandler(cfg, Buffers(cfg), m, log), m, log)
    assert daemon_side._read_until_end(ours)  # type: ignore[arg-type]
    assert m.registry.get_sample_value("watchkeep_callback_errors_total",
                                       {"loop": "ingest"}) == 2
