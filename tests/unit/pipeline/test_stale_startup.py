"""Staleness at the edges: a start before the sensors publish, and the end of a replay."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from agent.commission.replay import Replayer, ScoresWriter, replay
from agent.config.load import load_config
from tests.helpers import asset_doc, readings, train_pca_bundle, write_config

T0 = 1_767_225_600.0


def _cfg(tmp_path: Path, *, grace: float | None = None, bundle: Path | None = None,
         stale_s: float = 5.0) -> Any:
    doc = asset_doc("P-1", bundle)
    for ch in doc["channels"].values():
        ch["stale_s"] = stale_s
    extra: dict[str, Any] = {}
    if grace is not None:
        extra["ingest"] = {"startup_grace_s": grace}
    return load_config(write_config(tmp_path / "c.yaml", 1883, 1883, [doc], **extra))


def _faults(r: Replayer) -> list[dict[str, Any]]:
    return [e for e in r.sink.events() if e["type"].endswith("sensor.fault")]


@pytest.mark.parametrize(("grace", "silent_s", "faults"), [
    (None, 100.0, 0),   # default grace 120 s: still waiting after 100 s
    (None, 130.0, 3),   # past it: each channel that never published is stale
    (30.0, 20.0, 0),
    (30.0, 40.0, 3),
    (0.0, 4.0, 0),      # no grace: the channel's own stale_s (5 s) still applies
    (0.0, 6.0, 3),
])
def test_a_channel_that_never_published_is_waiting_until_the_grace(
        tmp_path: Path, grace: float | None, silent_s: float, faults: int) -> None:
    """After a start, channels that have not published yet raise no stale fault until
    max(ingest.startup_grace_s, stale_s) has passed."""
    r = Replayer.build(_cfg(tmp_path, grace=grace))
    r.advance(T0)
    r.advance(T0 + silent_s)
    got = _faults(r)
    assert len(got) == faults, got
    assert all(e["data"]["reasons"] == ["stale"] for e in got)


def test_a_channel_that_stops_is_stale_after_its_stale_s(tmp_path: Path) -> None:
    """A channel that published and then stopped is stale after stale_s, grace or not."""
    r = Replayer.build(_cfg(tmp_path))
    for t, topic, payload in ((json.loads(p)["ts"], tp, p) for tp, p in
                              readings("P-1", T0, 3, seed=1)):
        r.feed(t, topic, payload)
    r.advance(T0 + 3 + 4.0)
    assert _faults(r) == []
    r.advance(T0 + 3 + 6.0)
    assert len(_faults(r)) == 3


def test_a_replay_ends_without_stale_faults(tmp_path: Path) -> None:
    """The end of a capture is not every sensor going silent: no sensor.fault at the end."""
    msgs = [(json.loads(p)["ts"], tp, p) for tp, p in readings("P-1", T0, 30, seed=2)]
    # stale_s shorter than the wait for the last windows (timeout 2 s + length 1 s)
    r = replay(_cfg(tmp_path, stale_s=1.5), msgs)
    assert _faults(r) == []
    assert r.metrics.registry.get_sample_value("watchkeep_windows_closed_total",
                                               {"asset": "P-1"}) >= 29


def test_replay_scores_file_has_score_state_and_features(tmp_path: Path) -> None:
    """`replay --scores`: one JSON line per judged window, with its score, threshold,
    state and feature row, in time order."""
    bundle = train_pca_bundle(tmp_path / "m", "P-1")
    msgs = [(json.loads(p)["ts"], tp, p) for tp, p in
            readings("P-1", T0, 30, seed=3, fault_windows=range(15, 22))]
    out = tmp_path / "scores.jsonl"
    r = replay(_cfg(tmp_path, bundle=bundle), msgs, scores=ScoresWriter(out))
    lines = [json.loads(x) for x in out.read_text().splitlines()]
    scored = r.metrics.registry.get_sample_value("watchkeep_windows_scored_total",
                                                 {"asset": "P-1"})
    assert len(lines) == scored >= 28
    assert [x["t_start"] for x in lines] == sorted(x["t_start"] for x in lines)
    first = lines[0]
    assert first["asset"] == "P-1" and first["mode"] == "default"
    assert first["t_end"] - first["t_start"] == 1.0
    assert set(first["features"]) == {f"{c}.{f}" for c in ("temp", "current", "pressure")
                                      for f in ("mean", "std")}
    assert first["threshold"] > 0 and first["state"] in ("normal", "anomalous")
    assert any(x["state"] == "anomalous" for x in lines)
    assert max(x["score"] for x in lines[15:22]) > first["threshold"]


def test_replay_cli_scores_option(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """`watchkeep replay --scores FILE --out EVENTS`: both files, the count on stderr."""
    from agent.cli.main import main
    from agent.commission.capture import write_capture

    bundle = train_pca_bundle(tmp_path / "m", "P-1")
    cfg_path = write_config(tmp_path / "c.yaml", 1883, 1883, [asset_doc("P-1", bundle)])
    cap = tmp_path / "cap.jsonl"
    write_capture(cap, [(json.loads(p)["ts"], tp, p) for tp, p in
                        readings("P-1", T0, 12, seed=3)])
    rc = main(["replay", "-c", str(cfg_path), str(cap), "--out", str(tmp_path / "ev.jsonl"),
               "--scores", str(tmp_path / "scores.jsonl")])
    err = capsys.readouterr().err
    assert rc == 0, err
    lines = (tmp_path / "scores.jsonl").read_text().splitlines()
    assert f", {len(lines)} window lines in {tmp_path / 'scores.jsonl'}" in err
    assert len(lines) >= 11 and (tmp_path / "ev.jsonl").is_file()
    assert all(json.loads(x)["score"] is not None for x in lines)


def test_a_fresh_asset_is_not_visited_every_tick_for_staleness(tmp_path: Path) -> None:
    """Staleness is judged when a channel can have gone stale (`Judge.stale` returns
    when), not by visiting every asset with `stale_s` at every tick: between windows,
    a fresh asset is left alone; the tick after its deadline faults it, as before."""
    r = Replayer.build(_cfg(tmp_path))
    for t, topic, payload in ((json.loads(p)["ts"], tp, p) for tp, p in
                              readings("P-1", T0, 3, seed=1)):
        r.feed(t, topic, payload)
    r.advance(T0 + 3 + 0.5)
    visits = []
    t = T0 + 3 + 0.5
    while t < T0 + 3 + 4.5:  # the windows have closed; stale_s 5 s not reached
        t += r.cfg.tick_s
        r.advance(t)
        visits.append(bool(r.pipeline.last_due))
    assert visits.count(True) <= 3, visits  # the last windows' timeouts, not every tick
    assert _faults(r) == []
    r.advance(T0 + 3 + 5.0 + 2 * r.cfg.tick_s)
    got = _faults(r)
    assert len(got) == 3 and all(e["data"]["reasons"] == ["stale"] for e in got)
