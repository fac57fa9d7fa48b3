"""The typed reader the config loader walks a decoded YAML tree with.

It collects every problem (key path, what was expected, what was found) instead of
stopping at the first. Each getter checks one kind of value and returns it typed:
`get_int(node, key, path, default)` is an `int` when the default is one, and
`int | None` when the default is None or `REQUIRED` (a missing required key is
recorded as a problem and read as None). An optional `check` narrows the value
further; `expected` says in words what a good value is.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from enum import Enum
from pathlib import Path
from typing import Any, Final, Literal, overload

from agent.errors import ConfigProblem

NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")


class Required(Enum):
    """The default of a key that must be given (one value: `REQUIRED`)."""

    REQUIRED = "required"


REQUIRED: Final = Required.REQUIRED
_Req = Literal[Required.REQUIRED]

_NAMES = {"str": "a string", "int": "an integer", "num": "a number", "bool": "true or false",
          "list": "a list"}


def describe(v: Any) -> str:
    """A config value in a problem's words ("'abc'", "a list of 3", ...)."""
    if v is None:
        return "nothing"
    if isinstance(v, bool):
        return f"{str(v).lower()} (a boolean)"
    if isinstance(v, str):
        return repr(v) if len(v) < 60 else f"a string of {len(v)} characters"
    if isinstance(v, int | float):
        text = str(v)
        return text if len(text) <= 24 else f"a number of {len(text)} digits"
    if isinstance(v, list):
        return f"a list of {len(v)}" if v else "an empty list"
    if isinstance(v, dict):
        return "a mapping" if v else "an empty mapping"
    return type(v).__name__


def finite_number(v: Any) -> bool:
    """A YAML number (not a boolean) that is finite as a float."""
    if isinstance(v, bool) or not isinstance(v, int | float):
        return False
    try:
        return math.isfinite(float(v))
    except OverflowError:  # an integer too large for a float
        return False


def is_name(v: Any) -> bool:
    """A site, gateway, asset, channel or mode name."""
    return isinstance(v, str) and bool(NAME_RE.match(v))


def is_topic(v: str) -> bool:
    """A topic name (no wildcards, not a `$` system topic)."""
    return not any(c in v for c in "+#\0") and not v.startswith("$")


_KIND_OK: dict[str, Callable[[Any], bool]] = {
    "str": lambda v: isinstance(v, str) and v != "",
    "int": lambda v: isinstance(v, int) and not isinstance(v, bool),
    "num": finite_number,
    "bool": lambda v: isinstance(v, bool),
    "list": lambda v: isinstance(v, list),
}


