"""`evaluate`: metrics, labels, injected faults, the report files."""

from __future__ import annotations

import argparse
import io
import json
import sys
from pathlib import Path

import numpy as np
import pytest

from agent.commission.dataset import read_dataset, write_dataset
from agent.commission.evaluate import add_evaluate_arguments, cmd_evaluate, evaluate
from agent.commission.inject import FaultKind, InjectSpec, inject, parse_inject
from agent.commission.judging import judge, roc_auc, union_duration_s
from agent.commission.report import REPORT_JSON, REPORT_PNG, write_report
from agent.commission.train import train_bundle
from agent.commission.truth import (
    FaultSpan,
    TruthEvent,
    load_labels,
    truth_from_runs,
    truth_from_spans,
)
from agent.core.detector import DetectorParams
from agent.errors import DatasetError
from agent.models.bundle import load_bundle

F = 40
NAMES = [f"ch{i // 5}.f{i % 5}" for i in range(F)]
T0 = 1.75e9


def _windows(n: int, seed: int) -> np.ndarray:
    # Invented test data: 4 latent factors mixed nonlinearly into 40 features + 5 % noise;
    # the mixing matrix is fixed so every call describes the same "machine".
    mix = np.random.default_rng(1234).normal(size=(4, F))
    rng = np.random.default_rng(seed)
    lat = rng.normal(size=(n, 4))
    return 10.0 + 3.0 * (np.tanh(lat @ mix / 2.0) + 0.05 * rng.normal(size=(n, F)))


# --- metrics ---------------------------------------------------------------------------

@pytest.mark.parametrize(("scores", "labels", "auc"), [
    ([0.1, 0.2, 0.8, 0.9], [0, 0, 1, 1], 1.0),
    ([0.9, 0.8, 0.2, 0.1], [0, 0, 1, 1], 0.0),
    ([0.5, 0.5, 0.5, 0.5], [0, 1, 0, 1], 0.5),
    ([0.1, 0.4, 0.35, 0.8], [0, 0, 1, 1], 0.75),  # the usual textbook example
])
def test_roc_auc_small_cases(scores, labels, auc: float) -> None:
    """Hand-checkable AUCs, ties counting one half."""
    assert roc_auc(np.asarray(scores), np.asarray(labels, bool)) == pytest.approx(auc)


def test_roc_auc_one_class_is_nan() -> None:
    """No positives (or no negatives) has no AUC."""
    assert np.isnan(roc_auc(np.arange(3.0), np.zeros(3, bool)))


@pytest.mark.parametrize(("start", "end", "total"), [
    ([0, 10, 20], [10, 20, 30], 30.0),   # tumbling
    ([0, 5, 10], [10, 15, 20], 20.0),    # hopping: overlaps count once
    ([0, 100], [10, 110], 20.0),         # a gap
    ([], [], 0.0),
])
def test_union_duration(start, end, total: float) -> None:
    """Normal time is the union of the windows' intervals."""
    assert union_duration_s(np.asarray(start, float), np.asarray(end, float)) == total


def test_truth_from_spans_overlap() -> None:
    """A window is faulty when it overlaps a span of its asset; other assets are ignored."""
    ws = np.arange(0.0, 100.0, 10.0)
    spans = [FaultSpan("P-101", "imbalance", 25.0, 41.0),
             FaultSpan("F-201", "bearing", 0.0, 100.0)]
    kinds, events = truth_from_spans(ws, ws + 10.0, spans, "P-101")
    assert list(np.nonzero(kinds != "")[0]) == [2, 3, 4]
    assert events == [TruthEvent("imbalance", "machine", 25.0, 2, 4)]


def test_truth_from_runs() -> None:
    """A label array's runs become events."""
    kinds = np.asarray(["", "a", "a", "", "b", "b", "a"], object)
    ev = truth_from_runs(np.arange(7.0), kinds)
    assert [(e.kind, e.first, e.last) for e in ev] == [("a", 1, 2), ("b", 4, 5), ("a", 6, 6)]


