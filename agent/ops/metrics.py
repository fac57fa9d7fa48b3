"""Every metric watchkeep exports, on an injected registry (the HTTP endpoints that
serve them are in `agent.ops.http_server`).

Names follow the Prometheus naming rules (prometheus.io, "Metric and label
naming"): `watchkeep_` prefix, base units, `_total` counters, `_seconds`
histograms. Labels come only from bounded sets (asset, channel, reason, kind,
broker) — never ids, values or topics from the wire.
"""

from __future__ import annotations

import enum
import math
import os
import threading
import time
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Protocol

from prometheus_client import (
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    Info,
    PlatformCollector,
    ProcessCollector,
)
from prometheus_client.metrics_core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.registry import Collector

if TYPE_CHECKING:
    from agent.config.schema import Config
    from agent.pipeline.runtime import AssetRuntime


class _Arrivals(Protocol):
    @property
    def last_arrival(self) -> float: ...


class _ChannelsByAsset(Protocol):
    @property
    def by_asset(self) -> Sequence[Sequence[_Arrivals]]: ...


class PipelineView(Protocol):
    """What `TickGauges` reads of the pipeline (agent.pipeline.tick.Pipeline), without
    importing it (the pipeline imports this module)."""

    @property
    def cfg(self) -> Config: ...

    @property
    def runtimes(self) -> Sequence[AssetRuntime]: ...

    @property
    def buffers(self) -> _ChannelsByAsset: ...

__all__ = ["FAMILIES", "WORK_BUCKETS", "Family", "Kind", "Metrics",
           "PlainFamily", "PlainSeries", "TickGauges"]

# 50 µs to 5 s: one tick's features and a batch's inference run from well under a
# millisecond (a few assets) to seconds (a slow gateway with many waveform channels).
WORK_BUCKETS = (0.00005, 0.0001, 0.00025, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05,
                0.1, 0.25, 0.5, 1.0, 2.5, 5.0)


class PlainSeries:
    """One labelled series of a `PlainFamily`: a plain float, changed without a lock.

    For series one thread changes many times per tick (the pipeline's per-window counts
    and score): a prometheus_client child takes a lock and checks it is observable on
    every change, a measurable share of a tick at 200 assets. One writer thread only;
    a scrape reads the float as it is (a float store is atomic under the GIL).
    """

    __slots__ = ("created", "value")

    def __init__(self, created: float) -> None:
        self.value = 0.0
        self.created = created

    def inc(self, amount: float = 1.0) -> None:
        self.value += amount

    def set(self, value: float) -> None:
        self.value = float(value)

    def get(self) -> float:
        return self.value

    @property
    def _value(self) -> PlainSeries:
        # prometheus_client children hold their value in `_value`; tests read
        # `metric.labels(...)._value.get()` whichever kind of series it is.
        return self


class PlainFamily(Collector):
    """A counter or gauge family whose series are `PlainSeries`, exported at scrape time
    by this collector under the same name, type, HELP and labels a prometheus_client
    Counter or Gauge of that name would have (counters with their `_created` series).

    `labels(*values)` and `remove_by_labels(labels)` behave as prometheus_client's.
    """

    def __init__(self, kind: str, name: str, documentation: str, labelnames: Iterable[str],
                 registry: CollectorRegistry) -> None:
        if kind not in ("counter", "gauge"):
            raise ValueError(f"unsupported metric kind {kind!r}")
        self.kind = kind
        self.name = name
        self.documentation = documentation
        self.labelnames = tuple(labelnames)
        self._series: dict[tuple[str, ...], PlainSeries] = {}
        self._lock = threading.Lock()  # series made or removed vs. a scrape copying them
        registry.register(self)

    def labels(self, *values: str) -> PlainSeries:
        if len(values) != len(self.labelnames):
            raise ValueError(f"{self.name}: expected {len(self.labelnames)} label values")
        key = tuple(str(v) for v in values)
        got = self._series.get(key)
        if got is None:
            with self._lock:
                got = self._series.setdefault(key, PlainSeries(time.time()))
        return got

    def remove_by_labels(self, labels: Mapping[str, str]) -> None:
        """Remove every series whose labels include `labels`."""
        at = [(self.labelnames.index(k), v) for k, v in labels.items()]
        with self._lock:
            for key in [k for k in self._series if all(k[i] == v for i, v in at)]:
                del self._series[key]

    def _family(self) -> CounterMetricFamily | GaugeMetricFamily:
        if self.kind == "counter":
            return CounterMetricFamily(self.name, self.documentation, labels=self.labelnames)
        return GaugeMetricFamily(self.name, self.documentation, labels=self.labelnames)

    def describe(self) -> list[Metric]:
        return [self._family()]

    def collect(self) -> list[Metric]:
        with self._lock:
            series = list(self._series.items())
        fam = self._family()
        if isinstance(fam, CounterMetricFamily):
            # As prometheus_client does: `_created` unless turned off in the environment.
            created = os.environ.get("PROMETHEUS_DISABLE_CREATED_SERIES", "false").lower() \
                not in ("true", "1", "t")
            for key, s in series:
                fam.add_metric(key, s.value, s.created if created else None)
        else:
            for key, s in series:
                fam.add_metric(key, s.value)
        return [fam]


