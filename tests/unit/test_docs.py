"""README.md and DEVELOPERS.md against the code: what they show must work as shown.

Every `watchkeep ...` / `watchkeep-sim ...` command line in a shell block or a code span
parses with the real argparse parsers (nothing is run); every `make X` names a target;
every YAML block of the README loads with the config loader (its bundles trained with
the project's own `train_bundle`) and passes check-config; every metric, config key
and event type the README names exists in the code; and every subcommand and flag of
both commands is documented. A failure names the file and line.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import re
import shlex
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml
from prometheus_client import CollectorRegistry, generate_latest

from agent.cli.main import build_parser
from agent.cli.main import main as watchkeep_main
from agent.core.events import TYPE_PREFIX, EventType
from agent.core.features import FEATURES
from agent.ops.metrics import Metrics
from simulator.cli import _parser as sim_parser

ROOT = Path(__file__).resolve().parents[2]
DOCS = ("README.md", "DEVELOPERS.md")
PROGS = ("watchkeep", "watchkeep-sim")
SHELL_LANGS = ("", "sh", "bash", "shell", "console")


@dataclass(frozen=True)
class Snippet:
    """Text taken from a document, with where it starts (for failure messages)."""

    doc: str
    line: int
    text: str
    kind: str  # "block:<lang>", "indented" or "span"
    row: str = ""  # for spans inside a table row: the whole row

    @property
    def where(self) -> str:
        return f"{self.doc}:{self.line}"


def scan(doc: str, text: str | None = None) -> tuple[list[Snippet], list[Snippet]]:
    """(code blocks, code spans) of a Markdown file. Blocks are fenced (``` or ~~~, also
    inside list items) or indented by four or more spaces after a blank line; spans may
    run over a line break."""
    if text is None:
        text = (ROOT / doc).read_text(encoding="utf-8")
    lines = text.splitlines()
    blocks: list[Snippet] = []
    spans: list[Snippet] = []
    fence: tuple[int, str, list[str], str, int] | None = None  # line, lang, text, marker, indent
    indented: tuple[int, list[str]] | None = None
    para: list[tuple[int, str]] = []

    def flush_para() -> None:
        if not para:
            return
        text = "\n".join(t for _, t in para)
        starts = []
        pos = 0
        for n, t in para:
            starts.append((pos, n, t))
            pos += len(t) + 1
        for m in re.finditer(r"(`+)(.+?)\1", text, re.S):
            line_no, row = next((n, t) for p, n, t in reversed(starts) if p <= m.start())
            spans.append(Snippet(doc, line_no, m.group(2).strip().replace("\n", " "), "span",
                                 row if row.lstrip().startswith("|") else ""))
        para.clear()

    for i, raw in enumerate(lines, start=1):
        stripped = raw.lstrip()
        if fence is not None:
            marker, indent = fence[3], fence[4]
            if stripped.startswith(marker) and not stripped.lstrip(marker[0]).strip():
                blocks.append(Snippet(doc, fence[0], "\n".join(fence[2]), f"block:{fence[1]}"))
                fence = None
            else:  # a fence inside a list item: its lines lose the fence's indentation
                fence[2].append(raw[indent:] if not raw[:indent].strip() else raw.lstrip())
            continue
        m = re.match(r"(\s*)(`{3,}|~{3,})\s*([^`\s]*)", raw)
        if m:
            flush_para()
            fence = (i + 1, m.group(3).lower(), [], m.group(2), len(m.group(1)))
            continue
        is_code = raw.startswith("    ") and (indented is not None or not para)
        if is_code and raw.strip():
            if indented is None:
                indented = (i, [])
            indented[1].append(raw.strip())
            continue
        if indented is not None and raw.strip():
            blocks.append(Snippet(doc, indented[0], "\n".join(indented[1]).strip("\n"), "indented"))
            indented = None
        if not raw.strip():
            flush_para()
            if indented is not None:
                indented[1].append("")
            continue
        if raw.lstrip().startswith("|"):  # every table row is its own paragraph
            flush_para()
            para.append((i, raw))
            flush_para()
            continue
        para.append((i, raw))
    flush_para()
    assert fence is None, f"{doc}:{fence[0] - 1}: a code fence is never closed"
    if indented is not None:
        blocks.append(Snippet(doc, indented[0], "\n".join(indented[1]).strip("\n"), "indented"))
    return blocks, spans