def test_judge_detection_delay_and_false_alarms() -> None:
    """Delay counts from onset to the raising window's end; lone normal raises are false."""
    # threshold 1, clear 0.5, raise 2 of 3, clear after 2
    scores = np.asarray([0, 2, 2, 0, 0, 0, 0, 0, 2, 0, 2, 2, 2, 0, 0, 0], float)
    kinds = np.asarray([""] * 9 + ["f"] * 4 + [""] * 3, object)
    ws = 100.0 + 10.0 * np.arange(16)
    events = [TruthEvent("f", "machine", float(ws[9]), 9, 12)]
    d = judge(scores, ws, ws + 10.0, kinds, events, 1.0, 0.5, DetectorParams(2, 3, 2))
    # raise at 2 (windows 0-2 normal -> false alarm), clear at 4; raise at 10 (evidence
    # holds fault window 9..10 -> not false), so the event is detected at window 10
    assert d.false_alarms == 1 and d.raises == 2
    assert d.events[0].detected and d.events[0].delay_windows == 1
    assert d.events[0].delay_s == pytest.approx(20.0)
    assert d.normal_s == pytest.approx(120.0)
    assert d.false_alarms_per_day == pytest.approx(1 / (120.0 / 86400.0))


def test_judge_missed_event() -> None:
    """An event the detector never sees as anomalous is missed."""
    scores = np.asarray([0, 0, 2, 0, 0], float)
    kinds = np.asarray(["", "", "f", "", ""], object)
    ws = np.arange(5.0)
    d = judge(scores, ws, ws + 1, kinds, [TruthEvent("f", "machine", 2.0, 2, 2)], 1.0, 0.5,
              DetectorParams(2, 3, 3))
    assert not d.events[0].detected and d.detection_rate == 0.0 and d.false_alarms == 0


# --- labels file ---------------------------------------------------------------------

def test_load_labels(tmp_path: Path) -> None:
    """The simulator's label list loads into spans."""
    p = tmp_path / "labels.json"
    p.write_text(json.dumps([{"asset": "P-101", "kind": "imbalance", "start": 10, "end": 20,
                              "class": "machine"},
                             {"asset": "P-101", "kind": "stuck", "start": 30, "end": 40,
                              "class": "sensor"}]))
    assert load_labels(p) == [FaultSpan("P-101", "imbalance", 10.0, 20.0, "machine"),
                              FaultSpan("P-101", "stuck", 30.0, 40.0, "sensor")]


def test_load_simulator_labels(tmp_path: Path) -> None:
    """The simulator's labels document ({"labels": [...]}, `fault_class`) loads too."""
    p = tmp_path / "labels.json"
    p.write_text(json.dumps({"schema_version": 1, "scenario": "demo", "labels": [
        {"asset": "C-301", "kind": "stuck", "fault_class": "sensor", "channel": "vib",
         "start": 150.0, "end": 210.0, "severity": None}]}))
    assert load_labels(p) == [FaultSpan("C-301", "stuck", 150.0, 210.0, "sensor")]


@pytest.mark.parametrize(("doc", "message"), [
    ('{"asset": "P-101"}', "expected a JSON list"),
    ('[{"asset": "P-101", "kind": "x", "start": 5}]', r"\[0\]: needs asset, kind, start, end"),
    ('[{"asset": "P-101", "kind": "x", "start": 5, "end": 4}]', r"\[0\]: end must be after"),
    ('[{"asset": "P-101", "kind": "x", "start": 1, "end": 4, "class": "other"}]',
     r"\[0\]\.class: expected 'machine' or 'sensor'"),
    ("[", "cannot be read as JSON"),
])
def test_bad_labels_refused(tmp_path: Path, doc: str, message: str) -> None:
    """A broken labels file is refused with the entry and the reason."""
    p = tmp_path / "labels.json"
    p.write_text(doc)
    with pytest.raises(DatasetError, match=message):
        load_labels(p)


# --- injection -------------------------------------------------------------------------

@pytest.mark.parametrize(("text", "spec"), [
    ("step", InjectSpec(FaultKind.STEP, 3.0, 30)),
    ("drift:4", InjectSpec(FaultKind.DRIFT, 4.0, 60)),
    ("noise-burst:2:10", InjectSpec(FaultKind.NOISE, 2.0, 10)),
    ("stuck_channel", InjectSpec(FaultKind.STUCK, 0.0, 30)),
    ("SPIKE::2", InjectSpec(FaultKind.SPIKE, 8.0, 2)),
])
def test_parse_inject(text: str, spec: InjectSpec) -> None:
    """KIND[:SIGMA[:WINDOWS]] with defaults per kind."""
    assert parse_inject(text) == spec


