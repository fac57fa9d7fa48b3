"""Python opcodes and calls per window in one steady tick of the pipeline bench's fleets.

Wall-time ratios on a shared machine move by a tenth or more between runs of the same
code (DEVELOPERS.md, "Performance work"); the number of Python opcodes a tick executes
does not move at all. It is blind to time in C (numpy, onnxruntime) and weighs every
opcode alike, so it is a complement to `python -m tests.bench pipeline`, not a
replacement: use it to see whether a change to the tick's Python did what it meant to.
Counted with `sys.settrace` opcode events (CPython), one tick after five of warm-up,
for the plain fleet (200 assets x 8 channels) and the full-featured one (full_fleet.py).

Run: `python -m tests.bench.tick_opcodes [--top N]` (N functions by opcodes per window).
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from collections import Counter
from collections.abc import Callable
from pathlib import Path
from types import FrameType
from typing import Any

import numpy as np

from tests.bench import bench_pipeline as bp
from tests.bench.full_fleet import Fleet


def count(fn: Callable[[], Any]) -> tuple[int, int, Counter[str]]:
    """Opcodes and Python calls executed by `fn()`, and opcodes per function."""
    ops, calls = [0], [0]
    by: Counter[str] = Counter()

    def tracer(frame: FrameType, event: str, _: Any) -> Any:
        if event == "call":
            calls[0] += 1
            frame.f_trace_opcodes = True
        elif event == "opcode":
            ops[0] += 1
            by[frame.f_code.co_qualname] += 1
        return tracer

    sys.settrace(tracer)
    try:
        fn()
    finally:
        sys.settrace(None)
    return ops[0], calls[0], by


def _plain(tmp: Path) -> Callable[[], Any]:
    pipe, buffers, _, rng = bp.build(tmp)
    block = rng.normal(size=(bp.N_ASSETS, bp.N_CHANNELS, bp.N_SAMPLES))
    ts = np.arange(bp.N_SAMPLES) / bp.N_SAMPLES
    k = 0

    def feed_and_tick() -> Callable[[], Any]:
        nonlocal k
        for ai, chans in enumerate(buffers.by_asset):
            for ci, buf in enumerate(chans):
                buf.append_block(k + ts, block[ai, ci], k + 1.0)
        now = k + 2.0
        k += 1
        return lambda: pipe.tick(now)

    for _ in range(5):
        feed_and_tick()()
    return feed_and_tick()


def _full(tmp: Path) -> Callable[[], Any]:
    f = Fleet(tmp)
    for _ in range(5):
        f.feed()
        f.pipe.tick(f.k + 1.0)
    f.feed()
    return lambda: f.pipe.tick(f.k + 1.0)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--top", type=int, default=0, help="functions to list per fleet")
    args = ap.parse_args(sys.argv[1:])
    with tempfile.TemporaryDirectory() as d:
        for name, make in (("plain", _plain), ("full_featured", _full)):
            tick = make(Path(d) / name)
            ops, calls, by = count(tick)
            n = bp.N_ASSETS
            print(f"{name}: {ops / n:,.0f} opcodes and {calls / n:.1f} Python calls per "
                  f"window ({n} windows in the tick)")
            for fn, k in by.most_common(args.top):
                print(f"  {k / n:8.1f}  {fn}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
