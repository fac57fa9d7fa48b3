"""The tick's feature rows equal segment_features of each window's own samples.

The tick takes several paths to its features: one matrix cut for many assets at once
and used whole, blocks stacked again, rate groups of different lengths, ragged
windows (a channel short of samples but above min_coverage). Whatever the path, a
window's row must be what `segment_features` gives for its channels' samples.
"""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
from prometheus_client import CollectorRegistry

from agent.config.load import parse_config
from agent.core.features import FEATURE_INDEX, segment_features
from agent.core.windows.closed import ClosedWindow
from agent.ingest.buffers import Buffers
from agent.ops.metrics import Metrics
from agent.pipeline.runtime import AssetRuntime
from agent.pipeline.tick import Pipeline
from tests.helpers import rates_doc

FEATS = ["mean", "std", "rms", "peak_to_peak", "kurtosis", "skewness"]


class _Sink:
    def submit(self, msgs, **_) -> None:  # type: ignore[no-untyped-def]
        pass


def test_feature_rows_match_segment_features_on_every_path(tmp_path: Path) -> None:
    _check(tmp_path, {"A": (20.0, 20.0, 20.0), "B": (20.0, 20.0, 20.0), "C": (20.0, 5.0),
                      "D": (20.0, 20.0, 20.0)})


def test_feature_rows_of_aligned(tmp_path: Path, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    """The usual tick (featurize._aligned): every window one full block, rows of one
    matrix, assets laid out alike though wanting different features."""
    from agent.pipeline import featurize

    taken: list[bool] = []
    real = featurize._aligned
    monkeypatch.setattr(featurize, "_aligned",
                        lambda todo: taken.append(real(todo) is not None) or real(todo))
    _check(tmp_path, {"A": (20.0, 20.0, 20.0), "B": (20.0, 20.0, 20.0),
                      "E": (20.0, 20.0, 20.0)}, {"B": ["kurtosis", "min"]})
    assert taken.count(True) >= 4  # every tick after the first (which places the windows)


def _check(tmp_path: Path, rates: dict[str, tuple[float, ...]],
           feats: dict[str, list[str]] | None = None) -> None:
    feats = feats or {}
    cfg = parse_config(rates_doc(tmp_path / "state", rates, feats, FEATS, min_coverage=0.5),
                       tmp_path)
    buffers = Buffers(cfg)
    seen: list[tuple[str, ClosedWindow, np.ndarray, tuple[str, ...]]] = []
    pipe = Pipeline(cfg, buffers, _Sink(), Metrics(CollectorRegistry()),
                    logging.getLogger("test"), [AssetRuntime.build(a, None, None)
                                               for a in cfg.assets],
                    observer=lambda asset, mode, w, row, names: seen.append(
                        (asset, w, row.copy(), names)))
    rng = np.random.default_rng(5)
    for k in range(6):
        for ai, (a, rs) in enumerate(rates.items()):
            for ci, r in enumerate(rs):
                n = int(r)
                if a == "D" and ci == 1 and k % 2:
                    n -= 3  # ragged: 17 of 20 samples, still above min_coverage
                ts = k + np.arange(n) / r
                buffers.by_asset[ai][ci].append_block(ts, rng.normal(ci, 1.0 + ai, n), k + 1.0)
        pipe.tick(k + 2.0)
    assert {a for a, *_ in seen} == set(rates)
    for asset, w, row, names in seen:
        want = segment_features(list(w.values))
        for name, got in zip(names, row, strict=True):
            ch, feat = name.split(".")
            np.testing.assert_allclose(got, want[int(ch[1:]), FEATURE_INDEX[feat]],
                                       rtol=1e-9, atol=1e-12, err_msg=f"{asset} {name}")


def _rows_of(tmp_path: Path, names: list[str]) -> dict[str, list[np.ndarray]]:
    """Feature rows of assets X (a spectral channel, then a slow one) and Y (the same
    channels the other way round) as a pipeline of `names` gives them."""
    spec = {"bands_hz": [[5.0, 40.0], [40.0, 120.0]]}
    chans = {"X": [("w", 256.0, spec), ("t", 8.0, None)],
             "Y": [("t", 8.0, None), ("w", 256.0, spec)]}
    doc = {"site": "s", "gateway": "g", "state_dir": str(tmp_path / "state"),
           "assets": [{"name": a, "window": {"length_s": 1.0, "lateness_s": 0.0,
                                             "timeout_s": 0.5},
                       "channels": {c: {"topic": f"t/{a}/{c}", "decoder": "json-batch",
                                        "rate_hz": r, "features": FEATS,
                                        **({"spectrum": sp} if sp else {})}
                                    for c, r, sp in chans[a]}}
                      for a in names]}
    cfg = parse_config(doc, tmp_path)
    buffers = Buffers(cfg)
    rows: dict[str, list[np.ndarray]] = {a: [] for a in names}
    pipe = Pipeline(cfg, buffers, _Sink(), Metrics(CollectorRegistry()),
                    logging.getLogger("test"), [AssetRuntime.build(a, None, None)
                                               for a in cfg.assets],
                    observer=lambda asset, mode, w, row, _: rows[asset].append(row.copy()))
    for k in range(5):
        for ai, a in enumerate(names):
            for ci, (c, r, _) in enumerate(chans[a]):
                ts = k + np.arange(int(r)) / r
                vals = np.sin(2 * np.pi * (30.0 if c == "w" else 0.1) * ts) * (1 + ci + k)
                buffers.by_asset[ai][ci].append_block(ts, vals, k + 1.0)
        pipe.tick(k + 2.0)
    return rows


def test_assets_with_their_channels_in_another_order_keep_their_own_rows(
        tmp_path: Path) -> None:
    """X and Y have the same blocks and spectra but the spectral channel at another
    place in their rows: a tick with both gives each the row it gets alone (each alone
    with the layouts featurize remembers forgotten first)."""
    from agent.pipeline import featurize

    alone = {}
    for a in ("X", "Y"):
        featurize._BY_LAYOUT.clear()
        featurize._BY_SHAPE.clear()
        alone[a] = _rows_of(tmp_path / a, [a])[a]
    both = _rows_of(tmp_path / "both", ["X", "Y"])
    for a in ("X", "Y"):
        assert len(alone[a]) == len(both[a]) >= 3
        for got, want in zip(both[a], alone[a], strict=True):
            # Equal to rounding: the FFT of two segments at once may differ in the last bit.
            np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-300)


