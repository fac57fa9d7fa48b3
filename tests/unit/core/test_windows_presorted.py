"""`presorted=True` (a chunk promised in time order) cuts the same windows as the checks."""

from __future__ import annotations

import itertools

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.config.load import WindowConfig
from agent.core.windows.assembler import WindowAssembler


def _cut(chunks: list[np.ndarray], presorted: bool) -> list[tuple[float, tuple[float, ...]]]:
    asm = WindowAssembler(WindowConfig(length_s=1.0, hop_s=1.0, lateness_s=0.0,
                                       timeout_s=5.0, min_coverage=0.1), (10.0,))
    out = []
    for ch in chunks:
        asm.add(0, ch, ch * 2.0, float(ch[-1]), presorted=presorted)
        out += [(w.start, tuple(w.values[0])) for w in asm.close_due(float(ch[-1])).windows]
    out += [(w.start, tuple(w.values[0])) for w in asm.close_due(1e9).windows]
    return out


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(1, 15), min_size=1, max_size=12), st.booleans())
def test_presorted_chunks_give_the_same_windows(sizes: list[int], swap: bool) -> None:
    """In-order chunks (and one pair of sorted chunks swapped) give identical windows."""
    t = np.round(np.arange(sum(sizes)) / 10.0 + 100.0, 6)
    edges = np.cumsum([0, *sizes])
    chunks = [t[a:b] for a, b in itertools.pairwise(edges)]
    if swap and len(chunks) > 2:
        chunks[1], chunks[2] = chunks[2], chunks[1]  # each sorted, not in order with the last
    assert _cut(chunks, presorted=True) == _cut(chunks, presorted=False)
