"""Fuzz target `ingest-tick`: fuzzed messages dropped into a well-formed stream, through
the real ingest path (`IngestHandler.handle` -> channel buffers and time-base guards ->
window assemblers) and pipeline ticks (features, batched inference, detectors).

Two assets with trained models, stepping in 1 s windows at 2 Hz (sample time = wall
time + 50 ms): A has a `json`, a `json-batch`, a `text` and a `sparkplug-b` channel
(health checks: the general path), B three `json` channels (plain: the lockstep path).
A's Sparkplug edge node answers the rebirth requests the daemon publishes, as a real
one does. After three good windows the fuzzed messages arrive (on one of A's topics,
B's, or topics no channel reads), then sixteen more good windows.

Input: records of [topic selector byte][payload length, 3 bytes big-endian][payload],
at most four. An input of odd length goes through ingest as `ingest.worker: process`
runs it (the child's decode and batches, pickled, applied by the daemon's side), an
even one as `thread` runs it.

The contract (issue 20: no input may stop other channels or assets): no exception from
`handle` or `tick`; no asset's work fails (`watchkeep_asset_errors_total` stays 0); the
asset not written to scores exactly the windows it scores without the fuzzed messages;
the asset written to is scoring again in the last four windows (a message inside the
time-base guard's tolerance may cost it up to ~10 s of data), unless
the guard accepted a clock step on it (`_stepped`).
"""

from __future__ import annotations

import functools
import logging
import pickle
import shutil
from dataclasses import dataclass, field
from typing import Any

from hypothesis import strategies as st

from tests.fuzz.common import NOW, awkward_numbers, json_bytes, json_values, scratch_dir, times
from tests.fuzz.harness import Target, check

RATE = 2.0
T0 = NOW - 30.0  # the stream's first sample
FUZZ_AT = 3  # the fuzzed messages arrive before this window's samples
AFTER = 16  # good windows after them
DELAY = 0.05  # arrival - sample time
G, E, D = "plantg", "edge1", "dev1"
SPB = f"spBv1.0/{G}"
TOPICS = ("plant/A/temp", "plant/A/current", "plant/A/pressure", f"{SPB}/DDATA/{E}/{D}",
          f"{SPB}/DBIRTH/{E}/{D}", f"{SPB}/NBIRTH/{E}", f"{SPB}/NDEATH/{E}",
          f"{SPB}/DDEATH/{E}/{D}", f"{SPB}/NDATA/{E}", "plant/B/temp", "plant/Z/unknown",
          f"{SPB}/DDATA/{E}/other")
FUZZED_ASSET = ("A",) * 9 + ("B", None, "A")
DOUBLE, UINT64, BOOLEAN = 10, 8, 11


def _channels(asset: str) -> dict[str, Any]:
    feats = ["mean", "std"]
    if asset == "B":
        return {c: {"topic": f"plant/B/{c}", "decoder": "json", "rate_hz": RATE,
                    "features": feats} for c in ("temp", "current", "pressure")}
    return {
        "temp": {"topic": TOPICS[0], "decoder": "json", "rate_hz": RATE, "features": feats,
                 "min": -50, "max": 200},
        "current": {"topic": TOPICS[1], "decoder": "json-batch", "rate_hz": RATE,
                    "features": feats},
        "pressure": {"topic": TOPICS[2], "decoder": "text", "rate_hz": RATE,
                     "features": feats, "stale_s": 5},
        "flow": {"topic": TOPICS[3], "decoder": "sparkplug-b", "metric": "Pump/Flow",
                 "rate_hz": RATE, "features": ["mean"]},
    }


@functools.cache
def _setup() -> tuple[Any, dict[str, Any]]:
    """The config and the two trained bundles (once per process)."""
    from agent.config.load import parse_config
    from agent.models.bundle import load_bundle
    from tests.helpers import train_pca_bundle

    tmp = scratch_dir("tick")
    bundles = {a: load_bundle(train_pca_bundle(tmp / a, a, seed=i + 1, samples=int(RATE)))
               for i, a in enumerate("AB")}
    doc = {"site": "fz", "gateway": "gw", "state_dir": str(tmp / "state"),
           "local_broker": {"username": "gw", "password": "x"},
           "ingest": {"sparkplug": {"rebirth_requests": True, "rebirth_min_interval_s": 1}},
           "assets": [{"name": a, "bundle": str(tmp / a),
                       "window": {"length_s": 1.0, "lateness_s": 0.2, "timeout_s": 2.0,
                                  "min_coverage": 0.8},
                       "detector": {"raise_k": 2, "raise_n": 3, "clear_m": 3},
                       "channels": _channels(a)} for a in "AB"]}
    cfg = parse_config(doc, tmp)
    shutil.rmtree(tmp / "state", ignore_errors=True)
    return cfg, bundles


