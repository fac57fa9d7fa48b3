"""Containment of a tick's stage (issue 20): a stage runs for every window at once, and
when it raises, again asset by asset, so that only an asset whose own part raises fails
(`tick.Pipeline` counts and reports it); the other assets' work goes on."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import TypeVar

T = TypeVar("T")
K = TypeVar("K")


def contained(todo: Sequence[T], asset_of: Callable[[T], K], work: Callable[[Sequence[T]], None],
              failed: Callable[[K, Exception], None]) -> None:
    """`work(todo)` for all at once; when it raises, again for each asset's part
    (`asset_of(item)`: the asset, compared by identity), and `failed(asset, exc)` for
    each asset whose own part raises (for the one asset of `todo` without running it
    again)."""
    try:
        work(todo)
        return
    except Exception as exc:
        if len({id(asset_of(it)) for it in todo}) == 1:
            failed(asset_of(todo[0]), exc)
            return
    groups: dict[int, list[T]] = {}
    for it in todo:
        groups.setdefault(id(asset_of(it)), []).append(it)
    for part in groups.values():
        try:
            work(part)
        except Exception as exc:
            failed(asset_of(part[0]), exc)
