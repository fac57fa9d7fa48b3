"""A bad model bundle fails its own asset with a clear error; the other assets keep detecting."""

from __future__ import annotations

import json
import logging
import math
import time
from pathlib import Path

import numpy as np
import pytest

from agent.commission.export import export_dense, pca_autoencoder
from agent.config.load import load_config
from agent.daemon import Daemon
from agent.models.bundle import MODEL_JSON, write_bundle
from tests.brokers import Broker, wait_for
from tests.helpers import Collector, asset_doc, publisher, readings, train_pca_bundle, write_config

GOOD, WIDE, JUNK = "P-1", "P-2", "P-3"


def _meta_of(bundle: Path, asset: str) -> dict:
    doc = json.loads((bundle / MODEL_JSON).read_text())
    for key in ("format", "format_version"):
        doc.pop(key)
    return {**doc, "asset": asset, "model_id": f"{asset}/default"}


@pytest.fixture
def plant(tmp_path: Path, broker: Broker, upstream_broker: Broker):
    models = tmp_path / "models"
    good = train_pca_bundle(models / GOOD, GOOD, seed=11)
    n_names = len(_meta_of(good, GOOD)["feature_names"])
    # The same model.json, but the ONNX model takes one feature more than it lists.
    z = np.random.default_rng(0).normal(size=(100, n_names + 1))
    wide = write_bundle(models / WIDE, export_dense(pca_autoencoder(z, 2)),
                        _meta_of(good, WIDE))
    junk = write_bundle(models / JUNK, b"this is not an ONNX model\n", _meta_of(good, JUNK))
    cfg_path = write_config(tmp_path / "watchkeep.yaml", broker.port, upstream_broker.port,
                            [asset_doc(GOOD, good), asset_doc(WIDE, wide),
                             asset_doc(JUNK, junk)])
    daemon = Daemon(load_config(cfg_path), logger=logging.getLogger("watchkeep.test.bad"))
    collector = Collector(upstream_broker.port, "watchkeep/testworks/gw1/#",
                          "bad-bundle-collector")
    daemon.start()
    wait_for(daemon.ingest.connected.is_set, what="daemon connected to local broker")
    wait_for(daemon.upstream.connected.is_set, what="daemon connected upstream")
    pub = publisher(broker.port, "bad-bundle-publisher")
    yield daemon, collector, pub
    pub.disconnect()
    pub.loop_stop()
    daemon.stop()
    collector.close()


def _gauge(daemon: Daemon, asset: str) -> float:
    return daemon.metrics.model_loaded.labels(asset)._value.get()


def test_bad_bundles_fail_their_assets_and_the_good_one_detects(plant) -> None:
    """Width mismatch and not-ONNX: model_error and watchkeep_model_loaded 0 for those two;
    the third asset still raises an anomaly on its fault."""
    daemon, collector, pub = plant
    assets = {a["asset"]: a for a in daemon.status()["assets"]}
    assert assets[GOOD]["model_error"] is None and assets[GOOD]["model"] is not None
    wide_err = assets[WIDE]["model_error"]
    assert wide_err and "shape" in wide_err and "feature names" in wide_err, wide_err
    assert f"models/{WIDE}" in wide_err
    junk_err = assets[JUNK]["model_error"]
    assert junk_err and "is not a loadable ONNX model" in junk_err, junk_err
    assert f"models/{JUNK}" in junk_err
    for bad in (WIDE, JUNK):
        assert assets[bad]["model"] is None
        assert "\n" not in assets[bad]["model_error"]
    assert (_gauge(daemon, GOOD), _gauge(daemon, WIDE), _gauge(daemon, JUNK)) == (1, 0, 0)
    ok, why = daemon.ready()
    assert not ok and WIDE in why and JUNK in why

    t0 = math.floor(time.time()) + 1.0
    streams = [readings(GOOD, t0, 14, seed=1, fault_windows=range(6, 14)),
               readings(WIDE, t0, 14, seed=2, fault_windows=range(6, 14)),
               readings(JUNK, t0, 14, seed=3)]
    for msgs in zip(*streams, strict=True):
        for topic, payload in msgs:
            pub.publish(topic, payload, qos=0)

    def raised() -> list[dict]:
        return [e for e in collector.events() if e["type"] == "io.watchkeep.anomaly.raised"]

    wait_for(raised, timeout_s=20, what="anomaly.raised for the good asset")
    wait_for(lambda: daemon.metrics.windows_skipped.labels(WIDE, "no_model")._value.get() >= 10
             and daemon.metrics.windows_skipped.labels(JUNK, "no_model")._value.get() >= 10,
             timeout_s=20, what="windows of the bad assets skipped for want of a model")
    assert {e["subject"] for e in collector.events()} == {GOOD}
    (ev,) = raised()
    assert ev["data"]["model"] == {"id": f"{GOOD}/default", "version": 1}
    assert daemon.metrics.callback_errors.labels("pipeline")._value.get() == 0
