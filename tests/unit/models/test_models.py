"""The versioned model store: versions written whole, an atomic active link, pruning, adopt."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest

from agent.errors import BundleError
from agent.learning.rebaseline import Rehearsal
from agent.models.bundle import load_bundle
from agent.models.store import ACTIVE, ModelStore, read_rehearsal
from tests.helpers import feature_names, train_pca_bundle


def _reh(n: int = 20) -> Rehearsal:
    rng = np.random.default_rng(0)
    return Rehearsal(rng.normal(size=(n, 6)), tuple(feature_names()), n * 3)


@pytest.fixture
def store(tmp_path: Path) -> ModelStore:
    s = ModelStore(tmp_path / "models", keep=3)
    b = train_pca_bundle(tmp_path / "trained", "P-1")
    assert s.adopt("P-1", "default", b, _reh()) == 1
    return s


def test_adopt_activates_a_loadable_copy_with_its_rehearsal_set(store: ModelStore) -> None:
    """Adopted bundle is v1, active through a relative link, and loads like the original."""
    link = store.active_link("P-1", "default")
    assert link.is_symlink() and os.readlink(link) == "v1"
    assert store.active_version("P-1", "default") == 1
    b = load_bundle(link)
    assert b.meta.version == 1
    assert b.meta.raw["lineage"]["method"] == "adopted"
    r = read_rehearsal(store.version_path("P-1", "default", 1))
    assert r is not None and r.size == 20 and r.n_seen == 60
    np.testing.assert_array_equal(r.features, _reh().features)
    assert store.locate(link) == ("P-1", "default")
    assert store.locate(store.version_path("P-1", "default", 1)) is None


def test_versions_are_never_rewritten_and_activation_switches(store: ModelStore) -> None:
    """A new version is written whole; an existing one is refused; activate moves the link."""
    src = store.version_path("P-1", "default", 1)
    onnx = (src / "model.onnx").read_bytes()
    store.write_version("P-1", "default", 2, onnx, {"asset": "P-1"}, None)
    with pytest.raises(BundleError, match="never rewritten"):
        store.write_version("P-1", "default", 2, onnx, {"asset": "P-1"}, None)
    assert store.active_version("P-1", "default") == 1
    store.activate("P-1", "default", 2)
    assert store.active_version("P-1", "default") == 2
    assert not list(store.slot("P-1", "default").glob(".*"))  # no temp files left
    with pytest.raises(BundleError, match="no such version"):
        store.activate("P-1", "default", 9)


def test_prune_keeps_the_newest_and_never_the_active(store: ModelStore) -> None:
    """With keep=3 the oldest go first, but an active old version stays."""
    onnx = (store.version_path("P-1", "default", 1) / "model.onnx").read_bytes()
    for v in (2, 3, 4, 5):
        store.write_version("P-1", "default", v, onnx, {"asset": "P-1"}, None)
    assert store.prune("P-1", "default") == [2, 3]  # v1 is active
    assert store.versions("P-1", "default") == [1, 4, 5]
    store.activate("P-1", "default", 5)
    assert store.prune("P-1", "default") == []
    with pytest.raises(BundleError, match="active version cannot be removed"):
        store.remove_version("P-1", "default", 5)


def test_a_crashed_write_is_invisible(store: ModelStore) -> None:
    """A leftover temp directory is not a version, and the next write of it clears it."""
    slot = store.slot("P-1", "default")
    (slot / ".v2.tmp-crashed").mkdir()
    assert store.versions("P-1", "default") == [1]
    assert store.next_version("P-1", "default") == 2
    onnx = (slot / "v1" / "model.onnx").read_bytes()
    store.write_version("P-1", "default", 2, onnx, {"asset": "P-1"}, None)
    assert not (slot / ".v2.tmp-crashed").exists()


@pytest.mark.parametrize("name", ["", ".", "..", "a/b"])
def test_names_that_are_not_one_directory_are_refused(tmp_path: Path, name: str) -> None:
    """Asset and mode names must be a single path component."""
    with pytest.raises(BundleError):
        ModelStore(tmp_path).slot(name, "default")
    with pytest.raises(BundleError):
        ModelStore(tmp_path).slot("P-1", name)


def test_listing_marks_the_active_version(store: ModelStore) -> None:
    """`listing` gives every mode's versions with the active one marked."""
    (infos,) = store.listing("P-1").values()
    assert [(i.version, i.active, i.rehearsal_windows) for i in infos] == [(1, True, 20)]
    assert ACTIVE not in store.modes("P-1")[0]