class Kind(enum.Enum):
    """How a family is built: a prometheus_client metric, or a `PlainFamily`."""

    COUNTER = "counter"
    GAUGE = "gauge"
    HISTOGRAM = "histogram"
    INFO = "info"
    PLAIN_COUNTER = "plain counter"  # changed once or more per window by the pipeline
    PLAIN_GAUGE = "plain gauge"


@dataclass(frozen=True)
class Family:
    """One metric family: the `Metrics` attribute that holds it, and what it exports."""

    attr: str
    kind: Kind
    name: str
    documentation: str
    labels: tuple[str, ...] = ()

    def build(self, registry: CollectorRegistry) -> Any:
        """The family, registered on `registry`."""
        k, r = self.kind, registry
        if k is Kind.PLAIN_COUNTER or k is Kind.PLAIN_GAUGE:
            plain = "counter" if k is Kind.PLAIN_COUNTER else "gauge"
            return PlainFamily(plain, self.name, self.documentation, self.labels, r)
        if k is Kind.HISTOGRAM:
            return Histogram(self.name, self.documentation, self.labels, buckets=WORK_BUCKETS,
                             registry=r)
        cls = {Kind.COUNTER: Counter, Kind.GAUGE: Gauge, Kind.INFO: Info}[k]
        return cls(self.name, self.documentation, self.labels, registry=r)


# Short names for the table below.
_C, _G, _H, _I = Kind.COUNTER, Kind.GAUGE, Kind.HISTOGRAM, Kind.INFO
_PC, _PG = Kind.PLAIN_COUNTER, Kind.PLAIN_GAUGE
_A, _AC = ("asset",), ("asset", "channel")

