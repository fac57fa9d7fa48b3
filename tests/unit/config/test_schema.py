"""The JSON Schema in config/: valid, in step with the loader's keys, and as strict as it can be."""

from __future__ import annotations

import json
import re
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import yaml
from jsonschema import Draft202012Validator
from jsonschema.exceptions import ValidationError

from agent.config.load import load_config, parse_config
from agent.errors import ConfigError
from tests.unit.config.config_cases import BROKEN, CONFIG_DIR, Broken, base_doc, shipped_configs

SCHEMA_PATH = CONFIG_DIR / "watchkeep.schema.json"


@pytest.fixture(scope="module")
def schema() -> dict[str, Any]:
    return json.loads(SCHEMA_PATH.read_text())


@pytest.fixture(scope="module")
def validator(schema: dict[str, Any]) -> Draft202012Validator:
    return Draft202012Validator(schema)


def key_path(error: ValidationError) -> str:
    """A schema error's location in the loader's notation: assets[1].channels.vib.topic."""
    out = ""
    for part in error.absolute_path:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out


def within(ancestor: str, path: str) -> bool:
    return ancestor in ("", path) or path.startswith((f"{ancestor}.", f"{ancestor}["))


def parent(path: str) -> str:
    return re.sub(r"(\.[^.\[\]]+|\[\d+\])$", "", path)


def near(schema_path: str, loader_path: str) -> bool:
    """The schema error sits at the loader's key, above it, or beside it (a rule between
    two keys of one mapping may be reported at either key)."""
    return within(schema_path, loader_path) or (
        "." in loader_path and parent(schema_path) == parent(loader_path))


def as_json(doc: Any) -> Any:
    """The document as an editor's YAML language server sees it (YAML decoded to JSON types)."""
    return yaml.safe_load(yaml.safe_dump(doc))


def test_schema_is_valid_draft_2020_12(schema: dict[str, Any]) -> None:
    """The schema is itself a valid draft 2020-12 schema."""
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    Draft202012Validator.check_schema(schema)


@pytest.mark.parametrize("path", shipped_configs(), ids=lambda p: str(p.relative_to(CONFIG_DIR)))
def test_schema_accepts_shipped_config(path: Path, validator: Draft202012Validator) -> None:
    """Every shipped watchkeep config passes the schema."""
    errors = [f"{key_path(e)}: {e.message}"
              for e in validator.iter_errors(yaml.safe_load(path.read_text()))]
    assert errors == []


SEEN = [c for c in BROKEN if not c.schema_blind]
# Cases the schema cannot express, each with its reason in the table: rules across keys
# (hop_s <= length_s, raise_k <= raise_n, timeout_s >= lateness_s, subscriptions covering
# topics), across list items (unique asset names and topics), the file system (bundle and
# TLS files exist), and number kinds JSON lacks (infinity; 1883.0 as a non-integer).
# YAML syntax errors come before any document exists, so they are the loader's alone.
BLIND = [c for c in BROKEN if c.schema_blind]


@pytest.mark.parametrize("case", SEEN, ids=lambda c: c.id)
def test_schema_rejects_broken_config(case: Broken, tmp_path: Path,
                                      validator: Draft202012Validator) -> None:
    """The schema rejects what the loader rejects, at or next to the loader's key path."""
    errors = list(validator.iter_errors(as_json(case.build(tmp_path))))
    assert errors, f"schema accepts: {case.id}"
    where = [key_path(e) for e in errors]
    for problem in case.expected(tmp_path):
        loader_path = problem.split(": expected")[0].replace("(top level)", "")
        assert any(near(w, loader_path) for w in where), (problem, where)


@pytest.mark.parametrize("case", BLIND, ids=lambda c: c.id)
def test_schema_blind_spots_are_known(case: Broken, tmp_path: Path,
                                      validator: Draft202012Validator) -> None:
    """Cases marked schema-blind really pass the schema (so only the loader catches them)."""
    assert list(validator.iter_errors(as_json(case.build(tmp_path)))) == []


def resolve(schema: dict[str, Any], node: dict[str, Any]) -> dict[str, Any]:
    """Follow $ref to the object schema it names."""
    while "$ref" in node:
        node = schema["$defs"][node["$ref"].rsplit("/", 1)[1]]
    return node


# Every mapping the loader reads, in the loader's notation, with the schema route to it.
MAPPINGS = {
    "": (),
    "local_broker": ("local_broker",),
    "upstream_broker": ("upstream_broker",),
    "upstream_broker.tls": ("upstream_broker", "tls"),
    "upstream_broker.endpoints[0]": ("upstream_broker", "endpoints", "*"),
    "ingest": ("ingest",),
    "pipeline": ("pipeline",),
    "publish": ("publish",),
    "outbox": ("outbox",),
    "http": ("http",),
    "assets[0]": ("assets", "*"),
    "assets[0].window": ("assets", "*", "window"),
    "assets[0].detector": ("assets", "*", "detector"),
    "assets[0].channels.current": ("assets", "*", "channels", "*"),
}


def schema_keys(schema: dict[str, Any], route: tuple[str, ...]) -> set[str]:
    node = schema
    for step in route:
        node = resolve(schema, node)
        if step == "*":
            node = node.get("items") or node["additionalProperties"]
        else:
            node = node["properties"][step]
    return set(resolve(schema, node)["properties"])


