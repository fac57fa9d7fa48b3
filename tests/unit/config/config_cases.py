"""Broken watchkeep configs and the problems the loader must report for each.

Shared by test_config.py (the loader) and test_schema.py (the JSON Schema). Each case
edits a copy of a small valid config of the invented Fernbrook works; `schema_blind`
says why the JSON Schema cannot see a case (a rule spanning keys, lists or files).
"""

from __future__ import annotations

import copy
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

CONFIG_DIR = Path(__file__).resolve().parents[3] / "config"


def is_watchkeep_config(doc: Any) -> bool:
    """A watchkeep config has top-level `assets`; simulator scenarios (which also list
    assets) are told apart by their `timeline` and `duration_s`."""
    return (isinstance(doc, dict) and "assets" in doc
            and "timeline" not in doc and "duration_s" not in doc)


def shipped_configs() -> list[Path]:
    """Every watchkeep config under config/ (example.yaml, demo configs), not scenarios."""
    paths = sorted(CONFIG_DIR.rglob("*.yaml")) + sorted(CONFIG_DIR.rglob("*.yml"))
    return [p for p in paths if is_watchkeep_config(yaml.safe_load(p.read_text()))]


FEATURE_LIST = "mean, std, min, max, rms, peak_to_peak, crest_factor, skewness, kurtosis"
TOP_KEYS = ("site, gateway, topic_prefix, state_dir, local_broker, upstream_broker, ingest, "
            "pipeline, outbox, http, publish, assets, rebaseline")
CHANNEL_KEYS = "topic, decoder, rate_hz, features, unit, ts_field, value_field, values_field, " \
    "rate_field, seq_field, spectrum, min, max, stale_s, flatline_windows, max_rate_per_s, " \
    "limits, column, metric"


def base_doc() -> dict[str, Any]:
    """A small valid config: raw-water pump P-101 and aeration blower B-201."""
    return {
        "site": "fernbrook",
        "gateway": "gw1",
        "state_dir": "state",
        "assets": [
            {"name": "P-101", "channels": {
                "bearing_temp": {"topic": "fernbrook/raw-water/P-101/bearing_temp",
                                 "rate_hz": 1},
                "current": {"topic": "fernbrook/raw-water/P-101/current", "rate_hz": 10,
                            "features": ["mean", "std"]},
            }},
            {"name": "B-201", "channels": {
                "vib": {"topic": "fernbrook/aeration/B-201/vib", "decoder": "json-batch",
                        "rate_hz": 2560},
                "bearing_temp": {"topic": "fernbrook/aeration/B-201/bearing_temp",
                                 "rate_hz": 1},
            }},
        ],
    }


Edit = Callable[[dict[str, Any], Path], Any]


@dataclass(frozen=True)
class Broken:
    """A broken config: `edit(doc, tmp_path)` changes `doc` in place or returns a new
    document (or YAML text); `problems` are the loader's messages, `{tmp}` standing for
    tmp_path."""

    id: str
    edit: Edit
    problems: tuple[str, ...]
    schema_blind: str = ""

    def build(self, tmp: Path) -> Any:
        doc = base_doc()
        out = self.edit(doc, tmp)
        return doc if out is None else out

    def expected(self, tmp: Path) -> list[str]:
        return sorted(p.replace("{tmp}", str(tmp)) for p in self.problems)


def _set(path: str, value: Any) -> Edit:
    """Set a dotted path (list indices as numbers) to `value`."""
    def edit(doc: dict[str, Any], _tmp: Path) -> None:
        keys: list[Any] = [int(k) if k.isdigit() else k for k in path.split(".")]
        node: Any = doc
        for k in keys[:-1]:
            node = node[k]
        node[keys[-1]] = value
    return edit


def _delete(path: str) -> Edit:
    def edit(doc: dict[str, Any], _tmp: Path) -> None:
        keys: list[Any] = [int(k) if k.isdigit() else k for k in path.split(".")]
        node: Any = doc
        for k in keys[:-1]:
            node = node[k]
        del node[keys[-1]]
    return edit


def _edits(*edits: Edit) -> Edit:
    def edit(doc: dict[str, Any], tmp: Path) -> None:
        for e in edits:
            e(doc, tmp)
    return edit


