"""One YAML file -> frozen, typed config objects; every check made at load.

Errors name the key path (`assets[1].channels.bearing_temp.topic`), what was
expected and what was found, and all of them are reported at once.
"""

from __future__ import annotations

import itertools
import math
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from enum import StrEnum
from pathlib import Path
from typing import Any

from agent.config.rebaseline import RebaselineConfig, check_mqtt_commands, parse_rebaseline
from agent.core.detector_params import DetectorParams
from agent.errors import ConfigError, ConfigProblem

FEATURES = ("mean", "std", "min", "max", "rms", "peak_to_peak", "crest_factor",
            "skewness", "kurtosis")
DEFAULT_FEATURES = ("mean", "std", "min", "max", "rms")
# A channel that delivers few samples per window gets only its level and spread by
# default: the extremes and higher moments of a handful of samples are mostly sampling
# noise (the standard error of a sample kurtosis is about sqrt(24/n): 1.1 for n = 20
# against a Gaussian's 3; textbook, e.g. Kendall & Stuart). Below this many samples per
# window min/max/rms add noise (rms of a level-type reading is its mean) rather than
# information. The cut at 100 (SE of kurtosis ~0.5) is common practice, no source.
FEW_SAMPLES_FEATURES = ("mean", "std")
FEW_SAMPLES_PER_WINDOW = 100
WAVEFORM_DEFAULT_FEATURES = ("rms", "std", "peak_to_peak", "crest_factor", "kurtosis")
NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")


class Decoder(StrEnum):
    JSON = "json"
    JSON_BATCH = "json-batch"
    TEXT = "text"
    SPARKPLUG_B = "sparkplug-b"


class MqttProtocol(StrEnum):
    V311 = "3.1.1"
    V5 = "5"


class IngestWorker(StrEnum):
    """Where the local broker's client and the decoders run (see agent/ingest/parent.py)."""
    PROCESS = "process"
    THREAD = "thread"


class Synchronous(StrEnum):
    FULL = "FULL"
    NORMAL = "NORMAL"


class Support(StrEnum):
    """Machine support per ISO 10816-3: rigid or flexible in the measuring direction."""

    RIGID = "rigid"
    FLEXIBLE = "flexible"


# Accelerometer units velocity_rms can integrate, and their factor to m/s^2 (1 g is the
# standard gravity 9.80665 m/s^2, CGPM 1901).
ACCEL_UNITS = {"m/s2": 1.0, "m/s^2": 1.0, "m/s²": 1.0, "g": 9.80665}


def _hz_name(v: float) -> str:
    return f"{v:g}".replace(".", "p").replace("-", "m")


@dataclass(frozen=True)
class SpectrumConfig:
    """Spectral features of one waveform channel (see agent/core/spectral.py)."""

    bands_hz: tuple[tuple[float, float], ...] = ()
    velocity_rms: bool = False
    orders: tuple[float, ...] = ()
    envelope_hz: tuple[float, float] | None = None
    accel_to_m_s2: float = 1.0

    def feature_names(self) -> tuple[str, ...]:
        """Feature names in the order `spectral_features` returns their values."""
        names = [f"band_{_hz_name(lo)}_{_hz_name(hi)}_hz" for lo, hi in self.bands_hz]
        names += ["dominant_hz", "dominant_amp"]
        names += [f"order_{_hz_name(o)}x_amp" for o in self.orders]
        if self.envelope_hz is not None:
            names.append("envelope_rms")
        if self.velocity_rms:
            names.append("velocity_rms_mm_s")
        return tuple(names)


@dataclass(frozen=True)
class LimitConfig:
    """Static limits on one feature: alert/alarm high and low, deadband, on-delay (windows)."""

    feature: str
    alert: float | None = None
    alarm: float | None = None
    alert_low: float | None = None
    alarm_low: float | None = None
    deadband: float = 0.0
    on_delay: int = 2


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
    # The sensor's own message counter, when it sends one: a jump is a counted gap.
    seq_field: str | None = None
    spectrum: SpectrumConfig | None = None
    # Sensor health (agent/core/health.py); None switches a check off.
    min_value: float | None = None
    max_value: float | None = None
    stale_s: float | None = None
    flatline_windows: int | None = None
    max_rate_per_s: float | None = None
    limits: tuple[LimitConfig, ...] = ()
    # The channel's column in a CSV/historian export (`record --from-csv`); None: its name.
    column: str | None = None
    # sparkplug-b: the metric's name in the edge node's or device's birth certificate.
    metric: str | None = None

    @property
    def spectral_features(self) -> tuple[str, ...]:
        return self.spectrum.feature_names() if self.spectrum is not None else ()

    @property
    def all_features(self) -> tuple[str, ...]:
        """Time-domain features, then spectral ones: what the pipeline computes."""
        return self.features + self.spectral_features


@dataclass(frozen=True)
class WindowConfig:
    length_s: float = 10.0
    hop_s: float = 10.0
    lateness_s: float = 1.0
    timeout_s: float = 5.0
    min_coverage: float = 0.8


