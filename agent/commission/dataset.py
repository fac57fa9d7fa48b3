"""Feature-window datasets: what `record` writes and `train` / `evaluate` read.

A dataset is a directory holding two files:

    features.npz    arrays, loaded with allow_pickle=False:
                      features      [N, F] float64  one row per window, columns = feature_names
                      window_start  [N]    float64  unix seconds
                      window_end    [N]    float64  unix seconds, >= window_start
                      mode          [N]    str      operating mode of each window
                      label         [N]    int8     optional: 0 normal, >0 faulty (a kind code)
    manifest.json   {"format": "watchkeep-dataset", "format_version": 1,
                     "asset", "feature_names", "window" (settings dict), "units" (channel ->
                     unit), "modes" ({mode: count}), "time_span" ({start, end, duration_s}),
                     "counts" ({windows, features, labelled, faulty}), "content_sha256",
                     "created", "watchkeep_version", "extra" (free-form, e.g. record settings)}

`content_sha256` covers every array (name, dtype, shape and bytes, in a fixed order),
so a reader notices a `features.npz` that does not belong to its manifest. Windows are
stored in time order (non-decreasing `window_start`). Both files are written to a
temporary directory beside the destination, which is then renamed into place.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from agent import __version__
from agent.errors import DatasetError
from agent.fsutil import replace_dir

FORMAT = "watchkeep-dataset"
FORMAT_VERSION = 1
FEATURES_NPZ = "features.npz"
MANIFEST_JSON = "manifest.json"
DEFAULT_MIN_WINDOWS = 50
_ARRAYS = ("features", "window_start", "window_end", "mode", "label")


@dataclass(frozen=True)
class Dataset:
    """A checked dataset; arrays are read-only views in time order."""

    path: Path | None
    asset: str
    feature_names: tuple[str, ...]
    features: np.ndarray
    window_start: np.ndarray
    window_end: np.ndarray
    mode: np.ndarray
    label: np.ndarray | None = None
    window: Mapping[str, Any] = field(default_factory=dict)
    units: Mapping[str, str] = field(default_factory=dict)
    content_sha256: str = ""
    manifest: Mapping[str, Any] = field(default_factory=dict, repr=False)

    @property
    def n_windows(self) -> int:
        return int(self.features.shape[0])

    @property
    def n_features(self) -> int:
        return int(self.features.shape[1])

    @property
    def modes(self) -> tuple[str, ...]:
        """Distinct modes in first-seen order."""
        return tuple(dict.fromkeys(str(m) for m in self.mode))

    def select(self, mask: np.ndarray) -> Dataset:
        """The windows where `mask` is true, as a new Dataset (same names and hash)."""
        mask = np.asarray(mask, dtype=bool)
        return Dataset(
            path=self.path, asset=self.asset, feature_names=self.feature_names,
            features=self.features[mask], window_start=self.window_start[mask],
            window_end=self.window_end[mask], mode=self.mode[mask],
            label=None if self.label is None else self.label[mask],
            window=self.window, units=self.units, content_sha256=self.content_sha256,
            manifest=self.manifest,
        )

    def columns(self, names: Sequence[str]) -> np.ndarray:
        """Feature columns in the order of `names`; DatasetError names what is missing."""
        index = {n: i for i, n in enumerate(self.feature_names)}
        missing = [n for n in names if n not in index]
        if missing:
            raise DatasetError(
                f"dataset {self.path}: {len(missing)} feature(s) the model needs are missing: "
                f"{_few(missing)} (the dataset has {_few(self.feature_names)})")
        return self.features[:, [index[n] for n in names]]


def _few(names: Sequence[str], limit: int = 5) -> str:
    shown = ", ".join(repr(n) for n in list(names)[:limit])
    more = len(names) - limit
    return f"{shown} and {more} more" if more > 0 else shown


def content_hash(arrays: Mapping[str, np.ndarray]) -> str:
    """sha256 over each array's name, dtype, shape and little-endian bytes, in a fixed order."""
    h = hashlib.sha256()
    for name in _ARRAYS:
        if name not in arrays:
            continue
        a = np.ascontiguousarray(arrays[name])
        if a.dtype.byteorder == ">":
            a = a.astype(a.dtype.newbyteorder("<"))
        h.update(f"{name}|{a.dtype.str}|{a.shape}|".encode())
        h.update(a.tobytes())
    return h.hexdigest()


