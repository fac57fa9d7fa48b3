"""Run fuzz targets under atheris for a set time each and sum up (`make fuzz`):

    python -m tests.fuzz [--seconds 60] [--work .fuzz] [TARGET ...]

Each target runs in its own process (libFuzzer ends the process it runs in) with two
corpus directories under `--work`: `<target>/corpus`, which keeps growing across runs
(libFuzzer adds every input that reached new coverage), and `<target>/seeds`, rewritten
each run from the target's seeds. A crash, hang or out-of-memory input is saved as
`<work>/<target>/crash-*` (or `timeout-*`, `oom-*`); replay one with
`python -m tests.fuzz.run TARGET FILE`. Per target the table shows the executions, the
coverage libFuzzer counted over the instrumented Python (`cov`: edges, `ft`: features),
the corpus size and the crashes; the full output is in `<work>/<target>/log.txt`.
Exits 1 when any target crashed.
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

from tests.fuzz.harness import MODULES

_STATS = re.compile(r"#(\d+)\s+\w+\s+cov: (\d+) ft: (\d+) corp: (\d+)/")
_EXECUTED = re.compile(r"stat::number_of_executed_units: (\d+)")


@dataclass
class Result:
    target: str
    seconds: float
    executions: int
    cov: int
    ft: int
    corpus: int
    crashes: list[Path]
    returncode: int


def run_target(name: str, seconds: int, work: Path, extra: list[str]) -> Result:
    base = work / name
    corpus, seeds = base / "corpus", base / "seeds"
    corpus.mkdir(parents=True, exist_ok=True)
    before = set(base.glob("*-*"))
    cmd = [sys.executable, "-m", "tests.fuzz.run", name, "--seeds", str(seeds),
           str(corpus), str(seeds), f"-max_total_time={seconds}", "-print_final_stats=1",
           "-rss_limit_mb=3072", f"-artifact_prefix={base}/", *extra]
    # libFuzzer ends the process without Python's exit handlers, so the target's
    # scratch directories go in a TMPDIR of its own, removed here.
    tmp = base / "tmp"
    tmp.mkdir(exist_ok=True)
    t0 = time.monotonic()
    with open(base / "log.txt", "wb") as log:
        proc = subprocess.run(cmd, stdout=log, stderr=subprocess.STDOUT, check=False,
                              env={**os.environ, "TMPDIR": str(tmp.resolve())})
    took = time.monotonic() - t0
    shutil.rmtree(tmp, ignore_errors=True)
    text = (base / "log.txt").read_text(errors="replace")
    stats = _STATS.findall(text)
    execs = _EXECUTED.findall(text)
    last = stats[-1] if stats else ("0", "0", "0", "0")
    crashes = sorted(p for p in set(base.glob("*-*")) - before
                     if p.name.split("-")[0] in ("crash", "timeout", "oom", "leak"))
    return Result(name, took, int(execs[-1]) if execs else int(last[0]), int(last[1]),
                  int(last[2]), int(last[3]), crashes, proc.returncode)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tests.fuzz", description=__doc__.split("\n")[0])
    ap.add_argument("targets", nargs="*", metavar="TARGET",
                    help=f"default: all ({', '.join(MODULES)})")
    ap.add_argument("--seconds", type=int, default=60, help="per target (default 60)")
    ap.add_argument("--work", type=Path, default=Path(".fuzz"),
                    help="corpora, logs and crash inputs (default .fuzz)")
    ap.add_argument("--libfuzzer", action="append", default=[], metavar="FLAG",
                    help="an extra libFuzzer flag, e.g. --libfuzzer=-seed=1 (repeatable)")
    args = ap.parse_args(argv)
    names = args.targets or list(MODULES)
    unknown = [n for n in names if n not in MODULES]
    if unknown:
        ap.error(f"unknown targets {', '.join(unknown)} (known: {', '.join(MODULES)})")
    print(f"{'target':<18} {'executions':>10} {'exec/s':>7} {'cov':>6} {'ft':>7} "
          f"{'corpus':>6}  crashes", flush=True)
    failed = False
    for name in names:
        r = run_target(name, args.seconds, args.work, args.libfuzzer)
        rate = r.executions / r.seconds if r.seconds else 0.0
        crashed = ", ".join(str(p) for p in r.crashes) or ("0" if r.returncode == 0 else
                                                           f"exit {r.returncode}, see log")
        failed |= bool(r.crashes) or r.returncode != 0
        print(f"{name:<18} {r.executions:>10} {rate:>7.0f} {r.cov:>6} {r.ft:>7} "
              f"{r.corpus:>6}  {crashed}", flush=True)
    print(f"logs and corpora under {args.work}/<target>/", flush=True)
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
