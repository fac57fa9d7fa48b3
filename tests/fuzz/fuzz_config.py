"""Fuzz target `config`: a config file's bytes through `agent.config.load.load_config`
(the YAML loader, then every check), as `watchkeep run`, `check-config` and a SIGHUP
reload read it.

Input: the file's bytes. The contract (STYLE.md rule 4, errors.py): a `Config`, or a
`ConfigError` listing problems that each name where (a key path, a line and column, or
the file) and what was expected; never another exception. A hang shows as a libFuzzer
timeout (`make fuzz`) or the test timeout (the short pass).
"""

from __future__ import annotations

import copy
import functools
from pathlib import Path
from typing import Any

import yaml
from hypothesis import strategies as st

from agent.config.load import Config, load_config
from agent.errors import ConfigError
from tests.fuzz.common import (
    DEMO_CONFIG,
    EXAMPLE_CONFIG,
    awkward_numbers,
    json_values,
    scratch_dir,
)
from tests.fuzz.harness import Target, check


@functools.cache
def _file() -> Path:
    return scratch_dir("config") / "watchkeep.yaml"


def check_config(text: bytes) -> None:
    path = _file()
    path.write_bytes(text)
    try:
        cfg = load_config(path, require_bundles=False)
    except ConfigError as exc:
        check(bool(exc.problems), "a ConfigError without problems")
        for p in exc.problems:
            check(isinstance(p.key_path, str) and p.key_path.strip() != ""
                  and isinstance(p.expected, str) and p.expected != "", f"problem {p!r}")
        check(str(exc) != "", "an empty message")
        return
    check(isinstance(cfg, Config), f"load_config gave {cfg!r}")


def one_input(data: bytes) -> None:
    check_config(data)


@functools.cache
def _docs() -> tuple[Any, ...]:
    """Valid config documents: the example, the demo, the loader tests' base config."""
    from tests.unit.config.config_cases import base_doc

    return (yaml.safe_load(EXAMPLE_CONFIG.read_text()), yaml.safe_load(DEMO_CONFIG.read_text()),
            base_doc())


def seeds() -> list[bytes]:
    """The shipped configs, the loader tests' broken configs, YAML that does not parse,
    an alias bomb."""
    from tests.unit.config.config_cases import BAD_YAML, BROKEN

    out = [EXAMPLE_CONFIG.read_bytes(), DEMO_CONFIG.read_bytes(), BAD_YAML.encode()]
    tmp = scratch_dir("config-seeds")
    for case in BROKEN:
        built = case.build(tmp)
        out.append(built.encode() if isinstance(built, str)
                   else yaml.safe_dump(built, sort_keys=False).encode())
    bomb = "a: &a [x, x, x, x, x, x, x, x, x]\n" + "".join(
        f"{c}: &{c} [*{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}]\n"
        for p, c in zip("abcdefgh", "bcdefghi", strict=True)) + "site: *i\n"
    out.append(bomb.encode())
    return out


def _paths(node: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    """Every path into a document (dict keys and list indices)."""
    out = [prefix]
    if isinstance(node, dict):
        for k, v in node.items():
            out += _paths(v, (*prefix, k))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            out += _paths(v, (*prefix, i))
    return out


def _mutate(doc: Any, path: tuple[Any, ...], how: str, value: Any) -> Any:
    doc = copy.deepcopy(doc)
    if not path:
        return value
    node = doc
    for k in path[:-1]:
        node = node[k]
    if how == "delete":
        del node[path[-1]]
    elif how == "add" and isinstance(node[path[-1]], dict):
        node[path[-1]][str(value)[:20] or "?"] = value
    else:
        node[path[-1]] = value
    return doc


def strategy() -> Any:
    """Valid configs with one to three keys set to awkward values, deleted or joined by
    an unknown key (the loader's checks), and YAML text that is hard to parse."""
    values = st.one_of(awkward_numbers, json_values, st.sampled_from(
        ["~nosuchuser/x", "/dev/null", "\x00", "a\nb", "spBv1.0/g/DDATA/n/d", "+/#", ""]))

    @st.composite
    def mutated(draw: Any) -> bytes:
        docs = _docs()  # mostly the small one: PyYAML reads ~0.5 MB/s
        doc = docs[draw(st.sampled_from([0, 1, 2, 2, 2, 2]))]
        for _ in range(draw(st.integers(1, 3))):
            path = draw(st.sampled_from(_paths(doc)))
            doc = _mutate(doc, path, draw(st.sampled_from(["set", "delete", "add"])),
                          draw(values))
        return yaml.safe_dump(doc, sort_keys=False, allow_unicode=True).encode()

    text = st.one_of(
        st.integers(1, 4000).map(lambda n: ("site: " + "[" * n + "]" * n).encode()),
        st.integers(1, 4000).map(lambda n: ("site:\n" + "".join(
            " " * i + "- \n" for i in range(0, 2 * n, 2))).encode()),
        st.binary(max_size=64), st.text(max_size=64).map(str.encode),
        st.sampled_from([b"\xff\xfe", b"site: \xc3\x28", b"\x00", b"%YAML 9.9\n---\n",
                         b"!!python/object:os.system {}", b"? [a, b]\n: c\n",
                         b"&a [*a]", b"site: !!binary |\n  AAAA\n"]))
    return st.one_of(mutated(), text)


TARGET = Target("config", one_input, seeds, strategy, examples=40, max_len=65536,
                timeout_s=20)
