"""Ingest in a child process: the local broker's MQTT client and the decoders run apart
from the pipeline, and hand samples over in batches.

Why: paho and the payload decoders cost about 30 us of Python per message. In one
process they hold the interpreter lock for most of a burst (a 5 Hz plant of 200
assets x 8 channels sends 1,600 messages at every sample instant), and the pipeline
and upstream threads, whose every SQLite, socket or onnxruntime call gives the lock
up and must win it back, wait behind them: window results came out 150-300 ms after
the window closed. With ingest in its own process the two sides run on two cores and
the daemon's interpreter only applies ready-made samples (about 1 us each).

The child runs the very same `Ingest` and `IngestHandler` as `ingest.worker: thread`;
only where samples go differs (`_Tap` instead of `ChannelBuffer`). Wire protocol over
one duplex `multiprocessing` pipe, pickled tuples:

child -> parent
  ("data", gen, keys, ts, values, arrivals, blocks)  scalar samples as parallel lists
      (key = asset_index << 16 | channel_index) and json-batch blocks as (keys, sizes,
      arrivals, all timestamps, all values), the arrays concatenated; sent when the
      batch is `FLUSH_S` old or holds `MAX_BATCH` messages or `MAX_BATCH_SAMPLES`
      samples, whichever comes first
  ("counts", gen, {key: (messages, samples, gaps)}, {reason: n}, errors)  deltas,
      every `COUNTS_EVERY_S` and before a switch or stop
  ("state", connected, reason)   the local broker connection came up / went down
  ("log", levelno, message)      a log line (the child's logging is rate-limited already)
  ("gen", gen)                   the child now routes with config generation `gen`
  ("bye",)                       last message before a requested exit
parent -> child
  ("config", gen, Config)        reload: route with this config from now on
  ("stop",)                      disconnect, send what is left, exit

Generations: a reload gives the routes a new number; the parent keeps the previous
generation's channel buffers until the child says it switched, so samples decoded
just before the switch still land (kept assets share their buffers across both).

The child is `python -m agent.ingest_worker <fd>` (a plain subprocess with one end of
a socket pair, so no multiprocessing helper processes come with it); its first message
from the parent is ("init", gen, Config, log level). It ignores SIGINT/SIGTERM/SIGHUP
(the daemon decides when it stops) and exits when the pipe closes, so it never
outlives the daemon. If it dies, the parent logs
it, counts it (`watchkeep_ingest_worker_restarts_total`) and starts a new one after a
capped backoff.
"""

from __future__ import annotations

import contextlib
import logging
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from multiprocessing.connection import Connection
from typing import Any

import numpy as np
from prometheus_client import CollectorRegistry

from agent.config import Config
from agent.core.decode import Reason
from agent.ingest import Ingest, IngestHandler, PlainCount, append_run
from agent.logs import LOGGER_NAME, kv
from agent.metrics import Metrics

FLUSH_S = 0.002          # a sample waits at most this long in the child
MAX_BATCH = 512          # ... or until this many messages are waiting
MAX_BATCH_SAMPLES = 32768  # ... or this many samples (waveform blocks)
COUNTS_EVERY_S = 0.25    # message/sample/reject counts follow this often
STOP_TIMEOUT_S = 5.0
RESTART_MIN_S, RESTART_MAX_S = 0.5, 30.0
KEY_SHIFT = 16           # key = asset_index << 16 | channel_index
KEY_MASK = (1 << KEY_SHIFT) - 1


def channel_key(asset_index: int, channel_index: int) -> int:
    """One int naming a channel on the wire (`key >> KEY_SHIFT`, `key & KEY_MASK`)."""
    return (asset_index << KEY_SHIFT) | channel_index

Clock = Callable[[], float]


# -- the child ------------------------------------------------------------------------


class _Sender:
    """The child's end of the pipe; one lock for every thread that sends."""

    def __init__(self, conn: Connection) -> None:
        self.conn = conn
        self.lock = threading.Lock()

    def send(self, msg: tuple[Any, ...]) -> None:
        with self.lock:
            self.conn.send(msg)