@dataclass(frozen=True)
class ModeSpec:
    """One operating mode: a value band [min, max) of the mode channel or a mode code."""

    name: str
    min_value: float | None = None
    max_value: float | None = None
    code: float | None = None
    bundle: Path | None = None
    scored: bool = True
    settling_s: float = 0.0


@dataclass(frozen=True)
class ModesConfig:
    """How an asset's operating mode is decided (agent/core/modes.py)."""

    channel: str
    states: tuple[ModeSpec, ...]
    hysteresis: float = 0.0
    by_code: bool = False

    def spec(self, name: str) -> ModeSpec | None:
        return next((m for m in self.states if m.name == name), None)


@dataclass(frozen=True)
class IsoConfig:
    """ISO 10816-3 vibration-severity evaluation of the asset's velocity RMS."""

    group: int
    support: Support
    baseline_mm_s: float | None = None
    channels: tuple[str, ...] = ()
    deadband_mm_s: float = 0.1
    on_delay: int = 2


@dataclass(frozen=True)
class AssetConfig:
    name: str
    channels: tuple[ChannelConfig, ...]
    window: WindowConfig
    detector: DetectorParams
    bundle: Path | None
    speed_channel: str | None = None
    modes: ModesConfig | None = None
    iso10816: IsoConfig | None = None

    @property
    def level_channels(self) -> frozenset[str]:
        """Channels that read a level (not waveform blocks): the ones a drift can be
        blamed on (agent/core/suspect.py)."""
        return frozenset(c.name for c in self.channels
                         if c.decoder is not Decoder.JSON_BATCH and c.spectrum is None)

    @property
    def window_overlap(self) -> int:
        """Windows that share any one instant: ceil(length_s / hop_s)."""
        return max(1, math.ceil(self.window.length_s / self.window.hop_s - 1e-9))

    @property
    def window_detector(self) -> DetectorParams:
        """`detector` as applied to this asset's windows (hopping windows stretch the
        raise rule over the same span of time: `DetectorParams.over_windows`)."""
        return self.detector.over_windows(self.window.length_s, self.window.hop_s)

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
class Endpoint:
    """One address of a broker (a node of a cluster)."""

    host: str
    port: int

    def __str__(self) -> str:
        return f"[{self.host}]:{self.port}" if ":" in self.host else f"{self.host}:{self.port}"


@dataclass(frozen=True)
class BrokerConfig:
    # The first endpoint; with `endpoints` given, `host` and `port` are its address.
    host: str = "127.0.0.1"
    port: int = 1883
    client_id: str = ""
    keepalive_s: int = 20
    username: str | None = None
    password: str | None = field(default=None, repr=False)
    password_file: Path | None = None
    protocol: MqttProtocol = MqttProtocol.V311
    tls: TlsConfig | None = None
    # Upstream only: the nodes of a clustered broker, tried in turn when the connection is
    # lost (agent/delivery/upstream.py). Empty: the one `host`/`port`.
    endpoints: tuple[Endpoint, ...] = ()

    def targets(self) -> tuple[Endpoint, ...]:
        """Every address to try, in order; at least one."""
        return self.endpoints or (Endpoint(self.host, self.port),)


@dataclass(frozen=True)
class SparkplugConfig:
    """`ingest.sparkplug`: how the sparkplug-b decoder answers a broken stream."""

    # Answer a sequence gap, data before a birth or an unknown alias with the
    # specification's rebirth request (NCMD `Node Control/Rebirth` = true). Off by
    # default: it publishes to the edge node, so the local broker must know who we are.
    rebirth_requests: bool = False
    # At most one request per edge node in this many seconds (common practice, no source).
    rebirth_min_interval_s: float = 10.0


@dataclass(frozen=True)
class IngestConfig:
    max_payload_bytes: int = 262144
    max_clock_skew_s: float = 300.0
    # Topic filters to subscribe to instead of each channel's exact topic; messages on
    # topics no channel uses are then counted as `unknown_topic`.
    subscriptions: tuple[str, ...] = ()
    # `process`: a child process runs the MQTT client and the decoders and hands the
    # samples over in batches, so ingest and the pipeline do not share one interpreter
    # lock. `thread`: both in the daemon's process (one core's worth for everything).
    worker: IngestWorker = IngestWorker.PROCESS
    # After a start, a channel that has not published yet is "waiting", not stale, for
    # this long (or its own stale_s, if longer): sensors publish on their own cycle and
    # the broker connection takes a moment.
    startup_grace_s: float = 120.0
    sparkplug: SparkplugConfig = field(default_factory=SparkplugConfig)


@dataclass(frozen=True)
class OutboxConfig:
    path: Path
    synchronous: Synchronous = Synchronous.FULL
    max_rows: int = 100_000
    max_bytes: int = 64 * 1024 * 1024
    inflight: int = 20
    # The backlog kept in memory while the file cannot take it (a full disk).
    max_memory_bytes: int = 16 * 1024 * 1024


