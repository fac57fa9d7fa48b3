"""Pipeline throughput without a broker: windows/s through features + inference + detector.

200 assets x 8 channels x 100-sample windows (each asset its own ONNX session, as in
the daemon), beside a bare reference on the same batch: one vectorised numpy feature
pass over a [windows x channels, samples] array plus bare onnxruntime `run` per model.
The watchkeep figure times `Pipeline.tick` (windows closed out of the buffers, sensor
health, features, inference, detectors, messages), with a window observer asked per
window as the daemon's re-learning manager is; putting the samples into the
buffers is ingest's work, measured by the ingest benchmarks and printed here apart.
Rounds alternate so machine noise hits both alike. Run: `python -m tests.bench pipeline`.

A second row, `full_featured` (tests/bench/full_fleet.py), runs a fleet in which every
asset has sensor health on every channel, limits, operating modes and spectral features
on a 1,024 Hz waveform channel beside three 10 Hz channels, against a bare reference
doing the same feature (time-domain and spectral) and inference work.

Printed apart, not in a ratio: the plain fleet's windows closed while the next
window's samples are pending, as a daemon with `lateness_s: 0` closes them (as the
block holding their end arrives, or as one channel's next reading arrives:
`pending_next`), beside the plain row's own cost.
"""

from __future__ import annotations

import logging
import tempfile
from collections.abc import Callable
from pathlib import Path

import numpy as np
import onnxruntime as ort
from prometheus_client import CollectorRegistry

from agent.config.load import parse_config
from agent.ingest.buffers import Buffers
from agent.models.bundle import _session_options, load_bundle
from agent.ops.heap import freeze_heap
from agent.ops.metrics import Metrics
from agent.pipeline.runtime import AssetRuntime
from agent.pipeline.tick import Pipeline
from tests.bench.common import (
    alternate,
    median,
    quiet_bundle,
    save,
    steady_allocator,
    table,
)
from tests.bench.full_fleet import Bare, Fleet

N_ASSETS, N_CHANNELS, N_SAMPLES = 200, 8, 100
FEATS = ["mean", "std", "rms", "peak_to_peak", "kurtosis"]
ROUNDS = 11
WINDOWS_PER_ROUND = 10


class NullSink:
    def __init__(self) -> None:
        self.n = 0

    def submit(self, msgs, **_) -> None:  # type: ignore[no-untyped-def]
        self.n += len(msgs)


class IdleLearning:
    """The window observer as the daemon has it between re-learning jobs
    (`RebaselineManager.observe` / `.collecting`): asked per window, wanting none."""

    def __init__(self) -> None:
        self.jobs: dict[str, object] = {}

    def collecting(self, asset: str) -> bool:
        return self.jobs.get(asset) is not None

    def observe(self, *_: object) -> None:  # not called: no job collects
        return None


# The bundles the first `build` of a run wrote: the other fleets load them too (each
# its own sessions), instead of training 200 models again.
_MADE: list = []


def build(tmp: Path):
    rng = np.random.default_rng(0)
    names = [f"c{c}.{f}" for c in range(N_CHANNELS) for f in FEATS]
    # Every asset its own model (weights of its own), as on a plant: batching the
    # inference across assets must not lean on models being shared.
    made = [quiet_bundle(tmp / f"bundle{i:03d}", names,
                         rng.normal(size=(500, len(names))) * rng.uniform(0.5, 2, len(names)),
                         mean=0.0) for i in range(N_ASSETS)] \
        if not (_MADE and Path(_MADE[0][0]).exists()) else _MADE
    _MADE[:] = made  # the other fleets of this run load the same bundles (same seed)
    doc = {"site": "bench", "gateway": "gw", "state_dir": str(tmp / "state"),
           "assets": [{"name": f"A{i:03d}", "bundle": str(made[i][0]),
                       "window": {"length_s": 1.0, "lateness_s": 0.0, "timeout_s": 0.5},
                       "channels": {f"c{c}": {"topic": f"b/A{i:03d}/c{c}",
                                              "decoder": "json-batch", "rate_hz": N_SAMPLES,
                                              "features": FEATS}
                                    for c in range(N_CHANNELS)}}
                      for i in range(N_ASSETS)]}
    cfg = parse_config(doc, tmp)
    metrics = Metrics(CollectorRegistry())
    buffers = Buffers(cfg)
    runtimes = [AssetRuntime.build(a, load_bundle(made[i][0]), None)
                for i, a in enumerate(cfg.assets)]
    idle = IdleLearning()
    pipe = Pipeline(cfg, buffers, NullSink(), metrics, logging.getLogger("bench"), runtimes,
                    observer=idle.observe, observes=idle.collecting)
    sessions = [ort.InferenceSession(model, sess_options=_session_options(),
                                     providers=["CPUExecutionProvider"])
                for _, model in made]
    return pipe, buffers, sessions, rng