# Every family, in the order it is registered (the order /metrics lists them).
FAMILIES: tuple[Family, ...] = (
    Family("info", _I, "watchkeep", "watchkeep build version"),
    Family("model_info", _I, "watchkeep_model",
           "The model serving each asset: id and version", _A),
    Family("start_time", _G, "watchkeep_start_time_seconds", "Unix time the daemon started"),
    Family("ticks", _C, "watchkeep_pipeline_ticks_total", "Pipeline ticks run"),
    Family("messages_received", _C, "watchkeep_messages_received_total",
           "MQTT messages received from the local broker", _A),
    Family("messages_rejected", _C, "watchkeep_messages_rejected_total",
           "Messages rejected, by reason", ("reason",)),
    Family("callback_errors", _C, "watchkeep_callback_errors_total",
           "Exceptions caught in MQTT callbacks", ("loop",)),
    Family("samples", _C, "watchkeep_samples_total", "Samples accepted per channel", _AC),
    Family("late_samples", _C, "watchkeep_late_samples_total",
           "Samples older than the oldest open window", _A),
    Family("windows_closed", _PC, "watchkeep_windows_closed_total", "Windows closed", _A),
    Family("windows_scored", _PC, "watchkeep_windows_scored_total",
           "Windows scored by a model", _A),
    Family("windows_skipped", _C, "watchkeep_windows_skipped_total",
           "Windows not scored, by reason", ("asset", "reason")),
    Family("feature_seconds", _H, "watchkeep_feature_seconds",
           "Feature extraction time per tick"),
    Family("inference_seconds", _H, "watchkeep_inference_seconds",
           "Model inference time per batch"),
    Family("tick_seconds", _H, "watchkeep_pipeline_tick_seconds",
           "Duration of one pipeline tick"),
    Family("tick_lag", _G, "watchkeep_pipeline_tick_lag_seconds",
           "How late the last tick started"),
    Family("score", _PG, "watchkeep_anomaly_score",
           "Anomaly score of the last scored window", _A),
    Family("threshold", _G, "watchkeep_anomaly_threshold",
           "Raise threshold of the asset's model", _A),
    Family("anomalous", _G, "watchkeep_asset_anomalous",
           "Detector state: 1 while the asset's anomaly is raised, 0 when normal", _A),
    Family("model_loaded", _G, "watchkeep_model_loaded",
           "1 when the asset's model bundle is loaded", _A),
    Family("events", _C, "watchkeep_events_total", "Events emitted, by type", ("type",)),
    Family("connected", _G, "watchkeep_broker_connected", "1 while connected to the broker",
           ("broker",)),
    Family("reconnects", _C, "watchkeep_broker_reconnects_total",
           "Connections made after the first", ("broker",)),
    Family("ingest_worker_restarts", _C, "watchkeep_ingest_worker_restarts_total",
           "Ingest child processes started again after one exited unexpectedly"),
    Family("sample_age", _G, "watchkeep_sensor_last_sample_age_seconds",
           "Seconds since the channel's last sample", _AC),
    Family("outbox_rows", _G, "watchkeep_outbox_rows", "Messages waiting in the outbox"),
    Family("outbox_bytes", _G, "watchkeep_outbox_bytes", "Payload bytes waiting in the outbox"),
    Family("outbox_oldest_age", _G, "watchkeep_outbox_oldest_age_seconds",
           "Age of the oldest waiting message"),
    Family("outbox_capacity_rows", _G, "watchkeep_outbox_capacity_rows",
           "Configured maximum rows in the outbox"),
    Family("outbox_capacity_bytes", _G, "watchkeep_outbox_capacity_bytes",
           "Configured maximum payload bytes in the outbox"),
    Family("outbox_drops", _C, "watchkeep_outbox_dropped_total",
           "Messages dropped from a full outbox, by kind", ("kind",)),
    Family("outbox_drop_reasons", _C, "watchkeep_outbox_dropped_by_reason_total",
           "Messages dropped, by reason: outbox_full (max_rows/max_bytes of the file), "
           "memory_full (unwritable backlog past outbox.max_memory_bytes), shutdown "
           "(unwritable backlog at stop)", ("reason",)),
    Family("outbox_memory_rows", _G, "watchkeep_outbox_memory_rows",
           "Messages waiting in memory because the outbox file could not take them"),
    Family("outbox_errors", _C, "watchkeep_outbox_write_errors_total",
           "Outbox writes that failed (retried)", ("reason",)),
    Family("outbox_resets", _C, "watchkeep_outbox_corrupt_resets_total",
           "Corrupt outbox files moved aside"),
    Family("published", _C, "watchkeep_upstream_published_total",
           "Messages acknowledged by the upstream broker", ("kind",)),
    Family("upstream_endpoint", _G, "watchkeep_upstream_endpoint",
           "1 on the upstream endpoint (host:port from upstream_broker) in use while "
           "connected, 0 on the others", ("endpoint",)),
    Family("since_ack", _G, "watchkeep_upstream_seconds_since_last_ack",
           "Seconds since the upstream broker last acknowledged a message"),
    Family("reloads", _C, "watchkeep_config_reloads_total",
           "Config reloads, by result (success, failure)", ("result",)),
    Family("reload_ok", _G, "watchkeep_config_last_reload_successful",
           "1 if the last reload (or the start) applied the config, 0 if it was rejected"),
    Family("reload_time", _G, "watchkeep_config_last_reload_success_timestamp_seconds",
           "Unix time the running config was applied"),
    Family("gaps", _C, "watchkeep_sample_gaps_total",
           "Gaps seen in a channel: waveform blocks or sensor counters that do not follow on",
           _AC),
    # Machine know-how (issue 7): modes, sensor health, vibration severity, limits.
    Family("mode", _G, "watchkeep_asset_mode",
           "1 for the asset's current operating mode, 0 for the others", ("asset", "mode")),
    Family("sensor_fault", _G, "watchkeep_sensor_fault", "1 while the channel has a sensor fault",
           _AC),
    Family("velocity_rms", _PG, "watchkeep_vibration_velocity_rms_meters_per_second",
           "Velocity RMS (10 Hz - 1 kHz) of the channel's last window", _AC),
    Family("vibration_zone", _G, "watchkeep_vibration_zone",
           "ISO 10816-3 zone of the channel's velocity RMS: 1 A, 2 B, 3 C, 4 D", _AC),
    # One bad message must never stop detection (issue 20).
    Family("asset_errors", _C, "watchkeep_asset_errors_total",
           "Exceptions in one asset's work during a tick, contained to that asset, by stage "
           "(windows, health, features, inference, detector)", ("asset", "stage")),
    Family("asset_failing", _G, "watchkeep_asset_failing",
           "1 while the asset's last work in a tick failed (see watchkeep_asset_errors_total)",
           _A),
    Family("clock_steps", _C, "watchkeep_clock_steps_total",
           "Jumps ahead of a channel's time base accepted after they persisted "
           "(a sensor clock step, data resuming after a gap)", _AC),
    Family("coverage", _PG, "watchkeep_window_coverage_ratio",
           "Samples in the asset's last closed window over those its rates promise (lowest "
           "channel); 0 after windows closed empty", _A),
    Family("limit_level", _G, "watchkeep_limit_level",
           "Level of a feature's static limit: 0 normal, 1 alert (or zone/ALARM), 2 alarm",
           ("asset", "feature", "kind")),
)


