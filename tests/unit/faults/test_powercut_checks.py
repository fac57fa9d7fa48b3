"""The power-cut harness's own judgement (tests/faults/powercut.py): journal lines read,
sequences that go back found."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.faults.powercut import Journal, seq_back


def journal(tmp_path: Path, boots: list[str]) -> Journal:
    j = Journal()
    for b, text in enumerate(boots):
        p = tmp_path / f"j{b}"
        p.write_text(text)
        j.read(b, p)
    return j


def test_journal_reads_complete_lines_only(tmp_path: Path) -> None:
    """A line cut by the power cut (no newline) is not taken as committed."""
    j = journal(tmp_path, ["B 0 fsck=0 quick_check=absent files=-\n"
                           "C 0 id-1 PU-01 1 sensor.fault\nC 0 id-2 PU-01 2 sens"])
    assert j.boot_info[0] == {"fsck": "0", "quick_check": "absent", "files": "-"}
    assert j.commits[0] == [("id-1", "PU-01", 1)]


@pytest.mark.parametrize(("boot1", "back"), [
    # stored sequence as high as committed, new commits above it: fine
    ("S 1 PU-01 2\nC 1 id-3 PU-01 3 x\n", []),
    # the stored sequence below a committed one: a committed transaction was lost
    ("S 1 PU-01 1\n", ["PU-01: stored 1 < committed 2"]),
    # a new event reuses a committed sequence number
    ("S 1 PU-01 2\nC 1 id-9 PU-01 2 x\n", ["PU-01: 2 after 2"]),
    # an asset never stored at all after committing
    ("", ["PU-01: stored 0 < committed 2"]),
])
def test_sequences_that_go_back_are_found(tmp_path: Path, boot1: str, back: list[str]) -> None:
    """Per asset, the sequence after a cut continues above every committed one."""
    j = journal(tmp_path, ["C 0 id-1 PU-01 1 x\nC 0 id-2 PU-01 2 x\n", boot1])
    assert seq_back(j, 1) == back