def _check_arrays(features: np.ndarray, feature_names: Sequence[str], window_start: np.ndarray,
                  window_end: np.ndarray, mode: np.ndarray, label: np.ndarray | None,
                  where: str) -> None:
    """Every structural check shared by the writer and the reader."""
    if features.ndim != 2:
        raise DatasetError(f"{where}: features must be a 2-D array [N, F], got shape "
                           f"{features.shape}")
    n, f = features.shape
    names = list(feature_names)
    if len(names) != f:
        raise DatasetError(f"{where}: {len(names)} feature names for {f} feature columns")
    if not all(isinstance(x, str) and x for x in names):
        raise DatasetError(f"{where}: feature names must be non-empty strings")
    dupes = [k for k, c in Counter(names).items() if c > 1]
    if dupes:
        raise DatasetError(f"{where}: duplicate feature names {_few(dupes)}")
    for arr_name, arr in (("window_start", window_start), ("window_end", window_end),
                          ("mode", mode)) + ((("label", label),) if label is not None else ()):
        if arr.shape != (n,):
            raise DatasetError(f"{where}: {arr_name} has shape {arr.shape}, expected ({n},)")
    bad = ~np.isfinite(features)
    if bad.any():
        rows, cols = np.nonzero(bad)
        cols_named = sorted({names[c] for c in cols})
        raise DatasetError(
            f"{where}: {int(bad.sum())} non-finite feature value(s) (NaN or inf) in "
            f"{len(set(rows.tolist()))} window(s), first at window {int(rows[0])}; "
            f"features {_few(cols_named)}. Drop those windows before writing the dataset")
    if not (np.all(np.isfinite(window_start)) and np.all(np.isfinite(window_end))):
        raise DatasetError(f"{where}: window_start/window_end must be finite unix seconds")
    if np.any(window_end < window_start):
        i = int(np.argmax(window_end < window_start))
        raise DatasetError(f"{where}: window {i} ends before it starts")
    if n > 1 and np.any(np.diff(window_start) < 0):
        i = int(np.argmax(np.diff(window_start) < 0)) + 1
        raise DatasetError(f"{where}: windows are not in time order (window {i} starts "
                           "before the one before it)")


def write_dataset(dest: str | os.PathLike[str], features: np.ndarray,
                  feature_names: Sequence[str], window_start: np.ndarray,
                  window_end: np.ndarray, mode: Sequence[str] | np.ndarray, *, asset: str,
                  label: np.ndarray | None = None, window: Mapping[str, Any] | None = None,
                  units: Mapping[str, str] | None = None, extra: Mapping[str, Any] | None = None,
                  overwrite: bool = False, now: datetime | None = None) -> Path:
    """Check the arrays and write a dataset directory by temp-and-rename.

    Refuses (DatasetError) non-finite features, misshaped arrays, duplicate or
    miscounted names, windows out of time order, and an existing `dest` unless
    `overwrite`. Returns the destination path.
    """
    dest = Path(dest)
    where = f"dataset {dest}"
    feats = np.array(features, dtype=np.float64, copy=True)
    ws = np.asarray(window_start, dtype=np.float64)
    we = np.asarray(window_end, dtype=np.float64)
    modes = np.asarray([str(m) for m in mode], dtype=str) if len(mode) else np.zeros(0, "<U1")
    lab = None if label is None else np.asarray(label)
    if lab is not None:
        if lab.size and (not np.all(np.isfinite(lab)) or np.any(lab < 0) or np.any(lab > 127)
                         or np.any(lab != np.round(lab))):
            raise DatasetError(f"{where}: labels must be integers 0..127")
        lab = lab.astype(np.int8)
    if feats.ndim == 2 and feats.shape[0] == 0:
        raise DatasetError(f"{where}: no windows to write")
    _check_arrays(feats, feature_names, ws, we, modes, lab, where)
    if dest.exists() and not overwrite:
        raise DatasetError(f"{where}: already exists (choose another directory)")
    if not asset:
        raise DatasetError(f"{where}: asset must be named")

    arrays: dict[str, np.ndarray] = {"features": feats, "window_start": ws, "window_end": we,
                                     "mode": modes}
    if lab is not None:
        arrays["label"] = lab
    stamp = (now or datetime.now(UTC)).astimezone(UTC)
    manifest = {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "asset": asset,
        "feature_names": list(feature_names),
        "window": dict(window or {}),
        "units": dict(units or {}),
        "modes": dict(Counter(modes.tolist())),
        "time_span": {"start": float(ws.min()), "end": float(we.max()),
                      "duration_s": float(we.max() - ws.min())},
        "counts": {"windows": int(feats.shape[0]), "features": int(feats.shape[1]),
                   "labelled": lab is not None,
                   "faulty": int(np.count_nonzero(lab)) if lab is not None else 0},
        "content_sha256": content_hash(arrays),
        "created": stamp.isoformat(timespec="seconds").replace("+00:00", "Z"),
        "watchkeep_version": __version__,
        "extra": dict(extra or {}),
    }
    return replace_dir(dest, {
        FEATURES_NPZ: lambda fh: np.savez_compressed(fh, **arrays),  # type: ignore[arg-type]
        MANIFEST_JSON: (json.dumps(manifest, indent=2, allow_nan=False) + "\n").encode()})


