"""How `watchkeep train` divides a recording's windows: the asset's mode, the last
windows in time for calibration (forward validation), and seeded splits of whole blocks
of consecutive windows (so near-duplicate neighbours do not straddle the parts)."""

from __future__ import annotations

import numpy as np

from agent.commission.coverage import WindowGeometry
from agent.commission.dataset import Dataset
from agent.commission.tail import MIN_FORWARD_WINDOWS
from agent.errors import DatasetError

SPLIT_BLOCK = 10


def forward_windows(n: int, calib_fraction: float, geometry: WindowGeometry) -> int:
    """How many of the last windows calibrate (forward validation); DatasetError when the
    recording cannot give the minimum (see tail.MIN_FORWARD_WINDOWS)."""
    if not 0 < calib_fraction < 1:
        raise ValueError("calib_fraction must be in (0, 1)")
    need = MIN_FORWARD_WINDOWS * geometry.per_length
    n_cal = max(round(calib_fraction * n), need)
    if n - n_cal < need:
        raise DatasetError(
            f"{n} window(s) cannot give both a fit and a forward calibration: the threshold "
            f"needs the last {need} windows ({MIN_FORWARD_WINDOWS} independent windows of "
            f"{geometry.length_s:g} s at a hop of {geometry.hop_s:g} s) and the fit at least "
            f"as many before them; record for at least "
            f"{2 * MIN_FORWARD_WINDOWS * geometry.length_s:g} s")
    return int(n_cal)


def split_early(n: int, val_fraction: float, *, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """(train, val) indices of the first `n` windows, a seeded split of whole blocks
    (validation only decides early stopping, so it may interleave with the fit)."""
    if not 0 < val_fraction < 1:
        raise ValueError("val_fraction must be in (0, 1)")
    n_blocks = max(2, -(-n // SPLIT_BLOCK))
    blocks = np.minimum(np.arange(n) * n_blocks // max(n, 1), n_blocks - 1)
    order = np.random.default_rng([seed, 0x5A17]).permutation(n_blocks)
    val_b = order[: max(1, round(val_fraction * n_blocks))]
    is_val = np.isin(blocks, val_b)
    idx = np.arange(n)
    return idx[~is_val], idx[is_val]


def split_blocks(n: int, val_fraction: float, calib_fraction: float, *, seed: int,
                 block: int = SPLIT_BLOCK) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Indices (train, val, calib), each sorted, from a seeded split of whole blocks."""
    if not (0 < val_fraction < 1 and 0 < calib_fraction < 1 and val_fraction + calib_fraction < 1):
        raise ValueError("val_fraction and calib_fraction must be in (0, 1) and sum below 1")
    n_blocks = max(3, -(-n // block))
    block = -(-n // n_blocks)
    blocks = np.arange(n) // block
    n_blocks = int(blocks.max()) + 1
    order = np.random.default_rng([seed, 0x5A17]).permutation(n_blocks)
    n_cal = max(1, round(calib_fraction * n_blocks))
    n_val = max(1, round(val_fraction * n_blocks))
    cal_b, val_b = order[:n_cal], order[n_cal:n_cal + n_val]
    idx = np.arange(n)
    calib = idx[np.isin(blocks, cal_b)]
    val = idx[np.isin(blocks, val_b)]
    train = idx[~np.isin(blocks, np.concatenate([cal_b, val_b]))]
    return train, val, calib


def select_windows(ds: Dataset, *, asset: str | None, mode: str | None) -> tuple[Dataset, str]:
    """The dataset's windows for `asset` / `mode`, and the mode chosen."""
    if asset is not None and ds.asset and asset != ds.asset:
        raise DatasetError(f"dataset {ds.path} is for asset {ds.asset!r}, not {asset!r}")
    modes = ds.modes
    if mode is None:
        if len(modes) != 1:
            raise DatasetError(f"dataset {ds.path} has modes {list(modes)}: choose one "
                               "(--mode); each mode gets its own bundle")
        return ds, modes[0]
    if mode not in modes:
        raise DatasetError(f"dataset {ds.path} has no windows in mode {mode!r} "
                           f"(its modes: {list(modes)})")
    return ds.select(ds.mode == mode), mode
