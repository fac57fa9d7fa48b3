"""Training one rebaseline: the job directory, the worker process, its result.

`WorkerTrainer.train` writes the collected windows and `job.json` into the job's
directory, runs `python -m agent.learning.worker` there (nice 10, one BLAS thread) and
waits for it; `result.json` is its answer, and a worker that ends without one is a
failure. The manager runs this on a thread of its own and only ever sees the
`TrainingResult`; tests may hand the manager another `Trainer`.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

import numpy as np

from agent.learning.jobs import Job, Result
from agent.learning.worker import JOB_JSON, RESULT_JSON, WINDOWS_NPZ, write_json

# The worker runs numpy on one core: OpenBLAS/MKL/OpenMP would otherwise start a thread
# per core and compete with detection.
ONE_THREAD = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}

Started = Callable[[subprocess.Popen[bytes]], None]


@dataclass(frozen=True)
class TrainingResult:
    """The worker's answer (`result.json`), or why there is none."""

    verdict: Result
    reasons: list[str]
    figures: dict[str, Any] = field(default_factory=dict)
    version: int | None = None  # the version written (kept only when accepted)

    @classmethod
    def failed(cls, reason: str) -> TrainingResult:
        return cls(Result.FAILED, [reason])

    @classmethod
    def from_json(cls, doc: Mapping[str, Any]) -> TrainingResult:
        version = doc.get("version")
        return cls(Result.of_worker(doc.get("verdict")), list(doc.get("reasons", [])),
                   dict(doc.get("figures", {})), version if isinstance(version, int) else None)


class Trainer(Protocol):
    def train(self, job: Job, job_dir: Path, spec: Mapping[str, Any],
              started: Started) -> TrainingResult:
        """Train `job` in `job_dir` (`spec` is the worker's job.json); call `started`
        with the worker process once it runs. May raise: the manager reports that as a
        failed job."""
        ...


class WorkerTrainer:
    """Trains in `python -m agent.learning.worker` (agent/learning/worker.py).

    `env` is read at each start (a live mapping: tests add a hook's variable to it)."""

    def __init__(self, python: str = sys.executable, env: Mapping[str, str] | None = None
                 ) -> None:
        self.python = python
        self.env = env if env is not None else {}

    def train(self, job: Job, job_dir: Path, spec: Mapping[str, Any],
              started: Started) -> TrainingResult:
        job_dir.mkdir(parents=True, exist_ok=True)
        tmp = job_dir / f".{WINDOWS_NPZ}.tmp"
        with open(tmp, "wb") as fh:
            np.savez(fh, features=np.stack(job.rows), window_start=np.asarray(job.starts))
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, job_dir / WINDOWS_NPZ)
        write_json(job_dir / JOB_JSON, dict(spec))
        env = {**os.environ, **ONE_THREAD, **self.env}
        with open(job_dir / "worker.log", "wb") as errf:
            proc = subprocess.Popen([self.python, "-m", "agent.learning.worker", str(job_dir)],
                                    stdin=subprocess.DEVNULL, stdout=errf, stderr=errf,
                                    env=env, cwd=str(Path(__file__).resolve().parents[2]))
            started(proc)
            code = proc.wait()
        try:
            doc = json.loads((job_dir / RESULT_JSON).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            how = f"killed by signal {-code}" if code < 0 else f"exit code {code}"
            return TrainingResult.failed(f"the training worker ended without a result ({how})")
        return TrainingResult.from_json(doc)
