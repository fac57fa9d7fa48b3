"""`watchkeep check-config` as the integrator runs it: a summary, or one line per problem."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import yaml

from agent.config.load import load_config
from tests.helpers import CHANNELS, asset_doc, train_pca_bundle
from tests.unit.config.config_cases import BAD_YAML, BAD_YAML_WHERE, BROKEN, CONFIG_DIR

# The console script installed beside the interpreter running the tests (.venv/bin).
WATCHKEEP = Path(sys.executable).with_name("watchkeep")


def check_config(path: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([str(WATCHKEEP), "check-config", str(path)], capture_output=True,
                          text=True, timeout=120, check=False)


def test_example_summary() -> None:
    """The example passes with exit 0 and a summary naming every asset, channel and topic."""
    path = CONFIG_DIR / "example.yaml"
    done = check_config(path)
    assert done.returncode == 0, done.stderr
    assert done.stderr == ""
    out = done.stdout
    assert out.splitlines()[0] == f"config {path}: OK"
    assert "site fernbrook, gateway gw-raw-water, topic prefix watchkeep/fernbrook/gw-raw-water" \
        in out
    cfg = load_config(path)
    for asset in cfg.assets:
        assert f"asset {asset.name}: {len(asset.channels)} channels" in out
        for ch in asset.channels:
            line = next(x for x in out.splitlines() if x.strip().startswith(f"{ch.name} ")
                        and x.rstrip().endswith(ch.topic))
            assert ch.decoder.value in line and f"{ch.rate_hz:g} Hz" in line
    assert "window 20 s, hop 5 s, raise 3 of 5, clear after 4" in out   # B-201
    # One model line per asset, or per scored mode for an asset with operating modes.
    assert out.count(": none (windows are not scored)") >= len(cfg.assets)
    assert "modes from speed: stopped (not scored), reduced, rated" in out
    assert len(out.splitlines()) <= 40   # one screen


def test_broken_file_lists_every_problem(tmp_path: Path) -> None:
    """A broken file exits non-zero with one stderr line per problem and no traceback."""
    case = next(c for c in BROKEN if c.id == "several problems at once")
    path = tmp_path / "broken.yaml"
    path.write_text(yaml.safe_dump(case.build(tmp_path), sort_keys=False))
    done = check_config(path)
    assert done.returncode == 2
    assert done.stdout == ""
    lines = done.stderr.splitlines()
    assert lines[0] == f"watchkeep: {path}: {len(case.problems)} problems:"
    assert sorted(line.strip() for line in lines[1:]) == case.expected(tmp_path)
    assert "Traceback" not in done.stderr


def test_single_problem_is_one_line(tmp_path: Path) -> None:
    """One problem is one line: the file, the key path, what was expected and what was found."""
    case = next(c for c in BROKEN if c.id == "topic not a string")
    path = tmp_path / "broken.yaml"
    path.write_text(yaml.safe_dump(case.build(tmp_path), sort_keys=False))
    done = check_config(path)
    assert done.returncode == 2
    assert done.stderr == f"watchkeep: {path}: {case.problems[0]}\n"


def test_yaml_syntax_error(tmp_path: Path) -> None:
    """A file that is not YAML names the line, on one line, without a traceback."""
    path = tmp_path / "broken.yaml"
    path.write_text(BAD_YAML)
    done = check_config(path)
    assert done.returncode == 2
    assert done.stderr.startswith(f"watchkeep: {path}: {BAD_YAML_WHERE}")
    assert len(done.stderr.splitlines()) == 1


def test_missing_file(tmp_path: Path) -> None:
    """A path that does not exist is one line and a non-zero exit."""
    done = check_config(tmp_path / "absent.yaml")
    assert done.returncode == 2
    assert len(done.stderr.splitlines()) == 1 and "expected a readable file" in done.stderr


def test_bundles_are_checked(tmp_path: Path) -> None:
    """A usable bundle is summarised; a directory without a model fails that asset (exit 3)."""
    good = train_pca_bundle(tmp_path / "models" / "P-101", "P-101")
    empty = tmp_path / "models" / "P-102"
    empty.mkdir()
    doc = {"site": "fernbrook", "gateway": "gw1", "state_dir": str(tmp_path / "state"),
           "assets": [asset_doc("P-101", good, prefix="fernbrook"),
                      asset_doc("P-102", empty, prefix="fernbrook")]}
    path = tmp_path / "watchkeep.yaml"
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    done = check_config(path)
    assert done.returncode == 3, done.stderr
    assert "Traceback" not in done.stderr
    assert done.stderr.strip() == "1 model bundle(s) cannot be used"
    lines = done.stdout.splitlines()
    first = lines.index(next(x for x in lines if x.strip().startswith("asset P-101:")))
    second = lines.index(next(x for x in lines if x.strip().startswith("asset P-102:")))
    good_model = next(x for x in lines[first:second] if "model:" in x)
    assert f"P-101/default v1, {len(CHANNELS) * 2} features" in good_model
    bad_model = next(x for x in lines[second:] if "model:" in x)
    assert "model: ERROR" in bad_model and str(empty) in bad_model


def test_endpoints_listed_and_a_bad_entry_named(tmp_path: Path) -> None:
    """A cluster's endpoints are listed in order; a bad entry exits 2 naming its key path."""
    doc = yaml.safe_load((CONFIG_DIR / "example.yaml").read_text())
    doc["upstream_broker"].pop("host")
    doc["upstream_broker"].pop("port")
    doc["upstream_broker"].pop("password_file", None)
    doc["upstream_broker"].pop("username", None)
    doc["upstream_broker"]["endpoints"] = [{"host": "broker-a.fernbrook.lan", "port": 8883},
                                           {"host": "broker-b.fernbrook.lan"}]
    path = tmp_path / "cluster.yaml"
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    done = check_config(path)
    assert done.returncode == 0, done.stderr
    assert ("upstream broker endpoints broker-a.fernbrook.lan:8883, "
            "broker-b.fernbrook.lan:1883") in done.stdout
    doc["upstream_broker"]["endpoints"][1]["port"] = "8883"
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    done = check_config(path)
    assert done.returncode == 2
    assert done.stderr.splitlines() == [
        f"watchkeep: {path}: upstream_broker.endpoints[1].port: expected a TCP port 1-65535, "
        "got '8883'"]


def test_bundles_not_trained_yet(tmp_path: Path) -> None:
    """A bundle path that does not exist yet fails the check (exit 2, naming the flag) and
    passes with --allow-missing-bundles, with a warning: the config `record` runs with."""
    doc = {"site": "fernbrook", "gateway": "gw1", "state_dir": str(tmp_path / "state"),
           "assets": [asset_doc("P-101", tmp_path / "models" / "P-101", prefix="fernbrook")]}
    path = tmp_path / "watchkeep.yaml"
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    done = check_config(path)
    assert done.returncode == 2, done.stderr
    assert "assets[0].bundle" in done.stderr and "--allow-missing-bundles" in done.stderr
    done = subprocess.run([str(WATCHKEEP), "check-config", "--allow-missing-bundles", str(path)],
                          capture_output=True, text=True, timeout=120, check=False)
    assert done.returncode == 0, done.stderr
    model = next(x for x in done.stdout.splitlines() if "model:" in x)
    assert "not trained yet" in model and str(tmp_path / "models" / "P-101") in model
    assert done.stderr.strip() == ("warning: 1 model bundle(s) not trained yet: fine for "
                                   "`record`, not for `run`")
