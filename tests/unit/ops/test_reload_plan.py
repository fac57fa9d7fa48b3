"""Reload planning: which assets are kept, changed, added, removed, retried; restart keys."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest

from agent.config.load import parse_config
from agent.ops.reload import AssetNow, bundle_digest, plan_assets, restart_required


def cfg(tmp_path: Path, **over):
    doc = {"site": "s", "gateway": "g", "state_dir": str(tmp_path / "state"),
           "assets": [{"name": n, "channels": {"t": {"topic": f"p/{n}/t", "decoder": "json",
                                                     "rate_hz": 1.0}}}
                      for n in ("A", "B", "C")]}
    doc.update(over)
    return parse_config(doc, tmp_path)


def test_plan_sorts_assets(tmp_path: Path) -> None:
    """Equal config + same digest kept; other digest or config changed; new added; gone removed."""
    c = cfg(tmp_path)
    a, b, cc = c.assets
    running = {"A": AssetNow(a, "d1"), "B": AssetNow(b, "d2"), "C": AssetNow(cc, ""),
               "Z": AssetNow(a, None)}
    b2 = dataclasses.replace(b, window=dataclasses.replace(b.window, length_s=20.0))
    new_d = dataclasses.replace(a, name="D")
    plan = plan_assets(running, [a, b2, cc, new_d], {"A": "d1", "B": "d2", "C": "x", "D": None})
    assert plan.kept == ("A",) and plan.changed == ("B",) and plan.added == ("D",)
    assert plan.removed == ("Z",) and plan.retried == ("C",)
    assert plan_assets(running, [a], {"A": "other"}).changed == ("A",)


def test_restart_required_names_the_keys(tmp_path: Path) -> None:
    """Brokers, HTTP and identity need a restart; assets and tick do not."""
    old = cfg(tmp_path)
    assert restart_required(old, cfg(tmp_path, pipeline={"tick_s": 0.5})) == []
    new = cfg(tmp_path, http={"port": 9999}, local_broker={"port": 1999})
    assert restart_required(old, new) == ["local_broker", "http"]


@pytest.mark.parametrize("files", [{}, {"model.json": b"{}"}])
def test_bundle_digest_of_missing_files(tmp_path: Path, files: dict[str, bytes]) -> None:
    """No bundle -> None; unreadable files -> "" (never equal to a loaded bundle's digest)."""
    for name, data in files.items():
        (tmp_path / name).write_bytes(data)
    assert bundle_digest(None) is None
    assert bundle_digest(tmp_path) == ""
