"""Run every benchmark module `tests/bench/bench_*.py` in turn (`make bench`).

`python -m tests.bench NAME... [--option ...]` runs the modules whose name contains a
NAME, with the options (those of a module given alone). The long runs (`LONG`) only run
when named: `python -m tests.bench soak`."""

from __future__ import annotations

import importlib
import pkgutil
import sys
import time

import tests.bench as pkg
from tests.bench.common import machine

LONG = ("bench_soak",)  # 30 minutes of wall time: only when asked for by name


def main(argv: list[str]) -> int:
    names = sorted(m.name for m in pkgutil.iter_modules(pkg.__path__)
                   if m.name.startswith("bench_"))
    opts = next((i for i, a in enumerate(argv) if a.startswith("-")), len(argv))
    argv, options = argv[:opts], argv[opts:]
    if argv:
        names = [n for n in names if any(a in n for a in argv)]
    else:
        names = [n for n in names if n not in LONG]
    failed = 0
    m = machine()
    print(f"machine: {m['cpu_model'] or m['machine']}, {m['cpu_count']} CPUs, "
          f"Python {m['python']}, {m['date']}", flush=True)
    for name in names:
        t0 = time.monotonic()
        print(f"\n=== {name} ===", flush=True)
        mod = importlib.import_module(f"tests.bench.{name}")
        # A benchmark with options of its own runs with its defaults, unless it was the
        # only one named.
        sys.argv = [name, *(options if len(names) == 1 else [])]
        try:
            rc = mod.main()
        except Exception as exc:  # one broken benchmark must not hide the others
            print(f"{name} failed: {type(exc).__name__}: {exc}")
            rc = 1
        failed += bool(rc)
        print(f"({name}: {time.monotonic() - t0:.1f} s)", flush=True)
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
