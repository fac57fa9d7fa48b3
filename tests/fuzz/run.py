"""One fuzz target under atheris, in this process:

    python -m tests.fuzz.run TARGET [--seeds DIR] [libFuzzer flags and corpus dirs...]

`--seeds DIR` writes the target's seeds into DIR first (pass DIR as a corpus dir too).
libFuzzer ends the process: at `-max_total_time`/`-runs`, or at the first crash, whose
input it saves under `-artifact_prefix`. `python -m tests.fuzz` runs every target
this way and sums up; see DEVELOPERS.md.
"""

from __future__ import annotations

import sys
from pathlib import Path


def main(argv: list[str]) -> None:
    import atheris  # optional: installed with the dev extra

    from tests.fuzz import harness

    if len(argv) < 2 or argv[1] not in harness.MODULES:
        sys.exit(f"usage: python -m tests.fuzz.run TARGET [--seeds DIR] [libFuzzer args]; "
                 f"targets: {', '.join(harness.MODULES)}")
    name, rest = argv[1], argv[2:]
    seeds_dir = None
    if "--seeds" in rest:
        i = rest.index("--seeds")
        seeds_dir = Path(rest[i + 1])
        rest = rest[:i] + rest[i + 2:]
    _, packages = harness.MODULES[name]
    with atheris.instrument_imports(include=list(packages)):
        target = harness.load(name)
        # Targets import some modules where they first need them (a daemon, the
        # pipeline): one seed through the oracle here gets those instrumented too.
        seeds = list(target.seeds())
        target.one_input(seeds[0])
    if seeds_dir is not None:
        harness.write_seeds(target, seeds_dir)
    flags = [f"-max_len={target.max_len}", f"-timeout={target.timeout_s}"]
    atheris.Setup([argv[0], *flags, *rest], target.one_input)
    atheris.Fuzz()


if __name__ == "__main__":
    main(sys.argv)
