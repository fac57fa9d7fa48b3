"""`watchkeep status` rendering (pure) and its one-line error."""

from __future__ import annotations

import pytest

from agent.cli.main import main
from agent.cli.status import render_status, status_url

DOC = {"version": "0.1.0", "site": "fernbrook", "gateway": "gw2", "local_connected": True,
       "upstream_connected": False, "outbox": {"rows": 12},
       "assets": [
           {"asset": "P-101", "mode": "default", "state": "anomalous", "score": 3.21987,
            "threshold": 1.5, "model": {"id": "P-101/default", "version": 3},
            "last_event": {"type": "io.watchkeep.anomaly.raised", "id": "x",
                           "time": "2026-03-01T10:00:00.000Z"}, "model_error": None},
           {"asset": "F-7", "mode": "default", "state": "normal", "score": None,
            "threshold": None, "model": None, "last_event": None,
            "model_error": "model bundle /m: model.onnx is missing"}]}


def test_render_status_table() -> None:
    """Header, connection line, one aligned row per asset, model errors listed."""
    out = render_status(DOC).splitlines()
    assert out[0] == "watchkeep 0.1.0  site fernbrook  gateway gw2"
    assert out[1] == "local broker connected  upstream DISCONNECTED  outbox 12 rows"
    header = out[3]
    assert header.split()[:3] == ["ASSET", "MODE", "STATE"]
    p101 = out[4]
    assert p101.split()[:5] == ["P-101", "default", "ANOMALOUS", "3.22", "1.5"]
    assert "P-101/default v3" in p101 and "anomaly.raised 2026-03-01T10:00:00.000Z" in p101
    assert out[5].split()[:6] == ["F-7", "default", "normal", "-", "-", "ERROR"]
    assert out[-1] == "  F-7: model bundle /m: model.onnx is missing"
    assert header.index("STATE") == p101.index("ANOMALOUS")  # columns line up


def test_upstream_endpoint_in_the_connection_line() -> None:
    """The upstream endpoint in use (a node of a cluster) follows the upstream state."""
    doc = {**DOC, "upstream_connected": True,
           "upstream": {"endpoint": "broker-b:8883", "endpoints": ["broker-a:8883",
                                                                   "broker-b:8883"]}}
    assert render_status(doc).splitlines()[1] == \
        "local broker connected  upstream connected (broker-b:8883)  outbox 12 rows"


def test_learning_column() -> None:
    """A learning asset shows its phase and progress (and held events); one that learnt
    before shows the last outcome; the others a dash."""
    doc = {"assets": [
        {"asset": "P-101", "mode": "default", "state": "normal", "score": 0.4,
         "threshold": 1.5, "model": {"id": "P-101/default", "version": 1},
         "learning": {"phase": "collecting", "collected": 12, "target": 60,
                      "held_events": 2, "base_version": 1, "request_id": "r1"},
         "last_rebaseline": None},
        {"asset": "F-7", "mode": "default", "state": "normal", "model": None,
         "learning": None, "last_rebaseline": {"result": "accepted", "old_version": 1,
                                               "new_version": 2}},
        {"asset": "B-3", "mode": "default", "state": "normal", "model": None,
         "learning": None, "last_rebaseline": {"result": "rejected", "old_version": 4,
                                               "new_version": None}},
        {"asset": "C-9", "mode": "default", "state": "normal", "model": None}]}
    out = render_status(doc).splitlines()
    header = out[2]
    col, end = header.index("REBASELINE"), header.index("LAST EVENT")
    rows = {line.split()[0]: line[col:end].rstrip() for line in out[3:]}
    assert rows["P-101"] == "collecting 12/60 (2 held)"
    assert rows["F-7"] == "last accepted v1->v2"
    assert rows["B-3"] == "last rejected"
    assert rows["C-9"] == "-"


def test_no_assets() -> None:
    assert render_status({"assets": []}).endswith("no assets configured\n")


@pytest.mark.parametrize(("url", "expected"), [
    ("http://127.0.0.1:9310", "http://127.0.0.1:9310/status"),
    ("http://gw:9310/", "http://gw:9310/status"),
    ("http://gw:9310/status", "http://gw:9310/status"),
])
def test_status_url(url: str, expected: str) -> None:
    assert status_url(url) == expected


def test_unreachable_daemon_is_one_line(capsys: pytest.CaptureFixture[str]) -> None:
    """Nothing listening: exit 6 and one line on stderr, no traceback."""
    from tests.brokers import free_port

    assert main(["status", "--url", f"http://127.0.0.1:{free_port()}"]) == 6
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("watchkeep: cannot reach")
