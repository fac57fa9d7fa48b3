"""The errors the simulator raises; the CLI turns each into one line and an exit code."""

from __future__ import annotations

from agent.errors import ConfigProblem


class SimulatorError(Exception):
    """Base of every error the simulator expects and explains."""

    exit_code = 1


# One problem in a scenario file (key path, what was expected, what was found): the
# same value type the daemon's config loader reports with.
Problem = ConfigProblem


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