SCANNED = {d: scan(d) for d in DOCS}

SAMPLE = """Intro with `watchkeep
status --json` over a line break.

1. A list item:

   ~~~yaml
   site: a
   ~~~

       sudo /opt/x/bin/watchkeep run -c /etc/w.yaml   # a comment

| `watchkeep demo` | `--plain` |

```sh
DURATION=5 make demo && watchkeep check-config \\
    site.yaml | head
```
"""


def test_the_scanner_finds_blocks_spans_and_lines() -> None:
    """Fences of both kinds (indented ones dedented), indented blocks, spans over a line
    break, table rows, continuation lines, env prefixes, sudo and pipes: each with its line."""
    blocks, spans = scan("X.md", SAMPLE)
    assert [(b.line, b.kind, b.text) for b in blocks] == [
        (7, "block:yaml", "site: a"),
        (10, "indented", "sudo /opt/x/bin/watchkeep run -c /etc/w.yaml   # a comment"),
        (15, "block:sh", "DURATION=5 make demo && watchkeep check-config \\\n    site.yaml | head")]
    assert [(s.line, s.text, bool(s.row)) for s in spans][:3] == [
        (1, "watchkeep status --json", False), (12, "watchkeep demo", True),
        (12, "--plain", True)]
    cmds = [(n, prog_of(w)) for n, ln in shell_lines(blocks[2]) for w in simple_commands(ln)]
    assert cmds == [(15, None), (15, ("watchkeep", ["check-config", "site.yaml"])), (15, None)]
    assert [prog_of(w) for w in simple_commands(blocks[1].text)] == \
        [("watchkeep", ["run", "-c", "/etc/w.yaml"])]


def shell_lines(s: Snippet) -> Iterator[tuple[int, str]]:
    """(line number, command line) of a shell block, backslash continuations joined."""
    pending, start = "", 0
    for k, line in enumerate(s.text.splitlines()):
        if not pending:
            start = s.line + k
        if line.rstrip().endswith("\\"):
            pending += line.rstrip()[:-1] + " "
            continue
        yield start, pending + line
        pending = ""
    if pending:
        yield start, pending


def simple_commands(line: str) -> Iterator[list[str]]:
    """The simple commands of a shell line (split at |, &&, ;), as words. Placeholders
    (`<name>`) become one word; `[--opt v]` (optional parts) are kept without brackets."""
    line = re.sub(r"<[^<>\s]+>", "PLACEHOLDER", line)
    lex = shlex.shlex(line, posix=True, punctuation_chars=";&|<>()")
    lex.whitespace_split = True
    lex.commenters = "#"
    words: list[str] = []
    try:
        toks = list(lex)
    except ValueError:  # an unbalanced quote: not a command line
        return
    for tok in [*toks, ";"]:
        if tok and set(tok) <= set(";&|<>()"):
            if words:
                yield words
            words = []
        else:
            tok = tok.strip("[]")
            if tok and tok not in ("...", "…"):
                words.append(tok)


def prog_of(words: list[str]) -> tuple[str, list[str]] | None:
    """The watchkeep program a command runs (after sudo and VAR=value), and its args."""
    while words and (words[0] == "sudo" or re.fullmatch(r"[A-Z_]+=\S*", words[0])):
        words = words[1:]
    if words and words[0].rsplit("/", 1)[-1] in PROGS:
        return words[0].rsplit("/", 1)[-1], words[1:]
    return None


@dataclass(frozen=True)
class Invocation:
    where: str
    prog: str
    args: tuple[str, ...]
    mention: bool = False  # a code span naming a command (`watchkeep train`), not a line


