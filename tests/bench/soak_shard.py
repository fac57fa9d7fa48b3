"""One shard of the soak's simulator (`python -m tests.bench.soak_shard`): what
`watchkeep-sim run --speed 1 --start S` does, but held to the wall clock from S
(`publish(wall_start=S)`), so the shards, started one after another on a busy machine,
publish in step with each other and with the wall clock. `watchkeep-sim run` starts
its pacing when it has connected: a shard that took 1.5 s longer to start stayed 1.5 s
behind for the whole run, and every window of its assets closed before its samples came.
"""

from __future__ import annotations

import argparse
import signal
import sys
import threading

from simulator.plant import simulate
from simulator.publish import publish
from simulator.scenario import load_scenario, with_overrides


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
    stats = publish(simulate(scenario, args.start), host="127.0.0.1", port=args.port,
                    speed=1.0, sim_origin=args.start, wall_start=args.start, stop=stop)
    # The line bench_soak reads for the shard's drops (as watchkeep-sim prints it).
    print(f"soak shard: published {stats.sent} messages ({stats.dropped} dropped while "
          f"disconnected) in {stats.wall_s:.1f} s", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