def loader_keys(where: str, tmp_path: Path) -> set[str]:
    """The keys the loader accepts at `where`, read from its unknown-key message."""
    doc = base_doc()
    doc.setdefault("upstream_broker", {})["tls"] = {}
    doc["upstream_broker"]["endpoints"] = [{"host": "broker-a"}]
    node: Any = doc
    for part in re.findall(r"[^.\[\]]+", where):
        node = node[int(part)] if part.isdigit() else node.setdefault(part, {})
    node["zz_probe"] = 1
    with pytest.raises(ConfigError) as info:
        parse_config(doc, tmp_path)
    probe = f"{where}.zz_probe" if where else "zz_probe"
    (msg,) = [p.expected for p in info.value.problems if p.key_path == probe]
    listed = re.fullmatch(r"one of the known keys \((.*)\)", msg)
    assert listed, msg
    return set(listed.group(1).split(", "))


@pytest.mark.parametrize("where", MAPPINGS, ids=lambda w: w or "(top level)")
def test_schema_keys_match_the_loader(where: str, schema: dict[str, Any],
                                      tmp_path: Path) -> None:
    """Each mapping has the same keys in the schema as in the loader (a key added to one
    must be added to the other)."""
    assert schema_keys(schema, MAPPINGS[where]) == loader_keys(where, tmp_path)


def walk(schema: dict[str, Any], node: Any, path: str = "") -> Iterator[tuple[str, Any]]:
    """(path, property schema) for every property anywhere in the schema."""
    if isinstance(node, dict):
        for name, sub in node.get("properties", {}).items():
            yield f"{path}.{name}", sub
        for key, sub in node.items():
            # if/then hold conditions on properties, not properties of their own
            if key not in ("properties", "if", "then", "else", "not"):
                yield from walk(schema, sub, path)
        for name, sub in node.get("properties", {}).items():
            yield from walk(schema, sub, f"{path}.{name}")
    elif isinstance(node, list):
        for sub in node:
            yield from walk(schema, sub, path)


def test_objects_are_closed_and_properties_described(schema: dict[str, Any]) -> None:
    """Every object forbids unknown keys (the channel map admits only channels), and every
    property has a description for editors to show."""
    def objects(node: Any) -> Iterator[dict[str, Any]]:
        if isinstance(node, dict):
            if "properties" in node:
                yield node
            for sub in node.values():
                yield from objects(sub)
        elif isinstance(node, list):
            for sub in node:
                yield from objects(sub)

    for obj in objects(schema):
        if obj.get("type") in ("object", ["object", "null"]):
            assert obj.get("additionalProperties") is False, sorted(obj["properties"])
    undescribed = [p for p, sub in walk(schema, schema)
                   if isinstance(sub, dict) and "properties" not in sub
                   and not sub.get("description")]
    assert undescribed == []


def test_example_documents_every_schema_key(schema: dict[str, Any]) -> None:
    """Each key the schema knows appears in config/example.yaml (as a key or commented)."""
    text = (CONFIG_DIR / "example.yaml").read_text()
    names = {p.rsplit(".", 1)[1] for p, _ in walk(schema, schema)}
    missing = sorted(n for n in names
                     if not re.search(rf"^[ #]*(- )?{re.escape(n)}:", text, re.MULTILINE))
    assert missing == []


def test_every_key_set_passes_both(tmp_path: Path, validator: Draft202012Validator) -> None:
    """A config that sets every key passes the loader and the schema alike."""
    for name in ("ca.pem", "gw1.pem", "gw1.key"):
        (tmp_path / name).write_text("an invented certificate file")
    (tmp_path / "models" / "P-101").mkdir(parents=True)
    broker = {"host": "127.0.0.1", "port": 8883, "client_id": "wk-gw1", "keepalive_s": 30,
              "username": "gw1", "password_file": "broker.secret", "protocol": "5",
              "tls": {"ca_file": "ca.pem", "cert_file": "gw1.pem", "key_file": "gw1.key",
                      "verify": True}}
    doc = base_doc()
    doc.update({
        "topic_prefix": "watchkeep/fernbrook/gw1", "state_dir": "state",
        "local_broker": {**broker, "password": "s3cret", "password_file": None, "tls": None},
        "upstream_broker": broker,
        "ingest": {"max_payload_bytes": 65536, "max_clock_skew_s": 60,
                   "subscriptions": ["fernbrook/#"]},
        "pipeline": {"tick_s": 0.2}, "publish": {"scores": True},
        "outbox": {"path": "outbox.sqlite", "synchronous": "NORMAL", "max_rows": 1000,
                   "max_bytes": 1 << 20, "inflight": 10},
        "http": {"enabled": False, "host": "127.0.0.1", "port": 0},
    })
    pump = doc["assets"][0]
    pump.update(bundle="models/P-101",
                window={"length_s": 10, "hop_s": 5, "lateness_s": 1, "timeout_s": 5,
                        "min_coverage": 0.9},
                detector={"raise_k": 2, "raise_n": 4, "clear_m": 3})
    pump["channels"]["current"].update(decoder="json", unit="A", ts_field="t",
                                       value_field="reading.value", values_field="v",
                                       rate_field="r", features=["mean", "kurtosis"])
    path = tmp_path / "full.yaml"
    path.write_text(yaml.safe_dump(doc))
    cfg = load_config(path)
    assert cfg.upstream_broker.tls is not None and cfg.assets[0].bundle is not None
    assert list(validator.iter_errors(as_json(doc))) == []
