"""Log lines: key=value quoting, one line per record, JSON, rate-limited repeats."""

from __future__ import annotations

import io
import json
import logging

import pytest

from agent.ops.logs import JsonFormatter, OneLineFormatter, RateLimited, kv, setup_logging


@pytest.mark.parametrize(("fields", "expected"), [
    ({"a": 1}, "m a=1"),
    ({"a": "x y"}, 'm a="x y"'),
    ({"a": ""}, 'm a=""'),
    ({"a": 'say "hi"'}, 'm a="say \\"hi\\""'),
    ({"a": "k=v"}, 'm a="k=v"'),
    ({"a": "two\nlines"}, 'm a="two\\nlines"'),
    ({"a": "c:\\dir"}, 'm a="c:\\\\dir"'),
    ({"a": None, "b": 2.5}, "m a=None b=2.5"),
])
def test_kv(fields: dict, expected: str) -> None:
    """Values with spaces, `=`, quotes, backslashes or line breaks are quoted and escaped."""
    assert kv("m", **fields) == expected


def _record(msg: str, exc: bool = False) -> logging.LogRecord:
    info = None
    if exc:
        try:
            raise ValueError("boom\nsecond line")
        except ValueError:
            import sys

            info = sys.exc_info()
    return logging.LogRecord("watchkeep", logging.ERROR, __file__, 1, msg, None, info)


def test_one_line_even_with_a_traceback() -> None:
    """A multi-line message and a traceback still make exactly one line."""
    line = OneLineFormatter(with_time=False).format(_record("first\nsecond", exc=True))
    assert "\n" not in line
    assert line.startswith("ERROR first\\nsecond exc=")
    assert "ValueError: boom\\nsecond line" in line


def test_json_lines() -> None:
    """JSON format: one object per line with level, logger, msg and exc."""
    line = JsonFormatter(with_time=True).format(_record("hello", exc=True))
    assert "\n" not in line
    doc = json.loads(line)
    assert doc["level"] == "ERROR" and doc["msg"] == "hello" and "ValueError" in doc["exc"]
    assert "time" in doc


@pytest.mark.parametrize(("env", "has_time"), [({}, True), ({"INVOCATION_ID": "x"}, False),
                                               ({"JOURNAL_STREAM": "8:1"}, False)])
def test_no_time_stamps_under_the_journal(env: dict[str, str], has_time: bool,
                                         capsys: pytest.CaptureFixture[str]) -> None:
    """Under systemd the journal stamps lines itself."""
    log = setup_logging("INFO", "kv", env=env)
    log.info(kv("hello", a=1))
    err = capsys.readouterr().err.strip()
    assert err.endswith("INFO hello a=1")
    assert (err != "INFO hello a=1") is has_time


def test_rate_limited_repeats_carry_a_count() -> None:
    """First line logged; repeats within the interval suppressed, then one line with the count."""
    now = [0.0]
    stream = io.StringIO()
    log = logging.getLogger("watchkeep.test.rl")
    log.handlers[:] = [logging.StreamHandler(stream)]
    log.propagate = False
    rl = RateLimited(log, interval_s=60, clock=lambda: now[0])
    for t in (0, 1, 2, 30):
        now[0] = t
        rl.warning("bad:P-1", "message rejected", reason="malformed")
    rl.warning("other", "message rejected", reason="too_large")  # its own key
    now[0] = 61
    rl.warning("bad:P-1", "message rejected", reason="malformed")
    assert stream.getvalue().splitlines() == [
        "message rejected reason=malformed",
        "message rejected reason=too_large",
        "message rejected reason=malformed suppressed=3",
    ]
