"""The errors the simulator raises; the CLI turns each into one line and an exit code."""

from __future__ import annotations

from dataclasses import dataclass


class SimulatorError(Exception):
    """Base of every error the simulator expects and explains."""

    exit_code = 1


@dataclass(frozen=True)
class Problem:
    """One problem in a scenario file: where it is, what was expected, what was found."""

    key_path: str
    expected: str
    got: str = ""

    def __str__(self) -> str:
        tail = f", got {self.got}" if self.got else ""
        return f"{self.key_path}: expected {self.expected}{tail}"


class ScenarioError(SimulatorError):
    """A scenario that cannot be simulated; carries every problem found at once."""

    exit_code = 2

    def __init__(self, problems: list[Problem], source: str = "") -> None:
        self.problems = list(problems)
        self.source = source
        head = f"{source}: " if source else ""
        if len(self.problems) == 1:
            msg = f"{head}{self.problems[0]}"
        else:
            msg = f"{head}{len(self.problems)} problems: " + "; ".join(
                str(p) for p in self.problems
            )
        super().__init__(msg)


class PublishError(SimulatorError):
    """The broker could not be reached or refused the simulator."""

    exit_code = 3