def invocations(doc: str) -> list[Invocation]:
    """Every watchkeep / watchkeep-sim command line of a document (blocks and spans)."""
    blocks, spans = SCANNED[doc]
    out: list[Invocation] = []
    for b in blocks:
        lang = b.kind.split(":", 1)[1] if b.kind.startswith("block:") else ""
        if lang not in SHELL_LANGS:
            continue
        for n, line in shell_lines(b):
            for words in simple_commands(line):
                pa = prog_of(words)
                if pa:
                    out.append(Invocation(f"{doc}:{n}", pa[0], tuple(pa[1])))
    for s in spans:
        if s.text.split(" ", 1)[0] in PROGS:
            for words in simple_commands(s.text):
                pa = prog_of(words)
                if pa:
                    mention = not pa[1] or (len(pa[1]) == 1 and not pa[1][0].startswith("-"))
                    out.append(Invocation(s.where, pa[0], tuple(pa[1]), mention))
    return out


ALL_INVOCATIONS = [inv for d in DOCS for inv in invocations(d)]


def parser_for(prog: str) -> argparse.ArgumentParser:
    return build_parser() if prog == "watchkeep" else sim_parser()


def try_parse(prog: str, args: tuple[str, ...]) -> str | None:
    """None if argparse accepts the arguments, else its message."""
    err = io.StringIO()
    try:
        with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
            parser_for(prog).parse_args(list(args))
    except SystemExit as exc:
        if exc.code not in (0, None):
            return err.getvalue().strip().splitlines()[-1] if err.getvalue() else str(exc)
    return None


def test_the_docs_show_commands() -> None:
    """The extraction finds the commands the docs are known to show (guards the scanner)."""
    shown = {(i.prog, i.args[0] if i.args else "") for i in ALL_INVOCATIONS}
    for expected in [("watchkeep", "record"), ("watchkeep", "train"),
                     ("watchkeep", "check-config"), ("watchkeep", "rebaseline"),
                     ("watchkeep", "status"), ("watchkeep", "discover"),
                     ("watchkeep-sim", "run")]:
        assert expected in shown, expected


@pytest.mark.parametrize("inv", ALL_INVOCATIONS, ids=lambda i: f"{i.where} {i.prog}")
def test_every_command_line_parses(inv: Invocation) -> None:
    """Subcommand and flags exist, values are of the right type (nothing is run); a mere
    mention of a subcommand names one that exists."""
    subs = sorted(sub for prog, sub in parser_flags() if prog == inv.prog and sub)
    if inv.mention:
        assert not inv.args or inv.args[0] in subs, \
            f"{inv.where}: `{inv.prog} {inv.args[0]}`: no such command"
        return
    if inv.args and inv.args[0] == "PLACEHOLDER":  # `watchkeep <command> --help`
        whys = [try_parse(inv.prog, (sub, *inv.args[1:])) for sub in subs]
        why = next((w for w in whys if w), None)
    else:
        why = try_parse(inv.prog, inv.args)
    assert why is None, f"{inv.where}: `{inv.prog} {' '.join(inv.args)}`: {why}"


def make_targets() -> set[str]:
    text = (ROOT / "Makefile").read_text()
    return {t for m in re.finditer(r"^([A-Za-z0-9_./-]+(?:\s+[A-Za-z0-9_./-]+)*)\s*:(?!=)",
                                   text, re.M) for t in m.group(1).split()}


def test_every_make_command_names_a_target() -> None:
    """`make X` in a shell block or span names a Makefile target."""
    targets = make_targets()
    bad = []
    for doc in DOCS:
        blocks, spans = SCANNED[doc]
        lines = [(f"{doc}:{n}", ln) for b in blocks
                 if b.kind == "indented" or b.kind.split(":", 1)[-1] in SHELL_LANGS
                 for n, ln in shell_lines(b)]
        lines += [(s.where, s.text) for s in spans if s.text.startswith("make ")
                  or re.match(r"[A-Z_]+=\S+ make ", s.text)]
        for where, ln in lines:
            for words in simple_commands(ln):
                while words and re.fullmatch(r"[A-Z_]+=\S*", words[0]):
                    words = words[1:]
                if words[:1] == ["make"]:
                    bad += [f"{where}: make {t}" for t in words[1:]
                            if not t.startswith("-") and "=" not in t
                            and t != "PLACEHOLDER" and t not in targets]
    assert not bad, "no such Makefile target:\n" + "\n".join(bad)