def few_windows(tmp: Path, reps: int = 5) -> tuple[float, float]:
    """Median ms of a tick with nothing due, and of one in which 8 of the assets close
    a window (the next window's first sample arrived for them): the fixed per-tick cost
    a daemon ticking as samples arrive pays (what the end-to-end latency sees)."""
    import time

    pipe, buffers, _, rng = build(tmp)
    ts = np.arange(N_SAMPLES) / N_SAMPLES
    block = rng.normal(size=(N_ASSETS, N_CHANNELS, N_SAMPLES))

    def feed(k: int, part: slice, arrival: float, assets: range = range(N_ASSETS)) -> None:
        for ai in assets:
            for ci, buf in enumerate(buffers.by_asset[ai]):
                buf.append_block(k + ts[part], block[ai, ci, part], arrival)

    for k in range(4):  # warm-up; window 3 stays open with all its samples
        feed(k, slice(None), k + 1.0)
        pipe.tick(k + 1.0)
    nothing, eight = [], []
    for k in range(3, 3 + reps):
        for a0 in range(0, N_ASSETS, 8):
            t0 = time.perf_counter()
            pipe.tick(k + 1.0)
            nothing.append(time.perf_counter() - t0)
            feed(k + 1, slice(0, 1), k + 1.0, range(a0, min(a0 + 8, N_ASSETS)))
            t0 = time.perf_counter()
            pipe.tick(k + 1.0)
            eight.append(time.perf_counter() - t0)
        feed(k + 1, slice(1, None), k + 2.0)
    return 1e3 * median(nothing), 1e3 * median(eight)


def pending_next(tmp: Path, block: np.ndarray, ts: np.ndarray) -> dict[str, Callable[[], float]]:
    """Two plain fleets whose windows close (as `lateness_s: 0` has it) while the next
    window's samples are pending, each a round of `WINDOWS_PER_ROUND` windows per asset
    returning windows/s: "stream", every block one window long but starting half-way
    into a window (a window closes when the block holding its end arrives); "ahead",
    the first channel's next reading in before the others' (sensors sending one
    reading per message: a window closes when the first of them arrives)."""
    import time

    def fleet(name: str, feed: Callable[[Buffers, int], float]) -> Callable[[], float]:
        pipe, buffers, _, _ = build(tmp / name)
        state = {"k": 0}

        def run() -> float:
            spent, done = 0.0, 0
            for _ in range(WINDOWS_PER_ROUND):
                k = state["k"]
                now = feed(buffers, k)
                t0 = time.perf_counter()
                done += pipe.tick(now).windows_scored
                spent += time.perf_counter() - t0
                state["k"] = k + 1
            return done / spent
        return run

    def straddling(buffers: Buffers, k: int) -> float:
        for ai, chans in enumerate(buffers.by_asset):
            for ci, buf in enumerate(chans):
                buf.append_block(k + 0.5 + ts, block[ai, ci], k + 1.5)
        return k + 1.5

    def first_ahead(buffers: Buffers, k: int) -> float:
        for ai, chans in enumerate(buffers.by_asset):
            for ci, buf in enumerate(chans):
                part = slice(1 if ci == 0 and k else 0, None)
                buf.append_block(k + ts[part], block[ai, ci, part], k + 1.0)
            chans[0].append_block(k + 1.0 + ts[:1], block[ai, 0, :1], k + 1.0)
        return k + 1.001

    return {"stream": fleet("stream", straddling), "ahead": fleet("ahead", first_ahead)}


