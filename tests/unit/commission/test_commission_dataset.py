"""Datasets: round trip, incremental writer, and clear refusals."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from agent.commission.dataset import (
    FEATURES_NPZ,
    MANIFEST_JSON,
    DatasetWriter,
    read_dataset,
    write_dataset,
)
from agent.errors import DatasetError

NAMES = [f"ch{i // 3}.f{i % 3}" for i in range(6)]


def _arrays(n: int = 60, seed: int = 0) -> dict:
    # Invented test data: random features on a 10 s window grid.
    rng = np.random.default_rng(seed)
    t = 1.75e9 + 10.0 * np.arange(n)
    return {"features": rng.normal(size=(n, len(NAMES))), "feature_names": NAMES,
            "window_start": t, "window_end": t + 10.0, "mode": ["run"] * n}


def test_round_trip(tmp_path: Path) -> None:
    """What write_dataset writes, read_dataset returns unchanged with its manifest."""
    a = _arrays()
    label = np.zeros(60, np.int8)
    label[10:20] = 2
    write_dataset(tmp_path / "ds", **a, asset="P-101", label=label,
                  window={"length_s": 10.0, "hop_s": 10.0}, units={"ch0": "mm/s"})
    ds = read_dataset(tmp_path / "ds")
    np.testing.assert_array_equal(ds.features, a["features"])
    np.testing.assert_array_equal(ds.window_start, a["window_start"])
    np.testing.assert_array_equal(ds.label, label)
    assert ds.feature_names == tuple(NAMES)
    assert ds.asset == "P-101" and ds.modes == ("run",)
    m = json.loads((tmp_path / "ds" / MANIFEST_JSON).read_text())
    assert m["counts"] == {"windows": 60, "features": 6, "labelled": True, "faulty": 10}
    assert m["modes"] == {"run": 60}
    assert m["window"]["length_s"] == 10.0 and m["units"] == {"ch0": "mm/s"}
    assert m["time_span"]["duration_s"] == pytest.approx(600.0)
    assert m["content_sha256"] == ds.content_sha256 and len(ds.content_sha256) == 64
    assert not ds.features.flags.writeable
    assert [p.name for p in tmp_path.iterdir()] == ["ds"]  # no temp directory left behind


def test_writer_appends_and_writes_on_close(tmp_path: Path) -> None:
    """DatasetWriter writes nothing until close, then the same as write_dataset."""
    a = _arrays(55)
    w = DatasetWriter(tmp_path / "ds", asset="F-201", window={"length_s": 10.0})
    for row, s, e in zip(a["features"], a["window_start"], a["window_end"], strict=True):
        w.add(row, NAMES, s, e, "run")
    assert w.n_windows == 55 and not (tmp_path / "ds").exists()
    w.close()
    ds = read_dataset(tmp_path / "ds")
    np.testing.assert_array_equal(ds.features, a["features"])
    assert ds.label is None


def test_same_content_same_hash(tmp_path: Path) -> None:
    """The content hash depends on the arrays only."""
    write_dataset(tmp_path / "a", **_arrays(), asset="P-101")
    write_dataset(tmp_path / "b", **_arrays(), asset="P-101", window={"length_s": 5})
    write_dataset(tmp_path / "c", **_arrays(seed=1), asset="P-101")
    h = [read_dataset(tmp_path / x).content_sha256 for x in "abc"]
    assert h[0] == h[1] != h[2]


@pytest.mark.parametrize(("change", "message"), [
    (lambda a: a["features"].__setitem__((3, 4), np.nan), "non-finite feature value"),
    (lambda a: a["features"].__setitem__((3, 4), np.inf), "features 'ch1.f1'"),
    (lambda a: a.__setitem__("feature_names", NAMES[:5]), "5 feature names for 6"),
    (lambda a: a.__setitem__("feature_names", [*NAMES[:5], NAMES[0]]), "duplicate feature"),
    (lambda a: a.__setitem__("window_start", a["window_start"][::-1].copy()), "ends before"),
    (lambda a: a["window_start"].__setitem__(5, 0.0), "not in time order"),
    (lambda a: a.__setitem__("mode", ["run"] * 59), "mode has shape (59,)"),
])
def test_write_refuses(tmp_path: Path, change, message: str) -> None:
    """write_dataset names what is wrong with the arrays."""
    a = _arrays()
    change(a)
    with pytest.raises(DatasetError, match=message.replace("(", r"\(").replace(")", r"\)")):
        write_dataset(tmp_path / "ds", **a, asset="P-101")
    assert not (tmp_path / "ds").exists()


def test_too_few_windows_refused(tmp_path: Path) -> None:
    """A reader asking for a minimum gets a message with both numbers."""
    write_dataset(tmp_path / "ds", **_arrays(12), asset="P-101")
    with pytest.raises(DatasetError, match=r"only 12 window\(s\); at least 50 are needed"):
        read_dataset(tmp_path / "ds", min_windows=50)


def test_existing_destination_refused(tmp_path: Path) -> None:
    """An existing dataset is not replaced unless asked."""
    write_dataset(tmp_path / "ds", **_arrays(), asset="P-101")
    with pytest.raises(DatasetError, match="already exists"):
        write_dataset(tmp_path / "ds", **_arrays(seed=2), asset="P-101")
    write_dataset(tmp_path / "ds", **_arrays(seed=2), asset="P-101", overwrite=True)
    np.testing.assert_array_equal(read_dataset(tmp_path / "ds").features,
                                  _arrays(seed=2)["features"])


@pytest.mark.parametrize(("names", "message"), [
    ([*NAMES[:5], "ch9.f0"], r"missing 'ch1.f2'; unexpected 'ch9.f0'"),
    ([NAMES[1], NAMES[0], *NAMES[2:]], "same names in a different order"),
    (NAMES[:5], "missing 'ch1.f2'"),
])
def test_writer_refuses_mismatched_names(tmp_path: Path, names: list[str], message: str) -> None:
    """Every window must carry the first window's feature names in the same order."""
    w = DatasetWriter(tmp_path / "ds", asset="P-101")
    w.add(np.zeros(6), NAMES, 0.0, 10.0)
    with pytest.raises(DatasetError, match=f"window 1: feature names differ.*{message}"):
        w.add(np.zeros(len(names)), names, 10.0, 20.0)