# --- the reverse: every subcommand and flag is documented ----------------------------

def documented_flags() -> dict[tuple[str, str], set[str]]:
    """(prog, subcommand) -> flags shown with it: in command lines, or in a table row
    that names `prog subcommand` in its first cell."""
    out: dict[tuple[str, str], set[str]] = {}
    for inv in ALL_INVOCATIONS:
        sub = inv.args[0] if inv.args and not inv.args[0].startswith("-") else ""
        flags = {a.split("=", 1)[0] for a in inv.args if a.startswith("-")}
        out.setdefault((inv.prog, sub), set()).update(flags)
    for doc in DOCS:
        for s in SCANNED[doc][1]:
            if not s.row:
                continue
            first = s.row.strip().strip("|").split("|", 1)[0]
            m = re.search(r"`(watchkeep(?:-sim)?)(?: ([a-z-]+))?`", first)
            if m:
                flags = set(re.findall(r"(?<![\w-])(--?[a-z][a-z0-9-]*)", s.text))
                out.setdefault((m.group(1), m.group(2) or ""), set()).update(flags)
    return out


def parser_flags() -> dict[tuple[str, str], list[list[str]]]:
    """(prog, subcommand) -> each optional argument's option strings."""
    out: dict[tuple[str, str], list[list[str]]] = {}
    for prog in PROGS:
        p = parser_for(prog)
        out[(prog, "")] = [a.option_strings for a in p._actions
                           if a.option_strings and not isinstance(a, argparse._HelpAction)]
        for act in p._actions:
            if isinstance(act, argparse._SubParsersAction):
                for name, sp in act.choices.items():
                    out[(prog, name)] = [a.option_strings for a in sp._actions if
                                         a.option_strings
                                         and not isinstance(a, argparse._HelpAction)]
    return out


def test_every_subcommand_and_flag_is_documented() -> None:
    """Each subcommand of both programs, and each of its flags, appears in README.md or
    DEVELOPERS.md (a command line or the command reference table)."""
    docs = documented_flags()
    missing = []
    for (prog, sub), actions in parser_flags().items():
        if not sub and not actions:
            continue  # a program without options of its own (its subcommands count)
        if (prog, sub) not in docs:
            missing.append(f"`{prog} {sub}`".replace(" `", "`"))
            continue
        missing += [f"`{prog} {sub}` {opts[0]}" for opts in actions
                    if not set(opts) & docs[(prog, sub)]]
    assert not missing, "not documented in README.md or DEVELOPERS.md:\n" + "\n".join(missing)


def test_flags_in_the_command_reference_exist() -> None:
    """A flag a table row attributes to a subcommand is one of its flags."""
    real = {k: {o for opts in v for o in opts} for k, v in parser_flags().items()}
    bad = []
    for doc in DOCS:
        for s in SCANNED[doc][1]:
            first = s.row.strip().strip("|").split("|", 1)[0] if s.row else ""
            m = re.search(r"`(watchkeep(?:-sim)?)(?: ([a-z-]+))?`", first)
            if not m:
                continue
            key = (m.group(1), m.group(2) or "")
            if key not in real:
                bad.append(f"{s.where}: no subcommand `{' '.join(key)}`")
                continue
            bad += [f"{s.where}: `{' '.join(key)}` has no {f}"
                    for f in re.findall(r"(?<![\w-])(--?[a-z][a-z0-9-]*)", s.text)
                    if f not in real[key]]
    assert not bad, "\n".join(bad)


