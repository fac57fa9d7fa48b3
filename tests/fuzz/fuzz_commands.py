"""Fuzz target `mqtt-commands`: one message on the upstream commands topic through
`agent.learning.commands.parse_command`, the check every MQTT command passes before it
reaches the rebaseline manager.

Input: [topic selector byte (bit 7: retained)][payload]. The contract (commands.py):
a `Command` whose request the manager can take as it is (an asset of the config,
`windows` None or an integer from MIN_NEW_WINDOWS to MAX_WINDOWS, `mode`, `reason`,
`requested_by` one printable line within their lengths, `accept_shift` a bool), or a
`Rejected` with its `Reason`; a retained message is never a command; never an
exception.
"""

from __future__ import annotations

import json
from typing import Any

from hypothesis import strategies as st

from agent.config.rebaseline import MAX_WINDOWS, MIN_NEW_WINDOWS
from agent.learning.commands import (
    MAX_MODE_CHARS,
    MAX_NAME_CHARS,
    MAX_PAYLOAD_BYTES,
    MAX_REASON_CHARS,
    Command,
    Reason,
    Rejected,
    parse_command,
)
from tests.fuzz.common import awkward_numbers, json_bytes, json_values
from tests.fuzz.harness import Target, check

PREFIX = "watchkeep/fernbrook/gw-demo"
ASSETS = ("P-101", "B-201", "A/B")
TOPICS = (f"{PREFIX}/commands/P-101/rebaseline", f"{PREFIX}/commands/B-201/rebaseline",
          f"{PREFIX}/commands/X-9/rebaseline", f"{PREFIX}/commands//rebaseline",
          f"{PREFIX}/commands/A/B/rebaseline", f"{PREFIX}/commands/P-101/rollback",
          f"{PREFIX}/commands/P-101/rebaseline/x", "elsewhere/commands/P-101/rebaseline",
          f"{PREFIX}/commands/P-101", PREFIX)


def _line(v: Any, limit: int) -> bool:
    return v is None or (isinstance(v, str) and len(v) <= limit and v.isprintable())


def check_command(topic: str, payload: bytes, retained: bool) -> None:
    got = parse_command(PREFIX, topic, payload, retained, ASSETS)
    if isinstance(got, Rejected):
        check(isinstance(got.reason, Reason) and isinstance(got.detail, str), repr(got))
        return
    check(isinstance(got, Command), f"neither a Command nor a Rejected: {got!r}")
    check(not retained, "a retained message became a command")
    check(len(payload) <= MAX_PAYLOAD_BYTES, "an oversized payload became a command")
    req = got.request
    check(got.asset in ASSETS and req["asset"] == got.asset and topic.split("/")[-2]
          == got.asset, f"asset {got.asset!r} from topic {topic!r}")
    w = req["windows"]
    check(w is None or (type(w) is int and MIN_NEW_WINDOWS <= w <= MAX_WINDOWS),
          f"windows {w!r}")
    check(type(req["accept_shift"]) is bool, f"accept_shift {req['accept_shift']!r}")
    check(_line(req["mode"], MAX_MODE_CHARS) and _line(req["reason"], MAX_REASON_CHARS)
          and _line(got.requested_by, MAX_NAME_CHARS), f"text fields {req!r}")
    check(set(req) == {"asset", "mode", "windows", "reason", "accept_shift"}, f"{req!r}")


def one_input(data: bytes) -> None:
    if data:
        check_command(TOPICS[data[0] % len(TOPICS)], data[1:], bool(data[0] & 0x80))


def seeds() -> list[bytes]:
    docs = [{}, {"windows": 360, "mode": "duty", "reason": "impeller trimmed",
                 "requested_by": "m.okafor", "accept_shift": False},
            {"windows": 60}, {"windows": MAX_WINDOWS, "accept_shift": True},
            {"windows": 1_000_000_000_000}]  # issue 20, finding 4
    return [bytes([t]) + json.dumps(d).encode() for t in (0, 1, 2) for d in docs]


def strategy() -> Any:
    text = st.one_of(st.none(), st.text(max_size=8), st.text(min_size=60, max_size=600),
                     awkward_numbers)
    doc = st.fixed_dictionaries({}, optional={
        "windows": st.one_of(st.integers(MIN_NEW_WINDOWS - 2, MAX_WINDOWS + 2), awkward_numbers),
        "mode": text, "reason": text, "requested_by": text,
        "accept_shift": st.one_of(st.booleans(), awkward_numbers),
        "asset": text, "verb": text})
    # nesting deeper than the stdlib parser's recursion limit (~1000), within 4 KB
    nested = st.one_of(st.integers(1, 2040), st.sampled_from([1000, 2040])).map(
        lambda n: b"[" * n + b"]" * n)
    payloads = st.one_of(doc.map(json_bytes), json_values.map(json_bytes), nested,
                         st.binary(max_size=32))
    topic = st.one_of(st.sampled_from([0, 1]), st.integers(0, 255))  # mostly valid, live
    return st.tuples(topic, payloads).map(lambda t: bytes([t[0]]) + t[1])


TARGET = Target("mqtt-commands", one_input, seeds, strategy, examples=300,
                max_len=MAX_PAYLOAD_BYTES + 64)
