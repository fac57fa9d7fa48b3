"""What the power-cut test has to say goes to the terminal as it happens (even under
`pytest -q` with output captured: building the image and the cuts take minutes) and the
lines marked `summary` again at the end of the run, where CI's log is read."""

from __future__ import annotations

from collections.abc import Callable

import pytest

_SUMMARY = pytest.StashKey[list[str]]()


def note(config: pytest.Config, line: str, *, summary: bool = False) -> None:
    """Write `line` to the terminal now, prefixed; keep it for the summary too if asked."""
    text = f"power cuts: {line.removeprefix('powercut: ')}"
    reporter = config.pluginmanager.get_plugin("terminalreporter")
    capture = config.pluginmanager.get_plugin("capturemanager")
    if reporter is not None and capture is not None:
        with capture.global_and_fixture_disabled():  # past pytest's output capture
            reporter.ensure_newline()
            reporter.write_line(text)
    else:
        print(text, flush=True)
    if summary:
        config.stash.setdefault(_SUMMARY, []).append(text)


@pytest.fixture
def powercut_note(request: pytest.FixtureRequest) -> Callable[..., None]:
    """`note` bound to this run's config."""
    return lambda line, summary=False: note(request.config, line, summary=summary)


def pytest_terminal_summary(terminalreporter: pytest.TerminalReporter) -> None:
    lines = terminalreporter.config.stash.get(_SUMMARY, [])
    if lines:
        terminalreporter.section("power cuts (tests/faults)")
        for ln in lines:
            terminalreporter.write_line(ln)
