"""The one way the pipeline is built: the daemon, a reload, `record` and `replay`.

`load_runtimes` makes each asset's runtime from the config (loading its bundles, or
none for `record`); `build_pipeline` puts a config, its runtimes and a sink together
with fresh (or given) sample buffers and the ingest handler that fills them, and
returns them as one `Running`: what a pipeline loop ticks and a reload replaces as
a whole.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass

from agent.config.schema import AssetConfig, Config
from agent.errors import BundleError
from agent.ingest.buffers import Buffers, IngestHandler
from agent.models.bundle import Bundle, load_bundle
from agent.ops.logs import kv
from agent.ops.metrics import Metrics
from agent.pipeline.runtime import AssetRuntime
from agent.pipeline.tick import Pipeline, Sink, WindowObserver, WindowWanted

HandlerFactory = Callable[[Config, Buffers, Metrics, logging.Logger], IngestHandler[Buffers]]


@dataclass(frozen=True)
class Running:
    """A config and the pipeline built for it, with the buffers its ingest handler fills."""

    cfg: Config
    pipeline: Pipeline
    buffers: Buffers
    handler: IngestHandler[Buffers]


def load_asset_bundle(asset: AssetConfig, logger: logging.Logger
                      ) -> tuple[Bundle | None, str | None]:
    """The asset's bundle, or the reason it has none (logged, never raised)."""
    if asset.bundle is None:
        return None, None
    try:
        b = load_bundle(asset.bundle)
    except BundleError as exc:
        logger.error(kv("model bundle rejected; the asset runs without a model",
                        asset=asset.name, error=str(exc)))
        return None, str(exc)
    logger.info(kv("model loaded", asset=asset.name, model=b.meta.model_id,
                   version=b.meta.version, features=b.n_features))
    return b, None


def new_runtime(asset: AssetConfig, bundle: Bundle | None) -> AssetRuntime:
    """A fresh runtime serving `bundle` (checked to fit; the modes' bundles are loaded
    from the config)."""
    return AssetRuntime.build(asset, bundle, None)


def load_runtimes(cfg: Config, logger: logging.Logger, *, models: bool = True
                  ) -> list[AssetRuntime]:
    """Every asset's runtime, with its bundles loaded (a bad one leaves its asset
    without a model, logged); `models=False` loads none (`record` never scores)."""
    runtimes = []
    for a in cfg.assets:
        if models:
            bundle, err = load_asset_bundle(a, logger)
            rt = AssetRuntime.build(a, bundle, err)
            if rt.models.error and not err:
                logger.error(kv("model bundle rejected; the asset runs without a model",
                                asset=a.name, error=rt.models.error))
        else:
            rt = AssetRuntime.build(a, None, None, mode_bundles=({}, {}))
        runtimes.append(rt)
    return runtimes


def build_pipeline(cfg: Config, runtimes: list[AssetRuntime], sink: Sink, metrics: Metrics,
                   logger: logging.Logger, *, buffers: Buffers | None = None,
                   observer: WindowObserver | None = None,
                   observes: WindowWanted | None = None,
                   handler: HandlerFactory = IngestHandler) -> Running:
    """The pipeline for `cfg` over `runtimes`, its buffers (fresh unless given: a reload
    keeps the kept assets') and an ingest handler (`handler` makes it: `record --raw`
    taps the messages)."""
    buffers = buffers if buffers is not None else Buffers(cfg)
    pipeline = Pipeline(cfg, buffers, sink, metrics, logger, runtimes, observer=observer,
                        observes=observes)
    return Running(cfg, pipeline, buffers, handler(cfg, buffers, metrics, logger))
