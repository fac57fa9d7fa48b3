"""Where the running assets' models sit in the model store, and what a request may do
with them: the checks behind `rebaseline` and `rollback` (agent/learning/manager.py).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from agent.config.rebaseline import MAX_WINDOWS, RebaselineConfig
from agent.learning.ports import RunningAssets
from agent.learning.rebaseline import MIN_NEW_WINDOWS, RebaselineError
from agent.models.bundle import Bundle, load_bundle
from agent.models.store import ModelStore, read_rehearsal

UNKNOWN_MODES = ("unknown", "")


class Slots:
    """The running assets (`assets`) against the model store of the `rebaseline:` section
    now in force (`settings`). Each check raises `RebaselineError` with the reason."""

    def __init__(self, assets: RunningAssets, settings: Callable[[], RebaselineConfig]
                 ) -> None:
        self.assets = assets
        self.settings = settings

    @property
    def cfg(self) -> RebaselineConfig:
        return self.settings()

    @property
    def store(self) -> ModelStore:
        return ModelStore(self.cfg.models_dir, self.cfg.versions_kept)

    def known(self, asset: str) -> None:
        """The asset runs (raises otherwise)."""
        if not self.assets.has(asset):
            raise RebaselineError(f"no asset {asset!r} in the running config")

    def mode(self, asset: str, mode: Any) -> str:
        """The mode a request names, else the asset's mode now (an asset without modes is
        always in "default")."""
        if mode:
            return str(mode)
        now = self.assets.mode_now(asset)
        if now in UNKNOWN_MODES:
            raise RebaselineError(f"asset {asset} is in no known mode now; name one "
                                  "(--mode)")
        return now

    def target(self, n: Any) -> int:
        """The windows a request asks for (`rebaseline.windows` when it names none)."""
        target = self.cfg.windows if n is None else n
        if isinstance(target, bool) or not isinstance(target, int) or \
                not MIN_NEW_WINDOWS <= target <= MAX_WINDOWS:
            raise RebaselineError(f"windows must be an integer from {MIN_NEW_WINDOWS} "
                                  f"to {MAX_WINDOWS}, got {str(target)[:40]}")
        return target

    def slot(self, asset: str, mode: str) -> tuple[Bundle, str]:
        """The bundle serving `mode` and its slot in the model store."""
        bundle = self.assets.serving(asset, mode)
        if bundle is None:
            raise RebaselineError(f"asset {asset} has no model for mode {mode!r}: "
                                  "commission it first (record, train)")
        where = self.store.locate(bundle.path)
        if where is None or where[0] != asset:
            raise RebaselineError(
                f"asset {asset}: its bundle {bundle.path} is not in the model store "
                f"{self.cfg.models_dir}; adopt it (watchkeep models --asset {asset} "
                f"--adopt {bundle.path} --dataset DATASET) and point `bundle:` at the "
                "printed active link")
        return bundle, where[1]

    def base(self, asset: str, mode: str) -> tuple[Bundle, str, int]:
        """The running bundle of `mode`, its store slot and version, if it can be
        re-learned: the store's active version, with a rehearsal set."""
        bundle, slot_mode = self.slot(asset, mode)
        store = self.store
        active = store.active_version(asset, slot_mode)
        if active is None or active != bundle.meta.version:
            raise RebaselineError(f"the running model is v{bundle.meta.version} but the "
                                  f"store's active version is v{active}: reload first")
        if read_rehearsal(store.version_path(asset, slot_mode, active)) is None:
            raise RebaselineError(f"v{active} of {asset}/{slot_mode} has no rehearsal set, "
                                  "so a rebaseline could forget other conditions; adopt "
                                  "the bundle with its training dataset (--dataset)")
        return bundle, slot_mode, active

    def rollback_target(self, asset: str, slot_mode: str, to: Any) -> tuple[int, int | None]:
        """The version a rollback goes to (`to`, else the one before the active one), and
        the active one."""
        store = self.store
        active = store.active_version(asset, slot_mode)
        versions = store.versions(asset, slot_mode)
        if to is None:
            older = [v for v in versions if active is not None and v < active]
            if not older:
                raise RebaselineError(f"{asset}/{slot_mode} has no version before v{active}")
            target = older[-1]
        else:
            target = int(str(to).lstrip("v"))
            if target not in versions:
                raise RebaselineError(f"{asset}/{slot_mode} has no v{target} (kept: "
                                      f"{', '.join(f'v{v}' for v in versions)})")
        if target == active:
            raise RebaselineError(f"v{target} is already active")
        return target, active

    def load_active(self, asset: str, slot_mode: str) -> Bundle:
        """The store's active version of a slot, loaded and checked against the asset."""
        bundle = load_bundle(self.store.active_link(asset, slot_mode))
        why = self.assets.fits(asset, bundle)
        if why:
            raise RebaselineError(why)
        return bundle
