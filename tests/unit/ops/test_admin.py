"""The admin socket's request parser (agent/ops/admin.py), over a real unix socket: every
malformed request gets a one-line `bad request` reply, never an internal error."""

from __future__ import annotations

import json
import logging
import socket
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from agent.ops.admin import MAX_REQUEST_BYTES, AdminServer, Peer


@pytest.fixture
def server(tmp_path: Path) -> Iterator[tuple[Path, list[dict[str, Any]]]]:
    calls: list[dict[str, Any]] = []

    def handler(doc: dict[str, Any], peer: Peer) -> dict[str, Any]:
        calls.append(doc)
        return {"ok": True, "uid": peer.uid}

    srv = AdminServer(tmp_path / "state" / "admin.sock", handler,
                      logging.getLogger("watchkeep.test.admin"))
    srv.start()
    yield srv.path, calls
    srv.stop()


def _send(path: Path, data: bytes) -> dict[str, Any]:
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as s:
        s.settimeout(10)
        s.connect(str(path))
        s.sendall(data)
        s.shutdown(socket.SHUT_WR)
        reply = b""
        while chunk := s.recv(65536):
            reply += chunk
    assert reply.endswith(b"\n") and reply.count(b"\n") == 1
    doc = json.loads(reply)
    assert isinstance(doc, dict)
    return doc


def test_a_request_reaches_the_handler(server: tuple[Path, list[dict[str, Any]]]) -> None:
    path, calls = server
    assert _send(path, b'{"verb": "status"}\n')["ok"] is True
    assert calls == [{"verb": "status"}]


@pytest.mark.parametrize(("data", "error"), [
    (b"not json\n", "bad request: Expecting value"),
    (b"[1, 2]\n", "bad request: a request is a JSON object"),
    (b"{" + b" " * MAX_REQUEST_BYTES + b"}\n", "bad request: request too large"),
    (b"\xff\xfe\n", "bad request"),
    # found by the admin fuzz target: a RecursionError went to the catch-all, logged
    # "admin request failed" with a traceback and replied "internal error"
    (b'{"verb": ' + b"[" * 2054 + b"]" * 2054 + b"}\n", "bad request: JSON nested too deeply"),
])
def test_malformed_requests_are_bad_requests(server: tuple[Path, list[dict[str, Any]]],
                                             caplog: pytest.LogCaptureFixture, data: bytes,
                                             error: str) -> None:
    path, calls = server
    with caplog.at_level(logging.ERROR, logger="watchkeep.test.admin"):
        reply = _send(path, data)
    assert reply["ok"] is False and reply["error"].startswith(error), reply
    assert calls == []
    assert not caplog.records