@pytest.mark.parametrize("text", ["wobble", "step:x", "step:1:0", "step:-1", "step:1:2:3"])
def test_parse_inject_refuses(text: str) -> None:
    """Unknown kinds and bad numbers are refused."""
    with pytest.raises(ValueError):
        parse_inject(text)


NAMES6 = ["a.mean", "a.rms", "b.mean", "b.rms", "c", "d.x"]


@pytest.mark.parametrize("kind", list(FaultKind))
def test_inject_touches_one_channel_inside_events(kind: FaultKind) -> None:
    """Each event changes only one channel's features and only inside the event."""
    rng = np.random.default_rng(0)
    x = rng.normal(size=(400, 6))
    sigma = np.full(6, 2.0)
    spec = InjectSpec(kind, 3.0, 1 if kind is FaultKind.SPIKE else 20)
    y, events = inject(x, sigma, NAMES6, spec, seed=1)
    assert len(events) == 400 // (spec.length + max(3 * spec.length, 30))
    inside = np.zeros(400, bool)
    for ev in events:
        inside[ev.first:ev.last + 1] = True
        cols = [i for i, n in enumerate(NAMES6) if n.split(".")[0] == ev.channel]
        other = [i for i in range(6) if i not in cols]
        seg = slice(ev.first, ev.last + 1)
        np.testing.assert_array_equal(y[seg][:, other], x[seg][:, other])
        delta = y[seg][:, cols] - x[seg][:, cols]
        if kind in (FaultKind.STEP, FaultKind.SPIKE):
            np.testing.assert_allclose(delta, 6.0)
        elif kind is FaultKind.DRIFT:
            np.testing.assert_allclose(delta[:, 0], 6.0 * np.arange(1, 21) / 20)
        elif kind is FaultKind.NOISE:
            assert np.all(delta != 0) and 3.0 < delta.std() < 9.0
        else:
            np.testing.assert_array_equal(y[seg][:, cols],
                                          np.broadcast_to(x[ev.first - 1, cols], delta.shape))
    np.testing.assert_array_equal(y[~inside], x[~inside])


def test_inject_too_few_windows() -> None:
    """There must be room for at least one event."""
    with pytest.raises(DatasetError, match="too few to inject step"):
        inject(np.zeros((5, 6)), np.ones(6), NAMES6, parse_inject("step"))


# --- evaluate end to end ---------------------------------------------------------------

@pytest.fixture(scope="module")
def setup(tmp_path_factory: pytest.TempPathFactory):
    d = tmp_path_factory.mktemp("evaluate")
    t = T0 + 10.0 * np.arange(1600)
    x = _windows(1600, 0)
    write_dataset(d / "train", x[:800], NAMES, t[:800], t[:800] + 10, ["run"] * 800,
                  asset="P-101")
    train_bundle(d / "train", d / "bundle", epochs=60)
    xe = x[800:].copy()
    xe[300:340, 10:15] += 5.0 * load_bundle(d / "bundle").meta.scaler_scale[10:15]
    label = np.zeros(800, np.int8)
    label[300:340] = 1
    write_dataset(d / "eval", xe, NAMES, t[800:], t[800:] + 10, ["run"] * 800, asset="P-101",
                  label=label)
    spans = [{"asset": "P-101", "kind": "imbalance", "start": float(t[1100]),
              "end": float(t[1140]), "class": "machine"}]
    (d / "labels.json").write_text(json.dumps(spans))
    return d


