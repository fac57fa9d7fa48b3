"""Fuzz target `admin`: one request line over the admin socket of a running daemon
(`agent.ops.admin`'s request parser, then `RebaselineManager.handle`, the verbs).

The daemon is real and started once per process: config from tests/helpers, one asset
whose model is adopted into the model store with a rehearsal set (so `rebaseline`,
`cancel` and `rollback` get past their checks), one without a model, ingest in a thread,
both brokers on a loopback port where nothing listens (the admin interface needs none),
the pipeline ticking every 10 s (no data comes in). Input: the bytes the client sends.
The contract (admin.py): one JSON object line back, `{"ok": true, ...}` or
`{"ok": false, "error": ...}`; a malformed request is a "bad request", never an
"internal error" (an exception the handler did not expect, logged with a traceback);
no reply is missing; nothing is logged with a traceback.
"""

from __future__ import annotations

import atexit
import functools
import json
import logging
import shutil
import socket
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
from hypothesis import strategies as st

from tests.fuzz.common import awkward_numbers, json_values
from tests.fuzz.harness import Target, check

ASSET, BARE = "P-1", "P-2"


class _Tracebacks(logging.Handler):
    """Keeps every log record that carries an exception."""

    def __init__(self) -> None:
        super().__init__(logging.DEBUG)
        self.records: list[logging.LogRecord] = []

    def emit(self, record: logging.LogRecord) -> None:
        if record.exc_info:
            self.records.append(record)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@functools.cache
def daemon() -> tuple[Any, Path, _Tracebacks]:
    """The running daemon, its admin socket and the traceback catcher."""
    from agent.config.load import load_config
    from agent.daemon import Daemon
    from agent.learning.rehearsal import reservoir
    from agent.models.bundle import load_bundle
    from agent.models.store import ModelStore
    from tests.helpers import asset_doc, train_pca_bundle, write_config

    tmp = Path(tempfile.mkdtemp(prefix="wk-fuzz-admin-"))
    trained = train_pca_bundle(tmp / "trained", ASSET, seed=5)
    store = ModelStore(tmp / "state" / "models", keep=5)
    names = load_bundle(trained).meta.feature_names
    rows = np.random.default_rng(0).normal(size=(300, len(names)))
    store.adopt(ASSET, "default", trained, reservoir(rows, names, 256))
    port = _free_port()
    cfg_path = write_config(tmp / "watchkeep.yaml", port, port,
                            [asset_doc(ASSET, store.active_link(ASSET, "default")),
                             asset_doc(BARE, None)],
                            ingest={"worker": "thread"}, pipeline={"tick_s": 10},
                            outbox={"synchronous": "NORMAL"}, http={"enabled": False},
                            rebaseline={"windows": 60})
    log = logging.getLogger("watchkeep.fuzz.admin")
    log.propagate = False
    log.setLevel(logging.INFO)
    catcher = _Tracebacks()
    log.addHandler(catcher)
    d = Daemon(load_config(cfg_path), logger=log)
    d.start()

    def stop() -> None:
        d.stop()
        shutil.rmtree(tmp, ignore_errors=True)

    atexit.register(stop)
    return d, Path(d.cfg.rebaseline.admin_socket), catcher


def send(sock_path: Path, data: bytes, timeout_s: float = 10.0) -> bytes:
    """Send `data` as a client would (then end the writing side) and read the reply."""
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as s:
        s.settimeout(timeout_s)
        s.connect(str(sock_path))
        try:
            s.sendall(data)
            s.shutdown(socket.SHUT_WR)
        except OSError:  # the server answered and closed before taking it all
            pass
        chunks = []
        while True:
            chunk = s.recv(65536)
            if not chunk:
                break
            chunks.append(chunk)
    return b"".join(chunks)


def one_input(data: bytes) -> None:
    _, path, catcher = daemon()
    catcher.records.clear()
    reply = send(path, data)
    check(reply.endswith(b"\n") and reply.count(b"\n") == 1,
          f"no single reply line: {reply[:200]!r}")
    doc = json.loads(reply)
    check(isinstance(doc, dict) and type(doc.get("ok")) is bool, f"reply {doc!r}")
    if not doc["ok"]:
        err = doc.get("error")
        check(isinstance(err, str) and not err.startswith("internal error"),
              f"the request broke the handler: {err!r}")
    check(not catcher.records, "logged with a traceback: "
          + "; ".join(r.getMessage() for r in catcher.records))


def _line(doc: Any) -> bytes:
    return json.dumps(doc).encode() + b"\n"


def seeds() -> list[bytes]:
    """What `watchkeep rebaseline / models / rollback / status` send, and near misses."""
    docs: list[Any] = [
        {"verb": "status"}, {"verb": "models", "asset": ASSET},
        {"verb": "rebaseline", "asset": ASSET, "reason": "impeller trimmed"},
        {"verb": "rebaseline", "asset": ASSET, "reason": "x", "mode": "default", "windows": 60},
        {"verb": "cancel", "asset": ASSET},
        {"verb": "rollback", "asset": ASSET, "to": "v1", "reason": "back"},
        {"verb": "rollback", "asset": BARE}, {"verb": "rebaseline", "asset": BARE},
        {"verb": "rebaseline", "asset": "X-9"}, {"verb": "reboot"}, [], "status",
    ]
    return [_line(d) for d in docs]


def strategy() -> Any:
    value = st.one_of(awkward_numbers, json_values, st.sampled_from([ASSET, BARE, "v1", "v0"]))
    doc = st.fixed_dictionaries(
        {"verb": st.one_of(st.sampled_from(["rebaseline", "cancel", "rollback", "models",
                                            "status"]), value)},
        optional={"asset": st.one_of(st.sampled_from([ASSET, BARE]), value), "mode": value,
                  "windows": st.one_of(st.integers(-5, 20_000), value), "to": value,
                  "reason": value, "accept_shift": value})
    nested = st.integers(1, 5000).map(lambda n: b'{"verb": ' + b"[" * n + b"]" * n + b"}\n")
    return st.one_of(doc.map(_line), doc.map(_line).map(lambda b: b * 2), nested,
                     st.binary(max_size=64), json_values.map(_line),
                     st.integers(65_000, 70_000).map(lambda n: b"{" + b" " * n + b"}\n"))


TARGET = Target("admin", one_input, seeds, strategy, examples=150, max_len=70_000)
