"""Shared bits of the benchmarks: alternating timing, tables, JSON results."""

from __future__ import annotations

import json
import os
import platform
import statistics
import time
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

RESULTS = Path(os.environ.get("WATCHKEEP_BENCH_OUT", "bench-results"))


def alternate(fns: dict[str, Callable[[], float]], rounds: int) -> dict[str, list[float]]:
    """Run each function once per round, in turn, so machine noise hits all alike.

    Each function returns a rate (things per second); the lists hold every round's rate.
    """
    out: dict[str, list[float]] = {k: [] for k in fns}
    for _ in range(rounds):
        for k, f in fns.items():
            out[k].append(f())
    return out


def median(xs: list[float]) -> float:
    return float(statistics.median(xs))


def cpu_model() -> str:
    """The processor's name as Linux reports it (/proc/cpuinfo's first `model name`),
    "" elsewhere: the pipeline's ratios depend on it (per-window Python and the caches
    against onnxruntime's per-call cost), so a figure without it cannot be compared."""
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as f:
            for line in f:
                key, _, value = line.partition(":")
                if key.strip() == "model name":
                    return value.strip()
    except OSError:
        pass
    return ""


# glibc's mallopt parameters (malloc.h) and the largest mmap threshold it takes on 64-bit.
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3
_MMAP_MAX = 32 * 1024 * 1024


def steady_allocator() -> bool:
    """Keep freed memory in this process's heap (glibc: `mallopt`, fixed thresholds),
    so that a block of fresh temporaries costs the same in every round. By default glibc
    serves an allocation above its mmap threshold (128 KiB at first) with a new mapping,
    page-faulted in on first write and unmapped when freed, and raises the threshold as
    such blocks are freed: how fast a bare numpy pass with megabyte temporaries runs then
    depends on what the process did before (the pipeline bench's full-featured bare
    reference read 29,000-34,000 windows/s run alone and 44,000 inside `make bench`).
    It holds for the rest of the process (glibc keeps a fixed threshold once set), so in
    `make bench` the benchmarks after the one that calls it run with it too. Returns
    whether it was set (False off glibc)."""
    import ctypes
    import ctypes.util

    name = ctypes.util.find_library("c")
    try:
        libc = ctypes.CDLL(name or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    return bool(mallopt(_M_MMAP_THRESHOLD, _MMAP_MAX)) and \
        bool(mallopt(_M_TRIM_THRESHOLD, 2 * _MMAP_MAX))


def machine() -> dict[str, Any]:
    return {"cpu_count": os.cpu_count(), "cpu_model": cpu_model(),
            "machine": platform.machine(), "python": platform.python_version(),
            "system": platform.system(), "date": datetime.now(UTC).strftime("%Y-%m-%d")}


def table(rows: list[list[str]], header: list[str]) -> str:
    widths = [max(len(str(r[i])) for r in [header, *rows]) for i in range(len(header))]
    line = "  ".join(h.ljust(w) for h, w in zip(header, widths, strict=True))
    sep = "  ".join("-" * w for w in widths)
    body = "\n".join("  ".join(str(c).ljust(w) for c, w in zip(r, widths, strict=True))
                     for r in rows)
    return f"{line}\n{sep}\n{body}"


def save(name: str, doc: dict[str, Any]) -> Path:
    RESULTS.mkdir(parents=True, exist_ok=True)
    p = RESULTS / f"{name}.json"
    tmp = p.with_suffix(".json.tmp")
    tmp.write_text(json.dumps({"machine": machine(), **doc}, indent=2))
    tmp.replace(p)
    return p


def timed(fn: Callable[[], int]) -> float:
    """Call fn (which returns a count of things done) and return things per second."""
    t0 = time.perf_counter()
    n = fn()
    return n / (time.perf_counter() - t0)


def quiet_bundle(dest: Path, names: list[str], z: Any, mean: float) -> tuple[Path, bytes]:
    """A PCA-autoencoder bundle over `names` whose threshold is never reached, so a
    benchmark measures the scoring path without events; returns (directory, ONNX bytes)."""
    from agent.commission.export import export_dense, pca_autoencoder
    from agent.models.bundle import write_bundle

    meta = {"asset": "A", "mode": "default", "model_id": "A/default", "version": 1,
            "feature_names": names,
            "scaler": {"mean": [mean] * len(names), "scale": [1.0] * len(names)},
            "score": {"function": "mse"}, "threshold": 1e9, "clear_threshold": 1e8,
            "onnx": {"input": "x", "output": "recon"}}
    model = export_dense(pca_autoencoder(z, 8))
    return write_bundle(dest, model, meta), model
