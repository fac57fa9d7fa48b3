"""Capture files (agent.commission.capture): the JSON-lines format of sim, record and replay."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from agent.commission.capture import CaptureError, CaptureWriter, read_capture, write_capture

MESSAGES = [
    (1772438400.0, "fernbrook/raw-water/P-101/pressure", b"4.697"),
    (1772438400.1, "fernbrook/raw-water/P-101/current", b'{"ts":1772438400.1,"value":100.2}'),
    (1772438400.1, "plant/\u00e9t\u00e9/x", "d\u00e9bit \u2713".encode()),
]


def test_write_read_roundtrip(tmp_path: Path) -> None:
    """Messages come back exactly, one JSON object per line, and no temp file is left."""
    path = tmp_path / "cap.jsonl"
    assert write_capture(path, iter(MESSAGES)) == 3
    assert list(read_capture(path)) == MESSAGES
    lines = path.read_text(encoding="utf-8").splitlines()
    assert json.loads(lines[0]) == {"t": 1772438400.0,
                                    "topic": "fernbrook/raw-water/P-101/pressure",
                                    "payload": "4.697"}
    assert [p.name for p in tmp_path.iterdir()] == ["cap.jsonl"]
    assert path.stat().st_mode & 0o777 == 0o644


def test_failed_write_leaves_no_file(tmp_path: Path) -> None:
    """A non-UTF-8 payload aborts the write; neither the file nor a temp file remains."""
    path = tmp_path / "cap.jsonl"
    with pytest.raises(CaptureError, match="UTF-8"):
        write_capture(path, [MESSAGES[0], (2.0, "t", b"\xff\xfe")])
    assert list(tmp_path.iterdir()) == []


def test_writer_appends_and_flushes_each_line(tmp_path: Path) -> None:
    """A reader sees every appended line before the writer is closed."""
    path = tmp_path / "cap.jsonl"
    with CaptureWriter(path) as w:
        w.append(*MESSAGES[0])
        assert list(read_capture(path)) == MESSAGES[:1]
        w.append(*MESSAGES[1])
        assert w.count == 2
    with CaptureWriter(path) as w:
        w.append(*MESSAGES[2])
    assert list(read_capture(path)) == MESSAGES
    with CaptureWriter(path, append=False) as w:
        w.append(*MESSAGES[0])
    assert list(read_capture(path)) == MESSAGES[:1]
    with pytest.raises(CaptureError, match="closed"):
        w.append(*MESSAGES[0])


@pytest.mark.parametrize(
    ("bad", "reason"),
    [
        ("{not json", "not JSON"),
        ("[1, 2]", "JSON object"),
        ('{"t": 1, "topic": "a"}', "missing payload"),
        ('{"t": "soon", "topic": "a", "payload": "1"}', "'t'"),
        ('{"t": true, "topic": "a", "payload": "1"}', "'t'"),
        ('{"t": 1, "topic": "", "payload": "1"}', "'topic'"),
        ('{"t": 1, "topic": "a", "payload": 1.5}', "'payload'"),
        ('{"t": 0.5, "topic": "a", "payload": "1"}', "earlier"),
    ],
)
def test_bad_line_error_names_the_line(tmp_path: Path, bad: str, reason: str) -> None:
    """The error names the file and the 1-based line number of the bad line."""
    path = tmp_path / "cap.jsonl"
    path.write_text('{"t": 1, "topic": "a", "payload": "1"}\n\n' + bad + "\n")
    with pytest.raises(CaptureError, match=reason) as exc:
        list(read_capture(path))
    assert exc.value.line == 3
    assert f"{path}:3" in str(exc.value)


def test_order_check_can_be_relaxed(tmp_path: Path) -> None:
    """A wall-clock recording that stepped back reads with require_order=False."""
    path = tmp_path / "cap.jsonl"
    write_capture(path, [(2.0, "a", b"1"), (1.0, "a", b"2")])
    assert [m[0] for m in read_capture(path, require_order=False)] == [2.0, 1.0]


def test_missing_file_is_a_capture_error(tmp_path: Path) -> None:
    """Opening a missing capture raises CaptureError, not a bare OSError."""
    with pytest.raises(CaptureError, match="cannot open"):
        list(read_capture(tmp_path / "none.jsonl"))
