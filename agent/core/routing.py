"""Topic -> (asset, channel) routing: exact topics, one dict look-up per message."""

from __future__ import annotations

from dataclasses import dataclass

from agent.config import AssetConfig, ChannelConfig


@dataclass(frozen=True)
class Route:
    asset_index: int
    channel_index: int
    asset: str
    channel: ChannelConfig


def build_routes(assets: tuple[AssetConfig, ...]) -> dict[str, Route]:
    """Map every configured topic to its asset and channel (config forbids overlaps)."""
    routes: dict[str, Route] = {}
    for ai, a in enumerate(assets):
        for ci, ch in enumerate(a.channels):
            routes[ch.topic] = Route(ai, ci, a.name, ch)
    return routes


def subscriptions(assets: tuple[AssetConfig, ...]) -> list[str]:
    """The topics to subscribe to, sorted for stable logs."""
    return sorted(build_routes(assets))
