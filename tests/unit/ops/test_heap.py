"""freeze_heap: the collector as the running daemon has it."""

from __future__ import annotations

import gc

from agent.ops.heap import YOUNG_THRESHOLD, freeze_heap, thaw_heap


def test_freeze_heap_raises_the_young_threshold_and_keeps_the_others() -> None:
    before = gc.get_threshold()
    try:
        gc.set_threshold(700, 10, 10)
        freeze_heap()
        assert gc.get_threshold() == (YOUNG_THRESHOLD, 10, 10)
        assert gc.get_freeze_count() > 0
        gc.set_threshold(10 * YOUNG_THRESHOLD, 10, 10)  # a higher one set by hand stays
        freeze_heap()
        assert gc.get_threshold()[0] == 10 * YOUNG_THRESHOLD
    finally:
        thaw_heap()
        gc.set_threshold(*before)
