"""Benchmark: training 10,000 windows x 40 features on one core, and inference latency.

Run: .venv/bin/python tests/bench/bench_train.py [--windows N] [--out bench-results/train.json]

Training is `train_bundle` with its defaults (the gateway's path: dataset on disk ->
fit -> export -> calibrate -> bundle). Inference is the trained bundle's
`agent.models.bundle.Bundle.score` (standardise, onnxruntime, squared error) for a batch of
1 and of 200 windows, beside a bare onnxruntime session running the same model on
ready-standardised float32 input with default session options. Pinned to one CPU
with BLAS limited to one thread. Not run by pytest (the file is named bench_*.py).
Data: invented (latent factors mixed into 40 features), made here.
"""

from __future__ import annotations

import os

# One core: BLAS threads must be limited before numpy is imported.
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import contextlib  # noqa: E402
import json  # noqa: E402
import platform  # noqa: E402
import statistics  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

F = 40


def _windows(n: int, seed: int) -> np.ndarray:
    mix = np.random.default_rng(1234).normal(size=(4, F))
    rng = np.random.default_rng(seed)
    lat = rng.normal(size=(n, 4))
    return 10.0 + 3.0 * (np.tanh(lat @ mix / 2.0) + 0.05 * rng.normal(size=(n, F)))


def _per_call_us(fn, reps: int) -> tuple[float, float]:
    """Median and p99 microseconds per call, after a warm-up."""
    for _ in range(min(50, reps)):
        fn()
    samples = []
    for _ in range(reps):
        t = time.perf_counter_ns()
        fn()
        samples.append((time.perf_counter_ns() - t) / 1000.0)
    samples.sort()
    return statistics.median(samples), samples[min(len(samples) - 1, int(0.99 * len(samples)))]


def run(n_windows: int) -> dict:
    import onnxruntime as ort

    from agent.commission.dataset import write_dataset
    from agent.commission.train import train_bundle
    from agent.models.bundle import load_bundle

    names = [f"ch{i // 5}.f{i % 5}" for i in range(F)]
    x = _windows(n_windows, 0)
    t = 1.75e9 + 10.0 * np.arange(n_windows)
    with tempfile.TemporaryDirectory() as d:
        write_dataset(Path(d) / "ds", x, names, t, t + 10.0, ["run"] * n_windows,
                      asset="BENCH-1")
        t0 = time.perf_counter()
        rep = train_bundle(Path(d) / "ds", Path(d) / "bundle")
        total = time.perf_counter() - t0
        bundle = load_bundle(Path(d) / "bundle")
        model_bytes = (Path(d) / "bundle" / "model.onnx").read_bytes()

    bare = ort.InferenceSession(model_bytes, providers=["CPUExecutionProvider"])
    fresh = _windows(200, 7)
    z = bundle.standardise(fresh)
    rows = []
    for batch, reps in ((1, 3000), (200, 500)):
        xb, zb = fresh[:batch], np.ascontiguousarray(z[:batch])
        b_med, b_p99 = _per_call_us(lambda xb=xb: bundle.score(xb), reps)
        o_med, o_p99 = _per_call_us(lambda zb=zb: bare.run(["recon"], {"x": zb}), reps)
        rows.append({"batch": batch,
                     "bundle_call_median_us": b_med, "bundle_call_p99_us": b_p99,
                     "bundle_per_window_us": b_med / batch,
                     "bare_ort_call_median_us": o_med, "bare_ort_call_p99_us": o_p99,
                     "bare_ort_per_window_us": o_med / batch,
                     "ratio_bundle_to_bare": b_med / o_med})
    return {
        "benchmark": "train",
        "machine": {"python": platform.python_version(), "platform": platform.platform(),
                    "cpu_affinity": sorted(os.sched_getaffinity(0)),
                    "onnxruntime": ort.__version__, "numpy": np.__version__},
        "training": {"windows": n_windows, "features": F, "widths": list(rep.widths),
                     "n_params": rep.n_params, "onnx_bytes": rep.onnx_bytes,
                     "epochs_run": rep.epochs_run, "best_epoch": rep.best_epoch,
                     "fit_time_s": rep.train_time_s, "train_bundle_total_s": total,
                     "train_loss": rep.train_loss, "val_loss": rep.val_loss,
                     "threshold": rep.threshold},
        "inference": rows,
    }


def _table(res: dict) -> str:
    tr = res["training"]
    lines = [f"training: {tr['windows']} windows x {tr['features']} features, widths "
             f"{tr['widths']} ({tr['n_params']} params, ONNX {tr['onnx_bytes']} B), "
             f"{tr['epochs_run']} epochs: fit {tr['fit_time_s']:.2f} s, train_bundle total "
             f"{tr['train_bundle_total_s']:.2f} s (one core)",
             "",
             f"{'batch':>5} {'bundle.score/call':>18} {'p99':>8} {'per window':>11} "
             f"{'bare ort/call':>14} {'p99':>8} {'per window':>11} {'ratio':>6}"]
    for r in res["inference"]:
        lines.append(f"{r['batch']:>5} {r['bundle_call_median_us']:>15.1f} us "
                     f"{r['bundle_call_p99_us']:>8.1f} {r['bundle_per_window_us']:>8.2f} us "
                     f"{r['bare_ort_call_median_us']:>11.1f} us {r['bare_ort_call_p99_us']:>8.1f} "
                     f"{r['bare_ort_per_window_us']:>8.2f} us {r['ratio_bundle_to_bare']:>6.2f}")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--windows", type=int, default=10_000)
    p.add_argument("--out", default="bench-results/train.json")
    args = p.parse_args(argv)
    with contextlib.suppress(AttributeError, OSError):  # not every OS pins threads
        os.sched_setaffinity(0, {min(os.sched_getaffinity(0))})
    res = run(args.windows)
    print(_table(res))
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.tmp-{os.getpid()}")
    tmp.write_text(json.dumps(res, indent=2) + "\n")
    os.replace(tmp, out)
    print(f"written {out}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
