"""Upstream over TLS against a real Mosquitto TLS listener, certificates made with `openssl`."""

from __future__ import annotations

import dataclasses
import logging
import shutil
import subprocess
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from prometheus_client import CollectorRegistry

from agent.config.load import Config, Endpoint, load_config
from agent.delivery.outbox import Outbox
from agent.delivery.upstream import Upstream
from agent.errors import ConfigError
from agent.ops.metrics import Metrics
from agent.pipeline.messages import Kind, OutMessage
from tests.brokers import Broker, free_port, wait_for
from tests.helpers import Collector, asset_doc, write_config

pytestmark = pytest.mark.skipif(shutil.which("openssl") is None, reason="needs openssl")

CA_EXT = "basicConstraints=critical,CA:TRUE\nkeyUsage=critical,keyCertSign,cRLSign\n" \
         "subjectKeyIdentifier=hash\n"
LEAF_EXT = ("basicConstraints=critical,CA:FALSE\nkeyUsage=critical,digitalSignature\n"
            "subjectKeyIdentifier=hash\nauthorityKeyIdentifier=keyid,issuer\n")


def _openssl(*args: str, cwd: Path) -> None:
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True)


def _ca(d: Path, name: str) -> None:
    (d / f"{name}.ext").write_text(CA_EXT)
    _openssl("req", "-x509", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1",
             "-nodes", "-keyout", f"{name}.key", "-out", f"{name}.crt", "-days", "2",
             "-subj", f"/CN=Testworks {name}", "-addext", "basicConstraints=critical,CA:TRUE",
             "-addext", "keyUsage=critical,keyCertSign,cRLSign", cwd=d)


def _leaf(d: Path, name: str, ca: str, san: str, usage: str) -> None:
    (d / f"{name}.ext").write_text(LEAF_EXT + f"extendedKeyUsage={usage}\n"
                                   + (f"subjectAltName={san}\n" if san else ""))
    _openssl("req", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes",
             "-keyout", f"{name}.key", "-out", f"{name}.csr", "-subj", f"/CN=testworks-{name}",
             cwd=d)
    _openssl("x509", "-req", "-in", f"{name}.csr", "-CA", f"{ca}.crt", "-CAkey", f"{ca}.key",
             "-CAcreateserial", "-out", f"{name}.crt", "-days", "2", "-extfile", f"{name}.ext",
             cwd=d)