# --- YAML blocks load, and pass check-config -------------------------------------------

def yaml_blocks() -> list[Snippet]:
    return [b for d in DOCS for b in SCANNED[d][0] if b.kind in ("block:yaml", "block:yml")]


def bundle_for(bundle_dir: Path, asset: Any, tmp: Path) -> None:
    """Train a small bundle for `asset` with the project's own train code."""
    from agent.commission.dataset import write_dataset
    from agent.commission.train import train_bundle
    from agent.pipeline.runtime import asset_feature_names

    names = asset_feature_names(asset)
    rng = np.random.default_rng(7)
    n = 240
    x = rng.normal(size=(n, len(names))) + np.linspace(0, 1, len(names))
    t = 1_790_000_000.0 + 10.0 * np.arange(n)
    ds = tmp / f"ds-{asset.name}"
    write_dataset(ds, x, names, t, t + 10, ["default"] * n, asset=asset.name)
    train_bundle(ds, bundle_dir, asset=asset.name, epochs=15, widths=(4,), min_windows=50)


# What a fragment (a snippet showing one section) is completed with: the required keys
# and one asset without a bundle.
BASE = {"site": "fernbrook", "gateway": "gw-01",
        "assets": [{"name": "P-101", "channels": {"flow": {
            "topic": "fernbrook/raw-water/P-101/flow", "decoder": "json", "rate_hz": 1}}}]}
FILE_KEYS = ("ca_file", "cert_file", "key_file", "password_file")


def provide_paths(node: Any, tmp: Path, bundles: list[Path]) -> Any:
    """The snippet with the files it names made in `tmp` (absolute paths moved there) and
    the bundle directories it names listed in `bundles` (created empty, for the loader)."""
    if isinstance(node, list):
        return [provide_paths(v, tmp, bundles) for v in node]
    if not isinstance(node, dict):
        return node
    out = {}
    for k, v in node.items():
        if k in FILE_KEYS and isinstance(v, str):
            f = tmp / "files" / Path(v).name
            f.parent.mkdir(parents=True, exist_ok=True)
            f.write_text("placeholder\n")
            out[k] = str(f)
        elif k == "bundle" and isinstance(v, str):
            d = tmp / "bundles" / v.lstrip("/") if v.startswith("/") else tmp / v
            d.mkdir(parents=True, exist_ok=True)
            bundles.append(d)
            out[k] = str(d)
        else:
            out[k] = provide_paths(v, tmp, bundles)
    return out


@pytest.mark.parametrize("block", yaml_blocks(), ids=lambda b: b.where)
def test_every_yaml_block_is_a_working_config(block: Snippet, tmp_path: Path,
                                              capsys: pytest.CaptureFixture[str]) -> None:
    """The README's YAML loads with the config loader and passes `watchkeep check-config`:
    a fragment (top-level sections, or an asset's channels) completed with BASE, the
    files it names made, and the bundle directories it names holding bundles trained
    for their assets."""
    from agent.config.load import load_config
    from agent.errors import ConfigError

    doc = yaml.safe_load(block.text)
    assert isinstance(doc, dict), f"{block.where}: a YAML block that is not a mapping"
    fragment = not {"site", "gateway", "assets"} <= set(doc)
    if fragment and all(isinstance(v, dict) and "topic" in v for v in doc.values()):
        doc = {**BASE, "assets": [{**BASE["assets"][0], "channels": doc}]}  # channels
    elif fragment:
        unknown = sorted(set(doc) - set(schema()["properties"]))
        assert not unknown, f"{block.where}: unknown top-level keys {unknown}"
        doc = {**BASE, **doc}
    bundles: list[Path] = []
    doc = provide_paths(doc, tmp_path, bundles)
    path = tmp_path / "snippet.yaml"
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    what = "the YAML block" + (" (completed into a whole config)" if fragment else "")
    try:
        cfg = load_config(path)
    except ConfigError as exc:
        pytest.fail(f"{block.where}: {what} does not load: {exc}")
    for a in cfg.assets:
        dirs = [a.bundle] + ([m.bundle for m in a.modes.states] if a.modes else [])
        for d in dirs:
            if d is not None and d in bundles:
                d.rmdir()
                bundle_for(d, a, tmp_path)
    rc = watchkeep_main(["check-config", str(path)])
    out = capsys.readouterr()
    assert rc == 0, f"{block.where}: {what}: check-config exit {rc}:\n{out.out}{out.err}"