def _bundle_missing(doc: dict[str, Any], tmp: Path) -> None:
    doc["assets"][0]["bundle"] = str(tmp / "no-such-bundle")


def _bundle_is_file(doc: dict[str, Any], tmp: Path) -> None:
    (tmp / "model.onnx").write_bytes(b"not a directory")
    doc["assets"][0]["bundle"] = str(tmp / "model.onnx")


def _ca_missing(doc: dict[str, Any], tmp: Path) -> None:
    doc["upstream_broker"] = {"tls": {"ca_file": str(tmp / "plant-ca.pem")}}


def _cert_without_key(doc: dict[str, Any], tmp: Path) -> None:
    (tmp / "gw1.pem").write_text("an invented certificate")
    doc["upstream_broker"] = {"tls": {"cert_file": str(tmp / "gw1.pem")}}


def _shared_topic(doc: dict[str, Any], _tmp: Path) -> None:
    doc["assets"][1]["channels"]["bearing_temp"]["topic"] = \
        doc["assets"][0]["channels"]["bearing_temp"]["topic"]


SPB_TOPIC = "spBv1.0/fernbrook-dosing/DDATA/dosing-gw/C-301"


def _sparkplug_asset(**extra: Any) -> Edit:
    """A third asset, C-301, with two sparkplug-b channels on one device topic."""
    def edit(doc: dict[str, Any], _tmp: Path) -> None:
        flow: dict[str, Any] = {"topic": SPB_TOPIC, "decoder": "sparkplug-b",
                                "metric": "Pump/Flow", "rate_hz": 1}
        pressure = dict(flow, metric="Pump/Discharge Pressure")
        flow.update(extra)
        doc["assets"].append({"name": "C-301",
                              "channels": {"flow": flow, "pressure": pressure}})
    return edit


def _sparkplug_topic_taken(doc: dict[str, Any], tmp: Path) -> None:
    _sparkplug_asset()(doc, tmp)
    doc["assets"][0]["channels"]["current"]["topic"] = SPB_TOPIC


def _duplicate_name(doc: dict[str, Any], _tmp: Path) -> None:
    doc["assets"][1]["name"] = "P-101"


def _copy_asset(doc: dict[str, Any], _tmp: Path) -> None:
    doc["assets"].append(copy.deepcopy(doc["assets"][0]))


P0 = "assets[0].channels.current"
W0 = "assets[0].window"
D0 = "assets[0].detector"
CROSS = "a rule across keys (a schema compares no two values)"

S2 = "assets[2].channels.flow"
SPB_EXPECTED_TOPIC = ("a Sparkplug B data topic: spBv1.0/<group>/NDATA/<edge node> or "
                      "spBv1.0/<group>/DDATA/<edge node>/<device>")