class _Batch:
    """Samples of one config generation waiting to be sent."""

    def __init__(self, gen: int, sender: _Sender, wake: threading.Event) -> None:
        self.gen = gen
        self.sender = sender
        self.wake = wake  # tells the flusher thread a batch has started
        self.lock = threading.Lock()
        self._reset()

    def _reset(self) -> None:
        self.keys: list[int] = []
        self.ts: list[float] = []
        self.values: list[float] = []
        self.arrivals: list[float] = []
        self.blocks: list[tuple[int, np.ndarray, np.ndarray, float]] = []
        self.n = 0  # messages
        self.samples = 0

    def add(self, key: int, t: float, value: float, arrival: float) -> None:
        with self.lock:
            self.keys.append(key)
            self.ts.append(t)
            self.values.append(value)
            self.arrivals.append(arrival)
            self.n += 1
            self._after_add()

    def add_block(self, key: int, ts: np.ndarray, values: np.ndarray, arrival: float) -> None:
        with self.lock:
            self.blocks.append((key, ts, values, arrival))
            self.n += 1
            self.samples += int(ts.size)
            self._after_add()

    def _after_add(self) -> None:
        if self.n >= MAX_BATCH or self.samples >= MAX_BATCH_SAMPLES:
            self._send_locked()
        elif self.n and not self.wake.is_set():
            self.wake.set()

    def flush(self) -> None:
        with self.lock:
            self._send_locked()

    def _send_locked(self) -> None:
        if not self.n:
            return
        blocks: tuple[Any, ...] = ()
        if self.blocks:
            # One pair of arrays for all blocks: pickling two large arrays costs far
            # less than two small ones per message.
            b = self.blocks
            blocks = ([k for k, _, _, _ in b], [int(t.size) for _, t, _, _ in b],
                      [a for _, _, _, a in b], np.concatenate([t for _, t, _, _ in b]),
                      np.concatenate([v for _, _, v, _ in b]))
        msg = ("data", self.gen, self.keys, self.ts, self.values, self.arrivals, blocks)
        self._reset()
        self.sender.send(msg)


class _Tap:
    """Stands where `ChannelBuffer` stands in the daemon: the handler's per-channel
    bookkeeping, with samples going into the batch instead of a window assembler."""

    __slots__ = ("batch", "key", "last_arrival", "last_seq", "n_messages", "n_samples",
                 "next_block_ts", "sent_messages", "sent_samples")

    def __init__(self, batch: _Batch, key: int) -> None:
        self.batch = batch
        self.key = key
        self.last_arrival = 0.0
        self.next_block_ts: float | None = None
        self.last_seq: int | None = None
        self.n_messages = self.n_samples = 0
        self.sent_messages = self.sent_samples = 0

    def append(self, ts: float, value: float, arrival: float) -> None:
        self.batch.add(self.key, ts, value, arrival)

    def append_block(self, ts: np.ndarray, values: np.ndarray, arrival: float) -> None:
        self.batch.add_block(self.key, ts, values, arrival)


class _TapBuffers:
    def __init__(self, cfg: Config, batch: _Batch) -> None:
        self.by_asset = [[_Tap(batch, channel_key(ai, ci)) for ci in range(len(a.channels))]
                         for ai, a in enumerate(cfg.assets)]

    def get(self, route: Any) -> _Tap:
        return self.by_asset[route.asset_index][route.channel_index]


class _Generation:
    def __init__(self, gen: int, cfg: Config, sender: _Sender, wake: threading.Event,
                 log: logging.Logger) -> None:
        self.gen = gen
        self.cfg = cfg
        self.batch = _Batch(gen, sender, wake)
        self.taps = _TapBuffers(cfg, self.batch)
        # No Metrics: the handler counts rejections and gaps in PlainCounts.
        self.handler = IngestHandler(cfg, self.taps, None, log)  # type: ignore[arg-type]
        self.rejected: dict[Reason, PlainCount] = self.handler._rejected
        self.gaps: dict[str, PlainCount] = self.handler._gaps
        self.key_of = {t: channel_key(r.asset_index, r.channel_index)
                       for t, r in self.handler.routes.items()}

    def counts(self) -> tuple[Any, ...] | None:
        """The deltas since the last call, or None when nothing changed."""
        per_key: dict[int, tuple[int, int, int]] = {}
        for topic, key in self.key_of.items():
            tap = self.taps.by_asset[key >> KEY_SHIFT][key & KEY_MASK]
            g = self.gaps[topic]
            # Each count read once: the network thread may add to it meanwhile, and what
            # it adds after the read goes out next time.
            nm, ns, ng = tap.n_messages, tap.n_samples, g.n
            if nm != tap.sent_messages or ns != tap.sent_samples or ng != g.sent:
                per_key[key] = (nm - tap.sent_messages, ns - tap.sent_samples, ng - g.sent)
                tap.sent_messages, tap.sent_samples, g.sent = nm, ns, ng
        rejected = {}
        for r, c in self.rejected.items():
            n = c.n
            if n != c.sent:
                rejected[r.value] = n - c.sent
                c.sent = n
        if not per_key and not rejected:
            return None
        return ("counts", self.gen, per_key, rejected)


