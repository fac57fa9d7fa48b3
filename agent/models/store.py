"""The versioned model store: every bundle an asset's mode has had, and which one is active.

Layout under `models_dir` (contract of this module; `bundle:` in the config points at
the `active` link, e.g. `<models_dir>/P-101/default/active`):

    <asset>/<mode>/v<N>/      a bundle (model.onnx, model.json with "version": N) plus
                              rehearsal.npz: the bounded reservoir sample of the windows
                              the model learnt (features [R, F], feature_names, n_seen)
    <asset>/<mode>/active     a relative symlink to v<N>

- A version directory is written whole into a temporary directory beside it, fsynced,
  and renamed into place; an existing version is never rewritten. A crash leaves a
  `.v<N>.tmp-*` directory that listings ignore and the next write removes.
- `activate` switches the link atomically: a new symlink is made under a temporary
  name and renamed over `active` (rename(2) replaces it in one step), then the
  directory is fsynced. A reader resolves either the old or the new version, never
  neither.
- At most `keep` versions stay; the oldest are removed first, never the active one.
- Nothing here unpickles: `rehearsal.npz` is read with `allow_pickle=False`.
"""

from __future__ import annotations

import json
import os
import re
import shutil
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np

from agent.config.rebaseline import DEFAULT_KEEP  # numpy-free, for the config
from agent.errors import BundleError
from agent.fsutil import FileContent, fsync_dir, replace_dir
from agent.learning.rehearsal import Rehearsal
from agent.models.bundle import FORMAT, FORMAT_VERSION, MODEL_JSON, MODEL_ONNX

ACTIVE = "active"
REHEARSAL_NPZ = "rehearsal.npz"
_VERSION_RE = re.compile(r"^v([1-9][0-9]{0,8})$")


@dataclass(frozen=True)
class VersionInfo:
    """One stored version, as `watchkeep models` lists it."""

    version: int
    path: Path
    active: bool
    created: str
    threshold: float | None
    rehearsal_windows: int
    lineage: dict[str, Any] = field(default_factory=dict)

    def as_json(self) -> dict[str, Any]:
        return {"version": self.version, "path": str(self.path), "active": self.active,
                "created": self.created, "threshold": self.threshold,
                "rehearsal_windows": self.rehearsal_windows, "lineage": self.lineage}


def _component(name: str, what: str) -> str:
    if not name or name in (".", "..") or "/" in name or "\0" in name:
        raise BundleError(name, f"{what} {name!r} cannot name a directory in the model store")
    return name


def read_rehearsal(path: Path) -> Rehearsal | None:
    """The rehearsal set in a version directory, or None when it has none."""
    f = path / REHEARSAL_NPZ
    if not f.is_file():
        return None
    try:
        with np.load(f, allow_pickle=False) as z:
            feats = np.asarray(z["features"], np.float64)
            names = tuple(str(n) for n in z["feature_names"])
            seen = int(z["n_seen"])
    except (OSError, KeyError, ValueError) as exc:
        raise BundleError(str(path), f"{REHEARSAL_NPZ} cannot be read ({exc})") from exc
    if feats.ndim != 2 or feats.shape[1] != len(names):
        raise BundleError(str(path), f"{REHEARSAL_NPZ} has features of the wrong shape")
    return Rehearsal(feats, names, seen)


def _rehearsal_writer(r: Rehearsal) -> Callable[[BinaryIO], None]:
    def write(fh: BinaryIO) -> None:
        np.savez(fh, features=np.asarray(r.features, np.float64),
                 feature_names=np.asarray(r.feature_names, dtype=str),
                 n_seen=np.asarray(r.n_seen, np.int64))
    return write