def spb_payload(seq: int | None, metrics: list[dict[str, Any]], ts_ms: int | None) -> bytes:
    from tests.helpers import sparkplug_payload

    return sparkplug_payload(seq, metrics, ts_ms)


@dataclass
class EdgeNode:
    """A's Sparkplug edge node: births, then DDATA by alias; a rebirth request (NCMD from
    the daemon) makes it publish its births again before its next data."""

    seq: int = 0
    bd_seq: int = 0
    asked: bool = True  # the first births
    out: list[tuple[str, bytes]] = field(default_factory=list)

    def _next(self) -> int:
        s = self.seq
        self.seq = (self.seq + 1) % 256
        return s

    def messages(self, t: float, value: float) -> list[tuple[str, bytes]]:
        ms = round(t * 1000)
        msgs = []
        if self.asked:
            self.asked = False
            self.seq = 0
            self.bd_seq += 1
            msgs.append((f"{SPB}/NBIRTH/{E}", spb_payload(self._next(), [
                {"name": "bdSeq", "datatype": UINT64, "long_value": self.bd_seq},
                {"name": "Node Control/Rebirth", "datatype": BOOLEAN, "boolean_value": False}],
                ms)))
            msgs.append((f"{SPB}/DBIRTH/{E}/{D}", spb_payload(self._next(), [
                {"name": "Pump/Flow", "alias": 1, "datatype": DOUBLE, "double_value": value,
                 "timestamp": ms}], ms)))
            return msgs
        msgs.append((f"{SPB}/DDATA/{E}/{D}", spb_payload(self._next(), [
            {"alias": 1, "double_value": value, "timestamp": ms}], ms)))
        return msgs


def good_window(k: int, node: EdgeNode) -> list[tuple[float, str, bytes]]:
    """(arrival, topic, payload) of window k of both assets, in arrival order."""
    out: list[tuple[float, str, bytes]] = []
    for j in range(int(RATE)):
        t = T0 + k + j / RATE
        a = t + DELAY
        load = 0.75 + 0.2 * ((k * 7 + j * 3) % 5) / 5
        vals = {"temp": 40 + 10 * load, "current": 20 * load, "pressure": 3 + 2 * load}
        for c, v in vals.items():
            out.append((a, f"plant/B/{c}", json_bytes({"ts": round(t, 3), "value": v})))
        out.append((a, TOPICS[0], json_bytes({"ts": round(t, 3), "value": vals["temp"]})))
        out.append((a, TOPICS[2], f"{vals['pressure']:.3f}".encode()))
        out += [(a, topic, p) for topic, p in node.messages(t, 11.0 + load)]
    t0 = T0 + k
    block = [20 * (0.75 + 0.2 * ((k * 7 + j * 3) % 5) / 5) for j in range(int(RATE))]
    out.append((t0 + (RATE - 1) / RATE + DELAY, TOPICS[1],
                json_bytes({"ts": t0, "rate_hz": RATE, "values": block})))
    return sorted(out, key=lambda m: m[0])


def records(data: bytes) -> list[tuple[int, bytes]]:
    out = []
    i = 0
    while i < len(data) and len(out) < 4:
        n = int.from_bytes(data[i + 1:i + 4], "big")
        out.append((data[i] % len(TOPICS), data[i + 4:i + 4 + n]))
        i += 4 + n
    return out


def pack(msgs: list[tuple[int, bytes]]) -> bytes:
    return b"".join(bytes([t]) + len(p).to_bytes(3, "big") + p for t, p in msgs)


class _Pipe:
    """The child's end of the socket pair, in this process: each message is pickled as
    on the real pipe and applied by the daemon's side as `ProcessIngest` applies what it
    reads (`_read_until_end`); what the daemon cannot apply raises here."""

    def __init__(self, parent: Any) -> None:
        self.parent = parent

    def send(self, msg: Any) -> None:
        from agent.ingest.protocol import Counts, Data, Live

        msg = pickle.loads(pickle.dumps(msg))
        if isinstance(msg, Data):
            self.parent._apply(msg)
        elif isinstance(msg, Counts):
            self.parent._apply_counts(msg)
        elif isinstance(msg, Live):
            self.parent._apply_liveness(msg)
        else:
            raise AssertionError(f"unexpected message from the ingest child: {msg!r}")


