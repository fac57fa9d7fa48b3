"""One YAML file -> frozen, typed config objects; every check made at load.

Errors name the key path (`assets[1].channels.bearing_temp.topic`), what was
expected and what was found, and all of them are reported at once.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from enum import StrEnum
from pathlib import Path
from typing import Any

import yaml

from agent.core.detector import DetectorParams
from agent.errors import ConfigError, ConfigProblem

FEATURES = ("mean", "std", "min", "max", "rms", "peak_to_peak", "crest_factor",
            "skewness", "kurtosis")
DEFAULT_FEATURES = ("mean", "std", "min", "max", "rms")
WAVEFORM_DEFAULT_FEATURES = ("rms", "std", "peak_to_peak", "crest_factor", "kurtosis")
NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")


class Decoder(StrEnum):
    JSON = "json"
    JSON_BATCH = "json-batch"
    TEXT = "text"


class MqttProtocol(StrEnum):
    V311 = "3.1.1"
    V5 = "5"


class Synchronous(StrEnum):
    FULL = "FULL"
    NORMAL = "NORMAL"


@dataclass(frozen=True)
class ChannelConfig:
    name: str
    topic: str
    decoder: Decoder
    rate_hz: float
    features: tuple[str, ...]
    unit: str = ""
    ts_field: str = "ts"
    value_field: str = "value"
    values_field: str = "values"
    rate_field: str = "rate_hz"


@dataclass(frozen=True)
class WindowConfig:
    length_s: float = 10.0
    hop_s: float = 10.0
    lateness_s: float = 1.0
    timeout_s: float = 5.0
    min_coverage: float = 0.8


@dataclass(frozen=True)
class AssetConfig:
    name: str
    channels: tuple[ChannelConfig, ...]
    window: WindowConfig
    detector: DetectorParams
    bundle: Path | None

    def channel(self, name: str) -> ChannelConfig:
        for ch in self.channels:
            if ch.name == name:
                return ch
        raise KeyError(name)


@dataclass(frozen=True)
class TlsConfig:
    ca_file: Path | None = None
    cert_file: Path | None = None
    key_file: Path | None = None
    verify: bool = True
    # Verification off is refused unless this says so explicitly (warned at every start).
    allow_insecure: bool = False


@dataclass(frozen=True)
class BrokerConfig:
    host: str = "127.0.0.1"
    port: int = 1883
    client_id: str = ""
    keepalive_s: int = 20
    username: str | None = None
    password: str | None = field(default=None, repr=False)
    password_file: Path | None = None
    protocol: MqttProtocol = MqttProtocol.V311
    tls: TlsConfig | None = None


@dataclass(frozen=True)
class IngestConfig:
    max_payload_bytes: int = 262144
    max_clock_skew_s: float = 300.0
    # Topic filters to subscribe to instead of each channel's exact topic; messages on
    # topics no channel uses are then counted as `unknown_topic`.
    subscriptions: tuple[str, ...] = ()


@dataclass(frozen=True)
class OutboxConfig:
    path: Path
    synchronous: Synchronous = Synchronous.FULL
    max_rows: int = 100_000
    max_bytes: int = 64 * 1024 * 1024
    inflight: int = 20


@dataclass(frozen=True)
class HttpConfig:
    enabled: bool = True
    host: str = "127.0.0.1"
    port: int = 9310


@dataclass(frozen=True)
class Config:
    site: str
    gateway: str
    topic_prefix: str
    state_dir: Path
    local_broker: BrokerConfig
    upstream_broker: BrokerConfig
    ingest: IngestConfig
    tick_s: float
    publish_scores: bool
    outbox: OutboxConfig
    http: HttpConfig
    assets: tuple[AssetConfig, ...]
    source: Path | None = None

    def asset(self, name: str) -> AssetConfig:
        for a in self.assets:
            if a.name == name:
                return a
        raise KeyError(name)


def _describe(v: Any) -> str:
    if v is None:
        return "nothing"
    if isinstance(v, bool):
        return f"{str(v).lower()} (a boolean)"
    if isinstance(v, str):
        return repr(v) if len(v) < 60 else f"a string of {len(v)} characters"
    if isinstance(v, int | float):
        text = str(v)
        return text if len(text) <= 24 else f"a number of {len(text)} digits"
    if isinstance(v, list):
        return f"a list of {len(v)}" if v else "an empty list"
    if isinstance(v, dict):
        return "a mapping" if v else "an empty mapping"
    return type(v).__name__


class _Reader:
    """Walks a decoded YAML tree, collecting problems instead of stopping at the first."""

    def __init__(self, base_dir: Path) -> None:
        self.problems: list[ConfigProblem] = []
        self.base_dir = base_dir

    def bad(self, path: str, expected: str, got: Any = ..., *, found: str = "") -> None:
        """Record a problem; `got` is a config value to describe, `found` ready-made words."""
        said = found or ("" if got is ... else _describe(got))
        self.problems.append(ConfigProblem(path, expected, said))

    def mapping(self, node: Any, path: str, allowed: tuple[str, ...]) -> dict[str, Any]:
        if node is None:
            return {}
        if not isinstance(node, dict):
            self.bad(path or "(top level)", "a mapping", node)
            return {}
        for k in node:
            if k not in allowed:
                where = f"{path}.{k}" if path else str(k)
                self.bad(where, f"one of the known keys ({', '.join(allowed)})",
                         found=f"unknown key {k!r}")
        return node

    def get(self, node: dict[str, Any], key: str, path: str, kind: str, default: Any,
            check: Callable[[Any], bool] | None = None, expected: str = "") -> Any:
        where = f"{path}.{key}" if path else key
        names = {"str": "a string", "int": "an integer", "num": "a number",
                 "bool": "true or false", "list": "a list"}
        if key not in node or node[key] is None:
            if default is _REQUIRED:
                self.bad(where, f"{expected or names[kind]} (required)")
            return None if default is _REQUIRED else default
        v = node[key]
        ok = {
            "str": isinstance(v, str) and v != "",
            "int": isinstance(v, int) and not isinstance(v, bool),
            "num": _finite_number(v),
            "bool": isinstance(v, bool),
            "list": isinstance(v, list),
        }[kind]
        if not ok:
            self.bad(where, expected or names[kind], v)
            return None if default is _REQUIRED else default
        if check is not None and not check(v):
            self.bad(where, expected, v)
            return None if default is _REQUIRED else default
        return float(v) if kind == "num" else v

    def path(self, v: str | None) -> Path | None:
        if v is None:
            return None
        p = Path(v).expanduser()
        return p if p.is_absolute() else (self.base_dir / p)


_REQUIRED = object()


def _finite_number(v: Any) -> bool:
    if isinstance(v, bool) or not isinstance(v, int | float):
        return False
    try:
        return math.isfinite(float(v))
    except OverflowError:  # an integer too large for a float
        return False


def _name(v: Any) -> bool:
    return isinstance(v, str) and bool(NAME_RE.match(v))


def _topic_ok(v: str) -> bool:
    return not any(c in v for c in "+#\0") and not v.startswith("$")


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


def _matches(flt: str, topic: str) -> bool:
    """MQTT 3.1.1 section 4.7 topic matching of a filter against a topic name."""
    fl, tl = flt.split("/"), topic.split("/")
    for i, f in enumerate(fl):
        if f == "#":
            return True
        if i >= len(tl) or (f != "+" and f != tl[i]):
            return False
    return len(fl) == len(tl)


def _broker(r: _Reader, node: Any, path: str, default_id: str, default_port: int) -> BrokerConfig:
    keys = ("host", "port", "client_id", "keepalive_s", "username", "password",
            "password_file", "protocol", "tls")
    n = r.mapping(node, path, keys)
    host = r.get(n, "host", path, "str", "127.0.0.1")
    port = r.get(n, "port", path, "int", default_port, lambda v: 0 < v < 65536,
                 "a TCP port 1-65535")
    client_id = r.get(n, "client_id", path, "str", default_id)
    keepalive = r.get(n, "keepalive_s", path, "int", 20, lambda v: 5 <= v <= 3600,
                      "seconds between 5 and 3600")
    protocol = r.get(n, "protocol", path, "str", "3.1.1", lambda v: v in ("3.1.1", "5"),
                     "'3.1.1' or '5'")
    tls = None
    if n.get("tls") is not None:
        tpath = f"{path}.tls"
        t = r.mapping(n["tls"], tpath,
                      ("ca_file", "cert_file", "key_file", "verify", "allow_insecure"))
        ca = r.path(r.get(t, "ca_file", tpath, "str", None))
        cert = r.path(r.get(t, "cert_file", tpath, "str", None))
        key = r.path(r.get(t, "key_file", tpath, "str", None))
        for label, p in (("ca_file", ca), ("cert_file", cert), ("key_file", key)):
            if p is not None and not p.is_file():
                r.bad(f"{tpath}.{label}", "an existing file", found=str(p))
        if (cert is None) != (key is None):
            r.bad(f"{tpath}.cert_file", "cert_file and key_file together (mutual TLS)")
        verify = r.get(t, "verify", tpath, "bool", True)
        insecure = r.get(t, "allow_insecure", tpath, "bool", False)
        if not verify and not insecure:
            r.bad(f"{tpath}.verify", "true (set allow_insecure: true as well to accept an "
                  "unverified TLS connection)", verify)
        tls = TlsConfig(ca, cert, key, verify, insecure)
    pw_file = r.path(r.get(n, "password_file", path, "str", None))
    if pw_file is not None and n.get("password") is not None:
        # Two sources for one secret: which one wins would be a silent surprise.
        r.bad(f"{path}.password_file", "either password or password_file, not both")
    return BrokerConfig(host=host, port=port, client_id=client_id, keepalive_s=keepalive,
                        username=r.get(n, "username", path, "str", None),
                        password=r.get(n, "password", path, "str", None),
                        password_file=pw_file, protocol=MqttProtocol(protocol), tls=tls)


def _window(r: _Reader, node: Any, path: str) -> WindowConfig:
    n = r.mapping(node, path, ("length_s", "hop_s", "lateness_s", "timeout_s", "min_coverage"))
    pos = "a number of seconds > 0"
    length = r.get(n, "length_s", path, "num", 10.0, lambda v: 0 < v <= 86400, pos)
    hop = r.get(n, "hop_s", path, "num", length, lambda v: v > 0, pos)
    if hop > length:
        r.bad(f"{path}.hop_s", f"at most length_s ({length:g})", found=f"{hop:g}")
    late = r.get(n, "lateness_s", path, "num", min(1.0, length),
                 lambda v: v >= 0, "a number of seconds >= 0")
    timeout = r.get(n, "timeout_s", path, "num", max(5.0, late), lambda v: v > 0, pos)
    if timeout < late:
        r.bad(f"{path}.timeout_s", f"at least lateness_s ({late:g})", found=f"{timeout:g}")
    cov = r.get(n, "min_coverage", path, "num", 0.8, lambda v: 0 < v <= 1,
                "a fraction in (0, 1]")
    return WindowConfig(length, hop, late, timeout, cov)


def _channel(r: _Reader, name: Any, node: Any, path: str) -> ChannelConfig | None:
    if not _name(name):
        r.bad(path, "a channel name of letters, digits, '_', '.', '-' (at most 64)", name)
    keys = ("topic", "decoder", "rate_hz", "features", "unit", "ts_field", "value_field",
            "values_field", "rate_field")
    if not isinstance(node, dict):
        r.bad(path, "a mapping of channel settings (topic, decoder, rate_hz, ...)", node)
        return None
    n = r.mapping(node, path, keys)
    topic = r.get(n, "topic", path, "str", _REQUIRED, _topic_ok,
                  "a topic string without wildcards")
    dec = r.get(n, "decoder", path, "str", "json", lambda v: v in {d.value for d in Decoder},
                "one of json, json-batch, text")
    decoder = Decoder(dec) if dec in {d.value for d in Decoder} else Decoder.JSON
    rate = r.get(n, "rate_hz", path, "num", _REQUIRED, lambda v: 0 < v <= 1e6,
                 "a sample rate in Hz, > 0 and at most 1000000")
    default_feats = WAVEFORM_DEFAULT_FEATURES if decoder is Decoder.JSON_BATCH \
        else DEFAULT_FEATURES
    feats = r.get(n, "features", path, "list", list(default_feats))
    for i, f in enumerate(feats):
        if f not in FEATURES:
            r.bad(f"{path}.features[{i}]", f"one of {', '.join(FEATURES)}", f)
    dupes = sorted({f for i, f in enumerate(feats) if isinstance(f, str) and f in feats[:i]})
    if dupes:
        r.bad(f"{path}.features", "each feature once", found=f"{', '.join(dupes)} repeated")
    if not feats:
        r.bad(f"{path}.features", "at least one feature", feats)
    if topic is None or rate is None:
        return None
    return ChannelConfig(
        name=str(name), topic=topic, decoder=decoder, rate_hz=rate, features=tuple(feats),
        unit=r.get(n, "unit", path, "str", ""),
        ts_field=r.get(n, "ts_field", path, "str", "ts"),
        value_field=r.get(n, "value_field", path, "str", "value"),
        values_field=r.get(n, "values_field", path, "str", "values"),
        rate_field=r.get(n, "rate_field", path, "str", "rate_hz"))


def _asset(r: _Reader, node: Any, path: str) -> AssetConfig | None:
    if not isinstance(node, dict):
        r.bad(path, "an asset mapping (name, channels, window, detector, bundle)", node)
        return None
    n = r.mapping(node, path, ("name", "channels", "window", "detector", "bundle"))
    name = r.get(n, "name", path, "str", _REQUIRED, _name,
                 "an asset name of letters, digits, '_', '.', '-' (at most 64)")
    chans_node = n.get("channels")
    channels: list[ChannelConfig] = []
    if not isinstance(chans_node, dict) or not chans_node:
        r.bad(f"{path}.channels", "a mapping of channel name to channel settings", chans_node)
    else:
        for cname, cnode in chans_node.items():
            ch = _channel(r, cname, cnode, f"{path}.channels.{cname}")
            if ch is not None:
                channels.append(ch)
    window = _window(r, n.get("window"), f"{path}.window")
    dpath = f"{path}.detector"
    d = r.mapping(n.get("detector"), dpath, ("raise_k", "raise_n", "clear_m"))
    pos = "an integer >= 1"
    k = r.get(d, "raise_k", dpath, "int", 2, lambda v: v >= 1, pos)
    nn = r.get(d, "raise_n", dpath, "int", max(3, k), lambda v: v >= 1, pos)
    m = r.get(d, "clear_m", dpath, "int", 3, lambda v: v >= 1, pos)
    if k > nn:
        r.bad(f"{dpath}.raise_k", f"at most raise_n ({nn})", k)
        k = nn
    bundle = r.path(r.get(n, "bundle", path, "str", None))
    if bundle is not None and not bundle.is_dir():
        r.bad(f"{path}.bundle", "an existing model bundle directory", found=str(bundle))
    if name is None:
        return None
    return AssetConfig(name, tuple(channels), window, DetectorParams(k, nn, m), bundle)


TOP_KEYS = ("site", "gateway", "topic_prefix", "state_dir", "local_broker", "upstream_broker",
            "ingest", "pipeline", "outbox", "http", "publish", "assets")


def parse_config(doc: Any, base_dir: Path, source: Path | None = None) -> Config:
    """Check a decoded YAML document and build the frozen config; raise ConfigError."""
    r = _Reader(base_dir)
    if doc is not None and not isinstance(doc, dict):
        raise ConfigError([ConfigProblem("(top level)", "a mapping of settings (site, gateway, "
                                         "assets, ...)", _describe(doc))],
                          str(source) if source else "")
    top = r.mapping(doc, "", TOP_KEYS)
    site = r.get(top, "site", "", "str", _REQUIRED, _name,
                 "a site name of letters, digits, '_', '.', '-' (at most 64)")
    gateway = r.get(top, "gateway", "", "str", _REQUIRED, _name,
                    "a gateway name of letters, digits, '_', '.', '-' (at most 64)")
    prefix = r.get(top, "topic_prefix", "", "str", f"watchkeep/{site}/{gateway}", _topic_ok,
                   "a topic prefix without wildcards")
    prefix = prefix.rstrip("/")
    state_dir = r.path(r.get(top, "state_dir", "", "str", "/var/lib/watchkeep")) \
        or Path("/var/lib/watchkeep")
    role = f"watchkeep-{site}-{gateway}"
    local = _broker(r, top.get("local_broker"), "local_broker", f"{role}-ingest", 1883)
    upstream = _broker(r, top.get("upstream_broker"), "upstream_broker", f"{role}-upstream",
                       1883)
    ing = r.mapping(top.get("ingest"), "ingest",
                    ("max_payload_bytes", "max_clock_skew_s", "subscriptions"))
    subs = r.get(ing, "subscriptions", "ingest", "list", [])
    for i, f in enumerate(subs):
        if not isinstance(f, str) or not _filter_ok(f):
            r.bad(f"ingest.subscriptions[{i}]", "an MQTT topic filter", f)
    ingest = IngestConfig(
        r.get(ing, "max_payload_bytes", "ingest", "int", 262144, lambda v: v >= 64,
              "an integer number of bytes >= 64"),
        r.get(ing, "max_clock_skew_s", "ingest", "num", 300.0, lambda v: v > 0,
              "a number of seconds > 0"),
        tuple(f for f in subs if isinstance(f, str)))
    pipe = r.mapping(top.get("pipeline"), "pipeline", ("tick_s",))
    tick = r.get(pipe, "tick_s", "pipeline", "num", 0.1, lambda v: 0.01 <= v <= 10,
                 "seconds between 0.01 and 10")
    pub = r.mapping(top.get("publish"), "publish", ("scores",))
    scores = r.get(pub, "scores", "publish", "bool", False)
    ob = r.mapping(top.get("outbox"), "outbox",
                   ("path", "synchronous", "max_rows", "max_bytes", "inflight"))
    sync = r.get(ob, "synchronous", "outbox", "str", "FULL", lambda v: v in ("FULL", "NORMAL"),
                 "FULL or NORMAL")
    outbox = OutboxConfig(
        path=r.path(r.get(ob, "path", "outbox", "str", None)) or state_dir / "outbox.sqlite",
        synchronous=Synchronous(sync),
        max_rows=r.get(ob, "max_rows", "outbox", "int", 100_000, lambda v: v >= 10,
                       "an integer >= 10"),
        max_bytes=r.get(ob, "max_bytes", "outbox", "int", 64 * 1024 * 1024,
                        lambda v: v >= 4096, "an integer number of bytes >= 4096"),
        inflight=r.get(ob, "inflight", "outbox", "int", 20, lambda v: 1 <= v <= 1000,
                       "an integer between 1 and 1000"))
    h = r.mapping(top.get("http"), "http", ("enabled", "host", "port"))
    http = HttpConfig(r.get(h, "enabled", "http", "bool", True),
                      r.get(h, "host", "http", "str", "127.0.0.1"),
                      r.get(h, "port", "http", "int", 9310, lambda v: 0 <= v < 65536,
                            "a TCP port 0-65535 (0 picks a free one)"))
    indexed: list[tuple[int, AssetConfig]] = []
    anode = top.get("assets")
    if not isinstance(anode, list) or not anode:
        r.bad("assets", "a non-empty list of assets", anode)
    else:
        for i, a in enumerate(anode):
            ac = _asset(r, a, f"assets[{i}]")
            if ac is not None:
                indexed.append((i, ac))
    _cross_checks(r, indexed)
    assets = [a for _, a in indexed]
    if ingest.subscriptions:
        for a in assets:
            for ch in a.channels:
                if not any(_matches(f, ch.topic) for f in ingest.subscriptions):
                    r.bad("ingest.subscriptions", f"filters that cover every channel topic "
                          f"(none covers {ch.topic!r} of asset {a.name})")
    if r.problems:
        raise ConfigError(r.problems, str(source) if source else "")
    return Config(site=site, gateway=gateway, topic_prefix=prefix, state_dir=state_dir,
                  local_broker=local, upstream_broker=upstream, ingest=ingest, tick_s=tick,
                  publish_scores=scores, outbox=outbox, http=http, assets=tuple(assets),
                  source=source)


def _cross_checks(r: _Reader, assets: list[tuple[int, AssetConfig]]) -> None:
    """Asset names are unique and no two channels share a topic; `idx` is the list index."""
    seen_names: dict[str, int] = {}
    seen_topics: dict[str, str] = {}
    for idx, a in assets:
        if a.name in seen_names:
            r.bad(f"assets[{idx}].name", "a name no other asset has",
                  found=f"{a.name!r}, also assets[{seen_names[a.name]}]")
        seen_names.setdefault(a.name, idx)
        for ch in a.channels:
            where = f"assets[{idx}].channels.{ch.name}.topic"
            if ch.topic in seen_topics:
                r.bad(where, "a topic no other channel uses",
                      found=f"{ch.topic!r}, also {seen_topics[ch.topic]}")
            else:
                seen_topics[ch.topic] = where


def load_config(path: str | Path) -> Config:
    """Read and check a YAML config file."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError([ConfigProblem(str(p), "a readable file", exc.strerror or str(exc))]
                          ) from exc
    try:
        doc = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = (f"line {mark.line + 1}, column {mark.column + 1}" if mark is not None
                 else "(file)")
        raise ConfigError([ConfigProblem(where, "valid YAML", str(getattr(exc, "problem", exc)))],
                          str(p)) from exc
    return parse_config(doc, p.resolve().parent, p)


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
