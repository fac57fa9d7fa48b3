"""The garbage collector and the daemon's long-lived heap."""

from __future__ import annotations

import gc


def freeze_heap() -> None:
    """Move everything alive now (config, runtimes, model sessions, imported modules)
    out of the cyclic garbage collector's reach (`gc.freeze`, which walks nothing): a
    full collection then walks only what was made since, instead of every object of
    the process. Without it the pipeline bench slows by a fifth to a third as full
    collections come round. `watchkeep run` calls it once the daemon has started (not
    `Daemon.start`: a process running many daemons, a test run, would keep its old
    cycles forever); a reload undoes it (`thaw_heap`) so the replaced runtimes can be
    collected."""
    gc.freeze()


def thaw_heap() -> None:
    """Give the collector back everything `freeze_heap` hid (after a reload replaced
    runtimes; from then on full collections walk the whole heap again)."""
    gc.unfreeze()
