"""Every metric watchkeep exports, on an injected registry, and the HTTP endpoints.

Names follow the Prometheus naming rules (prometheus.io, "Metric and label
naming"): `watchkeep_` prefix, base units, `_total` counters, `_seconds`
histograms. Labels come only from bounded sets (asset, channel, reason, kind,
broker) — never ids, values or topics from the wire.
"""

from __future__ import annotations

import contextlib
import io
import json
import math
import os
import socket
import threading
import time
from collections.abc import Callable, Iterable, Mapping
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import TYPE_CHECKING, Any

from prometheus_client import (
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    Info,
    PlatformCollector,
    ProcessCollector,
)
from prometheus_client.exposition import CONTENT_TYPE_LATEST, generate_latest
from prometheus_client.metrics_core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.registry import Collector

if TYPE_CHECKING:
    from agent.pipeline.tick import Pipeline

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


class Metrics:
    """The daemon's metrics; build one per daemon with its own registry."""

    def __init__(self, registry: CollectorRegistry) -> None:
        self.registry = registry
        r = registry
        # process_* (CPU, memory, open fds) and python_info, on our registry, not the global one.
        ProcessCollector(registry=r)
        PlatformCollector(registry=r)
        self.info = Info("watchkeep", "watchkeep build version", registry=r)
        self.model_info = Info(
            "watchkeep_model", "The model serving each asset: id and version", ["asset"],
            registry=r)
        self.start_time = Gauge(
            "watchkeep_start_time_seconds", "Unix time the daemon started", registry=r)
        self.ticks = Counter(
            "watchkeep_pipeline_ticks_total", "Pipeline ticks run", registry=r)
        self.messages_received = Counter(
            "watchkeep_messages_received_total", "MQTT messages received from the local broker",
            ["asset"], registry=r)
        self.messages_rejected = Counter(
            "watchkeep_messages_rejected_total", "Messages rejected, by reason", ["reason"],
            registry=r)
        self.callback_errors = Counter(
            "watchkeep_callback_errors_total", "Exceptions caught in MQTT callbacks", ["loop"],
            registry=r)
        self.samples = Counter(
            "watchkeep_samples_total", "Samples accepted per channel", ["asset", "channel"],
            registry=r)
        self.late_samples = Counter(
            "watchkeep_late_samples_total", "Samples older than the oldest open window",
            ["asset"], registry=r)
        # Changed once or more per window by the pipeline: plain series (`PlainFamily`).
        self.windows_closed = PlainFamily(
            "counter", "watchkeep_windows_closed_total", "Windows closed", ["asset"], r)
        self.windows_scored = PlainFamily(
            "counter", "watchkeep_windows_scored_total", "Windows scored by a model", ["asset"],
            r)
        self.windows_skipped = Counter(
            "watchkeep_windows_skipped_total", "Windows not scored, by reason",
            ["asset", "reason"], registry=r)
        self.feature_seconds = Histogram(
            "watchkeep_feature_seconds", "Feature extraction time per tick",
            buckets=WORK_BUCKETS, registry=r)
        self.inference_seconds = Histogram(
            "watchkeep_inference_seconds", "Model inference time per batch",
            buckets=WORK_BUCKETS, registry=r)
        self.tick_seconds = Histogram(
            "watchkeep_pipeline_tick_seconds", "Duration of one pipeline tick",
            buckets=WORK_BUCKETS, registry=r)
        self.tick_lag = Gauge(
            "watchkeep_pipeline_tick_lag_seconds", "How late the last tick started", registry=r)
        self.score = PlainFamily(
            "gauge", "watchkeep_anomaly_score", "Anomaly score of the last scored window",
            ["asset"], r)
        self.threshold = Gauge(
            "watchkeep_anomaly_threshold", "Raise threshold of the asset's model", ["asset"],
            registry=r)
        self.anomalous = Gauge(
            "watchkeep_asset_anomalous",
            "Detector state: 1 while the asset's anomaly is raised, 0 when normal", ["asset"],
            registry=r)
        self.model_loaded = Gauge(
            "watchkeep_model_loaded", "1 when the asset's model bundle is loaded", ["asset"],
            registry=r)
        self.events = Counter(
            "watchkeep_events_total", "Events emitted, by type", ["type"], registry=r)
        self.connected = Gauge(
            "watchkeep_broker_connected", "1 while connected to the broker", ["broker"],
            registry=r)
        self.reconnects = Counter(
            "watchkeep_broker_reconnects_total", "Connections made after the first", ["broker"],
            registry=r)
        self.ingest_worker_restarts = Counter(
            "watchkeep_ingest_worker_restarts_total",
            "Ingest child processes started again after one exited unexpectedly", registry=r)
        self.sample_age = Gauge(
            "watchkeep_sensor_last_sample_age_seconds", "Seconds since the channel's last sample",
            ["asset", "channel"], registry=r)
        self.outbox_rows = Gauge(
            "watchkeep_outbox_rows", "Messages waiting in the outbox", registry=r)
        self.outbox_bytes = Gauge(
            "watchkeep_outbox_bytes", "Payload bytes waiting in the outbox", registry=r)
        self.outbox_oldest_age = Gauge(
            "watchkeep_outbox_oldest_age_seconds", "Age of the oldest waiting message",
            registry=r)
        self.outbox_capacity_rows = Gauge(
            "watchkeep_outbox_capacity_rows", "Configured maximum rows in the outbox",
            registry=r)
        self.outbox_capacity_bytes = Gauge(
            "watchkeep_outbox_capacity_bytes", "Configured maximum payload bytes in the outbox",
            registry=r)
        self.outbox_drops = Counter(
            "watchkeep_outbox_dropped_total", "Messages dropped from a full outbox, by kind",
            ["kind"], registry=r)
        self.outbox_drop_reasons = Counter(
            "watchkeep_outbox_dropped_by_reason_total",
            "Messages dropped, by reason: outbox_full (max_rows/max_bytes of the file), "
            "memory_full (unwritable backlog past outbox.max_memory_bytes), shutdown "
            "(unwritable backlog at stop)", ["reason"], registry=r)
        self.outbox_memory_rows = Gauge(
            "watchkeep_outbox_memory_rows",
            "Messages waiting in memory because the outbox file could not take them",
            registry=r)
        self.outbox_errors = Counter(
            "watchkeep_outbox_write_errors_total", "Outbox writes that failed (retried)",
            ["reason"], registry=r)
        self.outbox_resets = Counter(
            "watchkeep_outbox_corrupt_resets_total", "Corrupt outbox files moved aside",
            registry=r)
        self.published = Counter(
            "watchkeep_upstream_published_total", "Messages acknowledged by the upstream broker",
            ["kind"], registry=r)
        self.upstream_endpoint = Gauge(
            "watchkeep_upstream_endpoint",
            "1 on the upstream endpoint (host:port from upstream_broker) in use while "
            "connected, 0 on the others", ["endpoint"], registry=r)
        self.since_ack = Gauge(
            "watchkeep_upstream_seconds_since_last_ack",
            "Seconds since the upstream broker last acknowledged a message", registry=r)
        self.reloads = Counter(
            "watchkeep_config_reloads_total", "Config reloads, by result (success, failure)",
            ["result"], registry=r)
        for result in ("success", "failure"):
            self.reloads.labels(result)  # both series exist from the start, at 0
        self.reload_ok = Gauge(
            "watchkeep_config_last_reload_successful",
            "1 if the last reload (or the start) applied the config, 0 if it was rejected",
            registry=r)
        self.reload_ok.set(1)
        self.reload_time = Gauge(
            "watchkeep_config_last_reload_success_timestamp_seconds",
            "Unix time the running config was applied", registry=r)
        self.gaps = Counter(
            "watchkeep_sample_gaps_total",
            "Gaps seen in a channel: waveform blocks or sensor counters that do not follow on",
            ["asset", "channel"], registry=r)
        # Machine know-how (issue 7): modes, sensor health, vibration severity, limits.
        self.mode = Gauge(
            "watchkeep_asset_mode", "1 for the asset's current operating mode, 0 for the others",
            ["asset", "mode"], registry=r)
        self.sensor_fault = Gauge(
            "watchkeep_sensor_fault", "1 while the channel has a sensor fault",
            ["asset", "channel"], registry=r)
        self.velocity_rms = Gauge(
            "watchkeep_vibration_velocity_rms_meters_per_second",
            "Velocity RMS (10 Hz - 1 kHz) of the channel's last window", ["asset", "channel"],
            registry=r)
        self.vibration_zone = Gauge(
            "watchkeep_vibration_zone",
            "ISO 10816-3 zone of the channel's velocity RMS: 1 A, 2 B, 3 C, 4 D",
            ["asset", "channel"], registry=r)
        # One bad message must never stop detection (issue 20).
        self.asset_errors = Counter(
            "watchkeep_asset_errors_total",
            "Exceptions in one asset's work during a tick, contained to that asset, by stage "
            "(windows, health, features, inference, detector)", ["asset", "stage"], registry=r)
        self.asset_failing = Gauge(
            "watchkeep_asset_failing",
            "1 while the asset's last work in a tick failed (see watchkeep_asset_errors_total)",
            ["asset"], registry=r)
        self.clock_steps = Counter(
            "watchkeep_clock_steps_total",
            "Jumps ahead of a channel's time base accepted after they persisted "
            "(a sensor clock step, data resuming after a gap)", ["asset", "channel"],
            registry=r)
        self.coverage = PlainFamily(
            "gauge", "watchkeep_window_coverage_ratio",
            "Samples in the asset's last closed window over those its rates promise (lowest "
            "channel); 0 after windows closed empty", ["asset"], r)
        self.limit_level = Gauge(
            "watchkeep_limit_level",
            "Level of a feature's static limit: 0 normal, 1 alert (or zone/ALARM), 2 alarm",
            ["asset", "feature", "kind"], registry=r)



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
        self._pipeline: Pipeline | None = None
        self._ages: list[tuple[Any, Any]] = []  # (ChannelBuffer, its age gauge child)

    def update(self, pipeline: Pipeline, now: float) -> None:
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

    def _rebind(self, pipeline: Pipeline) -> None:
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
            if rt.bundle is not None:
                meta = rt.bundle.meta
                m.model_info.labels(name).info({"model_id": meta.model_id,
                                                "version": str(meta.version),
                                                "mode": meta.mode})
            else:
                _forget(m.model_info, asset=name)
                m.threshold.labels(name).set(math.nan)
            if rt.last_score is None:  # a fresh runtime: no score until its first window
                m.score.labels(name).set(math.nan)
            m.model_loaded.labels(name).set(1 if rt.bundle is not None else 0)
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


