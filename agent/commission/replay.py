"""`watchkeep replay`: a raw capture through the exact daemon pipeline, on a simulated clock.

The capture's `t` is each message's arrival time; the replay hands every message to
the daemon's own `IngestHandler` at that time and ticks the daemon's own `Pipeline`
every `tick_s` of simulated time, so the windows, features, scores and events are
the ones the daemon would have produced. Deterministic: the same capture and config
give the same events (ids included). `--speed N` paces the replay at N times real
time; the default runs as fast as possible.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

from prometheus_client import CollectorRegistry

from agent.config.load import Config, load_config
from agent.ingest.buffers import IngestHandler
from agent.ops.metrics import Metrics
from agent.pipeline.builder import build_pipeline, load_runtimes
from agent.pipeline.messages import Kind, OutMessage
from agent.pipeline.tick import Pipeline, WindowObserver


@dataclass
class CollectingSink:
    """Keeps what the pipeline submits, in order."""

    messages: list[OutMessage] = field(default_factory=list)
    on_event: Callable[[dict[str, Any]], None] | None = None
    on_messages: Callable[[Sequence[OutMessage]], None] | None = None

    def submit(self, msgs: Sequence[OutMessage],
               sequences: Mapping[str, int] | None = None) -> None:
        self.messages.extend(msgs)
        if self.on_messages is not None:
            self.on_messages(msgs)
        if self.on_event is not None:
            for m in msgs:
                if m.kind in (Kind.ANOMALY, Kind.EVENT):
                    self.on_event(json.loads(m.payload))

    def events(self) -> list[dict[str, Any]]:
        return [json.loads(m.payload) for m in self.messages
                if m.kind in (Kind.ANOMALY, Kind.EVENT)]


@dataclass
class Replayer:
    """The daemon's ingest handler and pipeline, driven by a simulated clock."""

    cfg: Config
    metrics: Metrics
    handler: IngestHandler
    pipeline: Pipeline
    sink: CollectingSink
    now: float | None = None
    _next_tick: float | None = None
    after_tick: Callable[[], None] | None = None

    @classmethod
    def build(cls, cfg: Config, logger: logging.Logger | None = None, *,
              observer: WindowObserver | None = None,
              sink: CollectingSink | None = None) -> Replayer:
        log = logger or logging.getLogger("watchkeep.replay")
        metrics = Metrics(CollectorRegistry())
        sink = sink or CollectingSink()
        running = build_pipeline(cfg, load_runtimes(cfg, log), sink, metrics, log,
                                 observer=observer)
        return cls(cfg, metrics, running.handler, running.pipeline, sink)

    def advance(self, t: float) -> None:
        """Run every tick due up to simulated time `t`."""
        if self._next_tick is None:
            self._next_tick = t
        while self._next_tick <= t:
            self.pipeline.tick(self._next_tick)
            self.handler.flush_counts()
            if self.after_tick is not None:
                self.after_tick()
            self._next_tick += self.cfg.tick_s
        self.now = t

    def feed(self, t: float, topic: str, payload: bytes) -> None:
        self.advance(t)
        self.handler.handle(topic, payload, t)

    def finish(self) -> None:
        """Let every open window close, as it would once data stops. The end of the
        capture is not every sensor going silent: staleness is not judged past it (a
        replay would otherwise end with a stale `sensor.fault` per channel)."""
        if self.now is None:
            return
        wait = max(a.window.timeout_s + a.window.length_s for a in self.cfg.assets)
        self.pipeline.judge_stale = False
        self.advance(self.now + wait + 2 * self.cfg.tick_s)


