"""The local admin interface: a unix socket in the state directory, one JSON request per line.

Not on the network at all: a unix socket is reachable only from this machine, and its
file mode (0600: the daemon's user, and root) decides who may use it; the state
directory is 0700 under systemd (StateDirectoryMode=) and when watchkeep creates it. The caller's
uid and pid come from the kernel (SO_PEERCRED), so "who asked" in the log and in the
event is not something the caller can claim.

Protocol: the client sends one JSON object and a newline, e.g.
`{"verb": "rebaseline", "asset": "P-101", "reason": "impeller trimmed"}`; the server
answers with one JSON object and a newline: `{"ok": true, ...}` or
`{"ok": false, "error": "..."}`, then closes the connection.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import pwd
import socket
import socketserver
import struct
import threading
from collections.abc import Callable
from dataclasses import dataclass
from enum import StrEnum
from pathlib import Path
from typing import Any

from agent.errors import WatchkeepError
from agent.fsutil import private_dir
from agent.ops.logs import kv

MAX_REQUEST_BYTES = 64 * 1024
SOCKET_MODE = 0o600


class AdminVerb(StrEnum):
    """The requests the admin socket takes (`"verb"` of the request object)."""

    REBASELINE = "rebaseline"
    CANCEL = "cancel"
    ROLLBACK = "rollback"
    MODELS = "models"
    STATUS = "status"


class AdminUnavailable(WatchkeepError):
    """The daemon's admin socket cannot be reached or answers with something else."""

    exit_code = 6


@dataclass(frozen=True)
class Peer:
    """Who is on the other end of the socket, as the kernel says."""

    uid: int
    gid: int
    pid: int

    @property
    def user(self) -> str:
        try:
            return pwd.getpwuid(self.uid).pw_name
        except KeyError:
            return str(self.uid)

    def as_json(self) -> dict[str, Any]:
        return {"via": "admin-socket", "user": self.user, "uid": self.uid, "pid": self.pid}


Handler = Callable[[dict[str, Any], Peer], dict[str, Any]]


def _peer(sock: socket.socket) -> Peer:
    raw = sock.getsockopt(socket.SOL_SOCKET, socket.SO_PEERCRED, struct.calcsize("3i"))
    pid, uid, gid = struct.unpack("3i", raw)
    return Peer(uid, gid, pid)


class _Server(socketserver.ThreadingMixIn, socketserver.UnixStreamServer):
    daemon_threads = True
    handler: Handler
    log: logging.Logger


class _Request(socketserver.StreamRequestHandler):
    server: _Server

    def handle(self) -> None:
        line = self.rfile.readline(MAX_REQUEST_BYTES + 1)
        try:
            if len(line) > MAX_REQUEST_BYTES:
                raise ValueError("request too large")
            try:
                doc = json.loads(line)
            except RecursionError:  # nested deeper than the parser's recursion limit
                raise ValueError("JSON nested too deeply") from None
            if not isinstance(doc, dict):
                raise ValueError("a request is a JSON object")
            reply = self.server.handler(doc, _peer(self.connection))
        except ValueError as exc:
            reply = {"ok": False, "error": f"bad request: {exc}"}
        except Exception as exc:  # one bad request must not take the admin interface down
            self.server.log.exception("admin request failed")
            reply = {"ok": False, "error": f"internal error: {type(exc).__name__}: {exc}"}
        with contextlib.suppress(OSError):
            self.wfile.write(json.dumps(reply, allow_nan=False).encode() + b"\n")


class AdminServer:
    """Serves `handler` on a unix socket at `path` (module docstring)."""

    def __init__(self, path: Path, handler: Handler, logger: logging.Logger) -> None:
        self.path = Path(path)
        self.handler = handler
        self.log = logger
        self._server: _Server | None = None
        self._thread: threading.Thread | None = None

    def start(self) -> None:
        private_dir(self.path.parent)
        if self.path.exists() or self.path.is_symlink():
            if _answers(self.path):
                raise WatchkeepError(f"admin socket {self.path} is in use by another process")
            self.path.unlink()  # left behind by a daemon that did not stop cleanly
        old = os.umask(0o177)  # the socket is born 0600, never briefly wider
        try:
            srv = _Server(str(self.path), _Request)
        finally:
            os.umask(old)
        os.chmod(self.path, SOCKET_MODE)
        srv.handler = self.handler
        srv.log = self.log
        self._server = srv
        self._thread = threading.Thread(target=srv.serve_forever, kwargs={"poll_interval": 0.2},
                                        name="watchkeep-admin", daemon=True)
        self._thread.start()
        self.log.info(kv("admin interface listening", socket=str(self.path)))

    def stop(self) -> None:
        if self._server is None:
            return
        self._server.shutdown()
        self._server.server_close()
        with contextlib.suppress(OSError):
            self.path.unlink()
        self._server = None


def _answers(path: Path) -> bool:
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as s:
        s.settimeout(0.5)
        try:
            s.connect(str(path))
        except OSError:
            return False
        return True


def request(path: str | os.PathLike[str], doc: dict[str, Any],
            timeout_s: float = 10.0) -> dict[str, Any]:
    """Send one request to the admin socket and return the reply (AdminUnavailable if the
    daemon cannot be reached)."""
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as s:
        s.settimeout(timeout_s)
        try:
            s.connect(str(path))
            s.sendall(json.dumps(doc).encode() + b"\n")
            buf = b""
            while not buf.endswith(b"\n"):
                chunk = s.recv(65536)
                if not chunk:
                    break
                buf += chunk
        except OSError as exc:
            raise AdminUnavailable(f"cannot reach the daemon at {path} "
                                   f"({exc.strerror or exc}); is watchkeep running?") from exc
    try:
        reply = json.loads(buf)
    except json.JSONDecodeError as exc:
        raise AdminUnavailable(f"the daemon at {path} did not answer with JSON") from exc
    if not isinstance(reply, dict):
        raise AdminUnavailable(f"the daemon at {path} did not answer with a JSON object")
    return reply