def test_evaluate_labels_and_injection(setup: Path) -> None:
    """Labelled and injected faults are found; normal data raises no false alarm."""
    b = load_bundle(setup / "bundle")
    ds = read_dataset(setup / "eval")
    ev = evaluate(b, ds, spans=load_labels(setup / "labels.json"),
                  inject_specs=[parse_inject("step"), parse_inject("spike")], seed=0)
    rec, step, spike = ev.scenarios
    assert rec.auc["imbalance"] > 0.99
    assert rec.detection.n_detected == 1 and rec.detection.false_alarms == 0
    assert rec.detection.events[0].delay_windows <= 2
    assert step.source == "injected" and step.auc["step"] > 0.99
    assert step.detection.detection_rate == 1.0
    assert spike.auc["spike"] > 0.99
    assert spike.detection.detection_rate < 0.5  # 2-of-3 rides through one-window spikes
    rows = ev.overall()
    assert sum(r["current"] for r in rows) == 1
    k1 = next(r for r in rows if (r["raise_k"], r["raise_n"], r["clear_m"]) == (1, 1, 1))
    k5 = next(r for r in rows if (r["raise_k"], r["raise_n"], r["clear_m"]) == (5, 8, 1))
    assert k1["spikes_raised"] == 1.0 and k5["spikes_raised"] == 0.0
    assert k1["median_delay_windows"] <= k5["median_delay_windows"]


def test_evaluate_uses_dataset_labels(setup: Path) -> None:
    """Without a labels file the dataset's own label array is the truth."""
    ev = evaluate(load_bundle(setup / "bundle"), read_dataset(setup / "eval"))
    assert list(ev.scenarios[0].auc) == ["label_1"]
    assert ev.scenarios[0].detection.n_detected == 1


def test_evaluate_refuses_missing_features(setup: Path, tmp_path: Path) -> None:
    """A dataset without the model's features is refused, naming them."""
    t = T0 + 10.0 * np.arange(60)
    names = [*NAMES[:-1], "other.f0"]
    write_dataset(tmp_path / "ds", _windows(60, 3), names, t, t + 10, ["run"] * 60,
                  asset="P-101")
    with pytest.raises(DatasetError, match=r"1 feature\(s\) the model needs are missing: "
                                           r"'ch7.f4'"):
        evaluate(load_bundle(setup / "bundle"), read_dataset(tmp_path / "ds"))


def test_report_files(setup: Path, tmp_path: Path) -> None:
    """--report writes report.json (no NaN) and a PNG."""
    ev = evaluate(load_bundle(setup / "bundle"), read_dataset(setup / "eval"),
                  inject_specs=[parse_inject("drift")])
    files = write_report(ev, tmp_path / "rep")
    doc = json.loads(files.json_path.read_text())
    assert doc["format"] == "watchkeep-evaluation"
    assert [s["name"] for s in doc["scenarios"]] == ["recorded",
                                                     "inject:drift 6 sigma x 60 windows"]
    assert doc["scenarios"][0]["detection"]["false_alarms"] == 0
    assert files.png_path == tmp_path / "rep" / REPORT_PNG
    assert files.png_path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_report_without_matplotlib(setup: Path, tmp_path: Path,
                                   monkeypatch: pytest.MonkeyPatch) -> None:
    """Without matplotlib the JSON is written and the plot is reported as skipped."""
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # makes `import matplotlib` fail
    ev = evaluate(load_bundle(setup / "bundle"), read_dataset(setup / "eval"))
    files = write_report(ev, tmp_path / "rep")
    assert files.png_path is None and "matplotlib is not installed" in files.plot_note
    assert sorted(p.name for p in (tmp_path / "rep").iterdir()) == [REPORT_JSON]


def test_cli_entry(setup: Path, tmp_path: Path) -> None:
    """cmd_evaluate prints the tables and writes the report."""
    parser = argparse.ArgumentParser()
    add_evaluate_arguments(parser)
    args = parser.parse_args([str(setup / "bundle"), str(setup / "eval"), "--labels",
                              str(setup / "labels.json"), "--inject", "step", "noise",
                              "--inject", "stuck", "--report", str(tmp_path / "rep"),
                              "--raise-k", "3", "--raise-n", "5"])
    out = io.StringIO()
    assert cmd_evaluate(args, out=out) == 0
    text = out.getvalue()
    assert "raise 3 of 5" in text and "inject:stuck" in text and "<- current" in text
    assert (tmp_path / "rep" / REPORT_JSON).is_file()


# --- sensor labels, fitted windows, the whole asset ------------------------------------