class ScoresWriter:
    """`replay --scores FILE`: one JSON line per window the pipeline judged, in order.

    Each line holds the window (`asset`, `mode`, `window_start`, `window_end` as RFC 3339
    and `t_start`/`t_end` as unix seconds), what the daemon made of it (`score`,
    `threshold`, `state` and whatever else its state message carries; null where the
    window was not scored, e.g. no model for the mode) and its feature row
    (`features`: name -> value, the row `record` would store). Windows skipped before
    features (incomplete, a sensor fault, settling, unknown mode) have no line.
    """

    _DROP = ("asset", "mode", "window_end")

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self._f = self.path.open("w", encoding="utf-8", newline="\n")
        self._pending: dict[tuple[str, str], dict[str, Any]] = {}
        self.lines = 0

    def observe(self, asset: str, mode: str, w: Any, row: Any, names: tuple[str, ...]) -> None:
        from agent.core.events import rfc3339

        end = rfc3339(w.end)
        self._pending[(asset, end)] = {
            "asset": asset, "mode": mode, "window_start": rfc3339(w.start),
            "window_end": end, "t_start": w.start, "t_end": w.end,
            "score": None, "threshold": None, "state": None,
            "features": {n: float(v) for n, v in zip(names, row, strict=True)}}

    def on_messages(self, msgs: Sequence[OutMessage]) -> None:
        for m in msgs:
            if m.kind is not Kind.STATE:
                continue
            doc = json.loads(m.payload)
            line = self._pending.get((doc.get("asset"), doc.get("window_end")))
            if line is not None:
                line.update({k: v for k, v in doc.items() if k not in self._DROP})

    def flush(self) -> None:
        """Write the windows of the tick just run (their state messages are in)."""
        for line in self._pending.values():
            feats = line.pop("features")
            line["features"] = feats  # last: the long part of the line
            self._f.write(json.dumps(line, separators=(",", ":")) + "\n")
            self.lines += 1
        self._pending.clear()

    def close(self) -> None:
        self.flush()
        self._f.close()


def replay(cfg: Config, messages: Iterable[tuple[float, str, bytes]], *,
           speed: float | None = None, logger: logging.Logger | None = None,
           on_event: Callable[[dict[str, Any]], None] | None = None,
           scores: ScoresWriter | None = None) -> Replayer:
    """Replay messages (t, topic, payload) and return the replayer with what it produced.

    With `scores`, every judged window's score, state and feature row is written too.
    """
    sink = CollectingSink(on_event=on_event,
                          on_messages=scores.on_messages if scores is not None else None)
    r = Replayer.build(cfg, logger, sink=sink,
                       observer=scores.observe if scores is not None else None)
    if scores is not None:
        r.after_tick = scores.flush
    wall0 = time.monotonic()
    t_first: float | None = None
    for t, topic, payload in messages:
        if speed is not None:
            t_first = t if t_first is None else t_first
            delay = (t - t_first) / speed - (time.monotonic() - wall0)
            if delay > 0:
                time.sleep(delay)
        r.feed(t, topic, payload)
    r.finish()
    if scores is not None:
        scores.close()
    return r


def add_replay_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", "-c", required=True, help="the daemon config to replay with")
    p.add_argument("capture", help="a raw capture (JSON lines: t, topic, payload)")
    pace = p.add_mutually_exclusive_group()
    pace.add_argument("--speed", type=float, help="pace at N times real time")
    pace.add_argument("--as-fast-as-possible", action="store_true", help="the default")
    p.add_argument("--out", help="write the events as JSON lines to this file")
    p.add_argument("--scores", metavar="FILE",
                   help="write every judged window's score, state and feature row as JSON "
                        "lines to this file (to plot what the daemon saw)")


def cmd_replay(args: argparse.Namespace, *, out: TextIO | None = None) -> int:
    from agent.commission.capture import read_capture

    out = out or sys.stdout
    cfg = load_config(args.config)
    if args.speed is not None and args.speed <= 0:
        raise SystemExit("watchkeep replay: --speed must be > 0")
    lines: list[str] = []

    def show(ev: dict[str, Any]) -> None:
        line = json.dumps(ev, sort_keys=True)
        lines.append(line)
        if not args.out:
            print(line, file=out, flush=True)

    scores = ScoresWriter(args.scores) if getattr(args, "scores", None) else None
    try:
        r = replay(cfg, read_capture(args.capture), speed=args.speed, on_event=show,
                   scores=scores)
    finally:
        if scores is not None and not scores._f.closed:
            scores._f.close()
    if args.out:
        p = Path(args.out)
        tmp = p.with_name(f".{p.name}.tmp")
        tmp.write_text("".join(x + "\n" for x in lines), encoding="utf-8")
        tmp.replace(p)
    reg = r.metrics.registry
    scored = sum(reg.get_sample_value("watchkeep_windows_scored_total", {"asset": a.name})
                 or 0 for a in cfg.assets)
    closed = sum(reg.get_sample_value("watchkeep_windows_closed_total", {"asset": a.name})
                 or 0 for a in cfg.assets)
    print(f"replay: {closed:.0f} windows closed, {scored:.0f} scored, {len(lines)} events"
          + (f", {scores.lines} window lines in {args.scores}" if scores is not None else ""),
          file=sys.stderr)
    return 0
