"""The package's shape, read from its source: no import cycles, and a pure `agent/core/`.

The import graph is built from the AST of every module under `agent/`, with every
import wherever it is written: at the top, under `if TYPE_CHECKING:` and inside
functions (a deferred import hides a cycle from the interpreter, not from the reader).
A failure names each cycle as a path of modules, with the line of each import.
"""

from __future__ import annotations

import ast
import itertools
import sys
from collections.abc import Collection, Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
PACKAGE = "agent"

# What `agent/core/` may not import: sockets, threads, processes, files, databases,
# clock reads (`now` is a parameter), logging.
CORE_FORBIDDEN_STDLIB = frozenset({
    "socket", "threading", "_thread", "multiprocessing", "concurrent", "asyncio",
    "subprocess", "sqlite3", "time", "os", "shutil", "tempfile", "select", "selectors",
    "signal", "io", "logging", "http", "urllib", "ssl", "pathlib", "glob",
})
# Besides the standard library's other modules and itself, it may import numpy; the
# pure codecs its decoders parse payloads with (orjson; protobuf and the generated
# Sparkplug B classes, agent/sparkplug_b); and the config's frozen value types
# (agent/config/schema.py, no loader: checked below to stay plain values).
CORE_ALLOWED_THIRD_PARTY = frozenset({"numpy", "orjson", "google"})
CORE_ALLOWED_AGENT = frozenset({"agent.config.schema", "agent.sparkplug_b",
                                "agent.sparkplug_b.sparkplug_b_pb2"})
# The value modules the core may read and what they in turn may import of agent/.
VALUE_MODULES = {"agent.config.schema": ("agent.config.rebaseline", "agent.core"),
                 "agent.config.rebaseline": ()}


@dataclass(frozen=True)
class Edge:
    source: str
    target: str
    line: int


def module_name(path: Path) -> str:
    rel = path.relative_to(ROOT).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def package_modules() -> dict[str, Path]:
    """Every module of the package by dotted name (generated protobuf code included)."""
    return {module_name(p): p for p in sorted((ROOT / PACKAGE).rglob("*.py"))}