class Reader:
    """Walks a decoded YAML tree, collecting problems instead of stopping at the first."""

    def __init__(self, base_dir: Path, *, require_bundles: bool = True) -> None:
        self.problems: list[ConfigProblem] = []
        self.base_dir = base_dir
        self.require_bundles = require_bundles

    def bundle_dir(self, p: Path | None, where: str) -> None:
        """A model bundle path must exist, unless the caller commissions it (`record`)."""
        if p is not None and not p.is_dir() and (self.require_bundles or p.exists()):
            self.bad(where, "an existing model bundle directory (record, and check-config "
                     "with --allow-missing-bundles, accept one not trained yet)", found=str(p))

    def bad(self, path: str, expected: str, got: Any = ..., *, found: str = "") -> None:
        """Record a problem; `got` is a config value to describe, `found` ready-made words."""
        said = found or ("" if got is ... else describe(got))
        self.problems.append(ConfigProblem(path, expected, said))

    def mapping(self, node: Any, path: str, allowed: tuple[str, ...]) -> dict[str, Any]:
        """`node` as a mapping whose keys are all `allowed` ({} for nothing or a non-mapping)."""
        if node is None:
            return {}
        if not isinstance(node, dict):
            self.bad(path or "(top level)", "a mapping", node)
            return {}
        for k in node:
            if k not in allowed:
                where = f"{path}.{k}" if path else str(k)
                self.bad(where, f"one of the known keys ({', '.join(allowed)})",
                         found=f"unknown key {k!r}")
        return node

    def path(self, v: str | None, where: str) -> Path | None:
        """A configured path (`where` is its key path), relative ones against the config
        file's directory, `~` and `~user` expanded."""
        if v is None:
            return None
        try:
            p = Path(v).expanduser()
        except RuntimeError:  # `~name` of no user here, or no home directory to expand to
            self.bad(where, "a path whose leading ~ names a user of this machine", v)
            p = Path(v)
        return p if p.is_absolute() else (self.base_dir / p)

    def _get(self, node: dict[str, Any], key: str, path: str, kind: str, default: Any,
             check: Callable[[Any], bool] | None, expected: str) -> Any:
        where = f"{path}.{key}" if path else key
        missing = None if default is REQUIRED else default
        if key not in node or node[key] is None:
            if default is REQUIRED:
                self.bad(where, f"{expected or _NAMES[kind]} (required)")
            return missing
        v = node[key]
        if not _KIND_OK[kind](v):
            self.bad(where, expected or _NAMES[kind], v)
            return missing
        if check is not None and not check(v):
            self.bad(where, expected, v)
            return missing
        return float(v) if kind == "num" else v

    @overload
    def get_str(self, node: dict[str, Any], key: str, path: str, default: str,
                check: Callable[[str], bool] | None = None, expected: str = "") -> str: ...

    @overload
    def get_str(self, node: dict[str, Any], key: str, path: str, default: _Req | None,
                check: Callable[[str], bool] | None = None, expected: str = ""
                ) -> str | None: ...

    def get_str(self, node: dict[str, Any], key: str, path: str, default: str | _Req | None,
                check: Callable[[str], bool] | None = None, expected: str = ""
                ) -> str | None:
        """A non-empty string."""
        got: str | None = self._get(node, key, path, "str", default, check, expected)
        return got

    @overload
    def get_int(self, node: dict[str, Any], key: str, path: str, default: int,
                check: Callable[[int], bool] | None = None, expected: str = "") -> int: ...

    @overload
    def get_int(self, node: dict[str, Any], key: str, path: str, default: _Req | None,
                check: Callable[[int], bool] | None = None, expected: str = ""
                ) -> int | None: ...

    def get_int(self, node: dict[str, Any], key: str, path: str, default: int | _Req | None,
                check: Callable[[int], bool] | None = None, expected: str = ""
                ) -> int | None:
        """An integer (not a boolean)."""
        got: int | None = self._get(node, key, path, "int", default, check, expected)
        return got

    @overload
    def get_float(self, node: dict[str, Any], key: str, path: str, default: float,
                  check: Callable[[float], bool] | None = None, expected: str = ""
                  ) -> float: ...

    @overload
    def get_float(self, node: dict[str, Any], key: str, path: str, default: _Req | None,
                  check: Callable[[float], bool] | None = None, expected: str = ""
                  ) -> float | None: ...

    def get_float(self, node: dict[str, Any], key: str, path: str,
                  default: float | _Req | None, check: Callable[[float], bool] | None = None,
                  expected: str = "") -> float | None:
        """A finite number (an integer in YAML too), as a float."""
        got: float | None = self._get(node, key, path, "num", default, check, expected)
        return got

    @overload
    def get_bool(self, node: dict[str, Any], key: str, path: str, default: bool,
                 expected: str = "") -> bool: ...

    @overload
    def get_bool(self, node: dict[str, Any], key: str, path: str, default: _Req | None,
                 expected: str = "") -> bool | None: ...

    def get_bool(self, node: dict[str, Any], key: str, path: str,
                 default: bool | _Req | None, expected: str = "") -> bool | None:
        """true or false."""
        got: bool | None = self._get(node, key, path, "bool", default, None, expected)
        return got

    def get_list(self, node: dict[str, Any], key: str, path: str, default: list[Any],
                 check: Callable[[list[Any]], bool] | None = None, expected: str = ""
                 ) -> list[Any]:
        """A list (its items are the caller's to check)."""
        got: list[Any] = self._get(node, key, path, "list", default, check, expected)
        return got