# --- names the README uses exist in the code ---------------------------------------------

def readme_text() -> str:
    return (ROOT / "README.md").read_text(encoding="utf-8")


def readme_lines_matching(pattern: str) -> list[tuple[int, str]]:
    return [(n, m.group(0)) for n, line in enumerate(readme_text().splitlines(), start=1)
            for m in re.finditer(pattern, line)]


def exported_metric_names() -> set[str]:
    """Family and sample names of a real registry with what the daemon puts on it:
    `Metrics`, the MQTT command receiver's counters and re-learning's families."""
    import logging

    from agent.learning.commands import CommandReceiver
    from agent.learning.metrics import LearningMetrics

    class NoAssets:
        def names(self) -> list[str]:
            return []

    reg = CollectorRegistry()
    Metrics(reg)
    CommandReceiver("p", lambda *a, **k: None, assets=lambda: (), enabled=lambda: False,
                    registry=reg, logger=logging.getLogger("test"))
    LearningMetrics(NoAssets(), dict, reg)  # with no asset, names() is all it reads
    text = generate_latest(reg).decode()
    names = set(re.findall(r"^# TYPE (\S+) ", text, re.M))
    names |= set(re.findall(r"^([a-zA-Z_:][a-zA-Z0-9_:]*)", text, re.M))
    for n in list(names):  # a counter family `x` is scraped as `x_total`, `x_created`
        names |= {n + "_total", n + "_info"}
    return names


def test_metric_names_in_the_readme_exist() -> None:
    """Each `watchkeep_...` metric the README names is on the daemon's /metrics."""
    have = exported_metric_names()
    bad = [f"README.md:{n}: {name}" for n, name in
           readme_lines_matching(r"(?<![\w/-])watchkeep_[a-z0-9_]*[a-z0-9](?![\w-])")
           if name not in have]
    assert not bad, "no such metric:\n" + "\n".join(bad)


def test_event_types_in_the_readme_exist() -> None:
    """Each `io.watchkeep.*` type, and each short `family.kind` span, is an EventType."""
    full = {e.full for e in EventType}
    short = {e.value for e in EventType}
    families = {s.split(".")[0] for s in short}
    bad = [f"README.md:{n}: {t}" for n, t in
           readme_lines_matching(re.escape(TYPE_PREFIX) + r"[a-z_]+(?:\.[a-z_]+)*")
           if t not in full]
    file_ext = {"json", "onnx", "npz", "yaml", "yml", "sqlite", "jsonl", "py", "md", "txt"}
    for s in SCANNED["README.md"][1]:
        m = re.fullmatch(r"([a-z]+)\.([a-z_]+)", s.text)
        if m and m.group(1) in families and m.group(2) not in file_ext \
                and s.text not in short:
            bad.append(f"{s.where}: {s.text}")
    assert not bad, "no such event type:\n" + "\n".join(bad)


def schema() -> dict[str, Any]:
    # The schema is held to the loader's keys by tests/unit/config/test_schema.py.
    doc: dict[str, Any] = json.loads((ROOT / "config" / "watchkeep.schema.json").read_text())
    return doc


def resolve(node: dict[str, Any], root: dict[str, Any]) -> dict[str, Any]:
    while "$ref" in node:
        node = root["$defs"][node["$ref"].rsplit("/", 1)[-1]]
    return node


