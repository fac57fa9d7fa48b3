"""The ingest child process (`python -m agent.ingest.child <fd>`), started by
`agent.ingest.parent.ProcessIngest`; the wire protocol is described there.

The child runs the very same `Ingest` and `IngestHandler` as `ingest.worker: thread`;
only where samples go differs (`_Tap` instead of `ChannelBuffer`). It imports neither
numpy nor prometheus_client (nor anything that does: config, decoders and the MQTT side
of ingest are free of them), so it stays a small process: a json-batch block travels
as its first time, rate and an `array('d')` of values, and the daemon makes the
timestamps (`agent.core.decode.blocks_timestamps`).
"""

from __future__ import annotations

import contextlib
import logging
import signal
import sys
import threading
import time
from array import array
from multiprocessing.connection import Connection
from typing import Any

from agent.config.load import Config
from agent.core.decode import Block, Reason
from agent.ingest.mqtt import Ingest, IngestHandler, PlainCount
from agent.ingest.protocol import (
    KEY_MASK,
    KEY_SHIFT,
    Blocks,
    Bye,
    ChildMessage,
    Counts,
    Data,
    Errors,
    Init,
    KeyCounts,
    Live,
    Log,
    Reconfigure,
    State,
    Stop,
    Switched,
    channel_key,
)
from agent.ops.logs import LOGGER_NAME, kv

FLUSH_S = 0.002          # a sample waits at most this long in the child
MAX_BATCH = 512          # ... or until this many messages are waiting
MAX_BATCH_SAMPLES = 32768  # ... or this many samples (waveform blocks)
COUNTS_EVERY_S = 0.25    # message/sample/reject counts follow this often


class _Sender:
    """The child's end of the pipe; one lock for every thread that sends."""

    def __init__(self, conn: Connection) -> None:
        self.conn = conn
        self.lock = threading.Lock()

    def send(self, msg: ChildMessage) -> None:
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
        # (key, t0, rate_hz, n, arrival, values) per block
        self.blocks: list[tuple[int, float, float, int, float, array[float]]] = []
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

    def add_block(self, key: int, block: Block, arrival: float) -> None:
        n = len(block.values)
        with self.lock:
            self.blocks.append((key, block.t0, block.rate_hz, n, arrival, block.values))
            self.n += 1
            self.samples += n
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
        blocks = None
        if self.blocks:
            # The blocks' values as one bytes object: pickling one large buffer costs
            # far less than one small one per message.
            keys, t0s, rates, sizes, arrivals, vals = zip(*self.blocks, strict=True)
            blocks = Blocks(keys, t0s, rates, sizes, arrivals, b"".join(vals))
        msg = Data(self.gen, self.keys, self.ts, self.values, self.arrivals, blocks)
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

    def append_decoded(self, block: Block, arrival: float) -> None:
        self.batch.add_block(self.key, block, arrival)

    def set_liveness(self, death: str | None, t: float) -> None:
        # After the samples decoded before it, so the daemon sees them in order.
        self.batch.flush()
        self.batch.sender.send(Live(self.batch.gen, self.key, death, t))


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
        self.handler = IngestHandler(cfg, self.taps, None, log)
        self.rejected: dict[Reason, PlainCount] = self.handler._rejected
        self.gaps: dict[tuple[int, int], PlainCount] = self.handler._gaps
        self.key_of = {t: channel_key(r.asset_index, r.channel_index)
                       for t, r in self.handler.routes.items()}
        self.channel_keys = [(r.key, channel_key(r.asset_index, r.channel_index))
                             for r in self.handler.channels]

    def counts(self) -> Counts | None:
        """The deltas since the last call, or None when nothing changed."""
        per_key: dict[int, KeyCounts] = {}
        for ck, key in self.channel_keys:
            tap = self.taps.by_asset[key >> KEY_SHIFT][key & KEY_MASK]
            g = self.gaps[ck]
            # Each count read once: the network thread may add to it meanwhile, and what
            # it adds after the read goes out next time.
            nm, ns, ng = tap.n_messages, tap.n_samples, g.n
            if nm != tap.sent_messages or ns != tap.sent_samples or ng != g.sent:
                per_key[key] = KeyCounts(nm - tap.sent_messages, ns - tap.sent_samples,
                                         ng - g.sent)
                tap.sent_messages, tap.sent_samples, g.sent = nm, ns, ng
        rejected = {}
        for r, c in self.rejected.items():
            n = c.n
            if n != c.sent:
                rejected[r.value] = n - c.sent
                c.sent = n
        if not per_key and not rejected:
            return None
        return Counts(self.gen, per_key, rejected)


def errors_delta(errors: PlainCount) -> Errors | None:
    """The callback errors counted since the last call, or None."""
    n = errors.n
    if n == errors.sent:
        return None
    msg = Errors(n - errors.sent)
    errors.sent = n
    return msg


