"""The tick's shortcuts are the long way exactly: `round_to` is `round`, the rendered
state payload is orjson's bytes of the state document, and a quiet window through
`Detector.quiet` / `EscalationTracker.observe_quiet` leaves what `step` / `observe` do."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import orjson
from hypothesis import example, given, settings
from hypothesis import strategies as st

from agent.core.detector import Detector, DetectorParams, State
from agent.core.escalation import EscalationTracker
from agent.core.events import rfc3339, severity_for
from agent.pipeline.emit import ratio, to_json
from agent.pipeline.messages import StatePayload, dumps_each, round_many, round_scaled, round_to


def same(a: float, b: float) -> bool:
    """The same float: equal with the same sign, or both NaN."""
    return (math.isnan(a) and math.isnan(b)) or (a == b and math.copysign(1, a)
                                                   == math.copysign(1, b))


def halfway(ndigits: int) -> st.SearchStrategy[float]:
    """Floats at and next to the ties of rounding at `ndigits` decimals."""
    n = st.integers(min_value=-(10**12), max_value=10**12)
    return st.builds(lambda k, step: math.nextafter((k + 0.5) / 10**ndigits,
                                                    math.inf if step > 0 else -math.inf)
                     if step else (k + 0.5) / 10**ndigits, n, st.integers(-1, 1))


@settings(max_examples=1500, deadline=None)
@given(x=st.floats() | halfway(6) | halfway(3), ndigits=st.sampled_from([3, 6]))
@example(x=0.0, ndigits=6).via("zero")
@example(x=-0.0, ndigits=6).via("negative zero")
@example(x=2.5e-7, ndigits=6).via("a tie below the last digit")
@example(x=4.4e9, ndigits=6).via("past 2**52 once scaled")
@example(x=1e308, ndigits=3).via("overflows once scaled")
def test_round_to_is_round(x: float, ndigits: int) -> None:
    """The same float as `round(x, ndigits)`, ties, signs, NaN and infinities too."""
    assert same(round_to(x, ndigits), round(x, ndigits))


names = st.text(max_size=12)
scores = st.floats(min_value=0.0, allow_infinity=False) | st.floats(allow_nan=False,
                                                                       allow_infinity=False)
thresholds = st.floats(allow_nan=False, allow_infinity=False) | st.integers(-5, 5)
events = st.none() | st.fixed_dictionaries({"type": names, "id": names, "time": names})
models = st.fixed_dictionaries({"id": names, "version": st.integers(0, 10**6)})


@settings(max_examples=600, deadline=None)
@given(name=names, state=st.sampled_from(list(State)), mode=names, threshold=thresholds,
       model=models, last_event=events, score=scores,
       end=st.floats(min_value=0, max_value=4e9))
def test_state_payload_is_orjsons_bytes(name: str, state: State, mode: str,
                                        threshold: float, model: dict[str, Any],
                                        last_event: dict[str, Any] | None, score: float,
                                        end: float) -> None:
    """`StatePayload.render` as the emitter calls it, byte for byte `to_json` of the
    state document as the emitter built it before."""
    doc = {"asset": name, "state": state, "mode": mode, "score": round(score, 6),
           "score_ratio": ratio(score, threshold), "threshold": threshold,
           "window_end": rfc3339(end), "model": model, "last_event": last_event}
    tpl = StatePayload(name, state, mode, threshold, model, last_event)
    assert tpl.ok
    assert tpl.fits(state, mode, threshold, model, last_event)
    got = tpl.render(to_json(round_to(score, 6)),
                     to_json(round_to(score / threshold, 3)) if threshold > 0 else b"null",
                     to_json(rfc3339(end)))
    assert got == to_json(doc)


def test_a_payload_fits_only_what_it_was_rendered_for() -> None:
    """Another state, mode, threshold object, model or last event: rendered again."""
    model, event = {"id": "m", "version": 1}, {"type": "t", "id": "i", "time": "x"}
    thr = 2.5
    tpl = StatePayload("a", State.NORMAL, "run", thr, model, event)
    assert tpl.fits(State.NORMAL, "run", thr, model, event)
    assert not tpl.fits(State.ANOMALOUS, "run", thr, model, event)
    assert not tpl.fits(State.NORMAL, "idle", thr, model, event)
    assert not tpl.fits(State.NORMAL, "run", float("2.50"), model, event)
    assert not tpl.fits(State.NORMAL, "run", thr, dict(model), event)
    assert not tpl.fits(State.NORMAL, "run", thr, model, dict(event))


def test_a_payload_orjson_cannot_write_is_not_used() -> None:
    """A model reference orjson refuses: `ok` is False (the emitter writes the whole
    document through the json module instead)."""
    assert not StatePayload("a", State.NORMAL, "m", 1.0, {"id": {1, 2}}, None).ok


@settings(max_examples=400, deadline=None)
@given(levels=st.lists(st.sampled_from([0.1, 0.9, 1.5, 3.0, 6.0]), max_size=60),
       k=st.integers(1, 3), extra=st.integers(0, 3), m=st.integers(1, 3),
       stride=st.integers(1, 3))
def test_quiet_windows_leave_what_step_and_observe_leave(levels: list[float], k: int,
                                                         extra: int, m: int,
                                                         stride: int) -> None:
    """Windows under the threshold while NORMAL through `quiet` / `observe_quiet`, the
    rest through `step` / `observe`: the same transitions, escalations and history as
    every window through `step` / `observe`."""
    _quiet_against_step(levels, k, extra, m, stride, skip_settled=False)


@settings(max_examples=400, deadline=None)
@given(levels=st.lists(st.sampled_from([0.1, 0.9, 1.5, 3.0, 6.0]), max_size=60),
       k=st.integers(1, 3), extra=st.integers(0, 3), m=st.integers(1, 3),
       stride=st.integers(1, 3))
def test_quiet_steps_left_out_once_settled_leave_what_step_and_observe_leave(
        levels: list[float], k: int, extra: int, m: int, stride: int) -> None:
    """As the emitter does: `quiet` / `observe_quiet` not called while `settled`, the
    rest through `step` / `observe`: the same transitions, escalations and history as
    every window through `step` / `observe`."""
    _quiet_against_step(levels, k, extra, m, stride, skip_settled=True)


def _quiet_against_step(levels: list[float], k: int, extra: int, m: int, stride: int, *,
                        skip_settled: bool) -> None:
    """One detector and escalation tracker fed every window through `step` / `observe`,
    the other the quiet ones through `quiet` / `observe_quiet` (left out while settled
    when `skip_settled`): after every window both say and hold the same."""
    thr, clear = 1.0, 0.8
    params = DetectorParams(k, k + extra, m, stride)
    dets = Detector(params), Detector(params)
    escs = (EscalationTracker(k, k + extra, stride), EscalationTracker(k, k + extra, stride))
    for score in levels:
        seen = []
        for quick, det, esc in zip((False, True), dets, escs, strict=True):
            if quick and det.state is State.NORMAL and not score > thr:
                if not (skip_settled and det.settled):
                    det.quiet()
                if not (skip_settled and esc.settled):
                    esc.observe_quiet()
                tr = None
            else:
                tr = det.step(score, thr, clear)
                esc.observe(severity_for(score, thr), frozenset())
            if tr is not None:
                got: Any = esc.start(frozenset()) if det.state is State.ANOMALOUS else esc.stop()
            else:
                got = esc.step() if det.state is State.ANOMALOUS else None
            seen.append((tr, got, det.state, det._n_above, list(det._recent),
                         det.peak_score, list(esc._recent), esc.severity))
        assert seen[0] == seen[1]


def test_settled_means_a_quiet_step_changes_nothing() -> None:
    """`settled` turns on once the history is all quiet, off at any other step."""
    det, esc = Detector(DetectorParams(2, 3, 2, 2)), EscalationTracker(2, 3, 2)
    for _ in range(5):  # a span of (3 - 1) * 2 + 1 windows
        assert not det.settled and not esc.settled
        det.quiet()
        esc.observe_quiet()
    assert det.settled and esc.settled
    before = (list(det._recent), det._n_above, list(esc._recent))
    det.quiet()
    esc.observe_quiet()
    assert (list(det._recent), det._n_above, list(esc._recent)) == before
    det.step(0.1, 1.0, 0.8)
    esc.observe(severity_for(0.1, 1.0), frozenset())
    assert not det.settled and not esc.settled
    det.reset()
    assert not det.settled


@settings(max_examples=500, deadline=None)
@given(xs=st.lists(st.floats() | halfway(6) | halfway(3), max_size=40),
       digits=st.lists(st.sampled_from([3, 6]), min_size=40, max_size=40))
def test_round_many_is_round_of_each(xs: list[float], digits: list[int]) -> None:
    """`round_many` of an array, one digit count for all or one per element: the same
    floats as `round` of each."""
    x = np.array(xs, dtype=np.float64)
    nd = digits[:len(xs)]
    assert all(same(a, round(v, n)) for a, v, n in zip(round_many(x, np.array(nd, np.int64)),
                                                         xs, nd, strict=True))
    assert all(same(a, round(v, 6)) for a, v in zip(round_many(x, 6), xs, strict=True))


@settings(max_examples=300, deadline=None)
@given(xs=st.lists(st.none() | st.floats() | halfway(6), max_size=30))
def test_dumps_each_is_orjson_of_each(xs: list[float | None]) -> None:
    """One orjson call split up: each value's bytes as orjson writes it alone."""
    assert dumps_each(xs) == [orjson.dumps(v) for v in xs]


