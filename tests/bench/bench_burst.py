"""The soak's burst, offline: the tick in which all 200 demo assets close a window at once.

The soak (`bench_soak.py`) runs config/demo's plant cloned to 200 assets. Their 5 s
windows are aligned to multiples of `hop_s`, so every 5 s one tick closes 200 windows,
each with a 12,800-sample vibration waveform (2,560 Hz x 5 s) and its spectral features;
that tick sets the windows' latency. This replays 16 s of the same plant (the
simulator's messages for the soak's clones, without its speed changes) through the
daemon's own pipeline (`Replayer`, one thread, no broker) and reports each burst tick's
duration and how much of it the stages took (the pipeline's own histograms), beside
a bare reference: the same 200 waveforms' spectral features (`spectral_features`, with
fresh arrays, all segments in one call) and nothing else.

Run: `python -m tests.bench burst`.
"""

from __future__ import annotations

import io
import logging
import tempfile
import time
from pathlib import Path

import numpy as np
import yaml

from agent.cli.demo import ensure_models
from agent.commission.replay import Replayer
from agent.config.load import parse_config
from agent.core.spectral import spectral_features
from agent.pipeline.emit import TickStats
from simulator.plant import simulate
from simulator.scenario import load_scenario
from tests.bench.bench_soak import ROOT, scaled_config, scaled_scenario
from tests.bench.common import median, save, table

SECONDS = 16.0  # three bursts: at 5.5, 10.5 and 15.5 s (window end + lateness_s)
START = 1_767_225_600.0
BURST = 100  # a tick closing at least this many windows is a burst


def main() -> int:
    models = ensure_models(ROOT / ".demo", io.StringIO())
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        cfg = parse_config(scaled_config(tmp / "state", 1883, 0, models), tmp)
        sc = scaled_scenario(SECONDS / 60)
        sc.update(duration_s=SECONDS, timeline=[])
        (tmp / "plant.yaml").write_text(yaml.safe_dump(sc))
        msgs = list(simulate(load_scenario(str(tmp / "plant.yaml")), START))
        r = Replayer.build(cfg, logging.getLogger("bench.burst"))
        reg = r.metrics.registry
        stages = ("feature", "inference")
        ticks: list[tuple[float, int, dict[str, float]]] = []
        tick = r.pipeline.tick

        def timed(now: float) -> TickStats:
            before = {s: reg.get_sample_value(f"watchkeep_{s}_seconds_sum") or 0.0
                      for s in stages}
            t0 = time.perf_counter()
            st = tick(now)
            dt = time.perf_counter() - t0
            ticks.append((dt, st.windows_closed,
                          {s: (reg.get_sample_value(f"watchkeep_{s}_seconds_sum") or 0.0)
                           - before[s] for s in stages}))
            return st

        r.pipeline.tick = timed  # type: ignore[method-assign]
        for t, topic, payload in msgs:
            r.feed(t, topic, payload)
        bursts = [x for x in ticks if x[1] >= BURST]
        vib = next(c for c in cfg.assets[0].channels if c.spectrum is not None)
        spec = vib.spectrum
        assert spec is not None
        n = round(vib.rate_hz * cfg.assets[0].window.length_s)
        rng = np.random.default_rng(0)
        segs = [rng.normal(size=n) for _ in range(len(cfg.assets))]
        bare = []
        for _ in range(3):
            t0 = time.perf_counter()
            spectral_features(segs, [vib.rate_hz] * len(segs), [spec] * len(segs),
                              [25.0] * len(segs))
            bare.append(time.perf_counter() - t0)
    # The first burst fills the caches and work arrays: the later ones are the steady state.
    steady = bursts[1:] or bursts
    rows = [[f"{i + 1}", f"{w}", f"{1e3 * dt:.1f}", f"{1e3 * st['feature']:.1f}",
             f"{1e3 * st['inference']:.1f}", f"{1e3 * (dt - sum(st.values())):.1f}"]
            for i, (dt, w, st) in enumerate(bursts)]
    print(f"{len(cfg.assets)} demo assets, {len(msgs):,} messages over {SECONDS:g} s; "
          f"ticks closing >= {BURST} windows:")
    print(table(rows, ["burst", "windows", "tick ms", "features ms", "inference ms",
                       "the rest ms"]))
    tick_ms = 1e3 * median([dt for dt, _, _ in steady])
    print(f"steady burst tick {tick_ms:.1f} ms; bare spectral features of the same "
          f"{len(segs)} waveforms ({n} samples, fresh arrays, one call): "
          f"{1e3 * median(bare):.1f} ms")
    save("burst", {"assets": len(cfg.assets), "messages": len(msgs),
                   "bursts": [{"windows": w, "tick_ms": 1e3 * dt,
                               "stage_ms": {k: 1e3 * v for k, v in st.items()}}
                              for dt, w, st in bursts],
                   "steady_tick_ms": tick_ms, "bare_spectral_ms": 1e3 * median(bare)})
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
