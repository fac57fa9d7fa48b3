"""`watchkeep discover` against the simulated Fernbrook plant on a real Mosquitto."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import yaml

from agent.config.load import load_config
from tests.brokers import Broker

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "config" / "demo"
LISTEN_S = 20


def test_discover_finds_every_demo_channel(broker: Broker, tmp_path: Path) -> None:
    """Every channel of config/demo/watchkeep.yaml is found with its decoder and a rate
    within 5%, and the written starter config passes `watchkeep check-config`."""
    out = tmp_path / "starter.yaml"
    sim = subprocess.Popen(
        [sys.executable, "-m", "simulator.cli", "run", "--scenario",
         str(DEMO / "scenario.yaml"), "--broker", f"127.0.0.1:{broker.port}",
         "--duration", str(LISTEN_S + 15)],
        cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    try:
        res = subprocess.run(
            [sys.executable, "-m", "agent.cli.main", "discover", "--broker",
             f"127.0.0.1:{broker.port}", "--duration", str(LISTEN_S), "--topic",
             "fernbrook/#", "--out", str(out)],
            cwd=ROOT, capture_output=True, text=True, timeout=LISTEN_S + 60)
    finally:
        sim.terminate()
        sim.wait(10)
    assert res.returncode == 0, res.stderr
    table = {row.split()[0]: row.split() for row in res.stdout.splitlines()[1:]}
    written = yaml.safe_load(out.read_text())
    found = {ch["topic"]: ch for a in written["assets"] for ch in a["channels"].values()}
    demo = load_config(DEMO / "watchkeep.yaml")
    for asset in demo.assets:
        for ch in asset.channels:
            assert ch.topic in found, f"{ch.topic} not found"
            got = found[ch.topic]
            assert got["decoder"] == ch.decoder.value, ch.topic
            assert abs(got["rate_hz"] - ch.rate_hz) <= 0.05 * ch.rate_hz, (ch.topic, got)
            # the measured message rate, before rounding (blocks: 256 samples each)
            msg_hz = ch.rate_hz / 256 if ch.decoder.value == "json-batch" else ch.rate_hz
            measured = float(table[ch.topic][1])
            assert abs(measured - msg_hz) <= 0.05 * msg_hz, (ch.topic, table[ch.topic])
    names = {a["name"]: set(a["channels"]) for a in written["assets"]}
    assert names == {a.name: {c.name for c in a.channels} for a in demo.assets}
    chk = subprocess.run([sys.executable, "-m", "agent.cli.main", "check-config", str(out)],
                         cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert chk.returncode == 0, chk.stdout + chk.stderr
    assert chk.stdout.count("model: none (windows are not scored)") == len(demo.assets)


def test_discover_without_a_broker_is_one_line(tmp_path: Path) -> None:
    """Nothing listening on the port: one line naming the broker, exit 6, no file."""
    from tests.brokers import free_port

    port = free_port()
    out = tmp_path / "x.yaml"
    res = subprocess.run([sys.executable, "-m", "agent.cli.main", "discover", "--broker",
                          f"127.0.0.1:{port}", "--duration", "1", "--out", str(out)],
                         cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert res.returncode == 6, res.stderr
    assert res.stderr.strip().splitlines()[-1].startswith(
        f"watchkeep: cannot reach the broker 127.0.0.1:{port}")
    assert "Traceback" not in res.stderr and not out.exists()


def test_discover_with_nothing_to_hear_writes_nothing(broker: Broker, tmp_path: Path) -> None:
    """A quiet broker: the table is empty, no starter config is written, exit 1."""
    out = tmp_path / "x.yaml"
    res = subprocess.run([sys.executable, "-m", "agent.cli.main", "discover", "--broker",
                          f"127.0.0.1:{broker.port}", "--duration", "1", "--topic",
                          "nobody/#", "--out", str(out)],
                         cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert res.returncode == 1, res.stderr
    assert "no topic carried numbers" in res.stderr and not out.exists()
