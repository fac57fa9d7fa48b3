"""Ingest in a child process: the local broker's MQTT client and the decoders run apart
from the pipeline, and hand samples over in batches. This module is the daemon's side
(`ProcessIngest`); the child is agent/ingest/child.py.

Why: paho and the payload decoders cost about 30 us of Python per message. In one
process they hold the interpreter lock for most of a burst (a 5 Hz plant of 200
assets x 8 channels sends 1,600 messages at every sample instant), and the pipeline
and upstream threads, whose every SQLite, socket or onnxruntime call gives the lock
up and must win it back, wait behind them: window results came out 150-300 ms after
the window closed. With ingest in its own process the two sides run on two cores and
the daemon's interpreter only applies ready-made samples (about 1 us each).

The child imports neither numpy nor prometheus_client, to stay small: it sends a
json-batch block as its first time, rate and values, and the daemon makes the block's
timestamps with the same arithmetic as thread mode (`blocks_timestamps`), so the same
samples land in the windows either way. Wire protocol over one duplex
`multiprocessing` connection on a socket pair, pickled NamedTuples of
agent/ingest/protocol.py:

child -> parent
  Data(gen, keys, ts, values, arrivals, blocks)  scalar samples as parallel lists
      (key = asset_index << 16 | channel_index) and json-batch `Blocks(keys, t0s,
      rates, sizes, arrivals, values)` with the blocks' float64 values concatenated in
      one bytes object; sent when the batch is `FLUSH_S` old or holds `MAX_BATCH`
      messages or `MAX_BATCH_SAMPLES` samples, whichever comes first
  Counts(gen, {key: KeyCounts(messages, samples, gaps)}, {reason: n})  deltas, every
      `COUNTS_EVERY_S` and before a switch or stop
  Errors(n)                      callback errors counted in the child since the last one
  Live(gen, key, death, t)       a Sparkplug death certificate (`death` names it) or a
      birth after one (None) for one channel, after the samples decoded before it
  State(connected, reason)       the local broker connection came up / went down
  Log(levelno, message)          a log line (the child's logging is rate-limited already)
  Switched(gen)                  the child now routes with config generation `gen`
  Bye()                          last message before a requested exit
parent -> child
  Reconfigure(gen, Config)       reload: route with this config from now on
  Stop()                         disconnect, send what is left, exit

Generations: a reload gives the routes a new number; the parent keeps the previous
generation's channel buffers until the child says it switched, so samples decoded
just before the switch still land (kept assets share their buffers across both).

The child is `python -m agent.ingest.child <fd>` (a plain subprocess with one end of
a socket pair, so no multiprocessing helper processes come with it); its first message
from the parent is Init(gen, Config, log level). It ignores SIGINT/SIGTERM/SIGHUP
(the daemon decides when it stops) and exits when the pipe closes, so it never
outlives the daemon. If it dies, the parent logs
it, counts it (`watchkeep_ingest_worker_restarts_total`) and starts a new one after a
capped backoff.
"""

from __future__ import annotations

import contextlib
import logging
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from multiprocessing.connection import Connection

import numpy as np

from agent.config.load import Config
from agent.core.decode import Reason, blocks_timestamps
from agent.ingest.buffers import Buffers, IngestHandler, append_run
from agent.ingest.protocol import (
    KEY_MASK,
    KEY_SHIFT,
    Bye,
    Counts,
    Data,
    Errors,
    Init,
    Live,
    Log,
    ParentMessage,
    Reconfigure,
    State,
    Stop,
    Switched,
    channel_key,
)
from agent.ops.logs import kv
from agent.ops.metrics import Metrics

STOP_TIMEOUT_S = 5.0
RESTART_MIN_S, RESTART_MAX_S = 0.5, 30.0

Clock = Callable[[], float]