@pytest.mark.parametrize(("row", "start", "message"), [
    ([0, 0, np.nan, 0, 0, 0], 10.0, "non-finite value.*'ch0.f2'"),
    ([0, 0, 0, 0, 0], 10.0, "5 values for 6 names"),
    ([0] * 6, -5.0, "before the previous window"),
])
def test_writer_refuses_bad_rows(tmp_path: Path, row, start: float, message: str) -> None:
    """Bad rows are refused when added, naming the window."""
    w = DatasetWriter(tmp_path / "ds", asset="P-101")
    w.add(np.zeros(6), NAMES, 0.0, 10.0)
    with pytest.raises(DatasetError, match=message):
        w.add(np.asarray(row, float), NAMES, start, start + 10.0)


def test_writer_with_no_windows_refused(tmp_path: Path) -> None:
    """Closing an empty writer says nothing was captured."""
    with pytest.raises(DatasetError, match="no windows were captured"):
        DatasetWriter(tmp_path / "ds", asset="P-101").close()


def test_tampered_arrays_refused(tmp_path: Path) -> None:
    """A features.npz that no longer matches its manifest is refused."""
    write_dataset(tmp_path / "ds", **_arrays(), asset="P-101")
    a = _arrays(seed=5)
    np.savez(tmp_path / "ds" / FEATURES_NPZ, features=a["features"],
             window_start=a["window_start"], window_end=a["window_end"],
             mode=np.asarray(a["mode"]))
    with pytest.raises(DatasetError, match="content hash mismatch"):
        read_dataset(tmp_path / "ds")


def test_pickled_arrays_never_loaded(tmp_path: Path) -> None:
    """An object array (which needs pickle) is refused, not unpickled."""
    write_dataset(tmp_path / "ds", **_arrays(), asset="P-101")
    a = _arrays()
    np.savez(tmp_path / "ds" / FEATURES_NPZ, features=a["features"],
             window_start=a["window_start"], window_end=a["window_end"],
             mode=np.asarray(a["mode"], dtype=object))
    with pytest.raises(DatasetError, match="cannot be read"):
        read_dataset(tmp_path / "ds")


@pytest.mark.parametrize(("setup", "message"), [
    (lambda d: None, "is not a directory"),
    (lambda d: d.mkdir(), "manifest.json is missing"),
    (lambda d: (d.mkdir(), (d / MANIFEST_JSON).write_text("{"),
                (d / FEATURES_NPZ).write_bytes(b"")), "not valid JSON"),
    (lambda d: (d.mkdir(), (d / MANIFEST_JSON).write_text('{"format": "other"}'),
                (d / FEATURES_NPZ).write_bytes(b"")), "is not a watchkeep-dataset"),
])
def test_unreadable_directories_refused(tmp_path: Path, setup, message: str) -> None:
    """Missing or foreign files give a one-line reason."""
    setup(tmp_path / "ds")
    with pytest.raises(DatasetError, match=message):
        read_dataset(tmp_path / "ds")
