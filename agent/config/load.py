"""One YAML file -> frozen, typed config objects; every check made at load.

Errors name the key path (`assets[1].channels.bearing_temp.topic`), what was
expected and what was found, and all of them are reported at once.

The objects are defined in agent/config/schema.py (re-exported here, so
`from agent.config.load import Config` keeps working), the reader that collects
the problems in agent/config/reader.py, the `assets:` section's parse in
agent/config/assets.py; this module reads the top-level sections and the file.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from agent.config.assets import check_subscriptions, parse_assets
from agent.config.reader import REQUIRED, Reader, describe, is_name, is_topic
from agent.config.rebaseline import (
    DEFAULT_FALSE_ALARM_BUDGET,
    DEFAULT_KEEP,
    DEFAULT_MAX_SHIFT,
    DEFAULT_REHEARSAL_SIZE,
    DEFAULT_REHEARSAL_TOLERANCE,
    DEFAULT_WINDOWS,
    MAX_WINDOWS,
    MIN_NEW_WINDOWS,
    RebaselineConfig,
)
from agent.config.rebaseline import KEYS as REBASELINE_KEYS
from agent.config.schema import (
    ACCEL_UNITS,
    DEFAULT_FEATURES,
    FEATURES,
    FEW_SAMPLES_FEATURES,
    FEW_SAMPLES_PER_WINDOW,
    SPARKPLUG_DATA_VERBS,
    SPARKPLUG_NAMESPACE,
    WAVEFORM_DEFAULT_FEATURES,
    AssetConfig,
    BrokerConfig,
    ChannelConfig,
    Config,
    Decoder,
    Endpoint,
    HttpConfig,
    IngestConfig,
    IngestWorker,
    IsoConfig,
    LimitConfig,
    ModesConfig,
    ModeSpec,
    MqttProtocol,
    OutboxConfig,
    SparkplugConfig,
    SpectrumConfig,
    Support,
    Synchronous,
    TlsConfig,
    WindowConfig,
    sparkplug_topic,
)
from agent.errors import ConfigError, ConfigProblem

# The schema's names, re-exported: `from agent.config.load import Config` is how most of
# the code base reads them (new code may import agent.config.schema directly).
__all__ = [
    "ACCEL_UNITS", "DEFAULT_FEATURES", "FEATURES", "FEW_SAMPLES_FEATURES",
    "FEW_SAMPLES_PER_WINDOW", "SPARKPLUG_DATA_VERBS", "SPARKPLUG_NAMESPACE", "TOP_KEYS",
    "WAVEFORM_DEFAULT_FEATURES", "AssetConfig", "BrokerConfig", "ChannelConfig", "Config",
    "Decoder", "Endpoint", "HttpConfig", "IngestConfig", "IngestWorker", "IsoConfig",
    "LimitConfig", "ModeSpec", "ModesConfig", "MqttProtocol", "OutboxConfig",
    "RebaselineConfig", "SparkplugConfig", "SpectrumConfig", "Support", "Synchronous",
    "TlsConfig", "WindowConfig", "check_mqtt_commands", "load_config", "parse_config",
    "parse_rebaseline", "read_secret", "sparkplug_topic", "yaml_load",
]


def _filter_ok(f: str) -> bool:
    """An MQTT topic filter: '#' only last and alone in its level, '+' alone in its level."""
    if not f or "\0" in f:
        return False
    levels = f.split("/")
    for i, lv in enumerate(levels):
        if "#" in lv and (lv != "#" or i != len(levels) - 1):
            return False
        if "+" in lv and lv != "+":
            return False
    return True


def _port_ok(v: int) -> bool:
    return 0 < v < 65536


def _endpoints(r: Reader, n: dict[str, Any], path: str, default_port: int
               ) -> tuple[Endpoint, ...]:
    """`endpoints: [{host, port}, ...]`: the nodes of a clustered upstream broker."""
    where = f"{path}.endpoints"
    items = r.get_list(n, "endpoints", path, [], lambda v: len(v) > 0,
                       "a non-empty list of {host, port} mappings")
    if items and (n.get("host") is not None or n.get("port") is not None):
        # Two ways to say where the broker is: which one wins would be a silent surprise.
        r.bad(where, "either host/port or endpoints, not both")
    out: list[Endpoint] = []
    for i, item in enumerate(items):
        ipath = f"{where}[{i}]"
        if not isinstance(item, dict):
            r.bad(ipath, "a mapping with host and port", item)
            continue
        e = r.mapping(item, ipath, ("host", "port"))
        host = r.get_str(e, "host", ipath, REQUIRED, expected="a host name or address")
        port = r.get_int(e, "port", ipath, default_port, _port_ok, "a TCP port 1-65535")
        if host is None:
            continue
        ep = Endpoint(host, port)
        if ep in out:
            r.bad(ipath, "each endpoint listed once", found=f"{ep} again")
            continue
        out.append(ep)
    return tuple(out)


def _tls(r: Reader, node: Any, tpath: str) -> TlsConfig:
    t = r.mapping(node, tpath, ("ca_file", "cert_file", "key_file", "verify", "allow_insecure"))
    ca = r.path(r.get_str(t, "ca_file", tpath, None), f"{tpath}.ca_file")
    cert = r.path(r.get_str(t, "cert_file", tpath, None), f"{tpath}.cert_file")
    key = r.path(r.get_str(t, "key_file", tpath, None), f"{tpath}.key_file")
    for label, p in (("ca_file", ca), ("cert_file", cert), ("key_file", key)):
        if p is not None and not p.is_file():
            r.bad(f"{tpath}.{label}", "an existing file", found=str(p))
    if (cert is None) != (key is None):
        r.bad(f"{tpath}.cert_file", "cert_file and key_file together (mutual TLS)")
    verify = r.get_bool(t, "verify", tpath, True)
    insecure = r.get_bool(t, "allow_insecure", tpath, False)
    if not verify and not insecure:
        r.bad(f"{tpath}.verify", "true (set allow_insecure: true as well to accept an "
              "unverified TLS connection)", verify)
    return TlsConfig(ca, cert, key, verify, insecure)


def _broker(r: Reader, node: Any, path: str, default_id: str, default_port: int,
            *, cluster: bool = False) -> BrokerConfig:
    keys = ("host", "port", "client_id", "keepalive_s", "username", "password",
            "password_file", "protocol", "tls") + (("endpoints",) if cluster else ())
    n = r.mapping(node, path, keys)
    host = r.get_str(n, "host", path, "127.0.0.1")
    port = r.get_int(n, "port", path, default_port, _port_ok, "a TCP port 1-65535")
    endpoints = _endpoints(r, n, path, default_port) if cluster else ()
    if endpoints:
        host, port = endpoints[0].host, endpoints[0].port
    client_id = r.get_str(n, "client_id", path, default_id)
    keepalive = r.get_int(n, "keepalive_s", path, 20, lambda v: 5 <= v <= 3600,
                          "seconds between 5 and 3600")
    protocol = r.get_str(n, "protocol", path, "3.1.1", lambda v: v in ("3.1.1", "5"),
                         "'3.1.1' or '5'")
    tls = _tls(r, n["tls"], f"{path}.tls") if n.get("tls") is not None else None
    pw_file = r.path(r.get_str(n, "password_file", path, None),
                     f"{path}.password_file")
    if pw_file is not None and n.get("password") is not None:
        # Two sources for one secret: which one wins would be a silent surprise.
        r.bad(f"{path}.password_file", "either password or password_file, not both")
    return BrokerConfig(host=host, port=port, client_id=client_id, keepalive_s=keepalive,
                        username=r.get_str(n, "username", path, None),
                        password=r.get_str(n, "password", path, None),
                        password_file=pw_file, protocol=MqttProtocol(protocol), tls=tls,
                        endpoints=endpoints)


def _ingest(r: Reader, node: Any, local: BrokerConfig) -> IngestConfig:
    ing = r.mapping(node, "ingest", ("max_payload_bytes", "max_clock_skew_s", "subscriptions",
                                     "worker", "startup_grace_s", "sparkplug"))
    subs = r.get_list(ing, "subscriptions", "ingest", [])
    for i, f in enumerate(subs):
        if not isinstance(f, str) or not _filter_ok(f):
            r.bad(f"ingest.subscriptions[{i}]", "an MQTT topic filter", f)
    return IngestConfig(
        r.get_int(ing, "max_payload_bytes", "ingest", 262144, lambda v: v >= 64,
                  "an integer number of bytes >= 64"),
        r.get_float(ing, "max_clock_skew_s", "ingest", 300.0, lambda v: v > 0,
                    "a number of seconds > 0"),
        tuple(f for f in subs if isinstance(f, str)),
        IngestWorker(r.get_str(ing, "worker", "ingest", "process",
                               lambda v: v in ("process", "thread"), "process or thread")),
        r.get_float(ing, "startup_grace_s", "ingest", 120.0, lambda v: v >= 0,
                    "a number of seconds >= 0"),
        _sparkplug(r, ing.get("sparkplug"), "ingest.sparkplug", local))


def _sparkplug(r: Reader, node: Any, path: str, local: BrokerConfig) -> SparkplugConfig:
    n = r.mapping(node, path, ("rebirth_requests", "rebirth_min_interval_s"))
    ask = r.get_bool(n, "rebirth_requests", path, False)
    every = r.get_float(n, "rebirth_min_interval_s", path, 10.0, lambda v: 1 <= v <= 3600,
                        "seconds between 1 and 3600")
    authenticated = (local.username is not None
                     and (local.password is not None or local.password_file is not None)) \
        or (local.tls is not None and local.tls.cert_file is not None)
    if ask and not authenticated:
        # A rebirth request makes an edge node publish its whole birth sequence again:
        # only a client the broker knows (and its ACL allows on NCMD) may send one.
        r.bad(f"{path}.rebirth_requests", "false unless local_broker authenticates (username "
              "with password or password_file, or tls.cert_file): the broker's ACL must "
              "allow this client to publish on spBv1.0/+/NCMD/+", True)
    return SparkplugConfig(ask, every)


def _outbox(r: Reader, node: Any, state_dir: Path) -> OutboxConfig:
    ob = r.mapping(node, "outbox", ("path", "synchronous", "max_rows", "max_bytes", "inflight",
                                    "max_memory_bytes"))
    sync = r.get_str(ob, "synchronous", "outbox", "FULL", lambda v: v in ("FULL", "NORMAL"),
                     "FULL or NORMAL")
    return OutboxConfig(
        path=r.path(r.get_str(ob, "path", "outbox", None), "outbox.path")
        or state_dir / "outbox.sqlite",
        synchronous=Synchronous(sync),
        max_rows=r.get_int(ob, "max_rows", "outbox", 100_000, lambda v: v >= 10,
                           "an integer >= 10"),
        max_bytes=r.get_int(ob, "max_bytes", "outbox", 64 * 1024 * 1024,
                            lambda v: v >= 4096, "an integer number of bytes >= 4096"),
        inflight=r.get_int(ob, "inflight", "outbox", 20, lambda v: 1 <= v <= 1000,
                           "an integer between 1 and 1000"),
        max_memory_bytes=r.get_int(ob, "max_memory_bytes", "outbox", 16 * 1024 * 1024,
                                   lambda v: 65536 <= v <= 1 << 34,
                                   "an integer number of bytes from 65536 to 17179869184"))


def _http(r: Reader, node: Any) -> HttpConfig:
    h = r.mapping(node, "http", ("enabled", "host", "port", "max_connections",
                                 "request_timeout_s"))
    return HttpConfig(r.get_bool(h, "enabled", "http", True),
                      r.get_str(h, "host", "http", "127.0.0.1"),
                      r.get_int(h, "port", "http", 9310, lambda v: 0 <= v < 65536,
                                "a TCP port 0-65535 (0 picks a free one)"),
                      r.get_int(h, "max_connections", "http", 32,
                                lambda v: 1 <= v <= 1000, "an integer from 1 to 1000"),
                      r.get_float(h, "request_timeout_s", "http", 10.0,
                                  lambda v: 0.1 <= v <= 300, "seconds from 0.1 to 300"))


def parse_rebaseline(r: Reader, node: Any, path: str, state_dir: Path) -> RebaselineConfig:
    """The `rebaseline:` section at `path`; defaults for what is unset."""
    d = r.mapping(node, path, REBASELINE_KEYS)
    sock = r.path(r.get_str(d, "admin_socket", path, None), f"{path}.admin_socket") \
        or state_dir / "admin.sock"
    if len(str(sock).encode()) > 107:  # sun_path holds 108 bytes with the final NUL
        r.bad(f"{path}.admin_socket", "a path of at most 107 bytes (a unix socket limit)",
              str(sock))
    return RebaselineConfig(
        admin_socket=sock,
        models_dir=r.path(r.get_str(d, "models_dir", path, None), f"{path}.models_dir")
        or state_dir / "models",
        enabled=r.get_bool(d, "enabled", path, True),
        windows=r.get_int(d, "windows", path, DEFAULT_WINDOWS,
                          lambda v: MIN_NEW_WINDOWS <= v <= MAX_WINDOWS,
                          f"an integer from {MIN_NEW_WINDOWS} to {MAX_WINDOWS}"),
        false_alarm_budget=r.get_float(d, "false_alarm_budget", path,
                                       DEFAULT_FALSE_ALARM_BUDGET, lambda v: 0 <= v < 1,
                                       "a fraction in [0, 1)"),
        rehearsal_size=r.get_int(d, "rehearsal_size", path, DEFAULT_REHEARSAL_SIZE,
                                 lambda v: 16 <= v <= 100_000, "an integer from 16 to 100000"),
        rehearsal_tolerance=r.get_float(d, "rehearsal_tolerance", path,
                                        DEFAULT_REHEARSAL_TOLERANCE, lambda v: v >= 1,
                                        "a ratio >= 1"),
        max_shift=r.get_float(d, "max_shift", path, DEFAULT_MAX_SHIFT, lambda v: v > 0,
                              "a ratio > 0 (median old-model score of the new windows / "
                              "threshold)"),
        versions_kept=r.get_int(d, "versions_kept", path, DEFAULT_KEEP,
                                lambda v: 2 <= v <= 100, "an integer from 2 to 100"),
        mqtt_commands=r.get_bool(d, "mqtt_commands", path, False),
        broker_enforces_acl=r.get_bool(d, "broker_enforces_acl", path, False),
    )


def check_mqtt_commands(r: Reader, rb: RebaselineConfig, upstream: BrokerConfig,
                        path: str = "rebaseline") -> None:
    """MQTT commands only over an authenticated upstream connection, and only when the
    operator states that the broker enforces access (`broker_enforces_acl`).

    The daemon cannot see who published a message: it relies on the broker's access
    control, which needs to know the gateway (a username or a TLS client certificate)
    to grant it the commands topic while others are kept from publishing there.
    """
    tls_cert = upstream.tls is not None and upstream.tls.cert_file is not None
    if rb.mqtt_commands and not upstream.username and not tls_cert:
        r.bad(f"{path}.mqtt_commands", "false unless upstream_broker authenticates (a "
              "username or tls.cert_file): the broker's ACL must decide who may publish "
              "commands", True)
    elif rb.mqtt_commands and not rb.broker_enforces_acl:
        # A username says who the gateway is, not that the broker keeps anyone else
        # off the commands topic (a broker with allow_anonymous true takes any command).
        r.bad(f"{path}.mqtt_commands", f"false unless {path}.broker_enforces_acl is true "
              "(the operator's statement that the upstream broker refuses anonymous "
              "clients and its ACL lets only trusted users publish on "
              "<topic_prefix>/commands/#; see README, MQTT commands)", True)


TOP_KEYS = ("site", "gateway", "topic_prefix", "state_dir", "local_broker", "upstream_broker",
            "ingest", "pipeline", "outbox", "http", "publish", "assets", "rebaseline")
_NAME_WORDS = "name of letters, digits, '_', '.', '-' (at most 64)"


def parse_config(doc: Any, base_dir: Path, source: Path | None = None, *,
                 require_bundles: bool = True) -> Config:
    """Check a decoded YAML document and build the frozen config; raise ConfigError.

    With `require_bundles=False` a model bundle path that does not exist yet is kept
    as it is (the config that records an asset may name the bundle it commissions).
    """
    r = Reader(base_dir, require_bundles=require_bundles)
    if doc is not None and not isinstance(doc, dict):
        raise ConfigError([ConfigProblem("(top level)", "a mapping of settings (site, gateway, "
                                         "assets, ...)", describe(doc))],
                          str(source) if source else "")
    top = r.mapping(doc, "", TOP_KEYS)
    site = r.get_str(top, "site", "", REQUIRED, is_name, f"a site {_NAME_WORDS}")
    gateway = r.get_str(top, "gateway", "", REQUIRED, is_name, f"a gateway {_NAME_WORDS}")
    prefix = r.get_str(top, "topic_prefix", "", f"watchkeep/{site}/{gateway}", is_topic,
                       "a topic prefix without wildcards").rstrip("/")
    state_dir = r.path(r.get_str(top, "state_dir", "", "/var/lib/watchkeep"), "state_dir") \
        or Path("/var/lib/watchkeep")
    role = f"watchkeep-{site}-{gateway}"
    local = _broker(r, top.get("local_broker"), "local_broker", f"{role}-ingest", 1883)
    upstream = _broker(r, top.get("upstream_broker"), "upstream_broker", f"{role}-upstream",
                       1883, cluster=True)
    ingest = _ingest(r, top.get("ingest"), local)
    pipe = r.mapping(top.get("pipeline"), "pipeline", ("tick_s",))
    tick = r.get_float(pipe, "tick_s", "pipeline", 0.1, lambda v: 0.01 <= v <= 10,
                       "seconds between 0.01 and 10")
    pub = r.mapping(top.get("publish"), "publish", ("scores",))
    scores = r.get_bool(pub, "scores", "publish", False)
    outbox = _outbox(r, top.get("outbox"), state_dir)
    http = _http(r, top.get("http"))
    rebaseline = parse_rebaseline(r, top.get("rebaseline"), "rebaseline", state_dir)
    check_mqtt_commands(r, rebaseline, upstream)
    assets = parse_assets(r, top.get("assets"))
    check_subscriptions(r, ingest.subscriptions, assets)
    if r.problems or site is None or gateway is None:
        raise ConfigError(r.problems, str(source) if source else "")
    return Config(site=site, gateway=gateway, topic_prefix=prefix, state_dir=state_dir,
                  local_broker=local, upstream_broker=upstream, ingest=ingest, tick_s=tick,
                  publish_scores=scores, outbox=outbox, http=http, assets=tuple(assets),
                  source=source, rebaseline=rebaseline)


def load_config(path: str | Path, *, require_bundles: bool = True) -> Config:
    """Read and check a YAML config file (`parse_config` for `require_bundles`)."""
    p = Path(path)
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise ConfigError([ConfigProblem(str(p), "a readable file", exc.strerror or str(exc))]
                          ) from exc
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw.count(b"\n", 0, exc.start) + 1
        column = exc.start - (raw.rfind(b"\n", 0, exc.start) + 1) + 1
        raise ConfigError([ConfigProblem(f"line {line}, column {column}", "UTF-8 text",
                                         f"byte 0x{raw[exc.start]:02x}")], str(p)) from None
    import yaml  # here, not at the top: the ingest child unpickles config, never loads it

    try:
        doc = yaml_load(text)
    except RecursionError:  # PyYAML composes nested collections recursively
        raise ConfigError([ConfigProblem("(file)", "YAML nested less deeply",
                                         "collections nested past the parser's recursion "
                                         "limit")], str(p)) from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = (f"line {mark.line + 1}, column {mark.column + 1}" if mark is not None
                 else "(file)")
        raise ConfigError([ConfigProblem(where, "valid YAML", str(getattr(exc, "problem", exc)))],
                          str(p)) from exc
    return parse_config(doc, p.resolve().parent, p, require_bundles=require_bundles)


# YAML 1.1 (PyYAML's resolver) reads a float only with a dot and a signed exponent
# (`1.0e+6`); `1e6` and `1.0e6` stay strings. YAML 1.2's core schema (section 10.3.2,
# tag resolution) reads all three as floats, as editors' YAML language servers do:
# the loader accepts them too. The regex is the 1.2 core schema's float pattern
# without its .inf/.nan forms (YAML 1.1 resolves those already).
_FLOAT_12 = re.compile(r"^[-+]?(?:\.[0-9]+|[0-9]+(?:\.[0-9]*)?)(?:[eE][-+]?[0-9]+)$")
_loader_cls: Any = None


def _config_loader() -> Any:
    global _loader_cls
    if _loader_cls is None:
        import yaml

        class ConfigLoader(yaml.SafeLoader):
            """SafeLoader that also reads YAML 1.2 exponent floats (`1e6`, `1.0e6`)."""

        # add_implicit_resolver copies the inherited table first: SafeLoader is unchanged.
        ConfigLoader.add_implicit_resolver("tag:yaml.org,2002:float", _FLOAT_12,
                                           list("-+0123456789."))
        _loader_cls = ConfigLoader
    return _loader_cls


def yaml_load(text: str) -> Any:
    """YAML text as Python values, as the config loader reads it (safe, plus 1.2 floats)."""
    import yaml

    return yaml.load(text, Loader=_config_loader())  # a SafeLoader subclass: safe


def read_secret(broker: BrokerConfig, env: Mapping[str, str]) -> str | None:
    """The broker password: inline, from `password_file`, or from a systemd credential.

    A relative `password_file` that does not exist is looked up in
    `$CREDENTIALS_DIRECTORY` (systemd's LoadCredential=).
    """
    if broker.password is not None:
        return broker.password
    if broker.password_file is None:
        return None
    candidates = [broker.password_file]
    cred_dir = env.get("CREDENTIALS_DIRECTORY")
    if cred_dir:
        candidates.append(Path(cred_dir) / broker.password_file.name)
    for c in candidates:
        if c.is_file():
            return c.read_text(encoding="utf-8").strip()
    raise ConfigError([ConfigProblem("password_file", "a readable file",
                                     str(broker.password_file))])