class _PipeLogHandler(logging.Handler):
    def __init__(self, sender: _Sender) -> None:
        super().__init__()
        self.sender = sender

    def emit(self, record: logging.LogRecord) -> None:
        try:
            msg = record.getMessage()
            if record.exc_info:
                msg += " exc=" + repr(logging.Formatter().formatException(record.exc_info))
            self.sender.send(Log(record.levelno, msg))
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
                self.sender.send(State(True, ""))
        except Exception:  # never raise on paho's thread; a broken pipe ends the child
            pass

    def _on_disconnect(self, client: Any, userdata: Any, flags: Any, reason: Any,
                       props: Any) -> None:
        super()._on_disconnect(client, userdata, flags, reason, props)
        with contextlib.suppress(Exception):
            self.sender.send(State(False, str(reason)))


class _Worker:
    """The child's state: the ingest, the current generation of config (and the one
    before it, until its last batch and counts are sent), and the flusher thread."""

    def __init__(self, conn: Connection, cfg: Config, gen: int, level: int) -> None:
        self.conn = conn
        self.sender = _Sender(conn)
        log = logging.getLogger(LOGGER_NAME + ".ingest-worker")
        log.handlers[:] = [_PipeLogHandler(self.sender)]
        log.setLevel(level)
        log.propagate = False
        self.log = log
        self.wake = threading.Event()
        self.current = _Generation(gen, cfg, self.sender, self.wake, log)
        self.previous: _Generation | None = None
        self.gens_lock = threading.Lock()
        self.stop = threading.Event()
        self.ingest = _WorkerIngest(cfg, self.current.handler, None, log)
        self.ingest.sender = self.sender
        self.errors: PlainCount = self.ingest._errors
        self.flush_thread = threading.Thread(target=self._flusher,
                                             name="watchkeep-ingest-flush", daemon=True)

    def _live(self) -> list[_Generation]:
        return [g for g in (self.previous, self.current) if g is not None]

    def send_counts(self, gens: list[_Generation]) -> None:
        for g in gens:
            c = g.counts()
            if c is not None:
                self.sender.send(c)
        e = errors_delta(self.errors)
        if e is not None:
            self.sender.send(e)

    def _flusher(self) -> None:
        """Sends a batch `FLUSH_S` after its first sample; sends the counts now and then.
        A broken pipe (the daemon is gone) ends it quietly: the main thread sees the
        pipe close too and ends the child."""
        try:
            self._flush_loop()
        except (OSError, EOFError, ValueError):  # BrokenPipeError; a closed connection
            self.stop.set()

    def _flush_loop(self) -> None:
        next_counts = time.monotonic() + COUNTS_EVERY_S
        while not self.stop.is_set():
            started = self.wake.wait(COUNTS_EVERY_S)
            if started:
                time.sleep(FLUSH_S)
                self.wake.clear()
            with self.gens_lock:
                live = self._live()
            for g in live:
                g.batch.flush()
            if time.monotonic() >= next_counts:
                next_counts = time.monotonic() + COUNTS_EVERY_S
                self.send_counts(live)

    def serve(self) -> None:
        """Apply the daemon's messages until `Stop` or the pipe closes."""
        while True:
            try:
                msg = self.conn.recv()
            except (EOFError, OSError):
                return  # the daemon is gone: so is its ingest
            if isinstance(msg, Stop):
                break
            if isinstance(msg, Reconfigure):
                self._switch(msg.gen, msg.cfg)

    def _switch(self, gen: int, cfg: Config) -> None:
        """A new config generation: ingest moves to it; the old one's last batch and
        counts go out, then the generation number."""
        new = _Generation(gen, cfg, self.sender, self.wake, self.log)
        with self.gens_lock:
            self.previous, self.current = self.current, new
        previous = self.previous
        self.ingest.reconfigure(new.cfg, new.handler)
        previous.batch.flush()
        c = previous.counts()
        if c is not None:
            self.sender.send(c)
        self.sender.send(Switched(new.gen))

    def close(self) -> None:
        """Stop ingest and the flusher, send what is left and `Bye`, close the pipe."""
        self.stop.set()
        with contextlib.suppress(Exception):
            self.ingest.stop()
        self.flush_thread.join(1.0)
        with contextlib.suppress(Exception):
            live = self._live()
            for g in live:
                g.batch.flush()
            self.send_counts(live)
            if self.log.isEnabledFor(logging.DEBUG):  # what the child's memory is made of
                self.log.debug(kv("ingest worker modules", packages=",".join(sorted(
                    {m.partition(".")[0] for m in sys.modules}))))
            self.sender.send(Bye())
        self.conn.close()


def worker_main(conn: Connection, cfg: Config, gen: int, level: int) -> None:
    """The child process: run ingest until told to stop or the parent goes away."""
    for sig in (signal.SIGINT, signal.SIGTERM, signal.SIGHUP):
        signal.signal(sig, signal.SIG_IGN)
    worker = _Worker(conn, cfg, gen, level)
    worker.flush_thread.start()
    worker.ingest.start()
    try:
        worker.serve()
    finally:
        worker.close()


def main(argv: list[str]) -> int:
    """`python -m agent.ingest.child <fd>`: started by `ProcessIngest`, not by hand."""
    conn = Connection(int(argv[1]))
    try:
        init = conn.recv()
    except (EOFError, OSError):
        return 0
    if not isinstance(init, Init):
        return 2
    worker_main(conn, init.cfg, init.gen, init.level)
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv))