class ProcessIngest:
    """The daemon's side of `ingest.worker: process`: same surface as `Ingest`
    (`start`, `stop`, `connected`, `disconnected_since`, `handler`, `reconfigure`).

    `handler` is the daemon's own `IngestHandler`: it never decodes here, but its
    buffers, counters, `close_at` and `wake` are where the child's samples land.
    """

    def __init__(self, cfg: Config, handler: IngestHandler[Buffers], metrics: Metrics,
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
        self._gens: dict[int, tuple[IngestHandler[Buffers], dict[int, tuple[int, int]]]] = {}
        self._add_gen(0, handler)
        self._connects = 0
        self._stopping = threading.Event()
        self._conn: Connection | None = None
        self._proc: subprocess.Popen[bytes] | None = None
        self._send_lock = threading.Lock()
        self._reader: threading.Thread | None = None
        self.worker_pid: int | None = None

    def _add_gen(self, gen: int, handler: IngestHandler[Buffers]) -> None:
        keys = {channel_key(r.asset_index, r.channel_index): r.key for r in handler.channels}
        self._gens[gen] = (handler, keys)

    # -- life cycle --------------------------------------------------------------------

    def start(self) -> None:
        self._spawn()
        self._reader = threading.Thread(target=self._read_run, name="watchkeep-ingest-read",
                                        daemon=True)
        self._reader.start()

    def _spawn(self) -> None:
        ours, theirs = socket.socketpair()
        try:
            proc = subprocess.Popen([sys.executable, "-m", "agent.ingest.child",
                                     str(theirs.fileno())], pass_fds=(theirs.fileno(),),
                                    stdin=subprocess.DEVNULL)
        finally:
            theirs.close()
        conn = Connection(ours.detach())
        conn.send(Init(self._gen, self.cfg, self.log.getEffectiveLevel()))
        self._conn, self._proc = conn, proc
        self.worker_pid = proc.pid

    def stop(self) -> None:
        """Ask the child to disconnect and send what it holds; apply it; reap the child."""
        self._stopping.set()
        with contextlib.suppress(OSError, ValueError):
            self._send(Stop())
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

    def reconfigure(self, cfg: Config, handler: IngestHandler[Buffers]) -> None:
        """Route with `cfg` from now on (reload); subscriptions follow in the child."""
        self._gen += 1
        self._add_gen(self._gen, handler)
        self.cfg = cfg
        self.handler = handler
        # When the child is being restarted, it starts with the new config anyway.
        with contextlib.suppress(OSError, ValueError):
            self._send(Reconfigure(self._gen, cfg))

    def _send(self, msg: ParentMessage) -> None:
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
                if isinstance(msg, Data):
                    self._apply(msg)
                elif isinstance(msg, Counts):
                    self._apply_counts(msg)
                elif isinstance(msg, Errors):
                    self._errors.inc(msg.n)
                elif isinstance(msg, Live):
                    self._apply_liveness(msg)
                elif isinstance(msg, State):
                    self._set_connected(msg.connected, msg.reason)
                elif isinstance(msg, Log):
                    self.log.log(msg.levelno, msg.message)
                elif isinstance(msg, Switched):
                    # The child switched to msg.gen; it still flushes the generation
                    # before it (samples decoded during the switch), not older ones.
                    for g in [g for g in self._gens if g < msg.gen - 1]:
                        del self._gens[g]
                elif isinstance(msg, Bye):
                    return True
            except Exception:
                self._errors.inc()
                self.log.exception("applying the ingest worker's message failed")

    def _apply(self, msg: Data) -> None:
        gen, keys, ts, values, arrivals, blocks = msg
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
            bkeys, t0s, rates, sizes, barrivals, raw = blocks
            all_vals = np.frombuffer(raw, dtype=np.float64)
            all_ts = blocks_timestamps(t0s, rates, sizes)
            o = 0
            for key, n, a in zip(bkeys, sizes, barrivals, strict=True):
                ai = key >> KEY_SHIFT
                by_asset[ai][key & KEY_MASK].append_block(all_ts[o:o + n], all_vals[o:o + n], a)
                o += n
                if all_ts[o - 1] >= close_at[ai]:
                    due = True
        if due and handler.wake is not None:
            handler.wake.set()

    def _apply_liveness(self, msg: Live) -> None:
        gen, key, death, t = msg
        found = self._gens.get(gen)
        if found is not None:
            found[0].buffers.by_asset[key >> KEY_SHIFT][key & KEY_MASK].set_liveness(death, t)

    def _apply_counts(self, msg: Counts) -> None:
        gen, per_key, rejected = msg
        found = self._gens.get(gen)
        if found is None:
            return
        handler, keys = found
        by_asset = handler.buffers.by_asset
        for key, (dm, ds, dg) in per_key.items():
            buf = by_asset[key >> KEY_SHIFT][key & KEY_MASK]
            buf.n_messages += dm
            buf.n_samples += ds
            if dg:
                handler._gaps[keys[key]].inc(dg)
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