class _PipeLogHandler(logging.Handler):
    def __init__(self, sender: _Sender) -> None:
        super().__init__()
        self.sender = sender

    def emit(self, record: logging.LogRecord) -> None:
        try:
            msg = record.getMessage()
            if record.exc_info:
                msg += " exc=" + repr(logging.Formatter().formatException(record.exc_info))
            self.sender.send(("log", record.levelno, msg))
        except Exception:  # a log line must never take ingest down
            pass


class _WorkerIngest(Ingest):
    """`Ingest` that also tells the parent when the connection comes and goes."""

    sender: _Sender

    def _on_connect(self, client: Any, userdata: Any, flags: Any, reason: Any,
                    props: Any) -> None:
        super()._on_connect(client, userdata, flags, reason, props)
        try:
            if not reason.is_failure:
                self.sender.send(("state", True, ""))
        except Exception:  # never raise on paho's thread; a broken pipe ends the child
            pass

    def _on_disconnect(self, client: Any, userdata: Any, flags: Any, reason: Any,
                       props: Any) -> None:
        super()._on_disconnect(client, userdata, flags, reason, props)
        with contextlib.suppress(Exception):
            self.sender.send(("state", False, str(reason)))


def worker_main(conn: Connection, cfg: Config, gen: int, level: int) -> None:
    """The child process: run ingest until told to stop or the parent goes away."""
    for sig in (signal.SIGINT, signal.SIGTERM, signal.SIGHUP):
        signal.signal(sig, signal.SIG_IGN)
    sender = _Sender(conn)
    log = logging.getLogger(LOGGER_NAME + ".ingest-worker")
    log.handlers[:] = [_PipeLogHandler(sender)]
    log.setLevel(level)
    log.propagate = False
    wake = threading.Event()
    current = _Generation(gen, cfg, sender, wake, log)
    previous: _Generation | None = None
    gens_lock = threading.Lock()
    stop = threading.Event()

    def flusher() -> None:
        """Sends a batch `FLUSH_S` after its first sample; sends the counts now and then."""
        next_counts = time.monotonic() + COUNTS_EVERY_S
        while not stop.is_set():
            started = wake.wait(COUNTS_EVERY_S)
            if started:
                time.sleep(FLUSH_S)
                wake.clear()
            with gens_lock:
                live = [g for g in (previous, current) if g is not None]
            for g in live:
                g.batch.flush()
            if time.monotonic() >= next_counts:
                next_counts = time.monotonic() + COUNTS_EVERY_S
                for g in live:
                    c = g.counts()
                    if c is not None:
                        sender.send(c)

    ingest = _WorkerIngest(cfg, current.handler, Metrics(CollectorRegistry()), log)
    ingest.sender = sender
    t = threading.Thread(target=flusher, name="watchkeep-ingest-flush", daemon=True)
    t.start()
    ingest.start()
    try:
        while True:
            try:
                msg = conn.recv()
            except (EOFError, OSError):
                return  # the daemon is gone: so is its ingest
            if msg[0] == "stop":
                break
            if msg[0] == "config":
                new = _Generation(msg[1], msg[2], sender, wake, log)
                with gens_lock:
                    previous, current = current, new
                ingest.reconfigure(new.cfg, new.handler)
                previous.batch.flush()
                c = previous.counts()
                if c is not None:
                    sender.send(c)
                sender.send(("gen", new.gen))
    finally:
        stop.set()
        with contextlib.suppress(Exception):
            ingest.stop()
        t.join(1.0)
        with contextlib.suppress(Exception):
            for g in (previous, current):
                if g is not None:
                    g.batch.flush()
                    c = g.counts()
                    if c is not None:
                        sender.send(c)
            sender.send(("bye",))
        conn.close()


