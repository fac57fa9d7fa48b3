"""The embedded broker's pure parts: topic matching, filter checks, remaining-length encoding."""

from __future__ import annotations

import pytest

from simulator.broker import (
    encode_remaining_length,
    topic_matches,
    valid_filter,
    valid_topic_name,
)

# Examples of OASIS MQTT Version 3.1.1, sections 4.7.1.2, 4.7.1.3 and 4.7.2 (checked against
# two transcriptions of the spec's examples), plus empty-level cases that follow from 4.7.1.
MATCHES = [
    ("sport/tennis/player1/#", "sport/tennis/player1", True),
    ("sport/tennis/player1/#", "sport/tennis/player1/ranking", True),
    ("sport/tennis/player1/#", "sport/tennis/player1/score/wimbledon", True),
    ("sport/#", "sport", True),
    ("#", "sport/tennis", True),
    ("sport/tennis/+", "sport/tennis/player1", True),
    ("sport/tennis/+", "sport/tennis/player2", True),
    ("sport/tennis/+", "sport/tennis/player1/ranking", False),
    ("sport/+", "sport", False),
    ("sport/+", "sport/", True),
    ("+", "sport", True),
    ("+/tennis/#", "sport/tennis/player1/ranking", True),
    ("sport/+/player1", "sport/tennis/player1", True),
    ("+/+", "/finance", True),
    ("/+", "/finance", True),
    ("+", "/finance", False),
    ("#", "$SYS/monitor/Clients", False),
    ("+/monitor/Clients", "$SYS/monitor/Clients", False),
    ("$SYS/#", "$SYS/monitor/Clients", True),
    ("$SYS/monitor/+", "$SYS/monitor/Clients", True),
    ("plant/P-101/temp", "plant/P-101/temp", True),
    ("plant/P-101/temp", "plant/P-101/Temp", False),  # case-sensitive
    ("plant/P-101", "plant/P-101/temp", False),
    ("plant//temp", "plant//temp", True),
    ("plant/+/temp", "plant//temp", True),
]


@pytest.mark.parametrize(("topic_filter", "topic", "expected"), MATCHES)
def test_topic_matches_spec_examples(topic_filter: str, topic: str, expected: bool) -> None:
    """Filters match topic names as the spec's examples say."""
    assert valid_filter(topic_filter)
    assert topic_matches(topic_filter, topic) is expected


@pytest.mark.parametrize(("topic_filter", "ok"), [
    ("#", True), ("+", True), ("sport/tennis/#", True), ("+/tennis/#", True), ("/", True),
    ("sport/tennis#", False), ("sport/tennis/#/ranking", False), ("sport+", False),
    ("", False), ("a/\x00", False), ("##", False), ("a/#/", False),
])
def test_valid_filter(topic_filter: str, ok: bool) -> None:
    """Wildcards must fill a whole level; `#` only last (spec 4.7.1)."""
    assert valid_filter(topic_filter) is ok


@pytest.mark.parametrize(("topic", "ok"), [
    ("plant/P-101/temp", True), ("/", True), ("", False), ("a/+", False), ("a/#", False),
    ("a\x00b", False),
])
def test_valid_topic_name(topic: str, ok: bool) -> None:
    """Topic names carry no wildcards and are not empty (spec 4.7.1-1, 4.7.3)."""
    assert valid_topic_name(topic) is ok


# Spec section 2.2.3, table 2.4: the boundaries of one to four length bytes.
@pytest.mark.parametrize(("n", "encoded"), [
    (0, b"\x00"), (127, b"\x7f"), (128, b"\x80\x01"), (16_383, b"\xff\x7f"),
    (16_384, b"\x80\x80\x01"), (2_097_151, b"\xff\xff\x7f"), (2_097_152, b"\x80\x80\x80\x01"),
    (268_435_455, b"\xff\xff\xff\x7f"),
])
def test_encode_remaining_length_spec_table(n: int, encoded: bytes) -> None:
    """Remaining lengths encode as in spec table 2.4."""
    assert encode_remaining_length(n) == encoded


@pytest.mark.parametrize("n", [-1, 268_435_456])
def test_encode_remaining_length_out_of_range(n: int) -> None:
    """Lengths beyond four bytes cannot be encoded."""
    with pytest.raises(ValueError):
        encode_remaining_length(n)
