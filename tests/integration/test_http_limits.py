"""The HTTP endpoints against idle and slow clients, on real sockets (issue 20, finding 5)."""

from __future__ import annotations

import http.client
import os
import resource
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from prometheus_client import CollectorRegistry

from agent.ops.http_server import HttpServer
from agent.ops.metrics import Metrics
from tests.brokers import Broker, free_port, wait_for
from tests.helpers import Collector, asset_doc, train_pca_bundle, write_config

WATCHKEEP = str(Path(sys.executable).with_name("watchkeep"))
STATUS_TOPIC = "watchkeep/testworks/gw1/status"
# The daemon runs with this many file descriptors (RLIMIT_NOFILE soft limit), and the test
# opens more idle connections than that: the probe of issue 20 opened idles up to the
# descriptor limit, after which the upstream could not reconnect ("Too many open files").
DAEMON_NOFILE = 256
IDLE_CONNECTIONS = 400


def get(port: int, path: str, timeout_s: float = 2.0) -> tuple[int, bytes]:
    c = http.client.HTTPConnection("127.0.0.1", port, timeout=timeout_s)
    try:
        c.request("GET", path)
        r = c.getresponse()
        return r.status, r.read()
    finally:
        c.close()


def answers(port: int, path: str = "/metrics") -> bytes | None:
    """The body of a 200 reply, or None (refused, 503 while full, timed out)."""
    try:
        code, body = get(port, path)
    except OSError:
        return None
    return body if code == 200 else None


def open_idle(port: int, n: int) -> list[socket.socket]:
    """Up to `n` connections that never send a byte, made one after the other (each
    connect completes before the next, as a client that wants to hold the server's
    descriptors would do); stops after 3 connects in a row time out (the server takes
    no more)."""
    out: list[socket.socket] = []
    misses = 0
    while len(out) < n and misses < 3:
        try:
            out.append(socket.create_connection(("127.0.0.1", port), timeout=1.0))
            misses = 0
        except OSError:
            misses += 1
    return out


def fds(pid: int) -> int:
    return len(os.listdir(f"/proc/{pid}/fd"))


def _lower_nofile() -> None:
    resource.setrlimit(resource.RLIMIT_NOFILE, (DAEMON_NOFILE, DAEMON_NOFILE))


@pytest.fixture
def daemon(tmp_path: Path, broker: Broker, upstream_broker: Broker
           ) -> Iterator[tuple[int, int]]:
    """`watchkeep run` with RLIMIT_NOFILE at `DAEMON_NOFILE` and the default HTTP
    settings; yields its HTTP port and PID."""
    bundle = train_pca_bundle(tmp_path / "models" / "P-1", "P-1", seed=3)
    port = free_port()
    cfg = write_config(tmp_path / "watchkeep.yaml", broker.port, upstream_broker.port,
                       [asset_doc("P-1", bundle)], http={"port": port})
    env = {k: v for k, v in os.environ.items() if k not in ("NOTIFY_SOCKET", "WATCHDOG_USEC")}
    log = open(tmp_path / "daemon.log", "wb")  # noqa: SIM115 - closed below
    proc = subprocess.Popen([WATCHKEEP, "run", "--config", str(cfg)], env=env,
                            stdout=log, stderr=subprocess.STDOUT, preexec_fn=_lower_nofile)
    try:
        wait_for(lambda: answers(port, "/readyz") or proc.poll() is not None, timeout_s=30,
                 what="the daemon ready")
        assert proc.poll() is None, (tmp_path / "daemon.log").read_text()
        yield port, proc.pid
    finally:
        if proc.poll() is None:
            proc.terminate()
            try:
                proc.wait(15)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(5)
        log.close()