class Metrics:
    """The daemon's metrics; build one per daemon with its own registry.

    One attribute per entry of `FAMILIES` (typed below), plus process_* (CPU, memory,
    open fds) and python_info on the same registry, not the global one.
    """

    info: Info
    model_info: Info
    start_time: Gauge
    ticks: Counter
    messages_received: Counter
    messages_rejected: Counter
    callback_errors: Counter
    samples: Counter
    late_samples: Counter
    windows_closed: PlainFamily
    windows_scored: PlainFamily
    windows_skipped: Counter
    feature_seconds: Histogram
    inference_seconds: Histogram
    tick_seconds: Histogram
    tick_lag: Gauge
    score: PlainFamily
    threshold: Gauge
    anomalous: Gauge
    model_loaded: Gauge
    events: Counter
    connected: Gauge
    reconnects: Counter
    ingest_worker_restarts: Counter
    sample_age: Gauge
    outbox_rows: Gauge
    outbox_bytes: Gauge
    outbox_oldest_age: Gauge
    outbox_capacity_rows: Gauge
    outbox_capacity_bytes: Gauge
    outbox_drops: Counter
    outbox_drop_reasons: Counter
    outbox_memory_rows: Gauge
    outbox_errors: Counter
    outbox_resets: Counter
    published: Counter
    upstream_endpoint: Gauge
    since_ack: Gauge
    reloads: Counter
    reload_ok: Gauge
    reload_time: Gauge
    gaps: Counter
    mode: Gauge
    sensor_fault: Gauge
    velocity_rms: PlainFamily
    vibration_zone: Gauge
    asset_errors: Counter
    asset_failing: Gauge
    clock_steps: Counter
    coverage: PlainFamily
    limit_level: Gauge

    def __init__(self, registry: CollectorRegistry) -> None:
        self.registry = registry
        ProcessCollector(registry=registry)
        PlatformCollector(registry=registry)
        for family in FAMILIES:
            setattr(self, family.attr, family.build(registry))
        for result in ("success", "failure"):
            self.reloads.labels(result)  # both series exist from the start, at 0
        self.reload_ok.set(1)


