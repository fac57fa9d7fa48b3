"""The garbage collector and the daemon's long-lived heap."""

from __future__ import annotations

import gc

# The young generation's collection threshold while the daemon runs (CPython's default
# is 700 net allocations of tracked objects). A tick at 200 assets makes a few thousand
# short-lived objects (windows, blocks, messages) and frees nearly all of them by
# reference counting before the tick ends; at 700 a collection comes several times a
# tick and walks the tick's objects still in flight (then again as the next
# generation's). At 20,000 it comes about once in ten such ticks, at the price of
# holding up to that many objects of cyclic garbage a little longer (kilobytes).
# Measured: ~2 us of a ~30 us window went to the collector at 700 (tick with
# `gc.callbacks` timing, the pipeline bench's fleet, 2026-12-04). Common practice for
# allocation-heavy services, no source.
YOUNG_THRESHOLD = 20_000


def freeze_heap() -> None:
    """Move everything alive now (config, runtimes, model sessions, imported modules)
    out of the cyclic garbage collector's reach (`gc.freeze`, which walks nothing): a
    full collection then walks only what was made since, instead of every object of
    the process. Without it the pipeline bench slows by a fifth to a third as full
    collections come round. `watchkeep run` calls it once the daemon has started (not
    `Daemon.start`: a process running many daemons, a test run, would keep its old
    cycles forever); a reload undoes it (`thaw_heap`) so the replaced runtimes can be
    collected. It also raises the young generation's threshold (`YOUNG_THRESHOLD`)."""
    gc.freeze()
    young, older, oldest = gc.get_threshold()
    gc.set_threshold(max(YOUNG_THRESHOLD, young), older, oldest)


def thaw_heap() -> None:
    """Give the collector back everything `freeze_heap` hid (after a reload replaced
    runtimes; from then on full collections walk the whole heap again)."""
    gc.unfreeze()