def read_dataset(path: str | os.PathLike[str], *,
                 min_windows: int = 1) -> Dataset:
    """Load and check a dataset directory; DatasetError says exactly what is wrong.

    Checks the manifest's format, the content hash, shapes, names, finiteness and time
    order, and that at least `min_windows` windows are present.
    """
    p = Path(path)
    where = f"dataset {p}"
    if not p.is_dir():
        raise DatasetError(f"{where}: is not a directory")
    mpath, npath = p / MANIFEST_JSON, p / FEATURES_NPZ
    for f in (mpath, npath):
        if not f.is_file():
            raise DatasetError(f"{where}: {f.name} is missing")
    manifest = _read_manifest(mpath, where)
    names = manifest["feature_names"]
    try:
        with np.load(npath, allow_pickle=False) as npz:
            arrays = {k: npz[k] for k in npz.files}
    except (OSError, ValueError, EOFError) as exc:
        raise DatasetError(f"{where}: {FEATURES_NPZ} cannot be read ({exc})") from exc
    for k in ("features", "window_start", "window_end", "mode"):
        if k not in arrays:
            raise DatasetError(f"{where}: {FEATURES_NPZ} has no {k!r} array")
    digest = content_hash(arrays)
    if digest != manifest.get("content_sha256"):
        raise DatasetError(f"{where}: content hash mismatch: {FEATURES_NPZ} does not match "
                           f"{MANIFEST_JSON} (changed or truncated since it was written)")
    feats = arrays["features"]
    if feats.dtype != np.float64:
        raise DatasetError(f"{where}: features are {feats.dtype}, expected float64")
    if arrays["mode"].dtype.kind != "U":
        raise DatasetError(f"{where}: mode must be a string array")
    label = arrays.get("label")
    if label is not None and label.dtype != np.int8:
        raise DatasetError(f"{where}: label must be int8, got {label.dtype}")
    _check_arrays(feats, names, arrays["window_start"], arrays["window_end"], arrays["mode"],
                  label, where)
    n = feats.shape[0]
    if n < min_windows:
        raise DatasetError(f"{where}: only {n} window(s); at least {min_windows} are needed "
                           "(record for longer)")
    for a in arrays.values():
        a.setflags(write=False)
    return Dataset(path=p, asset=str(manifest.get("asset", "")), feature_names=tuple(names),
                   features=feats, window_start=arrays["window_start"],
                   window_end=arrays["window_end"], mode=arrays["mode"], label=label,
                   window=dict(manifest.get("window") or {}),
                   units=dict(manifest.get("units") or {}), content_sha256=digest,
                   manifest=manifest)