class ModelStore:
    """Versions of each asset's mode bundles under one root directory (module docstring)."""

    def __init__(self, root: str | os.PathLike[str], keep: int = DEFAULT_KEEP) -> None:
        if keep < 2:
            raise ValueError("keep at least 2 versions (the active one and one to go back to)")
        self.root = Path(root)
        self.keep = keep

    def slot(self, asset: str, mode: str) -> Path:
        return self.root / _component(asset, "asset") / _component(mode, "mode")

    def active_link(self, asset: str, mode: str) -> Path:
        return self.slot(asset, mode) / ACTIVE

    def locate(self, bundle_path: str | os.PathLike[str]) -> tuple[str, str] | None:
        """(asset, mode) when `bundle_path` is a slot's `active` link in this store."""
        p = Path(os.path.abspath(bundle_path))
        root = Path(os.path.abspath(self.root))
        if p.name != ACTIVE or p.parent.parent.parent != root:
            return None
        return p.parent.parent.name, p.parent.name

    def versions(self, asset: str, mode: str) -> list[int]:
        slot = self.slot(asset, mode)
        if not slot.is_dir():
            return []
        out = []
        for child in slot.iterdir():
            m = _VERSION_RE.match(child.name)
            if m and child.is_dir() and not child.is_symlink():
                out.append(int(m.group(1)))
        return sorted(out)

    def modes(self, asset: str) -> list[str]:
        base = self.root / _component(asset, "asset")
        if not base.is_dir():
            return []
        return sorted(c.name for c in base.iterdir() if c.is_dir() and not c.name.startswith("."))

    def active_version(self, asset: str, mode: str) -> int | None:
        link = self.active_link(asset, mode)
        try:
            target = os.readlink(link)
        except OSError:
            return None
        m = _VERSION_RE.match(Path(target).name)
        return int(m.group(1)) if m else None

    def version_path(self, asset: str, mode: str, version: int) -> Path:
        return self.slot(asset, mode) / f"v{int(version)}"

    def next_version(self, asset: str, mode: str) -> int:
        return max(self.versions(asset, mode), default=0) + 1

    def info(self, asset: str, mode: str, version: int) -> VersionInfo:
        path = self.version_path(asset, mode, version)
        try:
            doc = json.loads((path / MODEL_JSON).read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise BundleError(str(path), f"{MODEL_JSON} cannot be read ({exc})") from exc
        reh = read_rehearsal(path)
        thr = doc.get("threshold")
        return VersionInfo(version, path, self.active_version(asset, mode) == version,
                           str(doc.get("created", "")),
                           float(thr) if isinstance(thr, int | float) else None,
                           reh.size if reh is not None else 0, dict(doc.get("lineage", {})))

    def listing(self, asset: str) -> dict[str, list[VersionInfo]]:
        """Every mode's versions of `asset`, oldest first."""
        return {m: [self.info(asset, m, v) for v in self.versions(asset, m)]
                for m in self.modes(asset)}

    def write_version(self, asset: str, mode: str, version: int, model_bytes: bytes,
                      meta: dict[str, Any], rehearsal: Rehearsal | None) -> Path:
        """Write v<version> whole (temp-and-rename); BundleError if it exists already."""
        slot = self.slot(asset, mode)
        slot.mkdir(parents=True, exist_ok=True)
        dest = self.version_path(asset, mode, version)
        if dest.exists():
            raise BundleError(str(dest), "this version exists already; versions are never "
                                         "rewritten")
        for stale in slot.glob(f".v{version}.tmp-*"):
            shutil.rmtree(stale, ignore_errors=True)
        doc = {"format": FORMAT, "format_version": FORMAT_VERSION, **meta, "version": version}
        files: dict[str, FileContent] = {
            MODEL_ONNX: model_bytes, MODEL_JSON: (json.dumps(doc, indent=2) + "\n").encode()}
        if rehearsal is not None:
            files[REHEARSAL_NPZ] = _rehearsal_writer(rehearsal)
        replace_dir(dest, files)
        return dest

    def remove_version(self, asset: str, mode: str, version: int) -> None:
        """Remove a version that is not active (a rejected candidate, a pruned one)."""
        if self.active_version(asset, mode) == version:
            raise BundleError(str(self.version_path(asset, mode, version)),
                              "the active version cannot be removed")
        path = self.version_path(asset, mode, version)
        if path.exists():
            doomed = path.with_name(f".{path.name}.tmp-removed")
            os.rename(path, doomed)  # gone from listings in one step, then deleted
            shutil.rmtree(doomed, ignore_errors=True)

    def activate(self, asset: str, mode: str, version: int) -> Path:
        """Point `active` at v<version> atomically; returns the link."""
        target = self.version_path(asset, mode, version)
        if not (target / MODEL_JSON).is_file():
            raise BundleError(str(target), "no such version in the model store")
        link = self.active_link(asset, mode)
        tmp = link.with_name(f".{ACTIVE}.tmp-{os.getpid()}")
        if tmp.is_symlink() or tmp.exists():
            tmp.unlink()
        os.symlink(target.name, tmp)
        os.replace(tmp, link)
        fsync_dir(link.parent)
        return link

    def prune(self, asset: str, mode: str) -> list[int]:
        """Remove the oldest versions beyond `keep` (never the active); returns them."""
        active = self.active_version(asset, mode)
        vs = self.versions(asset, mode)
        removed: list[int] = []
        for v in vs:
            if len(vs) - len(removed) <= self.keep:
                break
            if v == active:
                continue
            self.remove_version(asset, mode, v)
            removed.append(v)
        return removed

    def adopt(self, asset: str, mode: str, bundle_dir: str | os.PathLike[str],
              rehearsal: Rehearsal | None) -> int:
        """Copy an existing bundle (e.g. from `watchkeep train`) in as the next version and
        activate it; returns its version number."""
        src = Path(bundle_dir)
        try:
            doc = json.loads((src / MODEL_JSON).read_text(encoding="utf-8"))
            model_bytes = (src / MODEL_ONNX).read_bytes()
        except (OSError, ValueError) as exc:
            raise BundleError(str(src), f"cannot be read ({exc})") from exc
        for k in ("format", "format_version"):
            doc.pop(k, None)
        version = self.next_version(asset, mode)
        doc.setdefault("lineage", {"method": "adopted", "from": str(src),
                                   "original_version": doc.get("version")})
        self.write_version(asset, mode, version, model_bytes, doc, rehearsal)
        self.activate(asset, mode, version)
        return version
