"""`python -m agent.learning.worker JOB_DIR`: one rebaseline, in its own low-priority process.

The daemon writes a job directory (`job.json`, `windows.npz`) and starts this module
with `os.nice(10)` applied here first, one BLAS/OpenMP thread (set by the parent in the
environment), so training competes only for idle CPU and detection on other assets
keeps its pace. Python threads cannot be niced one by one, hence the process.

The worker reads the base version from the model store, runs `agent.learning.rebaseline.rebaseline`,
and, when accepted, writes the new version directory by temp-and-rename (it never
touches the `active` link: activating is the daemon's job). Its verdict goes into
`result.json`, written by temp-and-rename last of all. If the worker dies at any point,
there is no `result.json`, nothing is active that was not before, and a half-written
version is only a `.v<N>.tmp-*` directory the store ignores.

job.json: {"asset", "mode", "store": {"root", "keep"}, "base_version", "new_version",
"request": {...}, "settings": {...}, "detector": [k, n, m], "created"}.
windows.npz: "features" [N, F] in the model's feature order, "window_start" [N].
"""

from __future__ import annotations

import contextlib
import json
import os
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from agent.learning.rebaseline import OldModel, Outcome

JOB_JSON = "job.json"
WINDOWS_NPZ = "windows.npz"
RESULT_JSON = "result.json"
NICE = 10
# Test hook: seconds to wait after loading, before training (so a test can kill it mid-job).
TEST_DELAY_ENV = "WATCHKEEP_TEST_WORKER_DELAY_S"


def write_json(path: Path, doc: Any) -> None:
    """JSON by temp-and-rename, fsynced."""
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(doc, fh, indent=2, allow_nan=False)
        fh.write("\n")
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def _ort_scores(layers: list[Any], z: np.ndarray) -> np.ndarray:
    """Scores as the daemon computes them: onnxruntime on the exported model, float32 in."""
    import onnxruntime as ort

    from agent.commission.export import INPUT_NAME, OUTPUT_NAME, export_dense
    from agent.models.bundle import _session_options  # the daemon's own session settings

    sess = ort.InferenceSession(export_dense(layers), sess_options=_session_options(),
                                providers=["CPUExecutionProvider"])
    z32 = np.ascontiguousarray(z, dtype=np.float32)
    out = sess.run([OUTPUT_NAME], {INPUT_NAME: z32})[0]
    return np.mean((z32 - out).astype(np.float64) ** 2, axis=1)


def _old_model(base: Path) -> tuple[OldModel, dict[str, Any]]:
    """The base version as `OldModel`, and its model.json document."""
    from agent.learning.rebaseline import OldModel, layers_from_onnx
    from agent.models.bundle import MODEL_JSON, MODEL_ONNX

    doc = json.loads((base / MODEL_JSON).read_text(encoding="utf-8"))
    layers = layers_from_onnx((base / MODEL_ONNX).read_bytes())
    old = OldModel(layers, tuple(doc["feature_names"]),
                   np.asarray(doc["scaler"]["mean"], np.float64),
                   np.asarray(doc["scaler"]["scale"], np.float64),
                   float(doc["threshold"]), float(doc["clear_threshold"]), int(doc["version"]),
                   dict(doc.get("calibration", {})))
    return old, doc


def _new_doc(doc: dict[str, Any], job: dict[str, Any], old: OldModel, out: Outcome, version: int,
             starts: np.ndarray) -> dict[str, Any]:
    """The new version's model.json: the base's, with the new threshold, calibration,
    training summary and lineage."""
    from datetime import UTC, datetime

    from agent import __version__

    doc = {k: v for k, v in doc.items() if k not in ("format", "format_version")}
    now = datetime.now(UTC).isoformat(timespec="seconds").replace("+00:00", "Z")
    training = dict(doc.get("training", {}))
    training["rebaseline"] = {"n_windows": len(starts),
                              "time_span": {"start": float(starts.min()),
                                            "end": float(starts.max())},
                              "rehearsal_windows": out.rehearsal.size if out.rehearsal else 0}
    doc.update({
        "version": version, "threshold": out.threshold,
        "clear_threshold": out.clear_threshold,
        "calibration": {**(out.calibration or {}), "method": "quantile",
                        "data": "held-out new-normal + rehearsal windows"},
        "created": now, "watchkeep_version": __version__, "training": training,
        "lineage": {"method": "rebaseline", "parent": old.version,
                    "request": job["request"], "validation": out.figures},
    })
    return doc


def run_job(job_dir: Path) -> dict[str, Any]:
    """Carry out the job in `job_dir` and return the result document (also written)."""
    from agent.commission.export import export_dense
    from agent.core.detector import DetectorParams
    from agent.learning.rebaseline import Settings, Verdict, rebaseline
    from agent.models.store import ModelStore, read_rehearsal

    t0 = time.monotonic()
    job = json.loads((job_dir / JOB_JSON).read_text(encoding="utf-8"))
    store = ModelStore(job["store"]["root"], job["store"]["keep"])
    asset, mode = job["asset"], job["mode"]
    base = store.version_path(asset, mode, int(job["base_version"]))
    old, doc = _old_model(base)
    with np.load(job_dir / WINDOWS_NPZ, allow_pickle=False) as z:
        x_new = np.asarray(z["features"], np.float64)
        starts = np.asarray(z["window_start"], np.float64)
    reh = read_rehearsal(base)
    settings = Settings(**job["settings"], detector=DetectorParams(*job["detector"]))
    delay = float(os.environ.get(TEST_DELAY_ENV, "0") or 0)
    if delay > 0:
        time.sleep(delay)
    out = rebaseline(old, x_new, reh, settings, accept_shift=bool(job["request"].get(
        "accept_shift")), score_fn=_ort_scores)
    result: dict[str, Any] = {"verdict": out.verdict.value, "reasons": list(out.reasons),
                              "figures": out.figures, "base_version": old.version,
                              "version": None, "pid": os.getpid()}
    if out.verdict is Verdict.ACCEPTED:
        assert out.layers is not None and out.threshold is not None
        version = int(job["new_version"])
        model_bytes = export_dense(out.layers, doc=f"watchkeep autoencoder {asset}/{mode} "
                                                   f"v{version} (rebaselined)")
        store.write_version(asset, mode, version, model_bytes,
                            _new_doc(doc, job, old, out, version, starts), out.rehearsal)
        result["version"] = version
    result["train_time_s"] = round(time.monotonic() - t0, 3)
    write_json(job_dir / RESULT_JSON, result)
    return result


def main(argv: list[str]) -> int:
    if len(argv) != 1:
        print("usage: python -m agent.learning.worker JOB_DIR", file=sys.stderr)
        return 2
    with contextlib.suppress(OSError):  # already as low as allowed
        os.nice(NICE)
    job_dir = Path(argv[0])
    try:
        run_job(job_dir)
    except Exception as exc:  # reported to the daemon as a failed job, with the reason
        write_json(job_dir / RESULT_JSON, {"verdict": "failed",
                                           "reasons": [f"{type(exc).__name__}: {exc}"],
                                           "figures": {}, "version": None})
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
