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
import os
import sys
import threading
import time
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any, TextIO

import numpy as np
from prometheus_client import CollectorRegistry

from agent.capture import CaptureWriter
from agent.commission.dataset import DatasetWriter
from agent.config import Config, load_config
from agent.core.windows import ClosedWindow
from agent.errors import ConfigError, ConfigProblem, DatasetError
from agent.ingest import Buffers, Ingest, IngestHandler
from agent.logs import setup_logging
from agent.messages import OutMessage
from agent.metrics import Metrics
from agent.pipeline import Pipeline
from agent.runtime import AssetRuntime

RAW_NAME = "raw.jsonl"


class _NullSink:
    def submit(self, msgs: Sequence[OutMessage],
               sequences: Mapping[str, int] | None = None) -> None:
        return


class _RawTap(IngestHandler):
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
        self.buffers = Buffers(self.cfg)
        self.capture: CaptureWriter | None = None
        if raw:
            out.parent.mkdir(parents=True, exist_ok=True)
            self.raw_path = out.parent / f"{out.name}.{RAW_NAME}"
            self.capture = CaptureWriter(self.raw_path, append=False)
            self.handler: IngestHandler = _RawTap(self.cfg, self.buffers, self.metrics,
                                                  self.log, capture=self.capture)
        else:
            self.handler = IngestHandler(self.cfg, self.buffers, self.metrics, self.log)
        runtime = AssetRuntime.build(a, None, None)
        self.pipeline = Pipeline(self.cfg, self.buffers, _NullSink(), self.metrics, self.log,
                                 [runtime], observer=self._observe)
        self.coverage: list[float] = []
        self.skipped_mode = 0

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
        # Windows whose data has all arrived close once the timeout passes.
        w = self.asset.window
        self.pipeline.tick(self.clock() + w.timeout_s + w.length_s)
        self.handler.flush_counts()
        if progress is not None:
            self._progress(progress, 0.0, ingest, final=True)
        return self.writer.close()

    def _progress(self, f: TextIO, left_s: float, ingest: Ingest, final: bool = False) -> None:
        n = self.writer.n_windows
        cov = f"{100 * float(np.mean(self.coverage[-20:])):.0f}%" if self.coverage else "-"
        skipped = self.metrics.registry.get_sample_value(
            "watchkeep_windows_skipped_total", {"asset": self.asset.name,
                                                "reason": "incomplete"}) or 0
        link = "connected" if ingest.connected.is_set() else "waiting for broker"
        end = "\n" if final else "\r"
        f.write(f"record {self.asset.name}: {n} windows, coverage {cov}, "
                f"{skipped:.0f} incomplete, {left_s:5.0f} s left ({link})   {end}")
        f.flush()


def add_record_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", "-c", required=True)
    p.add_argument("--asset", required=True)
    p.add_argument("--mode", help="keep only windows in this operating mode")
    p.add_argument("--duration", type=float, required=True, help="seconds to record")
    p.add_argument("--out", required=True, help="the dataset directory to write")
    p.add_argument("--raw", action="store_true",
                   help=f"also write the raw messages to <out>.{RAW_NAME} for replay")


def cmd_record(args: argparse.Namespace) -> int:
    cfg = load_config(args.config)
    if args.duration <= 0:
        raise ConfigError([ConfigProblem("--duration", "a number of seconds > 0",
                                         str(args.duration))])
    rec = Recorder(cfg, args.asset, Path(args.out), mode=args.mode, raw=args.raw,
                   logger=setup_logging("WARNING"))
    path = rec.run(args.duration, progress=sys.stderr)
    print(f"dataset written: {path} ({rec.writer.n_windows} windows)")
    if rec.capture is not None:
        print(f"raw capture written: {rec.raw_path} ({rec.capture.count} messages)")
    return 0