def _forget(metric: Any, **labels: str) -> None:
    """Remove every series of `metric` whose labels include `labels`."""
    metric.remove_by_labels(labels)


class TickGauges:
    """Gauges the pipeline loop refreshes every tick, and the series that follow the config.

    `refresh_ages(now)` (before each scrape) sets each configured channel's
    last-sample age (seconds since its last sample arrived, or since `started_s` when
    none has yet); `update(pipeline, now)` (after each tick), whenever the pipeline
    object changes (start, reload), republishes per-asset
    model info, detector state and outbox capacity (score and threshold are NaN
    until there is one) and removes the series of assets and channels the new
    config no longer has, so label sets stay bounded by the running config. Series
    of assets that stay are never removed: the pipeline and ingest hold their
    children, and a removed child would go on counting unseen.
    """

    def __init__(self, metrics: Metrics, started_s: float) -> None:
        self.metrics = metrics
        self.started_s = started_s
        metrics.start_time.set(started_s)
        metrics.reload_time.set(started_s)
        self._pipeline: PipelineView | None = None
        self._ages: list[tuple[Any, Any]] = []  # (ChannelBuffer, its age gauge child)

    def update(self, pipeline: PipelineView, now: float) -> None:
        """After a tick: follow a new pipeline (start, reload). The ages are set by
        `refresh_ages` before each scrape: setting one gauge per channel every tick
        was milliseconds of GIL per tick, and ticks come in quick succession when
        many windows close at once."""
        if pipeline is not self._pipeline:
            self._rebind(pipeline)
            self.refresh_ages(now)

    def refresh_ages(self, now: float) -> None:
        """Set each channel's last-sample age as of `now` (any thread)."""
        for buf, gauge in self._ages:
            last = buf.last_arrival or self.started_s
            gauge.set(max(0.0, now - last))

    def _rebind(self, pipeline: PipelineView) -> None:
        m = self.metrics
        old = self._pipeline
        now_assets = {rt.cfg.name: rt for rt in pipeline.runtimes}
        if old is not None:
            for rt in old.runtimes:
                name = rt.cfg.name
                if name not in now_assets:
                    self._forget_asset(name)
                    continue
                keep = {ch.name for ch in now_assets[name].cfg.channels}
                for ch in rt.cfg.channels:
                    if ch.name not in keep:
                        for metric in (m.samples, m.sample_age, m.gaps, m.clock_steps):
                            _forget(metric, asset=name, channel=ch.name)
        for rt in pipeline.runtimes:
            name = rt.cfg.name
            shown = rt.models.shown
            if shown is not None:
                meta = shown.meta
                m.model_info.labels(name).info({"model_id": meta.model_id,
                                                "version": str(meta.version),
                                                "mode": meta.mode})
            else:
                _forget(m.model_info, asset=name)
                m.threshold.labels(name).set(math.nan)
            if rt.last_score is None:  # a fresh runtime: no score until its first window
                m.score.labels(name).set(math.nan)
            m.model_loaded.labels(name).set(1 if shown is not None else 0)
            m.anomalous.labels(name).set(1 if rt.state.value == "anomalous" else 0)
        cfg = pipeline.cfg
        m.outbox_capacity_rows.set(cfg.outbox.max_rows)
        m.outbox_capacity_bytes.set(cfg.outbox.max_bytes)
        self._ages = [
            (buf, m.sample_age.labels(rt.cfg.name, ch.name))
            for rt, bufs in zip(pipeline.runtimes, pipeline.buffers.by_asset, strict=True)
            for buf, ch in zip(bufs, rt.cfg.channels, strict=True)]
        self._pipeline = pipeline

    def _forget_asset(self, name: str) -> None:
        m = self.metrics
        for metric in (m.messages_received, m.samples, m.late_samples, m.windows_closed,
                       m.windows_scored, m.windows_skipped, m.score, m.threshold, m.anomalous,
                       m.model_loaded, m.model_info, m.sample_age, m.gaps, m.asset_errors,
                       m.asset_failing, m.clock_steps, m.coverage):
            _forget(metric, asset=name)

