"""The aligned paths of a tick over a fleet of alike full-featured assets (every check,
two rate groups, spectra on a waveform channel: `tests/bench/full_fleet.py`), held to
the general paths they shortcut:

* `HealthBatch._gather_aligned` (every question put to all windows at once) against
  the walk through every window (`_gather` with the shortcut off): the same messages,
  sequences and status over ticks with range faults, flatlines, limits and mode
  changes;
* the feature rows of an aligned tick with spectra (each spectral channel's rows of
  the cut matrix straight to `spectral_rows`; the rows' extremes taken from sensor
  health) against the general path, bit for bit.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest

from agent.pipeline import featurize
from agent.pipeline.health_batch import HealthBatch
from tests.bench.full_fleet import Fleet
from tests.helpers import rows_both_ways

N_ASSETS = 5
TICKS = 16


class _Rec:
    """Every tick's messages (topic, payload) and sequence numbers."""

    def __init__(self) -> None:
        self.ticks: list[Any] = []

    def submit(self, msgs: Any, sequences: Any = None) -> None:
        self.ticks.append(([(m.topic, m.payload) for m in msgs], sequences))


def _run(tmp: Path, monkeypatch: pytest.MonkeyPatch, *, aligned: bool
         ) -> tuple[list[Any], Any, int]:
    """The fleet over TICKS windows: asset 1's vibration spiking within range (limits)
    and once out of it (a range fault), asset 2's current flat (a flatline), asset 3's
    speed crossing into the high mode and back. Returns the messages, the status and
    how many ticks the aligned gather served."""
    served = [0]
    real = HealthBatch._gather_aligned

    def gather(self: HealthBatch, *args: Any) -> Any:
        got = real(self, *args) if aligned else None
        served[0] += got is not None
        return got

    monkeypatch.setattr(HealthBatch, "_gather_aligned", gather)
    f = Fleet(tmp, seed=4, n_assets=N_ASSETS)
    rec = _Rec()
    f.pipe.sink = rec
    rng = np.random.default_rng(9)
    for k in range(TICKS):
        vib = rng.normal(size=f.vib.shape)
        slow = f.slow + rng.normal(size=f.slow.shape)
        if k in (2, 3, 12, 13):
            vib[1, 100] = 400.0  # within range: kurtosis past its alarm (2 windows on)
        if k == 9:
            vib[1, 200] = 900.0  # out of range: a sensor fault
        if 5 <= k < 11:
            slow[2, 2] = 20.0  # current flat
        if 6 <= k < 10:
            slow[3, 1] = 2000.0 + rng.normal(size=slow.shape[2])  # the high mode
        for ai, chans in enumerate(f.buffers.by_asset):
            chans[0].append_block(k + f.t_vib, vib[ai], k + 1.0)
            for ci in range(3):
                chans[1 + ci].append_block(k + f.t_slow, slow[ai, ci], k + 1.0)
        f.pipe.tick(k + 1.0)
    monkeypatch.setattr(HealthBatch, "_gather_aligned", real)
    return rec.ticks, f.pipe.status(), served[0]


def test_aligned_gather_judges_as_the_walk_through_every_window(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    got, got_status, served = _run(tmp_path / "a", monkeypatch, aligned=True)
    want, want_status, none = _run(tmp_path / "b", monkeypatch, aligned=False)
    assert got == want
    assert got_status == want_status
    assert none == 0 and served >= TICKS - 3  # the first windows are laid out apart
    payloads = [p for msgs, _ in want for _, p in msgs]
    for kind in (b"sensor.fault", b"sensor.recovered", b"limit.exceeded"):
        assert any(kind in p for p in payloads), kind
    assert any(b'"mode":"high"' in p for p in payloads)


def test_aligned_rows_with_spectra_are_the_general_paths(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Every aligned tick's rows, spectral features included, bit for bit."""
    seen: list[Any] = []
    real = featurize._aligned
    monkeypatch.setattr(featurize, "_aligned",
                        lambda todo: seen.append(list(todo)) or real(todo))
    f = Fleet(tmp_path, seed=5, n_assets=N_ASSETS)
    for _ in range(5):
        f.feed()
        f.pipe.tick(f.k + 1.0)
    monkeypatch.setattr(featurize, "_aligned", real)
    taken = 0
    for todo in seen:
        got, al = rows_both_ways(todo, monkeypatch)
        taken += al is not None
        if al is not None:  # with sensor health's row extremes (as the tick hands them)
            ext = {id(b): (b, b.min(axis=1), b.max(axis=1)) for b in al.bases}
            shared = featurize.feature_rows(todo, None, ext)
            assert isinstance(got, np.ndarray) and isinstance(shared, np.ndarray)
            assert shared.tobytes() == got.tobytes()
    assert taken >= 3


def test_quiet_windows_state_messages_carry_every_field(tmp_path: Path) -> None:
    """The quiet window's state message (made as the named tuple it is, field by field
    in `Emitter.scored`) is an `OutMessage` whose typed fields say what its payload
    says, as the first state message of each asset (made by the constructor) does."""
    import orjson

    from agent.pipeline.messages import Kind, OutMessage

    f = Fleet(tmp_path, seed=6, n_assets=N_ASSETS)
    rec: list[Any] = []
    f.pipe.sink = type("S", (), {"submit": lambda self, msgs, sequences=None:
                                 rec.extend(msgs)})()
    for _ in range(6):
        f.feed()
        f.pipe.tick(f.k + 1.0)
    states = [m for m in rec if m.kind is Kind.STATE]
    assert len(states) >= 4 * N_ASSETS
    for m in states:
        doc = orjson.loads(m.payload)
        assert type(m) is OutMessage and len(m) == len(OutMessage._fields)
        assert (m.qos, m.retain, m.key, m.event, m.event_id) == (1, True, m.topic, None, None)
        assert m.asset is not None and f"/assets/{m.asset}/" in m.topic
        assert (m.score, m.threshold) == (doc["score"], doc["threshold"])
