"""The config loader: shipped examples load, broken configs name every problem, defaults."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
import yaml

from agent.config.load import (
    DEFAULT_FEATURES,
    FEW_SAMPLES_FEATURES,
    WAVEFORM_DEFAULT_FEATURES,
    Config,
    Decoder,
    Endpoint,
    MqttProtocol,
    Synchronous,
    load_config,
    parse_config,
)
from agent.errors import ConfigError
from tests.unit.config.config_cases import (
    BAD_YAML,
    BAD_YAML_WHERE,
    BROKEN,
    CONFIG_DIR,
    Broken,
    base_doc,
    shipped_configs,
)


def write(tmp_path: Path, doc: Any) -> Path:
    path = tmp_path / "watchkeep.yaml"
    path.write_text(doc if isinstance(doc, str) else yaml.safe_dump(doc, sort_keys=False))
    return path


def problems_of(path: Path) -> list[str]:
    with pytest.raises(ConfigError) as info:
        load_config(path)
    return sorted(str(p) for p in info.value.problems)


def test_example_is_among_the_shipped_configs() -> None:
    """The discovery below finds config/example.yaml and skips the simulator scenarios."""
    found = shipped_configs()
    assert CONFIG_DIR / "example.yaml" in found
    assert CONFIG_DIR / "demo" / "scenario.yaml" not in found


@pytest.mark.parametrize("path", shipped_configs(), ids=lambda p: str(p.relative_to(CONFIG_DIR)))
def test_shipped_config_loads(path: Path) -> None:
    """Every shipped watchkeep config loads as shipped."""
    cfg = load_config(path)
    assert cfg.assets and all(a.channels for a in cfg.assets)


def test_example_uses_every_decoder_and_a_hop() -> None:
    """The example shows each decoder and an overlapping window, as its comments describe."""
    cfg = load_config(CONFIG_DIR / "example.yaml")
    assert {ch.decoder for a in cfg.assets for ch in a.channels} == set(Decoder)
    assert any(a.window.hop_s < a.window.length_s for a in cfg.assets)
    assert cfg.asset("P-101").channel("vib").rate_hz == 2560


@pytest.mark.parametrize("case", BROKEN, ids=lambda c: c.id)
def test_broken_config_names_each_problem(case: Broken, tmp_path: Path) -> None:
    """Each broken config yields exactly the expected messages: key path, expected, got."""
    assert problems_of(write(tmp_path, case.build(tmp_path))) == case.expected(tmp_path)


def test_broken_table_is_large_enough() -> None:
    """The table covers at least 20 distinct breakages, each with a unique id."""
    assert len(BROKEN) >= 20
    assert len({c.id for c in BROKEN}) == len(BROKEN)


def test_yaml_syntax_error_names_its_line(tmp_path: Path) -> None:
    """A file that is not YAML is one problem naming line and column, with the file name."""
    path = write(tmp_path, BAD_YAML)
    with pytest.raises(ConfigError) as info:
        load_config(path)
    assert len(info.value.problems) == 1
    assert str(info.value.problems[0]).startswith(BAD_YAML_WHERE)
    assert str(info.value).startswith(f"{path}: {BAD_YAML_WHERE}")


# Found by the config fuzz target (tests/fuzz/fuzz_config.py): each was a traceback
# (UnicodeDecodeError, RecursionError from PyYAML's composer), not a ConfigError.
@pytest.mark.parametrize(("raw", "problem"), [
    (b"site: fernbrook\ngateway: \xe8\xda\n", "line 2, column 10: expected UTF-8 text, "
     "got byte 0xe8"),
    (b"\xff\xfe", "line 1, column 1: expected UTF-8 text, got byte 0xff"),
    (b"site: " + b"[" * 3000 + b"]" * 3000 + b"\n", "(file): expected YAML nested less "
     "deeply, got collections nested past the parser's recursion limit"),
])
def test_undecodable_or_deeply_nested_file_is_one_problem(tmp_path: Path, raw: bytes,
                                                          problem: str) -> None:
    path = tmp_path / "watchkeep.yaml"
    path.write_bytes(raw)
    assert problems_of(path) == [problem]


@pytest.mark.parametrize(("edit", "where"), [
    ({"state_dir": "~nosuchuser-wk/state"}, "state_dir"),
    ({"outbox": {"path": "~nosuchuser-wk/outbox.sqlite"}}, "outbox.path"),
    ({"rebaseline": {"admin_socket": "~nosuchuser-wk/a.sock"}}, "rebaseline.admin_socket"),
])
def test_tilde_of_no_user_names_its_key(tmp_path: Path, edit: dict[str, Any],
                                        where: str) -> None:
    """`~name` of no user on this machine is a problem at the key (found by the config
    fuzz target: Path.expanduser's RuntimeError escaped the loader)."""
    value = next(iter(edit.values()))
    value = value if isinstance(value, str) else next(iter(value.values()))
    assert problems_of(write(tmp_path, {**base_doc(), **edit})) == [
        f"{where}: expected a path whose leading ~ names a user of this machine, "
        f"got {value!r}"]


def test_all_problems_are_in_the_error_text(tmp_path: Path) -> None:
    """The exception text lists every problem, one per line, under a count."""
    case = next(c for c in BROKEN if c.id == "several problems at once")
    path = write(tmp_path, case.build(tmp_path))
    with pytest.raises(ConfigError) as info:
        load_config(path)
    lines = str(info.value).splitlines()
    assert lines[0] == f"{path}: {len(case.problems)} problems:"
    assert sorted(line.strip() for line in lines[1:]) == case.expected(tmp_path)


def test_missing_file_is_a_config_error(tmp_path: Path) -> None:
    """A file that cannot be read is a ConfigError, not an OSError."""
    with pytest.raises(ConfigError, match="expected a readable file"):
        load_config(tmp_path / "absent.yaml")


def test_empty_file_names_the_required_keys(tmp_path: Path) -> None:
    """An empty file is a missing site, gateway and assets."""
    problems = problems_of(write(tmp_path, ""))
    assert [p.split(":")[0] for p in problems] == ["assets", "gateway", "site"]


def test_defaults(tmp_path: Path) -> None:
    """Omitted keys take the documented defaults."""
    cfg = load_config(write(tmp_path, base_doc()))
    assert cfg.topic_prefix == "watchkeep/fernbrook/gw1"
    assert cfg.state_dir == tmp_path / "state"
    assert cfg.outbox.path == tmp_path / "state" / "outbox.sqlite"
    assert cfg.outbox.synchronous is Synchronous.FULL
    assert (cfg.outbox.max_rows, cfg.outbox.max_bytes, cfg.outbox.inflight) == \
        (100_000, 64 * 1024 * 1024, 20)
    lb, ub = cfg.local_broker, cfg.upstream_broker
    assert (lb.host, lb.port, lb.keepalive_s, lb.protocol) == \
        ("127.0.0.1", 1883, 20, MqttProtocol.V311)
    assert lb.client_id == "watchkeep-fernbrook-gw1-ingest"
    assert ub.client_id == "watchkeep-fernbrook-gw1-upstream"
    assert lb.tls is None and ub.tls is None and ub.password is None
    assert (cfg.ingest.max_payload_bytes, cfg.ingest.max_clock_skew_s,
            cfg.ingest.subscriptions) == (262144, 300.0, ())
    assert cfg.tick_s == 0.1 and cfg.publish_scores is False
    assert (cfg.http.enabled, cfg.http.host, cfg.http.port) == (True, "127.0.0.1", 9310)
    pump = cfg.asset("P-101")
    w = pump.window
    assert (w.length_s, w.hop_s, w.lateness_s, w.timeout_s, w.min_coverage) == \
        (10.0, 10.0, 1.0, 5.0, 0.8)
    d = pump.detector
    assert (d.raise_k, d.raise_n, d.clear_m) == (2, 3, 3)
    assert pump.bundle is None
    temp = pump.channel("bearing_temp")
    # 1 Hz over a 10 s window: too few samples for extremes and higher moments
    assert temp.decoder is Decoder.JSON and temp.features == FEW_SAMPLES_FEATURES
    assert (temp.ts_field, temp.value_field, temp.unit) == ("ts", "value", "")
    vib = cfg.asset("B-201").channel("vib")
    assert vib.features == WAVEFORM_DEFAULT_FEATURES
    assert (vib.values_field, vib.rate_field) == ("values", "rate_hz")


@pytest.mark.parametrize(("upstream", "targets"), [
    ({}, [("127.0.0.1", 1883)]),                                   # the default
    ({"host": "broker-a", "port": 8883}, [("broker-a", 8883)]),     # the single form
    ({"endpoints": [{"host": "broker-a", "port": 8883}, {"host": "broker-b"},
                    {"host": "fd00::7", "port": 18883}]},
     [("broker-a", 8883), ("broker-b", 1883), ("fd00::7", 18883)]),  # port defaults to 1883
    ({"endpoints": [{"host": "broker-a", "port": 8883}], "host": None},
     [("broker-a", 8883)]),                                         # null host: not given
])
def test_upstream_endpoints(upstream: dict[str, Any], targets: list[tuple[str, int]],
                            tmp_path: Path) -> None:
    """The upstream broker is one host/port or a list of endpoints, in the listed order;
    host and port are the first endpoint's."""
    doc = base_doc()
    doc["upstream_broker"] = upstream
    ub = load_config(write(tmp_path, doc)).upstream_broker
    assert [(e.host, e.port) for e in ub.targets()] == targets
    assert (ub.host, ub.port) == targets[0]
    assert ub.endpoints == (tuple(Endpoint(h, p) for h, p in targets)
                            if "endpoints" in upstream else ())


def test_endpoint_names_itself() -> None:
    """An endpoint prints as host:port, an IPv6 address in brackets (the metric label)."""
    assert [str(Endpoint("broker-a", 8883)), str(Endpoint("fd00::7", 1883))] == \
        ["broker-a:8883", "[fd00::7]:1883"]


@pytest.mark.parametrize(("window", "expected"), [
    ({"length_s": 20}, (20.0, 20.0, 1.0, 5.0)),       # hop defaults to length
    ({"length_s": 0.5}, (0.5, 0.5, 0.5, 5.0)),        # lateness at most the length
    ({"length_s": 60, "hop_s": 15, "lateness_s": 8}, (60.0, 15.0, 8.0, 8.0)),  # timeout >= lateness
])
def test_window_defaults_follow_length(window: dict[str, float],
                                       expected: tuple[float, ...], tmp_path: Path) -> None:
    """hop_s, lateness_s and timeout_s default from the keys they depend on."""
    doc = base_doc()
    doc["assets"][0]["window"] = window
    w = load_config(write(tmp_path, doc)).assets[0].window
    assert (w.length_s, w.hop_s, w.lateness_s, w.timeout_s) == expected


def test_raise_n_defaults_to_at_least_raise_k(tmp_path: Path) -> None:
    """raise_k alone above 3 is accepted: raise_n follows it."""
    doc = base_doc()
    doc["assets"][0]["detector"] = {"raise_k": 5}
    d = load_config(write(tmp_path, doc)).assets[0].detector
    assert (d.raise_k, d.raise_n) == (5, 5)


def test_prefix_and_relative_paths(tmp_path: Path) -> None:
    """An explicit prefix loses a trailing '/'; relative paths are relative to the file."""
    (tmp_path / "models" / "P-101").mkdir(parents=True)
    doc = base_doc()
    doc["topic_prefix"] = "plant/watch/"
    doc["outbox"] = {"path": "queue/outbox.db"}
    doc["assets"][0]["bundle"] = "models/P-101"
    cfg = load_config(write(tmp_path, doc))
    assert cfg.topic_prefix == "plant/watch"
    assert cfg.outbox.path == tmp_path / "queue" / "outbox.db"
    assert cfg.assets[0].bundle == tmp_path / "models" / "P-101"


def test_null_means_default(tmp_path: Path) -> None:
    """An empty YAML value (null) for an optional key is the same as leaving it out."""
    doc = base_doc()
    doc.update(local_broker=None, ingest={"subscriptions": None}, http={"port": None})
    doc["assets"][0]["window"] = {"hop_s": None}
    cfg = load_config(write(tmp_path, doc))
    assert cfg.local_broker.port == 1883 and cfg.http.port == 9310
    assert cfg.assets[0].window.hop_s == 10.0


def test_parse_config_is_frozen_and_typed(tmp_path: Path) -> None:
    """parse_config takes a decoded document and returns frozen objects."""
    cfg = parse_config(base_doc(), tmp_path)
    assert isinstance(cfg, Config)
    with pytest.raises(AttributeError):
        cfg.site = "elsewhere"  # type: ignore[misc]


def test_default_features_follow_samples_per_window() -> None:
    """A channel with 100 or more samples per window gets the full default set; fewer, mean
    and std (extremes and higher moments of a handful of samples are noise)."""
    doc = {"site": "s", "gateway": "g", "local_broker": {"host": "127.0.0.1"},
           "upstream_broker": {"host": "127.0.0.1"},
           "assets": [{"name": "A", "window": {"length_s": 10},
                       "channels": {"fast": {"topic": "t/fast", "rate_hz": 10},
                                    "slow": {"topic": "t/slow", "rate_hz": 9.9}}}]}
    a = parse_config(doc, Path("."))
    assert a.asset("A").channel("fast").features == DEFAULT_FEATURES
    assert a.asset("A").channel("slow").features == FEW_SAMPLES_FEATURES


@pytest.mark.parametrize(("text", "value"), [
    ("1e6", 1e6), ("1.0e6", 1e6), ("1.0e+6", 1e6), ("1E6", 1e6), ("-2.5e-3", -2.5e-3),
    ("+1e3", 1e3), (".5e2", 50.0), ("1000", 1000), ("0.5", 0.5), ("1_000", 1000),
])
def test_exponent_numbers_are_numbers(tmp_path: Path, text: str, value: float) -> None:
    """YAML 1.2 exponent floats (YAML 1.2.2 section 10.3.2: `1e6`, `1.0e6`) are numbers,
    as they are to an editor's YAML language server, not the strings PyYAML's YAML 1.1
    resolver makes of them; YAML 1.1 forms still read as before."""
    from agent.config.load import yaml_load

    got = yaml_load(f"x: {text}")["x"]
    assert got == value and type(got) is type(value)
    doc = yaml.safe_dump(base_doc(), sort_keys=False) + f"pipeline:\n  tick_s: {text}\n"
    if 0.01 <= value <= 10:
        assert load_config(write(tmp_path, doc)).tick_s == pytest.approx(value)
    else:  # out of range: refused as a number, not as "a string"
        assert problems_of(write(tmp_path, doc)) == [
            f"pipeline.tick_s: expected seconds between 0.01 and 10, got {value}"]


@pytest.mark.parametrize("text", ["'1e6'", '"1.0e6"', "v1e6", "1e", "e6", "1.2.3e4",
                                  "0x1e6", "2024-01-01", "1e6 rpm"])
def test_exponent_resolver_leaves_other_text_alone(text: str) -> None:
    """Quoted numbers, names and dates are not taken for exponent floats."""
    from agent.config.load import yaml_load

    assert yaml_load(f"x: {text}") == yaml.safe_load(f"x: {text}")


def test_column_and_startup_grace(tmp_path: Path) -> None:
    """A channel's CSV `column:` and `ingest.startup_grace_s` are read; defaults none, 120 s."""
    doc = base_doc()
    cfg = parse_config(doc, tmp_path)
    assert cfg.ingest.startup_grace_s == 120.0
    assert all(ch.column is None for a in cfg.assets for ch in a.channels)
    first = next(iter(doc["assets"][0]["channels"]))
    doc["assets"][0]["channels"][first]["column"] = "FT-101 [m3/h]"
    doc["ingest"] = {"startup_grace_s": 30}
    cfg = parse_config(doc, tmp_path)
    assert cfg.assets[0].channels[0].column == "FT-101 [m3/h]"
    assert cfg.ingest.startup_grace_s == 30.0


def test_missing_bundle_is_accepted_only_when_asked(tmp_path: Path) -> None:
    """A bundle not trained yet: an error naming the key, unless require_bundles=False."""
    doc = base_doc()
    doc["assets"][0]["bundle"] = str(tmp_path / "models" / "not-yet")
    with pytest.raises(ConfigError) as info:
        parse_config(doc, tmp_path)
    assert [p.key_path for p in info.value.problems] == ["assets[0].bundle"]
    cfg = parse_config(doc, tmp_path, require_bundles=False)
    assert cfg.assets[0].bundle == tmp_path / "models" / "not-yet"
