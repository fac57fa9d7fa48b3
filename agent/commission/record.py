"""`watchkeep record`: capture an asset's feature windows (and raw messages) from live topics.

It runs the daemon's own ingest, window assembly and features (one code path, not a
copy) against the local broker, and writes what closes to a dataset (`dataset.py`).
Nothing is published upstream. With `--raw` every message on the asset's topics is
also written to a capture file (JSON lines) for `replay`.
"""

from __future__ import annotations

import argparse
import dataclasses
import logging
import math
import os
import sys
import threading
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any, TextIO

import numpy as np
from prometheus_client import CollectorRegistry

from agent.commission.capture import CaptureWriter
from agent.commission.dataset import DatasetWriter
from agent.config.load import Config, load_config
from agent.core.events import rfc3339
from agent.core.windows.closed import ClosedWindow
from agent.errors import ConfigError, ConfigProblem, DatasetError
from agent.ingest.buffers import Buffers, Ingest, IngestHandler
from agent.ops.logs import setup_logging
from agent.ops.metrics import Metrics
from agent.pipeline.builder import HandlerFactory, build_pipeline, load_runtimes
from agent.pipeline.messages import OutMessage

RAW_NAME = "raw.jsonl"


class _NullSink:
    def submit(self, msgs: Sequence[OutMessage],
               sequences: Mapping[str, int] | None = None) -> None:
        return


class _RawTap(IngestHandler[Buffers]):
    """The daemon's ingest handler, also copying each message to a capture file."""

    def __init__(self, *args: Any, capture: CaptureWriter, **kw: Any) -> None:
        super().__init__(*args, **kw)
        self.capture = capture
        self.not_text = 0
        self._lock = threading.Lock()

    def handle(self, topic: str, payload: bytes, arrival: float) -> None:
        if topic in self.routes:
            with self._lock:
                try:
                    self.capture.append(arrival, topic, payload)
                except DatasetError:
                    self.not_text += 1  # the capture format holds UTF-8 text only
        super().handle(topic, payload, arrival)