def children(node: dict[str, Any], root: dict[str, Any]) -> dict[str, dict[str, Any]]:
    """Named sub-keys of a schema node (through $ref, list items and name->value maps)."""
    node = resolve(node, root)
    out: dict[str, dict[str, Any]] = {}
    for k in ("items", "additionalProperties"):
        if isinstance(node.get(k), dict):
            out.update(children(node[k], root))
    for k in ("anyOf", "oneOf", "allOf"):
        for alt in node.get(k, []):
            out.update(children(alt, root))
    out.update(node.get("properties", {}))
    return out


def all_keys_and_values(root: dict[str, Any]) -> set[str]:
    """Every key name the config knows anywhere, and every enumerated value."""
    seen: set[str] = set()
    stack = [root]
    done: set[int] = set()
    while stack:
        node = resolve(stack.pop(), root)
        if id(node) in done:
            continue
        done.add(id(node))
        seen.update(str(v) for v in node.get("enum", []))
        for k, v in children(node, root).items():
            seen.add(k)
            stack.append(v)
    return seen


def key_path_error(path: str, value: str | None, root: dict[str, Any]) -> str | None:
    """Why `a.b.c` (with an optional value) is not a config key path, or None."""
    node: dict[str, Any] = root
    for part in path.split("."):
        kids = children(node, root)
        if part not in kids:
            return f"no key {part!r} there"
        node = kids[part]
    node = resolve(node, root)
    if value is not None and "enum" in node and value not in [str(v) for v in node["enum"]] \
            and not value.startswith("{"):
        return f"{value!r} is not one of {node['enum']}"
    return None


def code_words() -> set[str]:
    """Every name written in agent/, simulator/ and tests/ but this file (identifiers,
    string contents, comments): event data fields, rejection reasons, a SQLite pragma,
    the settings of the brokers the tests run, that the README may name."""
    files = [f for d in ("agent", "simulator", "tests") for f in (ROOT / d).rglob("*.py")
             if f.resolve() != Path(__file__).resolve()]
    words: set[str] = set()
    for f in files:
        words.update(re.findall(r"[A-Za-z_][A-Za-z0-9_]*", f.read_text(encoding="utf-8")))
    return words


def test_config_keys_in_the_readme_exist() -> None:
    """Names the README puts in code spans exist: `a.b.c` paths from a top-level config
    key must be config key paths (with a value the schema enumerates, one of them);
    `key: value` spans and bare snake_case names must be a config key or a name in the
    code (`code_words`: event data fields, rejection reasons); `watchkeep_...` are
    metrics (tested above)."""
    root = schema()
    top = set(root["properties"])
    every = all_keys_and_values(root) | set(FEATURES) | code_words()
    bad = []
    for s in SCANNED["README.md"][1]:
        text = s.text
        m = re.fullmatch(r"([a-z_][a-z0-9_]*(?:\.[a-z_][a-z0-9_]*)*)(?::\s*(.+))?", text)
        if not m:
            continue
        path, value = m.group(1), m.group(2)
        if "." in path and path.split(".")[0] in top:
            why = key_path_error(path, value, root)
            if why:
                bad.append(f"{s.where}: `{text}`: {why}")
        elif value is not None or (":" in text) or ("_" in path and "." not in path):
            if path.startswith("watchkeep_"):
                continue  # metrics: test_metric_names_in_the_readme_exist
            if path not in every:
                bad.append(f"{s.where}: `{text}`: {path!r} is neither a config key nor a "
                           "name in the code")
    assert not bad, "not in the config or the code:\n" + "\n".join(bad)


def test_keys_in_flow_mappings_exist() -> None:
    """`key: {a: 1, b: 2}` spans: the inner keys are keys of that section."""
    root = schema()
    bad = []
    for s in SCANNED["README.md"][1]:
        m = re.fullmatch(r"([a-z_]+):\s*(\{.*\})", s.text)
        if not m or m.group(1) not in root["properties"]:
            continue
        inner = yaml.safe_load(m.group(2))
        for k in inner:
            why = key_path_error(f"{m.group(1)}.{k}", None, root)
            if why:
                bad.append(f"{s.where}: `{s.text}`: {why}")
    assert not bad, "\n".join(bad)