class Run:
    """One stream through a fresh daemon core: buffers, handler, pipeline. `process`:
    ingest as `ingest.worker: process` does it (the child's handler and batches, the
    daemon's `ProcessIngest` applying them), else as `thread` (one handler)."""

    def __init__(self, process: bool = False) -> None:
        from prometheus_client import CollectorRegistry

        from agent.ingest.buffers import Buffers
        from agent.ingest.mqtt import IngestHandler
        from agent.ops.metrics import Metrics
        from agent.pipeline.runtime import AssetRuntime
        from agent.pipeline.tick import Pipeline

        cfg, bundles = _setup()
        log = logging.getLogger("watchkeep.fuzz.tick")
        log.propagate = False
        log.setLevel(logging.CRITICAL)
        self.metrics = Metrics(CollectorRegistry())
        self.buffers = Buffers(cfg)
        self.handler = IngestHandler(cfg, self.buffers, self.metrics, log)
        self.node = EdgeNode()
        self.child: Any = None
        if process:
            import threading

            from agent.ingest.child import _Generation, _Sender
            from agent.ingest.parent import ProcessIngest

            parent = ProcessIngest(cfg, self.handler, self.metrics, log)  # never started
            self.child = _Generation(0, cfg, _Sender(_Pipe(parent)),  # type: ignore[arg-type]
                                     threading.Event(), log)
            self.decoder = self.child.handler
        else:
            self.decoder = self.handler
        self.decoder.publish = lambda topic, payload: setattr(self.node, "asked", True)
        runtimes = [AssetRuntime.build(a, bundles[a.name], None) for a in cfg.assets]
        self.pipeline = Pipeline(cfg, self.buffers, _NullSink(), self.metrics, log, runtimes)
        self.scored: dict[str, list[float]] = {"A": [], "B": []}

    def handle(self, topic: str, payload: bytes, arrival: float) -> None:
        self.decoder.handle(topic, payload, arrival)
        if self.child is not None:  # the child's flusher, after every message
            self.child.batch.flush()
            counts = self.child.counts()
            if counts is not None:
                self.child.batch.sender.send(counts)

    def window(self, k: int) -> None:
        msgs = good_window(k, self.node)
        for arrival, topic, payload in msgs:
            self.handle(topic, payload, arrival)
        self.tick(msgs[-1][0] + 0.01)

    def tick(self, now: float) -> None:
        self.pipeline.tick(now)
        check(not self.pipeline.all_failing, "the tick failed for every asset")
        for rt in self.pipeline.runtimes:
            check(rt.error is None, f"asset {rt.cfg.name} failed: {rt.error}")
        for a, seen in self.scored.items():
            seen.append(self.metrics.windows_scored.labels(a)._value.get())

    def run(self, fuzzed: list[tuple[int, bytes]]) -> None:
        for k in range(FUZZ_AT):
            self.window(k)
        at = T0 + FUZZ_AT + DELAY / 2
        for i, (topic, payload) in enumerate(fuzzed):
            self.handle(TOPICS[topic], payload, at + 0.001 * i)
        for k in range(FUZZ_AT, FUZZ_AT + AFTER):
            self.window(k)


class _NullSink:
    def submit(self, msgs: Any, sequences: Any = None) -> None:
        pass


@functools.cache
def baseline(process: bool) -> dict[str, list[float]]:
    """Windows scored after each tick with no fuzzed message."""
    r = Run(process)
    r.run([])
    return r.scored


def one_input(data: bytes) -> None:
    fuzzed = records(data)
    process = len(data) % 2 == 1  # half the inputs each way, deterministically
    base = baseline(process)
    r = Run(process)
    r.run(fuzzed)
    written = {FUZZED_ASSET[t] for t, _ in fuzzed} - {None}
    for a in "AB":
        seen = r.scored[a]
        if a not in written:
            check(seen == base[a], f"asset {a}, not written to, scored {seen[-1]:.0f} windows "
                                   f"instead of {base[a][-1]:.0f}")
        elif not _stepped(r, a):
            check(seen[-1] > seen[-5], f"asset {a} is not scoring 16 s after the fuzzed "
                                       f"messages ({seen})")