class Recorder:
    """Collects one asset's complete windows into a DatasetWriter."""

    def __init__(self, cfg: Config, asset: str, out: Path, *, mode: str | None = None,
                 raw: bool = False, logger: logging.Logger | None = None,
                 clock: Callable[[], float] = time.time) -> None:
        try:
            a = cfg.asset(asset)
        except KeyError:
            raise ConfigError([ConfigProblem("--asset", "an asset of the config "
                                             f"({', '.join(x.name for x in cfg.assets)})",
                                             repr(asset))]) from None
        # Its own client id: a recorder beside the running daemon must not kick the
        # daemon's session off the broker (same id = endless take-over, PITFALLS.md).
        local = dataclasses.replace(
            cfg.local_broker, client_id=f"{cfg.local_broker.client_id}-record-{os.getpid()}")
        self.cfg = dataclasses.replace(cfg, assets=(a,), local_broker=local,
                                       http=dataclasses.replace(cfg.http, enabled=False))
        self.asset = a
        self.mode = mode
        self.out = out
        self.log = logger or logging.getLogger("watchkeep.record")
        self.clock = clock
        w = a.window
        self.writer = DatasetWriter(
            out, asset=a.name,
            window={"length_s": w.length_s, "hop_s": w.hop_s, "lateness_s": w.lateness_s,
                    "timeout_s": w.timeout_s, "min_coverage": w.min_coverage},
            units={ch.name: ch.unit for ch in a.channels},
            extra={"channels": {ch.name: {"topic": ch.topic, "decoder": ch.decoder.value,
                                          "rate_hz": ch.rate_hz} for ch in a.channels}})
        self.metrics = Metrics(CollectorRegistry())
        self.capture: CaptureWriter | None = None
        make_handler: HandlerFactory = IngestHandler
        if raw:
            out.parent.mkdir(parents=True, exist_ok=True)
            self.raw_path = out.parent / f"{out.name}.{RAW_NAME}"
            capture = self.capture = CaptureWriter(self.raw_path, append=False)

            def make_handler(cfg: Config, buffers: Buffers, metrics: Metrics,
                             log: logging.Logger) -> IngestHandler[Buffers]:
                return _RawTap(cfg, buffers, metrics, log, capture=capture)
        # No model: record never scores (its bundles may not exist yet).
        running = build_pipeline(self.cfg, load_runtimes(self.cfg, self.log, models=False),
                                 _NullSink(), self.metrics, self.log, observer=self._observe,
                                 handler=make_handler)
        self.buffers = running.buffers
        self.handler: IngestHandler[Buffers] = running.handler
        self.pipeline = running.pipeline
        self.coverage: list[float] = []
        self.skipped_mode = 0
        self.offline_messages = 0
        self.last_offline_t = 0.0

    def _observe(self, asset: str, mode: str, w: ClosedWindow, row: np.ndarray,
                 names: tuple[str, ...]) -> None:
        if self.mode is not None and mode != self.mode:
            self.skipped_mode += 1
            return
        self.writer.add(row, names, w.start, w.end, mode)
        self.coverage.append(min(w.coverage))

    def run(self, duration_s: float, progress: TextIO | None = None) -> Path:
        """Record for `duration_s` of wall time, then write the dataset."""
        ingest = Ingest(self.cfg, self.handler, self.metrics, self.log, clock=self.clock)
        ingest.start()
        t_end = time.monotonic() + duration_s
        last_print = 0.0
        try:
            while True:
                now_m = time.monotonic()
                self.pipeline.tick(self.clock())
                self.handler.flush_counts()
                if progress is not None and now_m - last_print >= 1.0:
                    last_print = now_m
                    self._progress(progress, max(0.0, t_end - now_m), ingest)
                if now_m >= t_end:
                    break
                time.sleep(min(self.cfg.tick_s, max(0.0, t_end - now_m)))
        finally:
            ingest.stop()
            if self.capture is not None:
                self.capture.close()
        self._finish(self.clock())
        if progress is not None:
            self._progress(progress, 0.0, ingest, final=True)
        return self.writer.close()

    def _finish(self, now: float) -> None:
        """Windows whose data has all arrived close once the timeout passes; the end of
        the recording is not every sensor going stale."""
        w = self.asset.window
        self.pipeline.judge_stale = False
        self.pipeline.tick(now + w.timeout_s + w.length_s + self.cfg.tick_s)
        self.handler.flush_counts()

    def run_offline(self, messages: Iterable[tuple[float, str, bytes]], *,
                    duration_s: float | None = None, progress: TextIO | None = None,
                    fraction: Callable[[], float] | None = None,
                    source: str = "") -> Path:
        """Record from messages already captured (a capture file, a CSV export), at file
        speed, then write the dataset.

        Each `(t, topic, payload)` reaches the daemon's ingest handler with `t` as its
        arrival time, so the simulated clock is the data's own: `text` channels are
        stamped from it and `ingest.max_clock_skew_s` is judged against it, not the wall
        clock. The pipeline ticks on the `tick_s` grid of that clock, once per grid
        point that a message passes (windows close on the same samples as on every grid
        point: nothing arrives between messages). `duration_s` keeps the first that
        many seconds of data; `fraction()` says how far through the source the reader
        is, for the progress line.
        """
        tick = self.cfg.tick_s
        t_first: float | None = None
        next_tick: float | None = None
        now = 0.0
        last_print = time.monotonic()
        self.offline_messages = 0
        pipeline, handler = self.pipeline, self.handler
        try:
            for t, topic, payload in messages:
                if t_first is None:
                    t_first = next_tick = t
                if duration_s is not None and t >= t_first + duration_s:
                    break
                assert next_tick is not None
                if t >= next_tick:
                    g = next_tick + math.floor((t - next_tick) / tick) * tick
                    pipeline.tick(g)
                    handler.flush_counts()
                    next_tick = g + tick
                handler.handle(topic, payload, t)
                now = self.last_offline_t = t
                self.offline_messages += 1
                if progress is not None and not self.offline_messages % 2048:
                    m = time.monotonic()
                    if m - last_print >= 0.5:
                        last_print = m
                        self._offline_progress(progress, now, fraction, source)
        finally:
            if self.capture is not None:
                self.capture.close()
        if t_first is None:
            raise DatasetError(f"dataset {self.out}: the source {source or ''} holds no "
                               f"message for asset {self.asset.name}'s channels")
        self._finish(now)
        if progress is not None:
            self._offline_progress(progress, now, fraction, source, final=True)
        return self.writer.close()

    def _counts(self) -> tuple[int, str, float]:
        n = self.writer.n_windows
        cov = f"{100 * float(np.mean(self.coverage[-20:])):.0f}%" if self.coverage else "-"
        skipped = self.metrics.registry.get_sample_value(
            "watchkeep_windows_skipped_total", {"asset": self.asset.name,
                                                "reason": "incomplete"}) or 0
        return n, cov, skipped

    def _offline_progress(self, f: TextIO, now: float, fraction: Callable[[], float] | None,
                          source: str, final: bool = False) -> None:
        n, cov, skipped = self._counts()
        done = "done" if final else (f"{100 * fraction():3.0f}%" if fraction is not None
                                     else "reading")
        end = "\n" if final else "\r"
        f.write(f"record {self.asset.name}: {n} windows, coverage {cov}, "
                f"{skipped:.0f} incomplete, data at {rfc3339(now)} "
                f"({self.offline_messages} messages, {done})   {end}")
        f.flush()

    def _progress(self, f: TextIO, left_s: float, ingest: Ingest, final: bool = False) -> None:
        n, cov, skipped = self._counts()
        if final:  # the link state is gone by now (ingest has stopped): say what happened
            got = sum(b.n_messages for b in self.buffers.by_asset[0])
            link = "done" if got else "done, nothing received"
        else:
            link = "connected" if ingest.connected.is_set() else "waiting for broker"
        end = "\n" if final else "\r"
        f.write(f"record {self.asset.name}: {n} windows, coverage {cov}, "
                f"{skipped:.0f} incomplete, {left_s:5.0f} s left ({link})   {end}")
        f.flush()