@dataclass(frozen=True)
class HttpConfig:
    enabled: bool = True
    host: str = "127.0.0.1"
    port: int = 9310
    max_connections: int = 32  # agent.ops.metrics.DEFAULT_MAX_CONNECTIONS
    request_timeout_s: float = 10.0  # agent.ops.metrics.DEFAULT_REQUEST_TIMEOUT_S


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
    rebaseline: RebaselineConfig | None = None  # None: defaults under state_dir

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

    def __init__(self, base_dir: Path, *, require_bundles: bool = True) -> None:
        self.problems: list[ConfigProblem] = []
        self.base_dir = base_dir
        self.require_bundles = require_bundles

    def bundle_dir(self, p: Path | None, where: str) -> None:
        """A model bundle path must exist, unless the caller commissions it (`record`)."""
        if p is not None and not p.is_dir() and (self.require_bundles or p.exists()):
            self.bad(where, "an existing model bundle directory (record, and check-config "
                     "with --allow-missing-bundles, accept one not trained yet)", found=str(p))

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

    def path(self, v: str | None, where: str) -> Path | None:
        """A path setting (`where` is its key path) made absolute against the config's
        directory, `~` and `~user` expanded."""
        if v is None:
            return None
        try:
            p = Path(v).expanduser()
        except RuntimeError:  # `~name` of no user here, or no home directory to expand to
            self.bad(where, "a path whose leading ~ names a user of this machine", v)
            p = Path(v)
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


SPARKPLUG_NAMESPACE = "spBv1.0"
SPARKPLUG_DATA_VERBS = ("NDATA", "DDATA")


def sparkplug_topic(topic: str) -> tuple[str, str, str, str | None] | None:
    """(group, verb, edge node, device or None) of a Sparkplug B topic, or None.

    `spBv1.0/<group_id>/<message_type>/<edge_node_id>[/<device_id>]` (Sparkplug 3.0,
    chapter 4 Topics, "Sparkplug Topic Namespace Elements"); node verbs have four levels,
    device verbs five, and no element is empty.
    """
    parts = topic.split("/")
    if parts[0] != SPARKPLUG_NAMESPACE or len(parts) not in (4, 5) or not all(parts):
        return None
    verb = parts[2]
    if (len(parts) == 5) != verb.startswith("D"):
        return None
    return parts[1], verb, parts[3], parts[4] if len(parts) == 5 else None


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


def _port_ok(v: int) -> bool:
    return 0 < v < 65536