def _full_rows(tmp_path: Path, aligned: bool, monkeypatch,  # type: ignore[no-untyped-def]
               stream: bool = False) -> list[np.ndarray]:
    """Rows of four assets, each two 256 Hz waveforms with spectra (orders of the
    running speed, envelope) and three 8 Hz channels, one of them the speed, as the
    aligned path (`_aligned`) or the general one gives them. `stream`: each asset's
    samples run a little ahead (by 0.0625 to 0.25 s, its own), so its windows close as
    the next one's samples arrive."""
    from agent.pipeline import featurize

    taken: list[bool] = []
    real = featurize._aligned
    monkeypatch.setattr(featurize, "_aligned", (lambda todo: taken.append(
        (got := real(todo)) is not None) or got) if aligned else (lambda todo: None))
    spec = {"bands_hz": [[5.0, 40.0], [40.0, 120.0]], "orders": [1.0, 2.0],
            "envelope_hz": [20.0, 100.0], "velocity_rms": True}
    chans = [("v1", 256.0, spec), ("t", 8.0, None), ("v2", 256.0, spec),
             ("speed", 8.0, None), ("i", 8.0, None)]
    doc = {"site": "s", "gateway": "g", "state_dir": str(tmp_path / "state"),
           "assets": [{"name": f"A{a}", "speed_channel": "speed",
                       "window": {"length_s": 1.0, "lateness_s": 0.0, "timeout_s": 0.5},
                       "channels": {c: {"topic": f"t/{a}/{c}", "decoder": "json-batch",
                                        "rate_hz": r, "features": FEATS,
                                        **({"spectrum": sp, "unit": "m/s2"} if sp else {})}
                                    for c, r, sp in chans}}
                      for a in range(4)]}
    cfg = parse_config(doc, tmp_path)
    buffers = Buffers(cfg)
    rows: list[np.ndarray] = []
    pipe = Pipeline(cfg, buffers, _Sink(), Metrics(CollectorRegistry()),
                    logging.getLogger("test"), [AssetRuntime.build(a, None, None)
                                               for a in cfg.assets],
                    observer=lambda asset, mode, w, row, _: rows.append(row.copy()))
    rng = np.random.default_rng(11)
    for k in range(5):
        for ai in range(4):
            for ci, (c, r, _) in enumerate(chans):
                ts = k + np.arange(int(r)) / r + (0.0625 * (ai + 1) if stream else 0.0)
                vals = 1500.0 + 100 * ai + rng.normal(0, 5, ts.size) if c == "speed" else \
                    np.sin(2 * np.pi * (25.0 + ai) * ts) + rng.normal(0, 0.3, ts.size)
                buffers.by_asset[ai][ci].append_block(ts, vals, k + 1.0)
        pipe.tick(k + 2.0)
    assert not aligned or taken.count(True) >= 3
    return rows


def test_aligned_rows_equal_the_general_paths(tmp_path: Path, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    """The aligned path (several blocks per window, spectra with orders of the speed
    channel) gives the general path's rows bit for bit."""
    got = _full_rows(tmp_path / "a", True, monkeypatch)
    want = _full_rows(tmp_path / "g", False, monkeypatch)
    assert len(got) == len(want) >= 16
    for g, w in zip(got, want, strict=True):
        np.testing.assert_array_equal(g, w)


def test_aligned_rows_of_windows_closed_by_the_next_ones_samples(  # type: ignore[no-untyped-def]
        tmp_path: Path, monkeypatch) -> None:
    """Windows cut while samples past their end are pending (each asset at its own
    phase) are rows of one copy too, and give the general path's rows."""
    got = _full_rows(tmp_path / "a", True, monkeypatch, stream=True)
    want = _full_rows(tmp_path / "g", False, monkeypatch, stream=True)
    assert len(got) == len(want) >= 12
    for g, w in zip(got, want, strict=True):
        np.testing.assert_array_equal(g, w)