def add_record_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", "-c", required=True,
                   help="the daemon config (its model bundles need not exist yet)")
    p.add_argument("--asset", required=True)
    p.add_argument("--mode", help="keep only windows in this operating mode")
    p.add_argument("--duration", type=float,
                   help="seconds to record (live: required; from a file: the first that "
                        "many seconds of data, default all)")
    p.add_argument("--out", required=True, help="the dataset directory to write")
    p.add_argument("--raw", action="store_true",
                   help=f"also write the raw messages to <out>.{RAW_NAME} for replay")
    src = p.add_mutually_exclusive_group()
    src.add_argument("--from-capture", metavar="FILE",
                     help="record offline from a raw capture (record --raw, watchkeep-sim "
                          "--out) instead of live topics")
    src.add_argument("--from-csv", metavar="FILE",
                     help="record offline from a CSV/historian export: a time column and "
                          "one column per channel")
    p.add_argument("--time-column", help="CSV: the time column's header (default: the first)")
    p.add_argument("--column", action="append", metavar="CHANNEL=HEADER",
                   help="CSV: the column of a channel (default: its `column:` in the "
                        "config, else its name); repeat per channel")
    p.add_argument("--delimiter", choices=(",", ";", "tab"),
                   help="CSV: the delimiter (default: found from the header line)")
    p.add_argument("--time-format", choices=("auto", "iso", "unix", "unix_ms"), default="auto",
                   help="CSV: ISO 8601 date-times (no zone: UTC), unix seconds or unix "
                        "milliseconds (default: auto, ISO or seconds from the first row)")


def _tail_time(path: Path) -> float | None:
    """The time of a capture file's last line (for the progress line), or None."""
    import json

    try:
        with open(path, "rb") as f:
            f.seek(0, os.SEEK_END)
            size = f.tell()
            f.seek(max(0, size - 65536))
            lines = [x for x in f.read().splitlines() if x.strip()]
        t = json.loads(lines[-1])["t"] if lines else None
        return float(t) if isinstance(t, int | float) else None
    except (OSError, ValueError, KeyError, TypeError):
        return None


def cmd_record(args: argparse.Namespace) -> int:
    from agent.commission.tabular import CsvReader, parse_column_map

    cfg = load_config(args.config, require_bundles=False)
    offline = args.from_capture or args.from_csv
    if args.duration is None and not offline:
        raise ConfigError([ConfigProblem("--duration", "seconds to record from live topics "
                                         "(or --from-capture / --from-csv FILE)", "nothing")])
    if args.duration is not None and args.duration <= 0:
        raise ConfigError([ConfigProblem("--duration", "a number of seconds > 0",
                                         str(args.duration))])
    csv_opts = [o for o in ("time_column", "column", "delimiter") if getattr(args, o)]
    if csv_opts and not args.from_csv:
        raise ConfigError([ConfigProblem("--" + csv_opts[0].replace("_", "-"),
                                         "--from-csv FILE (it describes a CSV export)",
                                         "no --from-csv")])
    rec = Recorder(cfg, args.asset, Path(args.out), mode=args.mode, raw=args.raw,
                   logger=setup_logging("WARNING"))
    if args.from_csv:
        try:
            cmap = parse_column_map(args.column)
        except ValueError as exc:
            raise ConfigError([ConfigProblem("--column", "CHANNEL=HEADER", str(exc))]) from None
        reader = CsvReader(rec.asset, args.from_csv, time_column=args.time_column,
                           column_map=cmap,
                           delimiter="\t" if args.delimiter == "tab" else args.delimiter,
                           time_format=args.time_format)
        path = rec.run_offline(reader.messages(), duration_s=args.duration,
                               progress=sys.stderr, fraction=reader.fraction,
                               source=args.from_csv)
        skipped = ", ".join(f"{n} {why}" for why, n in sorted(reader.skipped.items()))
        print(f"csv read: {reader.rows} rows, {reader.samples} samples"
              + (f" (cells skipped: {skipped})" if skipped else ""))
    elif args.from_capture:
        from agent.commission.capture import read_capture

        t_end = _tail_time(Path(args.from_capture))
        first: list[float] = []

        def mine() -> Iterable[tuple[float, str, bytes]]:
            topics = {ch.topic for ch in rec.asset.channels}
            for msg in read_capture(args.from_capture):
                if not first:
                    first.append(msg[0])
                if msg[1] in topics:
                    yield msg

        def fraction() -> float:
            if t_end is None or not first or t_end <= first[0]:
                return 0.0
            return min(1.0, max(0.0, (rec.last_offline_t - first[0]) / (t_end - first[0])))

        path = rec.run_offline(mine(), duration_s=args.duration, progress=sys.stderr,
                               fraction=fraction, source=args.from_capture)
    else:
        path = rec.run(args.duration, progress=sys.stderr)
    print(f"dataset written: {path} ({rec.writer.n_windows} windows)")
    if rec.capture is not None:
        print(f"raw capture written: {rec.raw_path} ({rec.capture.count} messages)")
    return 0
