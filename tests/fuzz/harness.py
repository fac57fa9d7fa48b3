"""What every fuzz target is, and the registry of targets (no `agent` imports here).

A target's input is bytes. Its oracle, `one_input(data)`, returns quietly when the code
under test did what its contract says (a decoded value, or the documented rejection)
and raises on anything else: an unexpected exception escapes as itself, a broken
invariant as `Finding`. atheris reports either as a crash and saves the input; the
Hypothesis pass shrinks it.
"""

from __future__ import annotations

import hashlib
import importlib
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any


class Finding(AssertionError):
    """An input made the code under test break its contract (not a crash as such)."""


def check(ok: bool, what: str) -> None:
    """Raise `Finding(what)` unless `ok` (assert statements vanish under -O)."""
    if not ok:
        raise Finding(what)


@dataclass(frozen=True)
class Target:
    """One fuzz target.

    `one_input` is the oracle; `seeds` the starting corpus (real payloads); `strategy`
    a zero-argument callable returning a Hypothesis strategy of inputs for the same
    oracle (structured where byte mutation would rarely reach the interesting values);
    `examples` how many the short pass in `make test` draws; `max_len` libFuzzer's input
    size cap; `timeout_s` how long one input may take before libFuzzer calls it a hang.
    """

    name: str
    one_input: Callable[[bytes], None]
    seeds: Callable[[], Iterable[bytes]]
    strategy: Callable[[], Any]
    examples: int = 100
    max_len: int = 8192
    timeout_s: int = 10
    notes: str = field(default="", compare=False)


# name -> (module, the packages atheris instruments for coverage feedback). Each module
# has TARGET, or TARGETS[name] when it holds several. Instrumenting only what the target
# exercises keeps the executions fast; the YAML and JSON parsers are pure Python where
# the target's input goes through them.
MODULES: dict[str, tuple[str, tuple[str, ...]]] = {
    "decode-json": ("tests.fuzz.fuzz_decode", ("agent",)),
    "decode-json-batch": ("tests.fuzz.fuzz_decode", ("agent",)),
    "decode-text": ("tests.fuzz.fuzz_decode", ("agent",)),
    "sparkplug-b": ("tests.fuzz.fuzz_sparkplug", ("agent",)),
    "ingest-tick": ("tests.fuzz.fuzz_ingest_tick", ("agent",)),
    "config": ("tests.fuzz.fuzz_config", ("agent", "yaml")),
    "bundle-json": ("tests.fuzz.fuzz_bundle", ("agent", "json")),
    "bundle-onnx": ("tests.fuzz.fuzz_bundle", ("agent",)),
    "admin": ("tests.fuzz.fuzz_admin", ("agent", "json")),
    "mqtt-commands": ("tests.fuzz.fuzz_commands", ("agent", "json")),
}


def load(name: str) -> Target:
    """The target called `name` (imports its module)."""
    mod = importlib.import_module(MODULES[name][0])
    targets: dict[str, Target] = getattr(mod, "TARGETS", None) or {mod.TARGET.name: mod.TARGET}
    return targets[name]


def write_seeds(target: Target, dest: Path) -> int:
    """The target's seeds as files named by their SHA-1 (libFuzzer's own naming)."""
    dest.mkdir(parents=True, exist_ok=True)
    n = 0
    for data in target.seeds():
        (dest / hashlib.sha1(data).hexdigest()).write_bytes(data)
        n += 1
    return n