def _absolute(module: str, is_package: bool, node: ast.ImportFrom) -> str:
    if node.level == 0:
        return node.module or ""
    base = module.split(".")
    if not is_package:
        base = base[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def imports_of(module: str, path: Path, modules: Collection[str] = ()
               ) -> Iterator[tuple[str, int]]:
    """(imported module, line) for every import in the file, at any depth. `from pkg
    import mod` names the module pkg.mod when `modules` has it, else pkg."""
    tree = ast.parse(path.read_text(encoding="utf-8"), str(path))
    is_package = path.name == "__init__.py"
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                yield alias.name, node.lineno
        elif isinstance(node, ast.ImportFrom):
            base = _absolute(module, is_package, node)
            for alias in node.names:
                sub = f"{base}.{alias.name}"
                yield (sub if sub in modules else base), node.lineno


def import_graph() -> dict[str, list[Edge]]:
    """module -> its imports of other modules of the package (each target once)."""
    mods = package_modules()
    graph: dict[str, list[Edge]] = {}
    for mod, path in mods.items():
        seen: dict[str, Edge] = {}
        for target, line in imports_of(mod, path, mods):
            if target in mods and target != mod and target not in seen:
                seen[target] = Edge(mod, target, line)
        graph[mod] = list(seen.values())
    return graph


def components(graph: dict[str, list[Edge]]) -> list[list[str]]:
    """The strongly connected components of more than one module (Tarjan), each sorted:
    every module of one reaches every other."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on: set[str] = set()
    comps: list[list[str]] = []
    counter = 0  # the graph's depth is well under the default recursion limit

    def visit(v: str) -> None:
        nonlocal counter
        index[v] = low[v] = counter
        counter += 1
        stack.append(v)
        on.add(v)
        for e in graph.get(v, []):
            w = e.target
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                comps.append(comp)

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return sorted(sorted(c) for c in comps)


def cycles(graph: dict[str, list[Edge]]) -> list[list[str]]:
    """One cycle per component, as a closed path of module names."""
    return [_path_through(graph, set(c)) for c in components(graph)]


def _path_through(graph: dict[str, list[Edge]], comp: set[str]) -> list[str]:
    """A shortest cycle through the component's first module (breadth first)."""
    start = min(comp)
    prev: dict[str, str] = {}
    frontier = [start]
    while frontier:
        nxt = []
        for v in frontier:
            for e in graph[v]:
                if e.target not in comp:
                    continue
                if e.target == start:
                    path = [v]
                    while path[-1] != start:
                        path.append(prev[path[-1]])
                    return [start, *reversed(path[:-1]), start] if v != start else [start, start]
                if e.target not in prev:
                    prev[e.target] = v
                    nxt.append(e.target)
        frontier = nxt
    return sorted(comp)


def _describe(graph: dict[str, list[Edge]], cycle: list[str]) -> str:
    lines = {(e.source, e.target): e.line for es in graph.values() for e in es}
    hops = [f"{a} (line {lines[(a, b)]})" for a, b in itertools.pairwise(cycle)]
    return " -> ".join(hops) + f" -> {cycle[-1]}"


def test_no_import_cycles() -> None:
    """No module of agent/ reaches itself through imports, type-only ones included."""
    graph = import_graph()
    found = []
    for comp in components(graph):
        cycle = _path_through(graph, set(comp))
        rest = sorted(set(comp) - set(cycle))
        found.append(_describe(graph, cycle) + (f" (and through {', '.join(rest)})"
                                                if rest else ""))
    assert not found, "import cycles:\n  " + "\n  ".join(found)


def test_the_graph_sees_type_only_and_deferred_imports() -> None:
    """Imports under `if TYPE_CHECKING:` and inside functions are edges too."""
    graph = import_graph()
    targets = {e.target for e in graph["agent.daemon"]}
    assert {"agent.learning.manager", "agent.ops.loop", "agent.pipeline.builder"} <= targets
    assert any(e.target == "agent.config.load" for e in graph["agent.cli.main"])
    assert any(e.target == "agent.models.bundle" for e in graph["agent.learning.ports"])


def test_cycle_finder_names_a_cycle() -> None:
    """The finder itself: a three-module loop is reported as a closed path."""
    g = {"a": [Edge("a", "b", 1)], "b": [Edge("b", "c", 2)], "c": [Edge("c", "a", 3)],
         "d": [Edge("d", "a", 4)]}
    assert cycles(g) == [["a", "b", "c", "a"]]
    assert _describe(g, ["a", "b", "c", "a"]) == "a (line 1) -> b (line 2) -> c (line 3) -> a"


def _stdlib_root(name: str) -> str:
    return name.split(".")[0]


def _within(target: str, roots: Collection[str]) -> bool:
    return any(target == r or target.startswith(r + ".") for r in roots)


def _check_import(rel: Path, line: int, target: str, mods: Collection[str],
                  allowed_agent: Collection[str], allow_paths: bool = False) -> str | None:
    """Why one import of a pure module is not allowed, or None."""
    root = _stdlib_root(target)
    if root == PACKAGE:
        if target in mods and not _within(target, allowed_agent):
            return f"{rel}:{line} imports {target} (outside agent.core)"
    elif root in CORE_FORBIDDEN_STDLIB and not (allow_paths and root == "pathlib"):
        return f"{rel}:{line} imports {target} (I/O, threads or the clock)"
    elif root not in sys.stdlib_module_names and root not in CORE_ALLOWED_THIRD_PARTY \
            and root != "__future__":
        return f"{rel}:{line} imports {target} (not numpy or the standard library)"
    return None


def core_violations() -> list[str]:
    """Imports of agent/core/ modules (and of the value modules they read) that are
    not allowed."""
    out = []
    mods = package_modules()
    for mod, path in mods.items():
        if _within(mod, ("agent.core",)):
            allowed, paths = ("agent.core", *CORE_ALLOWED_AGENT), False
        elif mod in VALUE_MODULES:  # Path values (bundle paths), nothing else of pathlib
            allowed, paths = VALUE_MODULES[mod], True
        else:
            continue
        rel = path.relative_to(ROOT)
        for target, line in imports_of(mod, path, mods):
            why = _check_import(rel, line, target, mods, allowed, paths)
            if why is not None:
                out.append(why)
    return sorted(set(out))


def test_core_is_pure() -> None:
    """agent/core/ imports only itself, numpy, pure codecs, the config's value types and
    pure standard-library modules."""
    bad = core_violations()
    assert not bad, "agent/core/ must stay pure:\n  " + "\n  ".join(bad)


@pytest.mark.parametrize("source, found", [
    ("import socket", "socket"),
    ("import time", "time"),
    ("from threading import Lock", "threading"),
    ("import sqlite3", "sqlite3"),
    ("import subprocess", "subprocess"),
    ("import paho.mqtt.client", "paho.mqtt.client"),
    ("import onnxruntime", "onnxruntime"),
    ("import multiprocessing", "multiprocessing"),
    ("from agent.config.load import Config", "agent.config.load"),
    ("from agent.config import load", "agent.config.load"),
    ("if TYPE_CHECKING:\n    from agent.ops.metrics import Metrics", "agent.ops.metrics"),
])
def test_core_purity_check_catches(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                   source: str, found: str) -> None:
    """The purity check fails on each kind of forbidden import, type-only ones too."""
    fake = tmp_path / "agent" / "core"
    fake.mkdir(parents=True)
    (tmp_path / "agent" / "__init__.py").write_text("")
    (fake / "__init__.py").write_text("")
    (fake / "bad.py").write_text("from typing import TYPE_CHECKING\n" + source + "\n")
    for pkg in ("config", "ops"):
        (tmp_path / "agent" / pkg).mkdir()
        (tmp_path / "agent" / pkg / "__init__.py").write_text("")
        (tmp_path / "agent" / pkg / "load.py").write_text("")
        (tmp_path / "agent" / pkg / "metrics.py").write_text("")
    monkeypatch.setattr(sys.modules[__name__], "ROOT", tmp_path)
    bad = core_violations()
    assert len(bad) == 1 and f"imports {found} " in bad[0], bad


def test_value_modules_stay_plain(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The core may read agent.config.schema, which may not reach the reader or loader."""
    for pkg in ("core", "config"):
        (tmp_path / "agent" / pkg).mkdir(parents=True)
        (tmp_path / "agent" / pkg / "__init__.py").write_text("")
    (tmp_path / "agent" / "__init__.py").write_text("")
    (tmp_path / "agent" / "core" / "ok.py").write_text("from agent.config.schema import X\n")
    (tmp_path / "agent" / "config" / "reader.py").write_text("")
    (tmp_path / "agent" / "config" / "schema.py").write_text(
        "from pathlib import Path\nfrom agent.config.reader import Reader\n")
    monkeypatch.setattr(sys.modules[__name__], "ROOT", tmp_path)
    bad = core_violations()
    assert len(bad) == 1 and "schema.py:2 imports agent.config.reader" in bad[0], bad