def _read_manifest(mpath: Path, where: str) -> dict[str, Any]:
    """The manifest, checked: this format and version, with a feature_names list."""
    try:
        manifest = json.loads(mpath.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise DatasetError(f"{where}: {MANIFEST_JSON} is not valid JSON ({exc})") from exc
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        raise DatasetError(f"{where}: {MANIFEST_JSON} is not a {FORMAT} manifest")
    if manifest.get("format_version") != FORMAT_VERSION:
        raise DatasetError(f"{where}: format_version {manifest.get('format_version')!r} is not "
                           f"supported (this watchkeep reads {FORMAT_VERSION})")
    if not isinstance(manifest.get("feature_names"), list):
        raise DatasetError(f"{where}: {MANIFEST_JSON} has no feature_names list")
    return manifest


class DatasetWriter:
    """Collects windows one at a time (as `record` closes them), then writes once.

    `add` checks each row as it comes: the same feature names in the same order as the
    first row, finite values, time order. `close` writes the directory (temp-and-rename)
    and returns its path; nothing is on disk before `close`.
    """

    def __init__(self, dest: str | os.PathLike[str], *, asset: str,
                 window: Mapping[str, Any] | None = None, units: Mapping[str, str] | None = None,
                 extra: Mapping[str, Any] | None = None, overwrite: bool = False) -> None:
        self.dest = Path(dest)
        self.asset = asset
        self.window = dict(window or {})
        self.units = dict(units or {})
        self.extra = dict(extra or {})
        self.overwrite = overwrite
        self._names: tuple[str, ...] | None = None
        self._rows: list[np.ndarray] = []
        self._start: list[float] = []
        self._end: list[float] = []
        self._mode: list[str] = []
        self._label: list[int] = []
        self._closed = False

    @property
    def n_windows(self) -> int:
        return len(self._rows)

    @property
    def feature_names(self) -> tuple[str, ...] | None:
        return self._names

    def add(self, features_row: Sequence[float] | np.ndarray, names: Sequence[str],
            window_start: float, window_end: float, mode: str = "default",
            label: int | None = None) -> None:
        """Append one window; DatasetError if it does not fit the ones before it."""
        if self._closed:
            raise DatasetError(f"dataset {self.dest}: writer is already closed")
        where = f"dataset {self.dest}, window {len(self._rows)}"
        names_t = tuple(names)
        if self._names is None:
            self._names = names_t
        elif names_t != self._names:
            extra = [n for n in names_t if n not in self._names]
            missing = [n for n in self._names if n not in names_t]
            detail = (f"missing {_few(missing)}" if missing else "") + \
                     ("; " if missing and extra else "") + \
                     (f"unexpected {_few(extra)}" if extra else "")
            raise DatasetError(f"{where}: feature names differ from the first window's "
                               f"({detail or 'same names in a different order'})")
        row = np.asarray(features_row, dtype=np.float64).reshape(-1)
        if row.shape[0] != len(names_t):
            raise DatasetError(f"{where}: {row.shape[0]} values for {len(names_t)} names")
        if not np.all(np.isfinite(row)):
            bad = [names_t[i] for i in np.nonzero(~np.isfinite(row))[0]]
            raise DatasetError(f"{where}: non-finite value(s) in {_few(bad)}")
        ws, we = float(window_start), float(window_end)
        if not (math.isfinite(ws) and math.isfinite(we) and we >= ws):
            raise DatasetError(f"{where}: bad window times ({ws}, {we})")
        if self._start and ws < self._start[-1]:
            raise DatasetError(f"{where}: starts at {ws}, before the previous window "
                               f"({self._start[-1]})")
        if label is not None and not self._label and self._rows:
            raise DatasetError(f"{where}: label given, but earlier windows had none")
        if label is None and self._label:
            raise DatasetError(f"{where}: no label, but earlier windows had one")
        self._rows.append(row)
        self._start.append(ws)
        self._end.append(we)
        self._mode.append(str(mode))
        if label is not None:
            self._label.append(int(label))

    def close(self, *, now: datetime | None = None) -> Path:
        """Write the collected windows; DatasetError if there are none."""
        if self._closed:
            raise DatasetError(f"dataset {self.dest}: writer is already closed")
        if not self._rows or self._names is None:
            raise DatasetError(f"dataset {self.dest}: no windows were captured")
        self._closed = True
        return write_dataset(
            self.dest, np.vstack(self._rows), self._names, np.asarray(self._start),
            np.asarray(self._end), self._mode, asset=self.asset,
            label=np.asarray(self._label, dtype=np.int8) if self._label else None,
            window=self.window, units=self.units, extra=self.extra, overwrite=self.overwrite,
            now=now)
