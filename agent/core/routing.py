"""Topic -> (asset, channel) routing: exact topics, one dict look-up per message."""

from __future__ import annotations

from dataclasses import dataclass

from agent.config.schema import AssetConfig, ChannelConfig, Decoder


@dataclass(frozen=True)
class Route:
    asset_index: int
    channel_index: int
    asset: str
    channel: ChannelConfig

    @property
    def key(self) -> tuple[int, int]:
        return (self.asset_index, self.channel_index)


def channel_routes(assets: tuple[AssetConfig, ...]) -> list[Route]:
    """A route for every configured channel, in config order."""
    return [Route(ai, ci, a.name, ch) for ai, a in enumerate(assets)
            for ci, ch in enumerate(a.channels)]


def build_routes(assets: tuple[AssetConfig, ...]) -> dict[str, Route]:
    """Map every topic of a channel to its asset and channel (config forbids overlaps);
    sparkplug-b channels, which share their edge node's topics, are routed by
    `agent.core.sparkplug.SparkplugDecoder` instead."""
    return {r.channel.topic: r for r in channel_routes(assets)
            if r.channel.decoder is not Decoder.SPARKPLUG_B}


def subscriptions(assets: tuple[AssetConfig, ...]) -> list[str]:
    """The exact topics of the channels with a topic each, sorted for stable logs."""
    return sorted(build_routes(assets))
