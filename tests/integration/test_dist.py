"""`make dist`'s artefacts: the sdist is a whole checkout, the wheel installs and runs."""

from __future__ import annotations

import subprocess
import sys
import tarfile
from pathlib import Path

import pytest
import yaml

from agent import __version__

ROOT = Path(__file__).resolve().parents[2]


@pytest.mark.slow
def test_wheel_installs_into_a_fresh_venv_and_runs(tmp_path: Path) -> None:
    """`python -m build` (what `make dist` runs) gives an sdist with the tests and configs
    and a wheel that installs into a new venv, where both commands run outside the checkout."""
    dist = tmp_path / "dist"
    res = subprocess.run([sys.executable, "-m", "build", "--outdir", str(dist), str(ROOT)],
                         capture_output=True, text=True, timeout=600)
    assert res.returncode == 0, res.stdout[-2000:] + res.stderr[-2000:]
    sdist = dist / f"watchkeep-{__version__}.tar.gz"
    wheel = dist / f"watchkeep-{__version__}-py3-none-any.whl"
    assert sdist.is_file() and wheel.is_file(), sorted(p.name for p in dist.iterdir())
    with tarfile.open(sdist) as tf:
        names = {n.split("/", 1)[1] for n in tf.getnames() if "/" in n}
    for needed in ("Makefile", "pyproject.toml", "agent/cli/main.py", "simulator/cli.py",
                   "config/demo/watchkeep.yaml", "systemd/watchkeep.service",
                   "tests/unit/test_docs.py", ".ci/test-deps"):
        assert needed in names, needed

    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", str(venv)], check=True, timeout=120)
    res = subprocess.run([str(venv / "bin" / "pip"), "install", "--quiet", str(wheel)],
                         capture_output=True, text=True, timeout=900)
    assert res.returncode == 0, res.stderr[-2000:]
    run = tmp_path / "elsewhere"  # not the checkout: only the installed package can serve
    run.mkdir()
    ver = subprocess.run([str(venv / "bin" / "watchkeep"), "--version"], cwd=run,
                         capture_output=True, text=True, timeout=60)
    assert ver.returncode == 0 and ver.stdout.strip() == f"watchkeep {__version__}", ver
    cfg = run / "site.yaml"
    cfg.write_text(yaml.safe_dump({
        "site": "fernbrook", "gateway": "gw-01",
        "assets": [{"name": "P-101", "channels": {"temp": {
            "topic": "fernbrook/raw-water/P-101/temp", "decoder": "json", "rate_hz": 1}}}]}))
    chk = subprocess.run([str(venv / "bin" / "watchkeep"), "check-config", str(cfg)], cwd=run,
                         capture_output=True, text=True, timeout=120)
    assert chk.returncode == 0, chk.stdout + chk.stderr
    sim = subprocess.run([str(venv / "bin" / "watchkeep-sim"), "--help"], cwd=run,
                         capture_output=True, text=True, timeout=60)
    assert sim.returncode == 0 and "run" in sim.stdout, sim
    where = subprocess.run([str(venv / "bin" / "python"), "-c",
                            "import agent; print(agent.__file__)"], cwd=run,
                           capture_output=True, text=True, timeout=60)
    assert str(venv) in where.stdout, where.stdout  # the wheel's copy, not the checkout's