def _endpoints(r: _Reader, n: dict[str, Any], path: str, default_port: int
               ) -> tuple[Endpoint, ...]:
    """`endpoints: [{host, port}, ...]`: the nodes of a clustered upstream broker."""
    where = f"{path}.endpoints"
    items = r.get(n, "endpoints", path, "list", [], lambda v: len(v) > 0,
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
        host = r.get(e, "host", ipath, "str", _REQUIRED, expected="a host name or address")
        port = r.get(e, "port", ipath, "int", default_port, _port_ok, "a TCP port 1-65535")
        if host is None:
            continue
        ep = Endpoint(host, port)
        if ep in out:
            r.bad(ipath, "each endpoint listed once", found=f"{ep} again")
            continue
        out.append(ep)
    return tuple(out)


def _broker(r: _Reader, node: Any, path: str, default_id: str, default_port: int,
            *, cluster: bool = False) -> BrokerConfig:
    keys = ("host", "port", "client_id", "keepalive_s", "username", "password",
            "password_file", "protocol", "tls") + (("endpoints",) if cluster else ())
    n = r.mapping(node, path, keys)
    host = r.get(n, "host", path, "str", "127.0.0.1")
    port = r.get(n, "port", path, "int", default_port, _port_ok, "a TCP port 1-65535")
    endpoints = _endpoints(r, n, path, default_port) if cluster else ()
    if endpoints:
        host, port = endpoints[0].host, endpoints[0].port
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
        ca = r.path(r.get(t, "ca_file", tpath, "str", None), f"{tpath}.ca_file")
        cert = r.path(r.get(t, "cert_file", tpath, "str", None), f"{tpath}.cert_file")
        key = r.path(r.get(t, "key_file", tpath, "str", None), f"{tpath}.key_file")
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
    pw_file = r.path(r.get(n, "password_file", path, "str", None),
                     f"{path}.password_file")
    if pw_file is not None and n.get("password") is not None:
        # Two sources for one secret: which one wins would be a silent surprise.
        r.bad(f"{path}.password_file", "either password or password_file, not both")
    return BrokerConfig(host=host, port=port, client_id=client_id, keepalive_s=keepalive,
                        username=r.get(n, "username", path, "str", None),
                        password=r.get(n, "password", path, "str", None),
                        password_file=pw_file, protocol=MqttProtocol(protocol), tls=tls,
                        endpoints=endpoints)


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


def _channel(r: _Reader, name: Any, node: Any, path: str,
             window_length_s: float | None = None) -> ChannelConfig | None:
    if not _name(name):
        r.bad(path, "a channel name of letters, digits, '_', '.', '-' (at most 64)", name)
    keys = ("topic", "decoder", "rate_hz", "features", "unit", "ts_field", "value_field",
            "values_field", "rate_field", "seq_field", "spectrum", "min", "max", "stale_s",
            "flatline_windows", "max_rate_per_s", "limits", "column", "metric")
    if not isinstance(node, dict):
        r.bad(path, "a mapping of channel settings (topic, decoder, rate_hz, ...)", node)
        return None
    n = r.mapping(node, path, keys)
    topic = r.get(n, "topic", path, "str", _REQUIRED, _topic_ok,
                  "a topic string without wildcards")
    dec = r.get(n, "decoder", path, "str", "json", lambda v: v in {d.value for d in Decoder},
                "one of json, json-batch, text, sparkplug-b")
    decoder = Decoder(dec) if dec in {d.value for d in Decoder} else Decoder.JSON
    metric = r.get(n, "metric", path, "str", None)
    if decoder is Decoder.SPARKPLUG_B:
        if n.get("metric") is None:
            r.bad(f"{path}.metric", "the metric's name in the edge node's or device's "
                  "birth certificate (required for decoder sparkplug-b)")
        spb = sparkplug_topic(topic) if topic is not None else None
        if topic is not None and (spb is None or spb[1] not in SPARKPLUG_DATA_VERBS):
            r.bad(f"{path}.topic", "a Sparkplug B data topic: spBv1.0/<group>/NDATA/<edge "
                  "node> or spBv1.0/<group>/DDATA/<edge node>/<device>", topic)
    elif metric is not None:
        r.bad(f"{path}.metric", "no metric (only decoder sparkplug-b names one)", metric)
    rate = r.get(n, "rate_hz", path, "num", _REQUIRED, lambda v: 0 < v <= 1e6,
                 "a sample rate in Hz, > 0 and at most 1000000")
    default_feats: tuple[str, ...] = WAVEFORM_DEFAULT_FEATURES \
        if decoder is Decoder.JSON_BATCH else DEFAULT_FEATURES
    if (decoder is not Decoder.JSON_BATCH and isinstance(rate, int | float)
            and window_length_s is not None and rate * window_length_s < FEW_SAMPLES_PER_WINDOW):
        default_feats = FEW_SAMPLES_FEATURES
    feats = r.get(n, "features", path, "list", list(default_feats))
    for i, f in enumerate(feats):
        if f not in FEATURES:
            r.bad(f"{path}.features[{i}]", f"one of {', '.join(FEATURES)}", f)
    dupes = sorted({f for i, f in enumerate(feats) if isinstance(f, str) and f in feats[:i]})
    if dupes:
        r.bad(f"{path}.features", "each feature once", found=f"{', '.join(dupes)} repeated")
    if not feats:
        r.bad(f"{path}.features", "at least one feature", feats)
    unit = r.get(n, "unit", path, "str", "")
    spectrum = _spectrum(r, n.get("spectrum"), f"{path}.spectrum", rate, unit) \
        if n.get("spectrum") is not None else None
    lo = r.get(n, "min", path, "num", None)
    hi = r.get(n, "max", path, "num", None)
    if lo is not None and hi is not None and lo >= hi:
        r.bad(f"{path}.max", f"more than min ({lo:g})", hi)
    stale = r.get(n, "stale_s", path, "num", None, lambda v: v > 0, "a number of seconds > 0")
    flat = r.get(n, "flatline_windows", path, "int", None, lambda v: v >= 1, "an integer >= 1")
    max_rate = r.get(n, "max_rate_per_s", path, "num", None, lambda v: v > 0,
                     "a rate of change > 0 (channel units per second)")
    if topic is None or rate is None:
        return None
    feats_t = tuple(f for f in feats if isinstance(f, str))
    computed = feats_t + (spectrum.feature_names() if spectrum is not None else ())
    limits = _limits(r, n.get("limits"), f"{path}.limits", computed)
    return ChannelConfig(
        name=str(name), topic=topic, decoder=decoder, rate_hz=rate, features=feats_t,
        unit=unit,
        ts_field=r.get(n, "ts_field", path, "str", "ts"),
        value_field=r.get(n, "value_field", path, "str", "value"),
        values_field=r.get(n, "values_field", path, "str", "values"),
        rate_field=r.get(n, "rate_field", path, "str", "rate_hz"),
        seq_field=r.get(n, "seq_field", path, "str", None),
        spectrum=spectrum, min_value=lo, max_value=hi, stale_s=stale, flatline_windows=flat,
        max_rate_per_s=max_rate, limits=limits,
        column=r.get(n, "column", path, "str", None, expected="the header of the channel's "
                     "column in a CSV export (a non-empty string)"),
        metric=metric if decoder is Decoder.SPARKPLUG_B else None)


def _hz_pair(r: _Reader, v: Any, where: str, nyquist: float) -> tuple[float, float] | None:
    """[lo, hi] in Hz with 0 <= lo < hi <= the Nyquist frequency."""
    if (not isinstance(v, list) or len(v) != 2 or not all(_finite_number(x) for x in v)
            or not 0 <= v[0] < v[1] <= nyquist):
        r.bad(where, f"[low, high] in Hz with 0 <= low < high <= {nyquist:g} (half the "
              "sample rate)", v)
        return None
    return float(v[0]), float(v[1])


def _spectrum(r: _Reader, node: Any, path: str, rate: float | None, unit: str
              ) -> SpectrumConfig | None:
    n = r.mapping(node, path, ("bands_hz", "velocity_rms", "orders", "envelope_hz"))
    nyq = (rate or 2.0) / 2.0
    bands: list[tuple[float, float]] = []
    for i, b in enumerate(r.get(n, "bands_hz", path, "list", [])):
        pair = _hz_pair(r, b, f"{path}.bands_hz[{i}]", nyq)
        if pair is not None:
            bands.append(pair)
    if len(set(bands)) != len(bands):
        r.bad(f"{path}.bands_hz", "each band once", found="a band repeated")
    orders: list[float] = []
    for i, o in enumerate(r.get(n, "orders", path, "list", [])):
        if not _finite_number(o) or not 0 < o <= 64:
            r.bad(f"{path}.orders[{i}]", "a multiple of running speed in (0, 64]", o)
        else:
            orders.append(float(o))
    if len(set(orders)) != len(orders):
        r.bad(f"{path}.orders", "each order once", found="an order repeated")
    env = None
    if n.get("envelope_hz") is not None:
        env = _hz_pair(r, n["envelope_hz"], f"{path}.envelope_hz", nyq)
    vel = r.get(n, "velocity_rms", path, "bool", False)
    factor = 1.0
    if vel:
        if unit not in ACCEL_UNITS:
            r.bad(f"{path}.velocity_rms", "an acceleration channel (its unit one of "
                  f"{', '.join(ACCEL_UNITS)})", found=f"unit {unit!r}")
        else:
            factor = ACCEL_UNITS[unit]
        if rate is not None and rate < 2 * 20.0:
            r.bad(f"{path}.velocity_rms", "a sample rate of at least 40 Hz (the band starts "
                  "at 10 Hz)", found=f"{rate:g} Hz")
    return SpectrumConfig(tuple(bands), vel, tuple(orders), env, factor)


LIMIT_KEYS = ("alert", "alarm", "alert_low", "alarm_low", "deadband", "on_delay")


def _limits(r: _Reader, node: Any, path: str, computed: tuple[str, ...]
            ) -> tuple[LimitConfig, ...]:
    if node is None:
        return ()
    if not isinstance(node, dict) or not node:
        r.bad(path, "a mapping of feature name to limits (alert, alarm, ...)", node)
        return ()
    out: list[LimitConfig] = []
    for feat, lnode in node.items():
        where = f"{path}.{feat}"
        if feat not in computed:
            r.bad(where, f"a feature this channel computes ({', '.join(computed)})",
                  found=repr(feat))
            continue
        ln = r.mapping(lnode, where, LIMIT_KEYS)
        vals = {k: r.get(ln, k, where, "num", None) for k in LIMIT_KEYS[:4]}
        if all(v is None for v in vals.values()):
            r.bad(where, "at least one of alert, alarm, alert_low, alarm_low")
        if vals["alert"] is not None and vals["alarm"] is not None \
                and vals["alarm"] < vals["alert"]:
            r.bad(f"{where}.alarm", f"at least alert ({vals['alert']:g})", vals["alarm"])
        if vals["alert_low"] is not None and vals["alarm_low"] is not None \
                and vals["alarm_low"] > vals["alert_low"]:
            r.bad(f"{where}.alarm_low", f"at most alert_low ({vals['alert_low']:g})",
                  vals["alarm_low"])
        dead = r.get(ln, "deadband", where, "num", 0.0, lambda v: v >= 0, "a number >= 0")
        delay = r.get(ln, "on_delay", where, "int", 2, lambda v: v >= 1,
                      "a number of windows >= 1")
        out.append(LimitConfig(str(feat), vals["alert"], vals["alarm"], vals["alert_low"],
                               vals["alarm_low"], dead, delay))
    return tuple(out)


MODE_KEYS = ("min", "max", "code", "bundle", "scored", "settling_s")


def _modes(r: _Reader, node: Any, path: str, channels: dict[str, ChannelConfig]
           ) -> ModesConfig | None:
    n = r.mapping(node, path, ("channel", "hysteresis", "settling_s", "states"))
    chan = r.get(n, "channel", path, "str", _REQUIRED, expected="the channel that decides "
                 "the mode")
    if chan is not None and channels and chan not in channels:
        r.bad(f"{path}.channel", f"one of the asset's channels ({', '.join(channels)})", chan)
    hyst = r.get(n, "hysteresis", path, "num", 0.0, lambda v: v >= 0,
                 "a number >= 0 in the mode channel's unit")
    settle = r.get(n, "settling_s", path, "num", 0.0, lambda v: v >= 0,
                   "a number of seconds >= 0")
    snode = n.get("states")
    states: list[ModeSpec] = []
    if not isinstance(snode, dict) or not snode:
        r.bad(f"{path}.states", "a mapping of mode name to its band or code", snode)
        snode = {}
    for mname, mnode in snode.items():
        where = f"{path}.states.{mname}"
        if not _name(mname):
            r.bad(where, "a mode name of letters, digits, '_', '.', '-' (at most 64)", mname)
            continue
        m = r.mapping(mnode, where, MODE_KEYS)
        lo = r.get(m, "min", where, "num", None)
        hi = r.get(m, "max", where, "num", None)
        code = r.get(m, "code", where, "num", None)
        if code is not None and (lo is not None or hi is not None):
            r.bad(f"{where}.code", "either code or a min/max band, not both", code)
        if lo is not None and hi is not None and lo >= hi:
            r.bad(f"{where}.max", f"more than min ({lo:g})", hi)
        bundle = r.path(r.get(m, "bundle", where, "str", None), f"{where}.bundle")
        r.bundle_dir(bundle, f"{where}.bundle")
        states.append(ModeSpec(str(mname), lo, hi, code, bundle,
                               r.get(m, "scored", where, "bool", True),
                               r.get(m, "settling_s", where, "num", settle, lambda v: v >= 0,
                                     "a number of seconds >= 0")))
    coded = {s.code is not None for s in states}
    if len(coded) > 1:
        r.bad(f"{path}.states", "every mode by code or every mode by a min/max band")
    if chan is None or not states:
        return None
    by_code = coded == {True}
    if not by_code:
        bands = sorted((s.min_value if s.min_value is not None else -math.inf,
                        s.max_value if s.max_value is not None else math.inf, s.name)
                       for s in states)
        for (_, hi1, a), (lo2, _, b) in itertools.pairwise(bands):
            if lo2 < hi1:
                r.bad(f"{path}.states.{b}", f"a band that does not overlap mode {a}")
    return ModesConfig(chan, tuple(states), hyst, by_code)


def _iso(r: _Reader, node: Any, path: str, channels: dict[str, ChannelConfig]
         ) -> IsoConfig | None:
    n = r.mapping(node, path, ("group", "support", "baseline_mm_s", "channels",
                               "deadband_mm_s", "on_delay"))
    group = r.get(n, "group", path, "int", _REQUIRED, lambda v: v in (1, 2),
                  "machine group 1 (300 kW to 50 MW) or 2 (15 kW to 300 kW)")
    support = r.get(n, "support", path, "str", _REQUIRED, lambda v: v in ("rigid", "flexible"),
                    "rigid or flexible")
    base = r.get(n, "baseline_mm_s", path, "num", None, lambda v: v > 0,
                 "the machine's normal velocity RMS in mm/s, > 0")
    with_vel = [c.name for c in channels.values()
                if c.spectrum is not None and c.spectrum.velocity_rms]
    chans = r.get(n, "channels", path, "list", list(with_vel))
    for i, c in enumerate(chans):
        if c not in with_vel:
            r.bad(f"{path}.channels[{i}]", "a channel with spectrum.velocity_rms: true", c)
    if not chans and channels:
        r.bad(path, "a channel with spectrum.velocity_rms: true to evaluate")
    dead = r.get(n, "deadband_mm_s", path, "num", 0.1, lambda v: v >= 0, "a number >= 0")
    delay = r.get(n, "on_delay", path, "int", 2, lambda v: v >= 1, "a number of windows >= 1")
    if group is None or support is None:
        return None
    return IsoConfig(group, Support(support), base, tuple(str(c) for c in chans), dead, delay)


def _asset(r: _Reader, node: Any, path: str) -> AssetConfig | None:
    if not isinstance(node, dict):
        r.bad(path, "an asset mapping (name, channels, window, detector, bundle)", node)
        return None
    n = r.mapping(node, path, ("name", "channels", "window", "detector", "bundle",
                               "speed_channel", "modes", "iso10816"))
    name = r.get(n, "name", path, "str", _REQUIRED, _name,
                 "an asset name of letters, digits, '_', '.', '-' (at most 64)")
    window = _window(r, n.get("window"), f"{path}.window")
    chans_node = n.get("channels")
    channels: list[ChannelConfig] = []
    if not isinstance(chans_node, dict) or not chans_node:
        r.bad(f"{path}.channels", "a mapping of channel name to channel settings", chans_node)
    else:
        for cname, cnode in chans_node.items():
            ch = _channel(r, cname, cnode, f"{path}.channels.{cname}", window.length_s)
            if ch is not None:
                channels.append(ch)
    dpath = f"{path}.detector"
    d = r.mapping(n.get("detector"), dpath, ("raise_k", "raise_n", "clear_m"))
    pos = "an integer >= 1"
    k = r.get(d, "raise_k", dpath, "int", 2, lambda v: v >= 1, pos)
    nn = r.get(d, "raise_n", dpath, "int", max(3, k), lambda v: v >= 1, pos)
    m = r.get(d, "clear_m", dpath, "int", 3, lambda v: v >= 1, pos)
    if k > nn:
        r.bad(f"{dpath}.raise_k", f"at most raise_n ({nn})", k)
        k = nn
    bundle = r.path(r.get(n, "bundle", path, "str", None), f"{path}.bundle")
    r.bundle_dir(bundle, f"{path}.bundle")
    by_name = {c.name: c for c in channels}
    speed = r.get(n, "speed_channel", path, "str", None)
    if speed is not None and by_name and speed not in by_name:
        r.bad(f"{path}.speed_channel", f"one of the asset's channels ({', '.join(by_name)})",
              speed)
    for c in channels:
        if c.spectrum is not None and c.spectrum.orders and speed is None:
            r.bad(f"{path}.channels.{c.name}.spectrum.orders",
                  "the asset's speed_channel (rpm) to find running speed")
    modes = _modes(r, n["modes"], f"{path}.modes", by_name) \
        if n.get("modes") is not None else None
    iso = _iso(r, n["iso10816"], f"{path}.iso10816", by_name) \
        if n.get("iso10816") is not None else None
    if name is None:
        return None
    return AssetConfig(name, tuple(channels), window, DetectorParams(k, nn, m), bundle,
                       speed, modes, iso)


TOP_KEYS = ("site", "gateway", "topic_prefix", "state_dir", "local_broker", "upstream_broker",
            "ingest", "pipeline", "outbox", "http", "publish", "assets", "rebaseline")


def parse_config(doc: Any, base_dir: Path, source: Path | None = None, *,
                 require_bundles: bool = True) -> Config:
    """Check a decoded YAML document and build the frozen config; raise ConfigError.

    With `require_bundles=False` a model bundle path that does not exist yet is kept
    as it is (the config that records an asset may name the bundle it commissions).
    """
    r = _Reader(base_dir, require_bundles=require_bundles)
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
    state_dir = r.path(r.get(top, "state_dir", "", "str", "/var/lib/watchkeep"),
                       "state_dir") \
        or Path("/var/lib/watchkeep")
    role = f"watchkeep-{site}-{gateway}"
    local = _broker(r, top.get("local_broker"), "local_broker", f"{role}-ingest", 1883)
    upstream = _broker(r, top.get("upstream_broker"), "upstream_broker", f"{role}-upstream",
                       1883, cluster=True)
    ing = r.mapping(top.get("ingest"), "ingest",
                    ("max_payload_bytes", "max_clock_skew_s", "subscriptions", "worker",
                     "startup_grace_s", "sparkplug"))
    subs = r.get(ing, "subscriptions", "ingest", "list", [])
    for i, f in enumerate(subs):
        if not isinstance(f, str) or not _filter_ok(f):
            r.bad(f"ingest.subscriptions[{i}]", "an MQTT topic filter", f)
    ingest = IngestConfig(
        r.get(ing, "max_payload_bytes", "ingest", "int", 262144, lambda v: v >= 64,
              "an integer number of bytes >= 64"),
        r.get(ing, "max_clock_skew_s", "ingest", "num", 300.0, lambda v: v > 0,
              "a number of seconds > 0"),
        tuple(f for f in subs if isinstance(f, str)),
        IngestWorker(r.get(ing, "worker", "ingest", "str", "process",
                           lambda v: v in ("process", "thread"), "process or thread")),
        r.get(ing, "startup_grace_s", "ingest", "num", 120.0, lambda v: v >= 0,
              "a number of seconds >= 0"),
        _sparkplug(r, ing.get("sparkplug"), "ingest.sparkplug", local))
    pipe = r.mapping(top.get("pipeline"), "pipeline", ("tick_s",))
    tick = r.get(pipe, "tick_s", "pipeline", "num", 0.1, lambda v: 0.01 <= v <= 10,
                 "seconds between 0.01 and 10")
    pub = r.mapping(top.get("publish"), "publish", ("scores",))
    scores = r.get(pub, "scores", "publish", "bool", False)
    ob = r.mapping(top.get("outbox"), "outbox",
                   ("path", "synchronous", "max_rows", "max_bytes", "inflight",
                    "max_memory_bytes"))
    sync = r.get(ob, "synchronous", "outbox", "str", "FULL", lambda v: v in ("FULL", "NORMAL"),
                 "FULL or NORMAL")
    outbox = OutboxConfig(
        path=r.path(r.get(ob, "path", "outbox", "str", None), "outbox.path")
        or state_dir / "outbox.sqlite",
        synchronous=Synchronous(sync),
        max_rows=r.get(ob, "max_rows", "outbox", "int", 100_000, lambda v: v >= 10,
                       "an integer >= 10"),
        max_bytes=r.get(ob, "max_bytes", "outbox", "int", 64 * 1024 * 1024,
                        lambda v: v >= 4096, "an integer number of bytes >= 4096"),
        inflight=r.get(ob, "inflight", "outbox", "int", 20, lambda v: 1 <= v <= 1000,
                       "an integer between 1 and 1000"),
        max_memory_bytes=r.get(ob, "max_memory_bytes", "outbox", "int", 16 * 1024 * 1024,
                               lambda v: 65536 <= v <= 1 << 34,
                               "an integer number of bytes from 65536 to 17179869184"))
    h = r.mapping(top.get("http"), "http", ("enabled", "host", "port", "max_connections",
                                            "request_timeout_s"))
    http = HttpConfig(r.get(h, "enabled", "http", "bool", True),
                      r.get(h, "host", "http", "str", "127.0.0.1"),
                      r.get(h, "port", "http", "int", 9310, lambda v: 0 <= v < 65536,
                            "a TCP port 0-65535 (0 picks a free one)"),
                      r.get(h, "max_connections", "http", "int", 32,
                            lambda v: 1 <= v <= 1000, "an integer from 1 to 1000"),
                      r.get(h, "request_timeout_s", "http", "num", 10.0,
                            lambda v: 0.1 <= v <= 300, "seconds from 0.1 to 300"))
    rebaseline = parse_rebaseline(r, top.get("rebaseline"), "rebaseline", state_dir)
    check_mqtt_commands(r, rebaseline, upstream)
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
                for t in _topics_needed(ch):
                    if not any(_matches(f, t) for f in ingest.subscriptions):
                        r.bad("ingest.subscriptions", f"filters that cover every channel "
                              f"topic (none covers {t!r} of asset {a.name})")
                        break
    if r.problems:
        raise ConfigError(r.problems, str(source) if source else "")
    return Config(site=site, gateway=gateway, topic_prefix=prefix, state_dir=state_dir,
                  local_broker=local, upstream_broker=upstream, ingest=ingest, tick_s=tick,
                  publish_scores=scores, outbox=outbox, http=http, assets=tuple(assets),
                  source=source, rebaseline=rebaseline)


def _topics_needed(ch: ChannelConfig) -> tuple[str, ...]:
    """The topics a channel's samples depend on: its own, and for sparkplug-b also the
    births and deaths of its edge node (and device)."""
    spb = sparkplug_topic(ch.topic) if ch.decoder is Decoder.SPARKPLUG_B else None
    if spb is None:
        return (ch.topic,)
    group, _, node, device = spb
    base = f"{SPARKPLUG_NAMESPACE}/{group}"
    out = [ch.topic, f"{base}/NBIRTH/{node}", f"{base}/NDEATH/{node}"]
    if device is not None:
        out += [f"{base}/DBIRTH/{node}/{device}", f"{base}/DDEATH/{node}/{device}"]
    return tuple(out)


def _sparkplug(r: _Reader, node: Any, path: str, local: BrokerConfig) -> SparkplugConfig:
    n = r.mapping(node, path, ("rebirth_requests", "rebirth_min_interval_s"))
    ask = r.get(n, "rebirth_requests", path, "bool", False)
    every = r.get(n, "rebirth_min_interval_s", path, "num", 10.0, lambda v: 1 <= v <= 3600,
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


def _cross_checks(r: _Reader, assets: list[tuple[int, AssetConfig]]) -> None:
    """Asset names are unique and no two channels share a topic, except sparkplug-b
    channels, which share their edge node's or device's topic but not a metric there;
    `idx` is the list index."""
    seen_names: dict[str, int] = {}
    seen_topics: dict[str, str] = {}
    spb_topics: dict[str, str] = {}  # sparkplug-b topic -> the first channel using it
    seen_metrics: dict[tuple[str, str], str] = {}
    for idx, a in assets:
        if a.name in seen_names:
            r.bad(f"assets[{idx}].name", "a name no other asset has",
                  found=f"{a.name!r}, also assets[{seen_names[a.name]}]")
        seen_names.setdefault(a.name, idx)
        for ch in a.channels:
            where = f"assets[{idx}].channels.{ch.name}.topic"
            if ch.decoder is Decoder.SPARKPLUG_B:
                if ch.topic in seen_topics:
                    r.bad(where, "a topic no channel of another decoder uses",
                          found=f"{ch.topic!r}, also {seen_topics[ch.topic]}")
                spb_topics.setdefault(ch.topic, where)
                key = (ch.topic, ch.metric or "")
                mwhere = f"assets[{idx}].channels.{ch.name}.metric"
                if key in seen_metrics:
                    r.bad(mwhere, "a metric no other channel of this topic reads",
                          found=f"{ch.metric!r}, also {seen_metrics[key]}")
                else:
                    seen_metrics[key] = mwhere
            elif ch.topic in seen_topics or ch.topic in spb_topics:
                r.bad(where, "a topic no other channel uses",
                      found=f"{ch.topic!r}, also "
                            f"{seen_topics.get(ch.topic) or spb_topics[ch.topic]}")
            else:
                seen_topics[ch.topic] = where


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
