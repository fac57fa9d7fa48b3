"""The watchkeep-sim command line without a broker: config, capture, labels, errors."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from agent.commission.capture import read_capture
from simulator.cli import main
from simulator.config import watchkeep_assets
from simulator.plant import simulate
from simulator.scenario import load_scenario, read_labels

SCENARIO = """\
name: cli
seed: 3
start: 2026-03-02T08:00:00Z
duration_s: 3
assets:
  - {name: P-101, kind: pump, area: raw-water}
timeline:
  - {at_s: 1, asset: P-101, fault: imbalance, ramp_s: 1}
"""


@pytest.fixture
def scenario(tmp_path: Path) -> Path:
    p = tmp_path / "scenario.yaml"
    p.write_text(SCENARIO)
    return p


def test_config_prints_the_assets_section(scenario: Path,
                                          capsys: pytest.CaptureFixture[str]) -> None:
    """`config` prints YAML whose assets: equals watchkeep_assets()."""
    assert main(["config", "--scenario", str(scenario)]) == 0
    printed = yaml.safe_load(capsys.readouterr().out)
    assert printed == {"assets": watchkeep_assets(load_scenario(scenario))}


def test_run_without_broker_writes_capture_and_labels(scenario: Path, tmp_path: Path) -> None:
    """--no-broker --out writes exactly simulate()'s messages; --labels the ground truth."""
    out, lab = tmp_path / "cap.jsonl", tmp_path / "labels.csv"
    assert main(["run", "--scenario", str(scenario), "--no-broker", "--out", str(out),
                 "--labels", str(lab)]) == 0
    assert list(read_capture(out)) == list(simulate(load_scenario(scenario)))
    [label] = read_labels(lab)
    assert (label.asset, label.kind, label.start) == ("P-101", "imbalance", 1772438401.0)


def test_overrides_change_duration_seed_and_start(scenario: Path, tmp_path: Path) -> None:
    """--duration, --seed and --start override the file."""
    out = tmp_path / "cap.jsonl"
    assert main(["run", "--scenario", str(scenario), "--no-broker", "--out", str(out),
                 "--duration", "1", "--seed", "9", "--start", "1000"]) == 0
    msgs = list(read_capture(out))
    assert msgs[0][0] == 1000.0 and msgs[-1][0] == pytest.approx(1001.0)


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--no-broker"], "needs --out"),
        ([], "--broker"),
        (["--broker", "localhost:notaport"], "not a number"),
    ],
)
def test_usage_errors_are_one_line(scenario: Path, args: list[str], message: str,
                                   capsys: pytest.CaptureFixture[str]) -> None:
    """Known errors print one line on stderr and return non-zero."""
    assert main(["run", "--scenario", str(scenario), *args]) != 0
    err = capsys.readouterr().err
    assert message in err and err.count("\n") == 1


def test_bad_scenario_exits_non_zero_without_traceback(tmp_path: Path) -> None:
    """A broken scenario, run as a real process, gives one line naming the key path."""
    p = tmp_path / "bad.yaml"
    p.write_text("duration_s: 5\nassets: [{name: P-1, kind: turbine, area: a}]\n")
    r = subprocess.run([sys.executable, "-m", "simulator.cli", "run", "--scenario", str(p),
                        "--no-broker", "--out", str(tmp_path / "o.jsonl")],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2
    assert "assets[0].kind" in r.stderr
    assert "Traceback" not in r.stderr and r.stderr.count("\n") == 1
    assert not (tmp_path / "o.jsonl").exists()


def test_unreachable_broker_is_one_line(scenario: Path,
                                        capsys: pytest.CaptureFixture[str]) -> None:
    """Port 1 on loopback refuses: exit code 3 and a one-line message."""
    assert main(["run", "--scenario", str(scenario), "--broker", "127.0.0.1:1"]) == 3
    assert "cannot connect" in capsys.readouterr().err
