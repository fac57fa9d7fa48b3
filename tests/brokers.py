"""Real Mosquitto brokers for tests: free loopback ports, temp configs, stop/restart by PID."""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

MOSQUITTO = shutil.which("mosquitto") or "/usr/sbin/mosquitto"


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_for(pred: Callable[[], Any], timeout_s: float = 10.0, interval_s: float = 0.02,
             what: str = "condition") -> Any:
    """Poll `pred` until it returns something truthy; fail after `timeout_s`."""
    deadline = time.monotonic() + timeout_s
    while True:
        v = pred()
        if v:
            return v
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout_s} s waiting for {what}")
        time.sleep(interval_s)


def _port_open(port: int) -> bool:
    try:
        with socket.create_connection(("127.0.0.1", port), timeout=0.2):
            return True
    except OSError:
        return False


class Broker:
    """One Mosquitto process on a loopback port; `extra` lines go into its config."""

    def __init__(self, workdir: Path, extra: str = "", port: int | None = None) -> None:
        self.workdir = workdir
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.port = port or free_port()
        self.extra = extra
        self.proc: subprocess.Popen[bytes] | None = None
        self.conf = self.workdir / "mosquitto.conf"
        self.log = self.workdir / "mosquitto.log"

    def write_conf(self) -> None:
        self.conf.write_text(
            f"listener {self.port} 127.0.0.1\n"
            "allow_anonymous true\n"
            "persistence false\n"
            f"log_dest file {self.log}\n"
            "log_type error\nlog_type warning\nlog_type notice\n"
            "max_queued_messages 100000\n"
            # Started as root, mosquitto drops to the `mosquitto` user, which cannot
            # write into pytest's 0700 temp dirs: no log file, and `persistence true`
            # would silently save nothing.
            f"{'user root' if os.geteuid() == 0 else ''}\n"
            f"{self.extra}\n")

    def start(self, wait_port: int | None = None) -> Broker:
        self.write_conf()
        self.proc = subprocess.Popen([MOSQUITTO, "-c", str(self.conf)],
                                     stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        port = wait_port or self.port
        deadline = time.monotonic() + 10
        while not _port_open(port):
            if self.proc.poll() is not None:
                err = self.proc.stderr.read().decode() if self.proc.stderr else ""
                raise RuntimeError(f"mosquitto exited: {err} {self.log_text()}")
            if time.monotonic() > deadline:
                raise RuntimeError("mosquitto did not open its port")
            time.sleep(0.02)
        return self

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(5)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)
        self.proc = None

    def restart(self) -> None:
        self.stop()
        self.start()

    def log_text(self) -> str:
        return self.log.read_text() if self.log.exists() else ""


NATS_SERVER = shutil.which("nats-server") or "/usr/sbin/nats-server"


_HANDED: set[int] = set()  # fixed ports given out in this process, never twice


def fixed_port() -> int:
    """A free loopback port below the kernel's ephemeral range, for a listener that must
    get the same port again after a restart: outgoing connections (the cluster's own
    routes among them) take their local ports from the ephemeral range, where one could
    be sitting on the port by then (seen: "bind: address already in use")."""
    import random

    try:
        low = int(Path("/proc/sys/net/ipv4/ip_local_port_range").read_text().split()[0])
    except (OSError, ValueError, IndexError):
        low = 32768
    lo = max(1024, low - 12000)
    for _ in range(200):
        port = random.randrange(lo, low)
        if port in _HANDED:
            continue
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            try:
                s.bind(("127.0.0.1", port))
            except OSError:
                continue
            _HANDED.add(port)
            return port
    return free_port()


class NatsNode:
    """One nats-server of a `NatsCluster`: client, cluster route, MQTT and monitoring
    listeners on loopback ports, JetStream files under `workdir`."""

    def __init__(self, workdir: Path, name: str) -> None:
        self.workdir = workdir
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.name = name
        self.client_port, self.route_port = fixed_port(), fixed_port()
        self.mqtt_port, self.http_port = fixed_port(), fixed_port()
        self.conf = workdir / "nats.conf"
        self.log = workdir / "nats.log"
        self.proc: subprocess.Popen[bytes] | None = None

    def start(self) -> NatsNode:
        if not Path(NATS_SERVER).exists():
            raise RuntimeError("nats-server is missing: apt-get install nats-server "
                               "(make test and .ci/run install it)")
        self.proc = subprocess.Popen([NATS_SERVER, "-c", str(self.conf)],
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        return self

    def kill(self) -> None:
        """SIGKILL by PID: the node is gone at once, as on a power cut."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(10)
        self.proc = None

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)
        self.proc = None

    def healthy(self) -> bool:
        """`/healthz` answers 200: the server runs and its JetStream is current."""
        import urllib.error
        import urllib.request

        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{self.http_port}/healthz",
                                        timeout=1) as r:
                return bool(r.status == 200)
        except (OSError, urllib.error.URLError):
            return False

    def log_text(self) -> str:
        return self.log.read_text() if self.log.exists() else ""


class NatsCluster:
    """A three-node (by default) NATS cluster with JetStream and the MQTT listener, on
    loopback ports, from a temp config. `mqtt` lines go into each node's `mqtt {}` block."""

    def __init__(self, workdir: Path, nodes: int = 3, mqtt: str = "",
                 name: str = "wkfleet") -> None:
        self.nodes = [NatsNode(workdir / f"n{i + 1}", f"n{i + 1}") for i in range(nodes)]
        routes = ", ".join(f"nats-route://127.0.0.1:{n.route_port}" for n in self.nodes)
        for n in self.nodes:
            n.conf.write_text(
                f"server_name: {n.name}\n"
                f"listen: 127.0.0.1:{n.client_port}\n"
                f"http: 127.0.0.1:{n.http_port}\n"
                f"log_file: {n.log}\n"
                f"jetstream {{\n  store_dir: {n.workdir / 'js'}\n"
                "  max_memory_store: 64MB\n  max_file_store: 512MB\n}\n"
                f"cluster {{\n  name: {name}\n  listen: 127.0.0.1:{n.route_port}\n"
                f"  routes: [{routes}]\n}}\n"
                f"mqtt {{\n  listen: 127.0.0.1:{n.mqtt_port}\n{mqtt}\n}}\n")

    def start(self, timeout_s: float = 60.0) -> NatsCluster:
        for n in self.nodes:
            n.start()
        self.wait_healthy(self.nodes, timeout_s)
        return self

    def wait_healthy(self, nodes: list[NatsNode], timeout_s: float = 60.0) -> None:
        deadline = time.monotonic() + timeout_s
        for n in nodes:
            while not n.healthy():
                if n.proc is None or n.proc.poll() is not None:
                    raise RuntimeError(f"nats-server {n.name} exited: {n.log_text()[-2000:]}")
                if time.monotonic() > deadline:
                    raise RuntimeError(f"nats-server {n.name} not healthy: "
                                       f"{n.log_text()[-2000:]}")
                time.sleep(0.1)

    def stop(self) -> None:
        for n in self.nodes:
            n.stop()