def test_a_percent_sign_in_the_fixed_parts_is_written_as_it_is() -> None:
    """The payload's format escapes `%` in the name, mode and model."""
    model = {"id": "m%s%b%%", "version": 1}
    tpl = StatePayload("a%d", State.NORMAL, "run%", 1.5, model, None)
    doc = {"asset": "a%d", "state": State.NORMAL, "mode": "run%", "score": 0.5,
           "score_ratio": 0.333, "threshold": 1.5, "window_end": "t", "model": model,
           "last_event": None}
    assert tpl.render(b"0.5", b"0.333", b'"t"') == to_json(doc)


@settings(max_examples=300)
@given(st.lists(st.one_of(st.floats(allow_nan=True, allow_infinity=True),
                          st.floats(0, 1e4), st.integers(0, 10**7).map(lambda k: k / 2e6)),
                min_size=1, max_size=40))
def test_round_scaled_is_round_to_its_digits(xs: list[float]) -> None:
    """`round_scaled` (what the emitter rounds a tick's scores and ratios with: each
    element's 10**digits given) is `round` of each, half-way cases included."""
    x = np.asarray(xs * 2, dtype=np.float64)
    scale = np.repeat([1e6, 1e3], len(xs))
    want = [round(v, 6) for v in xs] + [round(v, 3) for v in xs]
    got = round_scaled(x, scale)
    assert all((a == b and math.copysign(1, a) == math.copysign(1, b)) or (a != a and b != b)
               for a, b in zip(got, want, strict=True))