def main() -> int:
    # Both sides' temporaries from a heap that keeps freed memory: the bare reference at
    # its fastest, whatever ran before in this process (`steady_allocator`).
    steady = steady_allocator()
    with tempfile.TemporaryDirectory() as d:
        pipe, buffers, sessions, rng = build(Path(d))
        freeze_heap()  # as the daemon does once started
        block = rng.normal(size=(N_ASSETS, N_CHANNELS, N_SAMPLES))
        ts = np.arange(N_SAMPLES) / N_SAMPLES
        state = {"k": 0}

        feed_s = [0.0, 0]
        spent_all = [0.0, 0]  # tick seconds and windows scored, over every round

        def watchkeep() -> float:
            import time

            spent = 0.0
            done = 0
            for _ in range(WINDOWS_PER_ROUND):
                k = state["k"]
                t0 = time.perf_counter()
                # The ingest side (what the network thread does per message), timed
                # apart: its cost is in the ingest benchmarks.
                for ai, chans in enumerate(buffers.by_asset):
                    for ci, buf in enumerate(chans):
                        buf.append_block(k + ts, block[ai, ci], k + 1.0)
                t1 = time.perf_counter()
                done += pipe.tick(k + 2.0).windows_scored
                dt = time.perf_counter() - t1
                spent += dt
                spent_all[0] += dt
                feed_s[0] += t1 - t0
                feed_s[1] += N_ASSETS
                state["k"] = k + 1
            spent_all[1] += done
            return done / spent

        def bare() -> float:
            import time

            t0 = time.perf_counter()
            for _ in range(WINDOWS_PER_ROUND):
                x = block.reshape(-1, N_SAMPLES)
                mean = x.mean(1)
                d = x - mean[:, None]
                d2 = d * d
                m2 = d2.mean(1)
                # d2 * d2, not d ** 4: numpy 2.4 computes an integer power above 2 with
                # pow() per element, ten times slower here, which would weaken the reference.
                feats = np.stack([mean, np.sqrt(m2), np.sqrt((x * x).mean(1)), np.ptp(x, 1),
                                  (d2 * d2).mean(1) / (m2 * m2)], 1)
                rows = feats.reshape(N_ASSETS, -1).astype(np.float32)
                for i, s in enumerate(sessions):
                    s.run(None, {"x": rows[i:i + 1]})
            return N_ASSETS * WINDOWS_PER_ROUND / (time.perf_counter() - t0)

        late = pending_next(Path(d), block, ts)  # beside the plain row, not in its ratio

        watchkeep()  # warm-up: first windows are skipped (alignment) and caches fill
        for run in late.values():
            run()
        bare()
        def seconds(stage: str) -> float:  # a histogram's running sum
            return pipe.metrics.registry.get_sample_value(f"watchkeep_{stage}_seconds_sum")

        full = Fleet(Path(d) / "full")
        full_bare = Bare(full)
        for _ in range(3):  # warm-up: first windows are skipped (alignment), modes settle
            full.feed()
            full.pipe.tick(full.k + 1.0)

        def full_watchkeep() -> float:
            import time

            spent, done = 0.0, 0
            for _ in range(WINDOWS_PER_ROUND):
                full.feed()
                t0 = time.perf_counter()
                done += full.pipe.tick(full.k + 1.0).windows_scored
                spent += time.perf_counter() - t0
            return done / spent

        def full_reference() -> float:
            import time

            t0 = time.perf_counter()
            n = sum(full_bare.window() for _ in range(WINDOWS_PER_ROUND))
            return n / (time.perf_counter() - t0)

        f0, i0 = seconds("feature"), seconds("inference")
        tick0, n0 = spent_all[0], spent_all[1]
        res = alternate({"watchkeep": watchkeep, "bare": bare, "full": full_watchkeep,
                         "full_bare": full_reference, **late}, ROUNDS)
        n_win = spent_all[1] - n0
        stage_us = {"features": 1e6 * (seconds("feature") - f0) / n_win,
                    "inference": 1e6 * (seconds("inference") - i0) / n_win}
        stage_us["rest"] = 1e6 * (spent_all[0] - tick0) / n_win - sum(stage_us.values())
        idle_ms, eight_ms = few_windows(Path(d) / "few")
    wk, br = median(res["watchkeep"]), median(res["bare"])
    ratio = wk / br
    fw, fb = median(res["full"]), median(res["full_bare"])
    print(f"{N_ASSETS} assets x {N_CHANNELS} channels x {N_SAMPLES}-sample windows, "
          f"{ROUNDS} alternating rounds of {WINDOWS_PER_ROUND} windows per asset")
    print(table([["plain: 8 channels, no checks", f"{wk:,.0f}", f"{br:,.0f}",
                  f"{ratio:.2f}", ">= 0.9"],
                 ["full_featured: health, limits, modes, spectra", f"{fw:,.0f}", f"{fb:,.0f}",
                  f"{fw / fb:.2f}", ">= 0.8"]],
                ["benchmark", "watchkeep windows/s", "bare windows/s", "ratio", "goal"]))
    print(f"per window in the tick: features {stage_us['features']:.1f} us, inference "
          f"{stage_us['inference']:.1f} us (standardising, onnxruntime, errors), the rest "
          f"{stage_us['rest']:.1f} us (cutting windows, sensor health, detector, messages); "
          f"bare: {1e6 / br:.1f} us in all")
    feed_us = 1e6 * feed_s[0] / feed_s[1]
    print(f"not in the ratio: filling the buffers (ingest's append_block, 8 per window) "
          f"took {feed_us:.1f} us per window")
    sw, aw = median(res["stream"]), median(res["ahead"])
    print(f"not in the ratio (lateness_s 0): windows closed as the block holding their "
          f"end arrives (half of the next window's samples pending) {1e6 / sw:.1f} us per "
          f"window, as one channel's next reading arrives {1e6 / aw:.1f} us, against "
          f"{1e6 / wk:.1f} for the plain row ({wk / sw:.2f}x and {wk / aw:.2f}x its cost)")
    print(f"not in the ratio: a tick with nothing due took {idle_ms:.3f} ms, one closing "
          f"8 of {N_ASSETS} assets' windows {eight_ms:.3f} ms (medians)")
    save("pipeline", {"watchkeep_windows_per_s": wk, "bare_windows_per_s": br,
                      "ratio": ratio, "rounds": res, "goal": 0.9,
                      "full_featured": {"watchkeep_windows_per_s": fw,
                                        "bare_windows_per_s": fb, "ratio": fw / fb,
                                        "goal": 0.8, "assets": full.n},
                      "stream_us_per_window": 1e6 / sw, "ahead_us_per_window": 1e6 / aw,
                      "feed_us_per_window": feed_us,
                      "stage_us_per_window": stage_us,
                      "idle_tick_ms": idle_ms, "tick_8_windows_ms": eight_ms,
                      "steady_allocator": steady})
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