def _stepped(r: Run, asset: str) -> bool:
    """Whether a channel of `asset` had its time base jump accepted (three messages far
    ahead that continue each other): agent/core/timebase.py accepts that as a sensor
    clock that stepped, and the asset's other channels are late until the wall clock
    catches up (a documented limitation there, "left for later"), so the asset cannot
    be scoring again within this stream. Its other asset is still held to the baseline."""
    fam = r.metrics.clock_steps
    return any(s.value > 0 for m in fam.collect() for s in m.samples
               if s.labels.get("asset") == asset and s.name.endswith("_total"))


def seeds() -> list[bytes]:
    """Good messages of every topic at the fuzzed time, and issue 20's probes."""
    node = EdgeNode(asked=False, seq=10)
    t = T0 + FUZZ_AT
    good = {topic: p for _, topic, p in good_window(FUZZ_AT, EdgeNode())}
    out = [pack([(i, good.get(topic, b""))]) for i, topic in enumerate(TOPICS)]
    out.append(pack([(3, node.messages(t, 1.0)[0][1])]))
    probes = [
        (1, json_bytes({"ts": t, "rate_hz": 5e-324, "values": [0.1, 0.1]})),  # finding 1
        (0, json_bytes({"ts": t + 280, "value": 45.0})),  # finding 2: ahead inside the skew
        (1, json_bytes({"ts": t + 250, "rate_hz": RATE, "values": [1.0] * 100})),
        (2, b"1e400"), (0, b"[" * 5000 + b"]" * 5000),
        (3, spb_payload(11, [{"alias": 1, "double_value": 1.0,
                              "timestamp": int((t + 280) * 1000)}], None)),
        (6, spb_payload(None, [{"name": "bdSeq", "datatype": UINT64, "long_value": 1}], None)),
        # found here: a metric 5.6 s ahead (beyond timeout_s) blinded A for good
        (3, spb_payload(2, [{"alias": 1, "double_value": 11.9,
                             "timestamp": int((t + 5.62) * 1000)}], int((t + 0.5) * 1000))),
        # found here: a DBIRTH without seq hiding the flow metric behind its alias
        (4, spb_payload(None, [{"name": "PumP/Flow", "alias": 1, "datatype": DOUBLE,
                                "double_value": 1.0, "timestamp": int(t * 1000)}],
                        int(t * 1000))),
    ]
    out += [pack([p]) for p in probes]
    out.append(pack(probes[1:2] * 3))  # a clock step needs three messages to be followed
    return out


def strategy() -> Any:
    """Messages of each decoder's shape with awkward times, rates, values and lengths."""
    def reading(t: Any, v: Any) -> bytes:
        return json_bytes({"ts": t, "value": v})

    def block(t: Any, r: Any, vals: Any) -> bytes:
        return json_bytes({"ts": t, "rate_hz": r, "values": vals})

    rates = st.one_of(st.just(RATE), st.floats(1.8, 2.2), awkward_numbers)
    vals = st.one_of(st.lists(st.floats(-1e6, 1e6), min_size=1, max_size=20),
                     st.integers(1, 3000).map(lambda n: [1.0] * n),
                     st.lists(awkward_numbers, max_size=4))
    ms = st.one_of(times.filter(lambda x: isinstance(x, float) and 0 <= x < 1e15)
                   .map(lambda x: int(x * 1000)), st.integers(0, 2**64 - 1))
    spb = st.builds(lambda seq, v, t, ts: spb_payload(seq, [{"alias": 1, "double_value": v,
                                                              "timestamp": t}], ts),
                    st.one_of(st.none(), st.integers(0, 300)), st.floats(), ms,
                    st.one_of(st.none(), ms))
    message = st.one_of(
        st.tuples(st.just(0), st.builds(reading, times, awkward_numbers)),
        st.tuples(st.just(9), st.builds(reading, times, awkward_numbers)),
        st.tuples(st.just(1), st.builds(block, times, rates, vals)),
        st.tuples(st.just(2), st.one_of(awkward_numbers.map(str), st.text(max_size=8))
                  .map(lambda s: s.encode("utf-8", "replace"))),
        st.tuples(st.sampled_from([3, 8, 11]), spb),
        st.tuples(st.integers(0, len(TOPICS) - 1),
                  st.one_of(json_values.map(json_bytes), st.binary(max_size=32))))
    return st.lists(message, min_size=1, max_size=4).map(pack)


TARGET = Target("ingest-tick", one_input, seeds, strategy, examples=40, max_len=65536,
                timeout_s=30)
