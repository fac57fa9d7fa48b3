"""The named errors watchkeep raises; the CLI turns each into one line and an exit code."""

from __future__ import annotations

from dataclasses import dataclass


class WatchkeepError(Exception):
    """Base of every error watchkeep expects and explains."""

    exit_code = 1


@dataclass(frozen=True)
class ConfigProblem:
    """One problem in a config file: where it is, what was expected, what was found."""

    key_path: str
    expected: str
    got: str = ""

    def __str__(self) -> str:
        tail = f", got {self.got}" if self.got else ""
        return f"{self.key_path}: expected {self.expected}{tail}"


class ConfigError(WatchkeepError):
    """A config file that cannot be used; carries every problem found at once."""

    exit_code = 2

    def __init__(self, problems: list[ConfigProblem], source: str = "") -> None:
        self.problems = list(problems)
        self.source = source
        head = f"{source}: " if source else ""
        if len(self.problems) == 1:
            msg = f"{head}{self.problems[0]}"
        else:
            lines = "\n".join(f"  {p}" for p in self.problems)
            msg = f"{head}{len(self.problems)} problems:\n{lines}"
        super().__init__(msg)


class BundleError(WatchkeepError):
    """A model bundle that cannot be loaded or fails its checks."""

    exit_code = 3

    def __init__(self, path: str, reason: str) -> None:
        self.path = path
        self.reason = reason
        super().__init__(f"model bundle {path}: {reason}")


class DatasetError(WatchkeepError):
    """A recorded dataset that cannot be used for training or evaluation."""

    exit_code = 4


class OutboxError(WatchkeepError):
    """The store-and-forward database cannot be opened or written."""

    exit_code = 5


class RebaselineError(WatchkeepError):
    """A rebaseline request or job that cannot be carried out."""

    exit_code = 7
