"""The HTTP endpoints: `/metrics`, `/healthz`, `/readyz`, `/status` on one small,
bounded, threaded HTTP server (`HttpServer`).

What each endpoint answers comes from callables the composition root passes in (the
registry to render, the health and readiness checks, the status document); this
module owns only the serving and its bounds against idle and slow clients (issue 20).
"""

from __future__ import annotations

import contextlib
import io
import json
import socket
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any, cast

from prometheus_client import CollectorRegistry
from prometheus_client.exposition import CONTENT_TYPE_LATEST, generate_latest

StatusFn = Callable[[], dict[str, Any]]
CheckFn = Callable[[], tuple[bool, str]]

# The HTTP server's bounds (config `http.max_connections`, `http.request_timeout_s`).
# Common practice, no source: a Prometheus server, a health probe and an operator's curl
# are a handful of clients, so 32 connections at once is plenty; a request head not
# complete 10 s after the connection was accepted is a stuck or hostile client (nginx's
# client_header_timeout default is 60 s, for the open internet; a loopback scrape sends
# its head at once).
DEFAULT_MAX_CONNECTIONS = 32
DEFAULT_REQUEST_TIMEOUT_S = 10.0
# Connections the kernel queues until they are accepted (listen(2) backlog; the kernel
# caps it at net.core.somaxconn, 4096 since Linux 5.4). socketserver's default is 5.
LISTEN_BACKLOG = 128
# The request line and headers together; Python's own limits are 64 KiB per line and
# 100 header lines, far more than a scrape sends.
MAX_HEAD_BYTES = 16 * 1024
_BUSY = (b"HTTP/1.0 503 Service Unavailable\r\nContent-Type: text/plain\r\n"
         b"Content-Length: 17\r\nConnection: close\r\n\r\ntoo many clients\n")


@dataclass(frozen=True)
class _Endpoints:
    """What the endpoints answer with, and the per-request timeout."""

    registry: CollectorRegistry
    healthy: CheckFn
    ready: CheckFn
    status: StatusFn
    before_scrape: Callable[[], None] | None
    request_timeout_s: float


class _DeadlineReader(io.RawIOBase):
    """A socket's reading side that gives up at a deadline (the request head's), however
    slowly the bytes trickle in, and after `MAX_HEAD_BYTES` before the head is complete:
    a per-recv timeout alone lets a client that sends one byte every few seconds hold
    its connection (and a thread) for ever."""

    def __init__(self, sock: socket.socket, deadline: float) -> None:
        super().__init__()
        self.sock = sock
        self.deadline = deadline
        self.taken = 0

    def readable(self) -> bool:
        return True

    def readinto(self, buf: Any) -> int:
        left = self.deadline - time.monotonic()
        if left <= 0:
            raise TimeoutError("request head not complete in time")
        if self.taken >= MAX_HEAD_BYTES:
            raise ValueError("request head too large")
        self.sock.settimeout(left)
        view = memoryview(buf)[:MAX_HEAD_BYTES - self.taken]
        n = self.sock.recv_into(view)
        self.taken += n
        return n