def _with_sensor_span(setup: Path, tmp_path: Path) -> tuple[Path, Path]:
    """The eval windows with a second disturbance at 500:520, labelled a sensor fault."""
    ds = read_dataset(setup / "eval")
    x = ds.features.copy()
    x[500:520, 20:25] += 8.0 * load_bundle(setup / "bundle").meta.scaler_scale[20:25]
    write_dataset(tmp_path / "ds", x, ds.feature_names, ds.window_start, ds.window_end,
                  ds.mode, asset="P-101")
    sensor = {"asset": "P-101", "kind": "drifting_transmitter", "class": "sensor",
              "start": float(ds.window_start[500]), "end": float(ds.window_end[519])}
    spans = [*json.loads((setup / "labels.json").read_text()), sensor]
    (tmp_path / "labels.json").write_text(json.dumps(spans))
    return tmp_path / "ds", tmp_path / "labels.json"


def test_sensor_class_labels_are_not_faults_to_detect(setup: Path, tmp_path: Path) -> None:
    """A sensor-class span is neither an event the model must find nor a false alarm:
    its windows are left out, with a note."""
    ds_path, labels = _with_sensor_span(setup, tmp_path)
    ev = evaluate(load_bundle(setup / "bundle"), read_dataset(ds_path),
                  spans=load_labels(labels))
    rec = ev.scenarios[0]
    assert [e.event.kind for e in rec.detection.events] == ["imbalance"]
    assert rec.detection.n_detected == 1 and rec.detection.false_alarms == 0
    assert ev.dataset["n_windows"] == 800 - 20
    assert any("sensor-class label span" in n and "drifting_transmitter" in n for n in ev.notes)


def test_windows_the_model_was_fitted_to_are_named(setup: Path) -> None:
    """Evaluating on the training data says so (report, summary); --held-out refuses when
    nothing is held out; a later recording has no fitted window."""
    from agent.commission.report import format_summary, to_json

    b = load_bundle(setup / "bundle")
    ev = evaluate(b, read_dataset(setup / "train"))
    assert ev.dataset["fitted_windows"] == 800
    assert any("trained and calibrated on" in n for n in ev.notes)
    assert "800 of them in the span the model was trained" in format_summary(ev)
    assert to_json(ev)["dataset"]["fitted_windows"] == 800
    with pytest.raises(DatasetError, match="nothing is held out"):
        evaluate(b, read_dataset(setup / "train"), held_out=True)
    later = evaluate(b, read_dataset(setup / "eval"))
    assert later.dataset["fitted_windows"] == 0
    assert not any("trained and calibrated on" in n for n in later.notes)


def test_whole_asset_view_of_several_modes(setup: Path, tmp_path: Path) -> None:
    """--mode-bundle: every window judged by its mode's bundle with one detector; a mode
    without a bundle is not scored; the fault is found, no false alarm."""
    ds = read_dataset(setup / "eval")
    # an invented duty cycle in blocks of 100 windows; the fault (300:340) falls in boost
    modes = np.tile(np.repeat(["run", "boost", "idle", "boost"], 100), 2)
    write_dataset(tmp_path / "ds", ds.features, ds.feature_names, ds.window_start,
                  ds.window_end, modes, asset="P-101", label=ds.label)
    parser = argparse.ArgumentParser()
    add_evaluate_arguments(parser)
    args = parser.parse_args([str(setup / "bundle"), str(tmp_path / "ds"),
                              "--mode-bundle", f"boost={setup / 'bundle'}",
                              "--report", str(tmp_path / "rep")])
    out = io.StringIO()
    assert cmd_evaluate(args, out=out) == 0
    text = out.getvalue()
    assert "whole asset (3 modes" in text and "no bundle: not scored" in text
    doc = json.loads((tmp_path / "rep" / REPORT_JSON).read_text())
    wa = doc["whole_asset"]
    assert wa["windows"] == 800 and wa["scored"] == 600
    assert wa["modes"]["idle"] == {"windows": 200, "model": None, "threshold": None}
    assert wa["events"] == 1 and wa["detected"] == 1 and wa["false_alarms"] == 0
    assert any("idle have no bundle" in n for n in doc["notes"])
