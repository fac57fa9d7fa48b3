"""Start-up refusals from the machine are one line on stderr and a non-zero exit."""

from __future__ import annotations

import socket
import subprocess
import sys
from pathlib import Path

import yaml

WATCHKEEP = str(Path(sys.executable).with_name("watchkeep"))


def _config(tmp: Path, **extra: object) -> Path:
    doc = {"site": "s", "gateway": "g", "state_dir": str(tmp / "state"),
           "local_broker": {"port": 1}, "upstream_broker": {"port": 1},
           "assets": [{"name": "A", "channels": {"c": {"topic": "t/c", "rate_hz": 1}}}],
           **extra}
    p = tmp / "watchkeep.yaml"
    p.write_text(yaml.safe_dump(doc))
    return p


def _run(cfg: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([WATCHKEEP, "run", "--config", str(cfg)], capture_output=True,
                          text=True, timeout=60)


def test_state_dir_that_cannot_be_made(tmp_path: Path) -> None:
    """A state_dir under a regular file: exit 2, the key path named, no traceback."""
    (tmp_path / "file").write_text("x")
    res = _run(_config(tmp_path, state_dir=str(tmp_path / "file" / "state")))
    assert res.returncode == 2
    assert "Traceback" not in res.stderr
    assert res.stderr.startswith("watchkeep: state_dir: expected a directory"), res.stderr


def test_http_port_in_use(tmp_path: Path) -> None:
    """The metrics port taken by another process: exit 1 with one line, no traceback."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        s.listen()
        res = _run(_config(tmp_path, http={"port": s.getsockname()[1]}))
    assert res.returncode == 1
    assert "Traceback" not in res.stderr
    assert "watchkeep: Address already in use" in res.stderr