class _Handler(BaseHTTPRequestHandler):
    """One request per connection; what to answer comes from the server's `_Endpoints`."""

    @property
    def endpoints(self) -> _Endpoints:
        return cast(_BoundedServer, self.server).endpoints

    def setup(self) -> None:
        super().setup()
        # rfile is replaced by one that keeps the head's deadline; the file
        # makefile() made is closed first (an open one keeps the socket's
        # descriptor alive after close()).
        sock = self.connection
        self.rfile.close()
        self.rfile = io.BufferedReader(
            _DeadlineReader(sock, time.monotonic() + self.endpoints.request_timeout_s))

    def handle(self) -> None:
        try:
            super().handle()
        except (OSError, ValueError):  # timed out, too large, or gone
            self.close_connection = True

    def do_GET(self) -> None:
        ep = self.endpoints
        # The head is in: the response is written with a plain timeout.
        self.connection.settimeout(ep.request_timeout_s)
        path = self.path.split("?", 1)[0]
        try:
            if path == "/metrics":
                if ep.before_scrape is not None:
                    ep.before_scrape()  # e.g. counts kept outside the registry
                self._send(200, generate_latest(ep.registry), CONTENT_TYPE_LATEST)
            elif path in ("/healthz", "/readyz"):
                ok, why = (ep.healthy if path == "/healthz" else ep.ready)()
                self._send(200 if ok else 503, (why + "\n").encode(), "text/plain")
            elif path == "/status":
                body = json.dumps(ep.status(), indent=2).encode()
                self._send(200, body, "application/json")
            else:
                self._send(404, b"not found\n", "text/plain")
        except OSError:
            raise  # the client is gone or stopped reading: nothing more to send
        except Exception as exc:  # never let a scrape kill the server thread
            self._send(500, f"error: {exc}\n".encode(), "text/plain")

    def _send(self, code: int, body: bytes, ctype: str) -> None:
        self.send_response(code)
        self.send_header("Content-Type", ctype)
        self.send_header("Content-Length", str(len(body)))
        self.end_headers()
        self.wfile.write(body)

    def log_message(self, format: str, *args: Any) -> None:
        return


class _BoundedServer(ThreadingHTTPServer):
    """At most `limit` connections served at once, one thread each; a connection past
    the limit gets a 503 at once and is closed (its file descriptor is released), so idle
    clients can never hold more than `limit` descriptors and threads."""

    daemon_threads = True
    request_queue_size = LISTEN_BACKLOG

    def __init__(self, addr: tuple[str, int], endpoints: _Endpoints, limit: int) -> None:
        self.endpoints = endpoints
        self.limit = limit
        self.timeout_s = endpoints.request_timeout_s
        self.slots = threading.BoundedSemaphore(limit)
        self.refused = 0
        super().__init__(addr, _Handler)

    def process_request(self, request: Any, client_address: Any) -> None:
        if not self.slots.acquire(blocking=False):
            self.refused += 1
            with contextlib.suppress(OSError):
                request.setblocking(False)
                request.send(_BUSY)  # one small write into an empty buffer: never blocks
            self.shutdown_request(request)
            return
        try:
            super().process_request(request, client_address)
        except BaseException:
            self.slots.release()
            raise

    def process_request_thread(self, request: Any, client_address: Any) -> None:
        try:
            super().process_request_thread(request, client_address)
        finally:
            self.slots.release()

    def handle_error(self, request: Any, client_address: Any) -> None:
        return  # a client that timed out or hung up is not the server's error


class HttpServer:
    """`/metrics`, `/healthz`, `/readyz`, `/status` on one small threaded HTTP server.

    Bounded against idle and slow clients (issue 20): at most `max_connections`
    connections at once (one thread each; more get a 503 and are closed), each must
    send its request head within `request_timeout_s` of being accepted (idle or
    trickling clients are cut off), the response is written with the same timeout,
    one request per connection (HTTP/1.0), and a listen backlog of `LISTEN_BACKLOG`.
    """

    def __init__(self, host: str, port: int, registry: CollectorRegistry, *,
                 healthy: CheckFn, ready: CheckFn, status: StatusFn,
                 before_scrape: Callable[[], None] | None = None,
                 max_connections: int = DEFAULT_MAX_CONNECTIONS,
                 request_timeout_s: float = DEFAULT_REQUEST_TIMEOUT_S) -> None:
        self.registry = registry
        endpoints = _Endpoints(registry, healthy, ready, status, before_scrape,
                               request_timeout_s)
        self._server = _BoundedServer((host, port), endpoints, max_connections)
        self._thread = threading.Thread(target=self._server.serve_forever,
                                        name="watchkeep-http", daemon=True)

    @property
    def port(self) -> int:
        return int(self._server.server_address[1])

    @property
    def refused(self) -> int:
        """Connections turned away (503) because `max_connections` were open."""
        return self._server.refused

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self._server.shutdown()
        self._server.server_close()
