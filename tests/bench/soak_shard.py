"""One shard of the soak's simulator (`python -m tests.bench.soak_shard`): what
`watchkeep-sim run --speed 1 --start S` does, but held to the wall clock from S
(`publish(wall_start=S)`), so the shards, started one after another on a busy machine,
publish in step with each other and with the wall clock. `watchkeep-sim run` starts
its pacing when it has connected: a shard that took 1.5 s longer to start stayed 1.5 s
behind for the whole run, and every window of its assets closed before its samples came.

The messages are made ahead of time on a thread of their own (`ahead`): the simulator
makes a second of 50 machines' samples at once, which took ~100 ms of a crowded core,
and the messages due meanwhile went out that late (the soak's "simulator lag", which
every window's latency then carried). Made ahead, the publishing thread waits only for
its turn at the interpreter.
"""

from __future__ import annotations

import argparse
import queue
import signal
import sys
import threading
from collections.abc import Iterable, Iterator

from simulator.plant import CHUNK_S, simulate
from simulator.publish import publish
from simulator.scenario import load_scenario, with_overrides

AHEAD_S = 3 * CHUNK_S  # how far ahead of the publisher the messages are made
PART_S = 0.1  # messages are handed over in parts of this much simulated time


def ahead(messages: Iterable[tuple[float, str, bytes]], stop: threading.Event
          ) -> Iterator[tuple[float, str, bytes]]:
    """`messages`, made on a thread of their own up to AHEAD_S ahead of the reader."""
    parts: queue.Queue[list[tuple[float, str, bytes]] | None] = queue.Queue(
        maxsize=round(AHEAD_S / PART_S))

    def make() -> None:
        part: list[tuple[float, str, bytes]] = []
        edge = None
        try:
            for m in messages:
                if edge is None:
                    edge = m[0] + PART_S
                elif m[0] >= edge:
                    while not stop.is_set():
                        try:
                            parts.put(part, timeout=0.5)
                            break
                        except queue.Full:
                            continue
                    part, edge = [], m[0] + PART_S
                if stop.is_set():
                    return
                part.append(m)
            parts.put(part)
        finally:
            parts.put(None)

    threading.Thread(target=make, daemon=True, name="make-ahead").start()
    while (got := parts.get()) is not None:
        yield from got


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tests.bench.soak_shard")
    ap.add_argument("--scenario", required=True)
    ap.add_argument("--port", type=int, required=True)
    ap.add_argument("--start", type=float, required=True, help="unix seconds, shared")
    ap.add_argument("--duration", type=float, required=True)
    args = ap.parse_args(argv)
    stop = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: stop.set())
    scenario = with_overrides(load_scenario(args.scenario), duration_s=args.duration,
                              start_unix=args.start)
    stats = publish(ahead(simulate(scenario, args.start), stop), host="127.0.0.1", port=args.port,
                    speed=1.0, sim_origin=args.start, wall_start=args.start, stop=stop)
    # The line bench_soak reads for the shard's drops (as watchkeep-sim prints it).
    print(f"soak shard: published {stats.sent} messages ({stats.dropped} dropped while "
          f"disconnected) in {stats.wall_s:.1f} s", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