def test_idle_connections_neither_stall_metrics_nor_starve_the_upstream(
        daemon: tuple[int, int], upstream_broker: Broker, tmp_path: Path) -> None:
    """400 idle connections against a daemon limited to 256 descriptors: the upstream
    reconnects after a broker restart while they are open, and /metrics answers again
    within a bounded wait (the default 10 s request timeout cuts the idles off)."""
    port, pid = daemon
    idles = open_idle(port, IDLE_CONNECTIONS)
    try:
        opened = time.monotonic()
        print(f"{len(idles)} idle connections made; the daemon holds {fds(pid)} descriptors "
              f"(limit {DAEMON_NOFILE})")
        # The upstream broker goes away and comes back while the idles are held.
        upstream_broker.restart()
        watcher = Collector(upstream_broker.port, STATUS_TOPIC, "status-after-restart")
        try:
            wait_for(lambda: any(s.get("state") == "online" for s in watcher.json()),
                     timeout_s=30, what="the daemon back online upstream (it reconnected)")
        finally:
            watcher.close()
        body = wait_for(lambda: answers(port), timeout_s=30, interval_s=0.2,
                        what="/metrics answering with the idle connections still open")
        waited = time.monotonic() - opened
        assert b'watchkeep_broker_connected{broker="upstream"} 1.0' in body
        print(f"/metrics answered {waited:.1f} s after {IDLE_CONNECTIONS} idle connections")
        log = (tmp_path / "daemon.log").read_text()
        assert "Too many open files" not in log
    finally:
        for s in idles:
            s.close()


@pytest.fixture
def server() -> Iterator[HttpServer]:
    reg = CollectorRegistry()
    Metrics(reg)
    srv = HttpServer("127.0.0.1", 0, reg, healthy=lambda: (True, "ok"),
                     ready=lambda: (True, "ready"), status=lambda: {},
                     max_connections=4, request_timeout_s=1.0)
    srv.start()
    yield srv
    srv.stop()


def test_past_the_limit_a_client_gets_503_and_is_closed(server: HttpServer) -> None:
    """With `max_connections` idle clients held, the next one is answered 503 at once."""
    idles = open_idle(server.port, 4)
    try:
        wait_for(lambda: get(server.port, "/healthz")[0] == 503, timeout_s=5,
                 what="a 503 while the limit is held")
        assert server.refused >= 1
    finally:
        for s in idles:
            s.close()


@pytest.mark.parametrize("send", [b"", b"GET /metrics HTTP/1.0\r\n", b"G"],
                         ids=["idle", "head-unfinished", "one-byte"])
def test_a_client_that_does_not_finish_its_head_is_cut_off(server: HttpServer,
                                                           send: bytes) -> None:
    """Idle, or a head that is never finished: the server closes the connection after
    `request_timeout_s` (1 s here), well within the bounded wait."""
    with socket.create_connection(("127.0.0.1", server.port), timeout=10) as s:
        s.sendall(send)
        assert s.recv(100) == b""  # closed by the server, nothing sent


def test_a_trickling_client_is_cut_off_at_the_deadline(server: HttpServer) -> None:
    """One header byte every 0.1 s (never a per-read timeout) still ends at the head's
    deadline: the server closes while the client is still sending."""
    with socket.create_connection(("127.0.0.1", server.port), timeout=10) as s:
        s.sendall(b"GET /metrics HTTP/1.0\r\n")
        deadline = time.monotonic() + 10
        closed = False
        while time.monotonic() < deadline and not closed:
            try:
                s.sendall(b"X")
                s.settimeout(0.1)
                closed = s.recv(100) == b""
            except TimeoutError:
                continue
            except OSError:
                closed = True
        assert closed, "the trickling client was never cut off"


def test_an_oversized_head_is_refused(server: HttpServer) -> None:
    """A head past the size cap ends the connection without a reply body."""
    with socket.create_connection(("127.0.0.1", server.port), timeout=10) as s:
        s.sendall(b"GET /metrics HTTP/1.0\r\n" + b"X-A: " + b"a" * 20_000)
        try:
            got = s.recv(100)
        except ConnectionResetError:
            got = b""
        assert got == b""


def test_metrics_still_answer_after_the_idles(server: HttpServer) -> None:
    """After idle clients filled the limit and were cut off, /metrics answers 200."""
    idles = open_idle(server.port, 20)
    try:
        body = wait_for(lambda: answers(server.port), timeout_s=10, interval_s=0.1,
                        what="/metrics after the idles")
        assert b"watchkeep_start_time_seconds" in body
    finally:
        for s in idles:
            s.close()