@pytest.fixture(scope="module")
def pki(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A CA, a server certificate for 127.0.0.1, a client certificate, another CA, and a
    server certificate naming some other host."""
    d = tmp_path_factory.mktemp("pki")
    _ca(d, "ca")
    _ca(d, "otherca")
    _leaf(d, "server", "ca", "IP:127.0.0.1,DNS:localhost", "serverAuth")
    _leaf(d, "wrongname", "ca", "DNS:elsewhere.invalid", "serverAuth")
    _leaf(d, "client", "ca", "", "clientAuth")
    return d


def _tls_broker(tmp_path: Path, pki: Path, server: str = "server",
                name: str = "tlsbroker") -> tuple[Broker, int]:
    port = free_port()
    # (tests.brokers keeps a root-started broker root, so it can read the test's files)
    b = Broker(tmp_path / name, extra=(
        f"listener {port} 127.0.0.1\n"
        f"cafile {pki / 'ca.crt'}\n"
        f"certfile {pki / (server + '.crt')}\n"
        f"keyfile {pki / (server + '.key')}\n"
        "require_certificate true\n"))
    b.start(wait_port=port)
    return b, port


def _cfg(tmp_path: Path, port: int, tls: dict[str, Any], protocol: str = "3.1.1") -> Config:
    path = write_config(tmp_path / "wk.yaml", free_port(), port, [asset_doc("P-1", None)])
    import yaml

    doc = yaml.safe_load(path.read_text())
    doc["upstream_broker"].update({"tls": tls, "protocol": protocol})
    path.write_text(yaml.safe_dump(doc))
    return load_config(path)


@pytest.fixture
def run_upstream(tmp_path: Path) -> Iterator[Any]:
    made: list[tuple[Upstream, Outbox]] = []

    def run(cfg: Config) -> Upstream:
        metrics = Metrics(CollectorRegistry())
        log = logging.getLogger("watchkeep.test.tls")
        ob = Outbox(cfg.outbox, metrics, log).open()
        up = Upstream(cfg, ob, metrics, log)
        made.append((up, ob))
        up.start()
        return up

    yield run
    for up, ob in made:
        up.stop(timeout_s=2)
        ob.close()


def _refused(up: Upstream) -> str:
    msg = wait_for(lambda: up.last_error, timeout_s=15, what="a connection error")
    assert not up.connected.is_set()
    return str(msg)


def test_mutual_tls_connects_and_delivers(tmp_path: Path, pki: Path, run_upstream: Any) -> None:
    """CA + client certificate against a listener that requires one: connected, delivered."""
    broker, port = _tls_broker(tmp_path, pki)
    try:
        cfg = _cfg(tmp_path, port, {"ca_file": str(pki / "ca.crt"),
                                    "cert_file": str(pki / "client.crt"),
                                    "key_file": str(pki / "client.key")}, protocol="5")
        collector = Collector(broker.port, "watchkeep/testworks/gw1/#", "maint-tls")
        up = run_upstream(cfg)
        wait_for(up.connected.is_set, what="TLS connection")
        up.outbox.submit([OutMessage("watchkeep/testworks/gw1/assets/P-1/events",
                                     b'{"id":"x1"}', Kind.ANOMALY)])
        wait_for(lambda: collector.json("/events"), what="event over TLS")
        wait_for(lambda: up.outbox.counts()[0] == 0, what="row deleted after PUBACK")
        assert collector.json("/status")[0]["state"] == "online"
        collector.close()
    finally:
        broker.stop()


def test_wrong_ca_is_refused_with_a_clear_error(tmp_path: Path, pki: Path,
                                                run_upstream: Any) -> None:
    """A CA that did not sign the broker's certificate: refused, and the error says why."""
    broker, port = _tls_broker(tmp_path, pki)
    try:
        cfg = _cfg(tmp_path, port, {"ca_file": str(pki / "otherca.crt"),
                                    "cert_file": str(pki / "client.crt"),
                                    "key_file": str(pki / "client.key")})
        msg = _refused(run_upstream(cfg))
        assert "certificate verification failed" in msg and "ca_file" in msg, msg
    finally:
        broker.stop()


def test_missing_client_certificate_is_refused(tmp_path: Path, pki: Path,
                                               run_upstream: Any) -> None:
    """No client certificate for a listener that requires one: never connected."""
    broker, port = _tls_broker(tmp_path, pki)
    try:
        cfg = _cfg(tmp_path, port, {"ca_file": str(pki / "ca.crt")})
        msg = _refused(run_upstream(cfg))
        assert "certificate" in msg.lower(), msg
    finally:
        broker.stop()


def test_hostname_is_verified_by_default(tmp_path: Path, pki: Path, run_upstream: Any) -> None:
    """A valid certificate for another host name is refused."""
    broker, port = _tls_broker(tmp_path, pki, server="wrongname")
    try:
        cfg = _cfg(tmp_path, port, {"ca_file": str(pki / "ca.crt"),
                                    "cert_file": str(pki / "client.crt"),
                                    "key_file": str(pki / "client.key")})
        msg = _refused(run_upstream(cfg))
        assert "mismatch" in msg, msg
    finally:
        broker.stop()


def test_verification_off_needs_allow_insecure_and_warns(tmp_path: Path, pki: Path,
                                                         run_upstream: Any,
                                                         caplog: pytest.LogCaptureFixture
                                                         ) -> None:
    """`verify: false` alone is a config error; with `allow_insecure` it runs and warns."""
    broker, port = _tls_broker(tmp_path, pki, server="wrongname")
    try:
        tls = {"ca_file": str(pki / "otherca.crt"), "cert_file": str(pki / "client.crt"),
               "key_file": str(pki / "client.key"), "verify": False}
        with pytest.raises(ConfigError, match="allow_insecure"):
            _cfg(tmp_path, port, tls)
        up = run_upstream(_cfg(tmp_path, port, {**tls, "allow_insecure": True}))
        wait_for(up.connected.is_set, what="unverified TLS connection")
        assert any("TLS VERIFICATION IS OFF" in r.getMessage() for r in caplog.records)
    finally:
        broker.stop()


def test_tls_applies_to_every_endpoint(tmp_path: Path, pki: Path, run_upstream: Any,
                                       caplog: pytest.LogCaptureFixture) -> None:
    """Endpoints A, W, B with one TLS block: A killed by PID, W's certificate names another
    host and is refused (mismatch), B is verified and takes the events, mutual TLS."""
    brokers = {name: _tls_broker(tmp_path, pki, server, name)
               for name, server in (("a", "server"), ("w", "wrongname"), ("b", "server"))}
    try:
        cfg = _cfg(tmp_path, brokers["a"][1], {"ca_file": str(pki / "ca.crt"),
                                               "cert_file": str(pki / "client.crt"),
                                               "key_file": str(pki / "client.key")})
        cfg = dataclasses.replace(cfg, upstream_broker=dataclasses.replace(
            cfg.upstream_broker, endpoints=tuple(Endpoint("127.0.0.1", brokers[n][1])
                                                 for n in ("a", "w", "b"))))
        on_b = Collector(brokers["b"][0].port, "watchkeep/testworks/gw1/#", "maint-tls-b")
        up = run_upstream(cfg)
        wait_for(up.connected.is_set, what="TLS connection to A")
        assert up.status()["endpoint"] == f"127.0.0.1:{brokers['a'][1]}"
        proc = brokers["a"][0].proc
        assert proc is not None
        proc.kill()
        proc.wait(5)
        wait_for(lambda: up.connected.is_set()
                 and up.status()["endpoint"] == f"127.0.0.1:{brokers['b'][1]}",
                 timeout_s=30, what="TLS connection to B")
        up.outbox.submit([OutMessage("watchkeep/testworks/gw1/assets/P-1/events",
                                     b'{"id":"x2"}', Kind.ANOMALY)])
        wait_for(lambda: on_b.json("/events"), what="event over TLS through B")
        on_b.close()
        w = f"127.0.0.1:{brokers['w'][1]}"
        assert any(w in r.getMessage() and "mismatch" in r.getMessage()
                   for r in caplog.records), [r.getMessage() for r in caplog.records]
    finally:
        for b, _ in brokers.values():
            b.stop()