class _BoundedServer(ThreadingHTTPServer):
    """At most `limit` connections served at once, one thread each; a connection past
    the limit gets a 503 at once and is closed (its file descriptor is released), so idle
    clients can never hold more than `limit` descriptors and threads."""

    daemon_threads = True
    request_queue_size = LISTEN_BACKLOG

    def __init__(self, addr: tuple[str, int], handler: Any, limit: int,
                 timeout_s: float) -> None:
        self.limit = limit
        self.timeout_s = timeout_s
        self.slots = threading.BoundedSemaphore(limit)
        self.refused = 0
        super().__init__(addr, handler)

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
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def setup(self) -> None:
                super().setup()
                # rfile is replaced by one that keeps the head's deadline; the file
                # makefile() made is closed first (an open one keeps the socket's
                # descriptor alive after close()).
                sock = self.connection
                self.rfile.close()
                self.rfile = io.BufferedReader(
                    _DeadlineReader(sock, time.monotonic() + request_timeout_s))

            def handle(self) -> None:
                try:
                    super().handle()
                except (OSError, ValueError):  # timed out, too large, or gone
                    self.close_connection = True

            def do_GET(self) -> None:
                # The head is in: the response is written with a plain timeout.
                self.connection.settimeout(request_timeout_s)
                path = self.path.split("?", 1)[0]
                try:
                    if path == "/metrics":
                        if before_scrape is not None:
                            before_scrape()  # e.g. counts kept outside the registry
                        self._send(200, generate_latest(outer.registry), CONTENT_TYPE_LATEST)
                    elif path in ("/healthz", "/readyz"):
                        ok, why = (healthy if path == "/healthz" else ready)()
                        self._send(200 if ok else 503, (why + "\n").encode(), "text/plain")
                    elif path == "/status":
                        body = json.dumps(status(), indent=2).encode()
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

        self.registry = registry
        self._server = _BoundedServer((host, port), Handler, max_connections,
                                      request_timeout_s)
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