# -- the parent -----------------------------------------------------------------------


class ProcessIngest:
    """The daemon's side of `ingest.worker: process`: same surface as `Ingest`
    (`start`, `stop`, `connected`, `disconnected_since`, `handler`, `reconfigure`).

    `handler` is the daemon's own `IngestHandler`: it never decodes here, but its
    buffers, counters, `close_at` and `wake` are where the child's samples land.
    """

    def __init__(self, cfg: Config, handler: IngestHandler, metrics: Metrics,
                 logger: logging.Logger, *, clock: Clock = time.time) -> None:
        self.cfg = cfg
        self.handler = handler
        self.metrics = metrics
        self.log = logger
        self.clock = clock
        self.connected = threading.Event()
        self.disconnected_since: float | None = None
        self._gauge = metrics.connected.labels("local")
        self._errors = metrics.callback_errors.labels("ingest")
        self._restarts = metrics.ingest_worker_restarts
        self._gen = 0
        self._gens: dict[int, tuple[IngestHandler, dict[int, str]]] = {}
        self._add_gen(0, handler)
        self._connects = 0
        self._stopping = threading.Event()
        self._conn: Connection | None = None
        self._proc: subprocess.Popen[bytes] | None = None
        self._send_lock = threading.Lock()
        self._reader: threading.Thread | None = None
        self.worker_pid: int | None = None

    def _add_gen(self, gen: int, handler: IngestHandler) -> None:
        topics = {channel_key(r.asset_index, r.channel_index): t
                  for t, r in handler.routes.items()}
        self._gens[gen] = (handler, topics)

    # -- life cycle --------------------------------------------------------------------

    def start(self) -> None:
        self._spawn()
        self._reader = threading.Thread(target=self._read_run, name="watchkeep-ingest-read",
                                        daemon=True)
        self._reader.start()

    def _spawn(self) -> None:
        ours, theirs = socket.socketpair()
        try:
            proc = subprocess.Popen([sys.executable, "-m", "agent.ingest_worker",
                                     str(theirs.fileno())], pass_fds=(theirs.fileno(),),
                                    stdin=subprocess.DEVNULL)
        finally:
            theirs.close()
        conn = Connection(ours.detach())
        conn.send(("init", self._gen, self.cfg, self.log.getEffectiveLevel()))
        self._conn, self._proc = conn, proc
        self.worker_pid = proc.pid

    def stop(self) -> None:
        """Ask the child to disconnect and send what it holds; apply it; reap the child."""
        self._stopping.set()
        with contextlib.suppress(OSError, ValueError):
            self._send(("stop",))
        if self._reader is not None:
            self._reader.join(STOP_TIMEOUT_S)
        proc = self._proc
        if proc is not None:
            try:
                proc.wait(STOP_TIMEOUT_S)
            except subprocess.TimeoutExpired:
                self.log.warning(kv("ingest worker did not exit; killing it", pid=proc.pid))
                proc.kill()
                proc.wait(STOP_TIMEOUT_S)
        self._set_connected(False, "stopped")

    def reconfigure(self, cfg: Config, handler: IngestHandler) -> None:
        """Route with `cfg` from now on (reload); subscriptions follow in the child."""
        self._gen += 1
        self._add_gen(self._gen, handler)
        self.cfg = cfg
        self.handler = handler
        # When the child is being restarted, it starts with the new config anyway.
        with contextlib.suppress(OSError, ValueError):
            self._send(("config", self._gen, cfg))

    def _send(self, msg: tuple[Any, ...]) -> None:
        conn = self._conn
        if conn is None:
            raise OSError("no ingest worker")
        with self._send_lock:
            conn.send(msg)

    # -- the reader thread ------------------------------------------------------------

    def _read_run(self) -> None:
        attempt = 0
        while True:
            conn = self._conn
            assert conn is not None
            clean = self._read_until_end(conn)
            with contextlib.suppress(OSError):
                conn.close()
            if self._stopping.is_set() or clean:
                return
            proc = self._proc
            code = None
            if proc is not None:
                with contextlib.suppress(subprocess.TimeoutExpired):
                    code = proc.wait(1.0)
            attempt += 1
            delay = min(RESTART_MAX_S, RESTART_MIN_S * 2 ** (attempt - 1))
            self.log.error(kv("ingest worker exited; starting a new one", exitcode=code,
                              restart_in_s=delay))
            self._restarts.inc()
            self._set_connected(False, "ingest worker exited")
            if self._stopping.wait(delay):
                return
            try:
                self._spawn()
            except Exception:
                self.log.exception("starting the ingest worker failed")
                continue
            if attempt > 3:
                attempt = 3  # keep retrying at a steady pace, not ever slower

    def _read_until_end(self, conn: Connection) -> bool:
        """Apply messages until the child says bye (True) or the pipe breaks (False)."""
        while True:
            try:
                msg = conn.recv()
            except (EOFError, OSError):
                return False
            try:
                kind = msg[0]
                if kind == "data":
                    self._apply(msg)
                elif kind == "counts":
                    self._apply_counts(msg)
                elif kind == "state":
                    self._set_connected(msg[1], msg[2])
                elif kind == "log":
                    self.log.log(msg[1], msg[2])
                elif kind == "gen":
                    # The child switched to msg[1]; it still flushes the generation
                    # before it (samples decoded during the switch), not older ones.
                    for g in [g for g in self._gens if g < msg[1] - 1]:
                        del self._gens[g]
                elif kind == "bye":
                    return True
            except Exception:
                self._errors.inc()
                self.log.exception("applying the ingest worker's message failed")

    def _apply(self, msg: tuple[Any, ...]) -> None:
        _, gen, keys, ts, values, arrivals, blocks = msg
        found = self._gens.get(gen)
        if found is None:
            return  # routes of a generation already dropped (a reload raced it)
        handler = found[0]
        by_asset = handler.buffers.by_asset
        close_at = handler.close_at
        due = False
        i, n_keys = 0, len(keys)
        while i < n_keys:
            # A run of samples of one asset (a sensor's channels usually arrive
            # together): one take of the asset's lock for the run.
            ai = keys[i] >> KEY_SHIFT
            j = i + 1
            while j < n_keys and keys[j] >> KEY_SHIFT == ai:
                j += 1
            append_run(by_asset[ai], [k & KEY_MASK for k in keys[i:j]], ts[i:j],
                       values[i:j], arrivals[i:j])
            if max(ts[i:j]) >= close_at[ai]:
                due = True
            i = j
        if blocks:
            bkeys, sizes, barrivals, all_ts, all_vals = blocks
            o = 0
            for key, n, a in zip(bkeys, sizes, barrivals, strict=True):
                ai = key >> KEY_SHIFT
                by_asset[ai][key & KEY_MASK].append_block(all_ts[o:o + n], all_vals[o:o + n], a)
                o += n
                if all_ts[o - 1] >= close_at[ai]:
                    due = True
        if due and handler.wake is not None:
            handler.wake.set()

    def _apply_counts(self, msg: tuple[Any, ...]) -> None:
        _, gen, per_key, rejected = msg
        found = self._gens.get(gen)
        if found is None:
            return
        handler, topics = found
        by_asset = handler.buffers.by_asset
        for key, (dm, ds, dg) in per_key.items():
            buf = by_asset[key >> KEY_SHIFT][key & KEY_MASK]
            buf.n_messages += dm
            buf.n_samples += ds
            if dg:
                handler._gaps[topics[key]].inc(dg)
        for reason, n in rejected.items():
            handler._rejected[Reason(reason)].inc(n)

    def _set_connected(self, up: bool, reason: str) -> None:
        """The child's connection state (it logs the changes itself)."""
        if up:
            self._connects += 1
            if self._connects > 1:
                self.metrics.reconnects.labels("local").inc()
            self.connected.set()
            self._gauge.set(1)
            self.disconnected_since = None
        else:
            if self.connected.is_set() or self.disconnected_since is None:
                self.disconnected_since = self.clock()
            self.connected.clear()
            self._gauge.set(0)


def main(argv: list[str]) -> int:
    """`python -m agent.ingest_worker <fd>`: started by `ProcessIngest`, not by hand."""
    conn = Connection(int(argv[1]))
    try:
        kind, gen, cfg, level = conn.recv()
    except (EOFError, OSError):
        return 0
    if kind != "init":
        return 2
    worker_main(conn, cfg, gen, level)
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv))