BROKEN: tuple[Broken, ...] = (
    Broken("sparkplug channel without a metric", _sparkplug_asset(metric=None),
           (f"{S2}.metric: expected the metric's name in the edge node's or device's birth "
            "certificate (required for decoder sparkplug-b)",)),
    Broken("sparkplug metric empty", _sparkplug_asset(metric=""),
           (f"{S2}.metric: expected a string, got ''",)),
    Broken("sparkplug topic not a data topic",
           _sparkplug_asset(topic="spBv1.0/fernbrook-dosing/DBIRTH/dosing-gw/C-301"),
           (f"{S2}.topic: expected {SPB_EXPECTED_TOPIC}, "
            "got 'spBv1.0/fernbrook-dosing/DBIRTH/dosing-gw/C-301'",)),
    Broken("sparkplug topic outside the namespace",
           _sparkplug_asset(topic="fernbrook/dosing/C-301"),
           (f"{S2}.topic: expected {SPB_EXPECTED_TOPIC}, got 'fernbrook/dosing/C-301'",)),
    Broken("sparkplug device verb on an edge node topic",
           _sparkplug_asset(topic="spBv1.0/fernbrook-dosing/DDATA/dosing-gw"),
           (f"{S2}.topic: expected {SPB_EXPECTED_TOPIC}, "
            "got 'spBv1.0/fernbrook-dosing/DDATA/dosing-gw'",)),
    Broken("metric on a json channel", _set("assets.0.channels.current.metric", "Pump/Flow"),
           (f"{P0}.metric: expected no metric (only decoder sparkplug-b names one), "
            "got 'Pump/Flow'",)),
    Broken("two sparkplug channels read one metric",
           _sparkplug_asset(metric="Pump/Discharge Pressure"),
           ("assets[2].channels.pressure.metric: expected a metric no other channel of this "
            "topic reads, got 'Pump/Discharge Pressure', also assets[2].channels.flow.metric",),
           schema_blind="a rule across mapping entries"),
    Broken("a json channel on a sparkplug topic", _sparkplug_topic_taken,
           ("assets[2].channels.flow.topic: expected a topic no channel of another decoder "
            f"uses, got '{SPB_TOPIC}', also assets[0].channels.current.topic",
            "assets[2].channels.pressure.topic: expected a topic no channel of another decoder "
            f"uses, got '{SPB_TOPIC}', also assets[0].channels.current.topic"),
           schema_blind="a rule across list items (uniqueItems compares whole items only)"),
    Broken("rebirth requests without credentials",
           _set("ingest", {"sparkplug": {"rebirth_requests": True}}),
           ("ingest.sparkplug.rebirth_requests: expected false unless local_broker "
            "authenticates (username with password or password_file, or tls.cert_file): the "
            "broker's ACL must allow this client to publish on spBv1.0/+/NCMD/+, "
            "got true (a boolean)",),
           schema_blind=CROSS),
    Broken("rebirth interval too short",
           _set("ingest", {"sparkplug": {"rebirth_min_interval_s": 0.1}}),
           ("ingest.sparkplug.rebirth_min_interval_s: expected seconds between 1 and 3600, "
            "got 0.1",)),
    Broken("unknown top-level key", _set("colour", "blue"),
           (f"colour: expected one of the known keys ({TOP_KEYS}), got unknown key 'colour'",)),
    Broken("unknown channel key", _set("assets.0.channels.current.scale", 2),
           (f"{P0}.scale: expected one of the known keys ({CHANNEL_KEYS}), "
            "got unknown key 'scale'",)),
    Broken("unknown window key", _set("assets.0.window", {"length": 10}),
           (f"{W0}.length: expected one of the known keys (length_s, hop_s, lateness_s, "
            "timeout_s, min_coverage), got unknown key 'length'",)),
    Broken("topic not a string", _set("assets.1.channels.bearing_temp.topic", 12),
           ("assets[1].channels.bearing_temp.topic: expected a topic string without "
            "wildcards, got 12",)),
    Broken("topic with a wildcard", _set("assets.0.channels.current.topic", "fernbrook/+/x"),
           (f"{P0}.topic: expected a topic string without wildcards, got 'fernbrook/+/x'",)),
    Broken("topic missing", _delete("assets.0.channels.current.topic"),
           (f"{P0}.topic: expected a topic string without wildcards (required)",)),
    Broken("rate not a number", _set("assets.0.channels.current.rate_hz", "fast"),
           (f"{P0}.rate_hz: expected a sample rate in Hz, > 0 and at most 1000000, "
            "got 'fast'",)),
    Broken("rate a boolean", _set("assets.0.channels.current.rate_hz", True),
           (f"{P0}.rate_hz: expected a sample rate in Hz, > 0 and at most 1000000, "
            "got true (a boolean)",)),
    Broken("negative window length", _set("assets.0.window", {"length_s": -5}),
           (f"{W0}.length_s: expected a number of seconds > 0, got -5",)),
    Broken("infinite window length", _set("assets.0.window", {"length_s": float("inf")}),
           (f"{W0}.length_s: expected a number of seconds > 0, got inf",)),
    Broken("hop longer than the window", _set("assets.0.window", {"length_s": 10, "hop_s": 20}),
           (f"{W0}.hop_s: expected at most length_s (10), got 20",), schema_blind=CROSS),
    Broken("timeout shorter than lateness",
           _set("assets.0.window", {"lateness_s": 8, "timeout_s": 4}),
           (f"{W0}.timeout_s: expected at least lateness_s (8), got 4",), schema_blind=CROSS),
    Broken("coverage above one", _set("assets.0.window", {"min_coverage": 1.5}),
           (f"{W0}.min_coverage: expected a fraction in (0, 1], got 1.5",)),
    Broken("raise_k above raise_n", _set("assets.0.detector", {"raise_k": 5, "raise_n": 3}),
           (f"{D0}.raise_k: expected at most raise_n (3), got 5",), schema_blind=CROSS),
    Broken("clear_m zero", _set("assets.0.detector", {"clear_m": 0}),
           (f"{D0}.clear_m: expected an integer >= 1, got 0",)),
    Broken("raise_n not an integer", _set("assets.0.detector", {"raise_n": "three"}),
           (f"{D0}.raise_n: expected an integer >= 1, got 'three'",)),
    Broken("topic shared by two assets", _shared_topic,
           ("assets[1].channels.bearing_temp.topic: expected a topic no other channel uses, "
            "got 'fernbrook/raw-water/P-101/bearing_temp', also "
            "assets[0].channels.bearing_temp.topic",),
           schema_blind="a rule across list items (uniqueItems compares whole items only)"),
    Broken("duplicate asset names", _duplicate_name,
           ("assets[1].name: expected a name no other asset has, got 'P-101', also assets[0]",),
           schema_blind="a rule across list items (uniqueItems compares whole items only)"),
    Broken("an asset copied whole", _copy_asset,
           ("assets[2].name: expected a name no other asset has, got 'P-101', also assets[0]",
            "assets[2].channels.bearing_temp.topic: expected a topic no other channel uses, "
            "got 'fernbrook/raw-water/P-101/bearing_temp', also "
            "assets[0].channels.bearing_temp.topic",
            "assets[2].channels.current.topic: expected a topic no other channel uses, "
            "got 'fernbrook/raw-water/P-101/current', also assets[0].channels.current.topic"),
           schema_blind="a rule across list items (uniqueItems compares whole items only)"),
    Broken("bundle that does not exist", _bundle_missing,
           ("assets[0].bundle: expected an existing model bundle directory (record, and "
            "check-config with --allow-missing-bundles, accept one not trained yet), "
            "got {tmp}/no-such-bundle",), schema_blind="the file system"),
    Broken("bundle that is a file", _bundle_is_file,
           ("assets[0].bundle: expected an existing model bundle directory (record, and "
            "check-config with --allow-missing-bundles, accept one not trained yet), "
            "got {tmp}/model.onnx",), schema_blind="the file system"),
    Broken("TLS CA file that does not exist", _ca_missing,
           ("upstream_broker.tls.ca_file: expected an existing file, got {tmp}/plant-ca.pem",),
           schema_blind="the file system"),
    Broken("client certificate without its key", _cert_without_key,
           ("upstream_broker.tls.cert_file: expected cert_file and key_file together "
            "(mutual TLS)",)),
    Broken("TLS verification off without allow_insecure",
           _set("upstream_broker", {"tls": {"verify": False}}),
           ("upstream_broker.tls.verify: expected true (set allow_insecure: true as well to "
            "accept an unverified TLS connection), got false (a boolean)",)),
    Broken("allow_insecure not a boolean",
           _set("upstream_broker", {"tls": {"verify": False, "allow_insecure": "yes please"}}),
           ("upstream_broker.tls.allow_insecure: expected true or false, got 'yes please'",
            "upstream_broker.tls.verify: expected true (set allow_insecure: true as well to "
            "accept an unverified TLS connection), got false (a boolean)")),
    Broken("bad decoder", _set("assets.0.channels.current.decoder", "xml"),
           (f"{P0}.decoder: expected one of json, json-batch, text, sparkplug-b, got 'xml'",)),
    Broken("bad feature name", _set("assets.0.channels.current.features", ["mean", "median"]),
           (f"{P0}.features[1]: expected one of {FEATURE_LIST}, got 'median'",)),
    Broken("feature twice", _set("assets.0.channels.current.features", ["rms", "std", "rms"]),
           (f"{P0}.features: expected each feature once, got rms repeated",)),
    Broken("no features", _set("assets.0.channels.current.features", []),
           (f"{P0}.features: expected at least one feature, got an empty list",)),
    Broken("feature as a mapping", _set("assets.0.channels.current.features", [{"rms": 1}]),
           (f"{P0}.features[0]: expected one of {FEATURE_LIST}, got a mapping",)),
    Broken("broker port out of range", _set("local_broker", {"port": 70000}),
           ("local_broker.port: expected a TCP port 1-65535, got 70000",)),
    Broken("http port negative", _set("http", {"port": -1}),
           ("http.port: expected a TCP port 0-65535 (0 picks a free one), got -1",)),
    Broken("port as a float", _set("local_broker", {"port": 1883.0}),
           ("local_broker.port: expected a TCP port 1-65535, got 1883.0",),
           schema_blind="JSON Schema counts 1883.0 as an integer; the loader does not"),
    Broken("keepalive as a string", _set("upstream_broker", {"keepalive_s": "20"}),
           ("upstream_broker.keepalive_s: expected seconds between 5 and 3600, got '20'",)),
    Broken("protocol unquoted", _set("upstream_broker", {"protocol": 5}),
           ("upstream_broker.protocol: expected '3.1.1' or '5', got 5",)),
    Broken("password given twice",
           _set("upstream_broker", {"password": "s3cret", "password_file": "upstream.secret"}),
           ("upstream_broker.password_file: expected either password or password_file, "
            "not both",)),
    Broken("endpoint port out of range",
           _set("upstream_broker", {"endpoints": [{"host": "broker-a", "port": 8883},
                                                  {"host": "broker-b", "port": 70000}]}),
           ("upstream_broker.endpoints[1].port: expected a TCP port 1-65535, got 70000",)),
    Broken("endpoint without a host", _set("upstream_broker", {"endpoints": [{"port": 8883}]}),
           ("upstream_broker.endpoints[0].host: expected a host name or address (required)",)),
    Broken("endpoint written as host:port",
           _set("upstream_broker", {"endpoints": [{"host": "broker-a"}, "broker-b:8883"]}),
           ("upstream_broker.endpoints[1]: expected a mapping with host and port, "
            "got 'broker-b:8883'",)),
    Broken("TLS inside an endpoint",
           _set("upstream_broker", {"endpoints": [{"host": "broker-a", "tls": {}}]}),
           ("upstream_broker.endpoints[0].tls: expected one of the known keys (host, port), "
            "got unknown key 'tls'",)),
    Broken("empty endpoint list", _set("upstream_broker", {"endpoints": []}),
           ("upstream_broker.endpoints: expected a non-empty list of {host, port} mappings, "
            "got an empty list",)),
    Broken("endpoint listed twice",
           _set("upstream_broker", {"endpoints": [{"host": "broker-a", "port": 8883},
                                                  {"host": "broker-a", "port": 8883}]}),
           ("upstream_broker.endpoints[1]: expected each endpoint listed once, "
            "got broker-a:8883 again",)),
    Broken("host and endpoints together",
           _set("upstream_broker", {"host": "broker-a", "endpoints": [{"host": "broker-b"}]}),
           ("upstream_broker.endpoints: expected either host/port or endpoints, not both",)),
    Broken("endpoints on the local broker",
           _set("local_broker", {"endpoints": [{"host": "127.0.0.1"}]}),
           ("local_broker.endpoints: expected one of the known keys (host, port, client_id, "
            "keepalive_s, username, password, password_file, protocol, tls), "
            "got unknown key 'endpoints'",)),
    Broken("scores not a boolean", _set("publish", {"scores": "sometimes"}),
           ("publish.scores: expected true or false, got 'sometimes'",)),
    Broken("tick too short", _set("pipeline", {"tick_s": 0}),
           ("pipeline.tick_s: expected seconds between 0.01 and 10, got 0",)),
    Broken("bad synchronous mode", _set("outbox", {"synchronous": "OFF"}),
           ("outbox.synchronous: expected FULL or NORMAL, got 'OFF'",)),
    Broken("infinite clock skew", _set("ingest", {"max_clock_skew_s": float("inf")}),
           ("ingest.max_clock_skew_s: expected a number of seconds > 0, got inf",),
           schema_blind="JSON has no infinity, so a schema has no type for finite numbers"),
    Broken("bad subscription filter", _set("ingest", {"subscriptions": ["fernbrook/#/vib"]}),
           ("ingest.subscriptions[0]: expected an MQTT topic filter, got 'fernbrook/#/vib'",)),
    Broken("subscriptions that miss a channel",
           _set("ingest", {"subscriptions": ["fernbrook/raw-water/#"]}),
           ("ingest.subscriptions: expected filters that cover every channel topic (none "
            "covers 'fernbrook/aeration/B-201/vib' of asset B-201)",
            "ingest.subscriptions: expected filters that cover every channel topic (none "
            "covers 'fernbrook/aeration/B-201/bearing_temp' of asset B-201)"),
           schema_blind="a rule across keys (filters against channel topics)"),
    Broken("asset name with a space", _set("assets.0.name", "P 101"),
           ("assets[0].name: expected an asset name of letters, digits, '_', '.', '-' "
            "(at most 64), got 'P 101'",)),
    Broken("channel name with a slash",
           _set("assets.0.channels", {"bearing/temp": {"topic": "fernbrook/t", "rate_hz": 1}}),
           ("assets[0].channels.bearing/temp: expected a channel name of letters, digits, "
            "'_', '.', '-' (at most 64), got 'bearing/temp'",)),
    Broken("site missing", _delete("site"),
           ("site: expected a site name of letters, digits, '_', '.', '-' (at most 64) "
            "(required)",)),
    Broken("asset not a mapping", _set("assets.1", "B-201"),
           ("assets[1]: expected an asset mapping (name, channels, window, detector, bundle), "
            "got 'B-201'",)),
    Broken("channel not a mapping", _set("assets.0.channels.current", "fernbrook/x"),
           (f"{P0}: expected a mapping of channel settings (topic, decoder, rate_hz, ...), "
            "got 'fernbrook/x'",)),
    Broken("no channels", _set("assets.0.channels", {}),
           ("assets[0].channels: expected a mapping of channel name to channel settings, "
            "got an empty mapping",)),
    Broken("top level a list", lambda _d, _t: ["site", "gateway"],
           ("(top level): expected a mapping of settings (site, gateway, assets, ...), "
            "got a list of 2",)),
    Broken("mqtt commands without upstream authentication",
           _set("rebaseline", {"mqtt_commands": True, "broker_enforces_acl": True}),
           ("rebaseline.mqtt_commands: expected false unless upstream_broker authenticates "
            "(a username or tls.cert_file): the broker's ACL must decide who may publish "
            "commands, got true (a boolean)",),
           schema_blind="a rule across sections (rebaseline and upstream_broker)"),
    Broken("mqtt commands without the statement that the broker enforces access",
           lambda d, t: {**d, "upstream_broker": {"username": "gw1"},
                         "rebaseline": {"mqtt_commands": True}},
           ("rebaseline.mqtt_commands: expected false unless rebaseline.broker_enforces_acl "
            "is true (the operator's statement that the upstream broker refuses anonymous "
            "clients and its ACL lets only trusted users publish on "
            "<topic_prefix>/commands/#; see README, MQTT commands), got true (a boolean)",)),
    Broken("rebaseline windows past the bound", _set("rebaseline", {"windows": 17_281}),
           ("rebaseline.windows: expected an integer from 60 to 17280, got 17281",)),
    Broken("empty assets", _set("assets", []),
           ("assets: expected a non-empty list of assets, got an empty list",)),
    Broken("assets missing", _delete("assets"),
           ("assets: expected a non-empty list of assets, got nothing",)),
    Broken("several problems at once", _edits(
        _delete("gateway"),
        _set("local_broker", {"port": "1883"}),
        _set("assets.0.window", {"length_s": 0, "hop": 5}),
        _set("assets.1.channels.vib.decoder", "wav")),
        ("gateway: expected a gateway name of letters, digits, '_', '.', '-' (at most 64) "
         "(required)",
         "local_broker.port: expected a TCP port 1-65535, got '1883'",
         f"{W0}.hop: expected one of the known keys (length_s, hop_s, lateness_s, timeout_s, "
         "min_coverage), got unknown key 'hop'",
         f"{W0}.length_s: expected a number of seconds > 0, got 0",
         "assets[1].channels.vib.decoder: expected one of json, json-batch, text, sparkplug-b, "
         "got 'wav'")),
)

# YAML that does not parse: the loader names the line and column (1-based).
BAD_YAML = """\
site: fernbrook
gateway: gw1
assets:
  - name: P-101
    channels: {current: {topic: fernbrook/raw-water/P-101/current, rate_hz: 10}
"""
BAD_YAML_WHERE = "line 6, column 1: expected valid YAML"
