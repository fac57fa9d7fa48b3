"""The config's frozen, typed objects: what `agent.config.load` builds from YAML.

Plain values only (no file, YAML or numpy here): the pure core reads its parts of the
config from this module (`agent/core/` may import it and nothing else of the shell),
and the ingest child unpickles a `Config` without loading anything heavier.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from enum import StrEnum
from pathlib import Path

from agent.config.rebaseline import RebaselineConfig
from agent.core.detector_params import DetectorParams

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

