"""`record` offline: a CSV export or a capture file through the daemon's own ingest,
windows and features, on the data's own clock; the same feature rows as a live record."""

from __future__ import annotations

import json
import logging
import math
import threading
import time
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pytest
import yaml

from agent.cli.main import main
from agent.commission.capture import write_capture
from agent.commission.dataset import Dataset, read_dataset
from agent.commission.record import Recorder
from agent.commission.tabular import CsvReader, csv_messages
from agent.config.load import load_config
from tests.brokers import Broker
from tests.helpers import CHANNELS, asset_doc, publisher, readings, write_config

LOG = logging.getLogger("watchkeep.test")
# 2024-03-01T00:00:00Z: an export about two years older than the tests' wall clock.
OLD_T0 = 1_709_251_200.0


def _rows_from_readings(msgs: list[tuple[str, bytes]]) -> list[tuple[float, dict[str, float]]]:
    """The published readings regrouped as table rows: (time, {channel: value})."""
    rows: dict[float, dict[str, float]] = {}
    for topic, payload in msgs:
        doc = json.loads(payload)
        rows.setdefault(doc["ts"], {})[topic.rsplit("/", 1)[-1]] = doc["value"]
    return sorted(rows.items())


def _write_csv(path: Path, rows: list[tuple[float, dict[str, float]]], *, delimiter: str = ",",
               iso: bool = False, decimal_comma: bool = False, header: tuple[str, ...] = CHANNELS
               ) -> Path:
    lines = [delimiter.join(("time", *header))]
    for t, vals in rows:
        stamp = (datetime.fromtimestamp(t, UTC).replace(tzinfo=None).isoformat(sep=" ")
                 if iso else repr(t))
        cells = [repr(vals[c]) for c in CHANNELS]
        if decimal_comma:
            cells = [c.replace(".", ",") for c in cells]
        lines.append(delimiter.join((stamp, *cells)))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def _by_start(ds: Dataset) -> dict[float, np.ndarray]:
    return {round(float(s), 3): ds.features[i] for i, s in enumerate(ds.window_start)}


def test_csv_import_gives_the_live_records_feature_rows(tmp_path: Path, broker: Broker) -> None:
    """A live record over Mosquitto and the offline route on a CSV of the same values
    give the same feature rows, window for window."""
    cfg_path = write_config(tmp_path / "rec.yaml", broker.port, broker.port,
                            [asset_doc("P-1", tmp_path / "models" / "not-trained-yet")])
    cfg = load_config(cfg_path, require_bundles=False)
    t0 = math.floor(time.time()) + 1.0
    msgs = list(readings("P-1", t0, 40, seed=11))
    rec = Recorder(cfg, "P-1", tmp_path / "live", logger=LOG)
    th = threading.Thread(target=rec.run, args=(5.0,))
    th.start()
    time.sleep(1.0)  # the recorder subscribes first (QoS 0 to a late subscriber is lost)
    pub = publisher(broker.port, "offline-test-pub")
    try:
        for info in [pub.publish(t, p, qos=1) for t, p in msgs]:
            info.wait_for_publish(10)
    finally:
        pub.disconnect()
        pub.loop_stop()
    th.join(30)
    live = read_dataset(tmp_path / "live", min_windows=1)

    csv_path = _write_csv(tmp_path / "export.csv", _rows_from_readings(msgs))
    off = Recorder(cfg, "P-1", tmp_path / "offline", logger=LOG)
    offline = read_dataset(off.run_offline(csv_messages(off.asset, csv_path)), min_windows=1)

    assert offline.feature_names == live.feature_names
    a, b = _by_start(live), _by_start(offline)
    common = sorted(set(a) & set(b))
    assert len(common) >= 37, (len(a), len(b), len(common))
    for s in common:
        assert np.array_equal(a[s], b[s]), (s, a[s], b[s])


@pytest.mark.parametrize(("delimiter", "iso", "decimal_comma"), [
    (",", False, False),   # unix seconds
    (";", True, True),     # a spreadsheet export: ISO without zone (UTC), decimal comma
    ("\t", True, False),
])
def test_a_two_year_old_export_is_recorded_on_its_own_clock(
        tmp_path: Path, delimiter: str, iso: bool, decimal_comma: bool) -> None:
    """Historical timestamps are not clock skew offline: every window of the export is
    recorded, at the export's own times, with the default max_clock_skew_s."""
    cfg = load_config(write_config(tmp_path / "c.yaml", 1883, 1883, [asset_doc("P-1", None)]))
    assert cfg.ingest.max_clock_skew_s == 300.0
    rows = _rows_from_readings(list(readings("P-1", OLD_T0, 60, seed=3)))
    csv_path = _write_csv(tmp_path / "old.csv", rows, delimiter=delimiter, iso=iso,
                          decimal_comma=decimal_comma)
    rec = Recorder(cfg, "P-1", tmp_path / "ds", logger=LOG)
    reader = CsvReader(rec.asset, csv_path)
    ds = read_dataset(rec.run_offline(reader.messages(), fraction=reader.fraction),
                      min_windows=1)
    assert ds.n_windows >= 59
    assert ds.window_start[0] == OLD_T0
    assert reader.rows == len(rows) and not reader.skipped
    assert rec.metrics.registry.get_sample_value(
        "watchkeep_messages_rejected_total", {"reason": "clock_skew"}) in (None, 0.0)
    temp_mean = ds.feature_names.index("temp.mean")
    expect = np.mean([v["temp"] for t, v in rows if OLD_T0 <= t < OLD_T0 + 1.0])
    assert ds.features[0, temp_mean] == pytest.approx(expect, rel=1e-12)


def test_text_channels_are_stamped_from_the_capture(tmp_path: Path) -> None:
    """A `text` channel (stamped at arrival) read from an old capture lands in the same
    windows as the `json` channels beside it: arrival is the capture's time."""
    doc = asset_doc("P-1", None)
    doc["channels"]["pressure"]["decoder"] = "text"
    cfg = load_config(write_config(tmp_path / "c.yaml", 1883, 1883, [doc]))
    msgs = []
    for topic, payload in readings("P-1", OLD_T0, 30, seed=4):
        d = json.loads(payload)
        if topic.endswith("/pressure"):
            payload = repr(d["value"]).encode()
        msgs.append((d["ts"], topic, payload))
    cap = tmp_path / "old.raw.jsonl"
    write_capture(cap, msgs)
    rec = Recorder(cfg, "P-1", tmp_path / "ds", logger=LOG)
    from agent.commission.capture import read_capture

    ds = read_dataset(rec.run_offline(read_capture(cap)), min_windows=1)
    assert ds.n_windows >= 29 and ds.window_start[0] == OLD_T0
    i = ds.feature_names.index("pressure.mean")
    expect = np.mean([json.loads(p)["value"] if t.endswith("temp") else float(p)
                      for ts, t, p in msgs if t.endswith("/pressure") and ts < OLD_T0 + 1])
    assert ds.features[0, i] == pytest.approx(expect, rel=1e-12)


def test_record_cli_from_csv_with_a_bundle_not_trained_yet(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """`watchkeep record --from-csv` with columns mapped in the config and on the command
    line, a bundle path that does not exist yet, a progress line that ends in 'done' and
    the first --duration seconds of the data only."""
    doc = asset_doc("P-1", tmp_path / "models" / "P-1")  # not trained yet
    doc["channels"]["temp"]["column"] = "TT-101 [degC]"
    cfg_path = write_config(tmp_path / "c.yaml", 1883, 1883, [doc])
    rows = _rows_from_readings(list(readings("P-1", OLD_T0, 30, seed=5)))
    csv_path = _write_csv(tmp_path / "e.csv", rows,
                          header=("TT-101 [degC]", "IT-102", "pressure"))
    rc = main(["record", "-c", str(cfg_path), "--asset", "P-1", "--out", str(tmp_path / "ds"),
               "--from-csv", str(csv_path), "--column", "current=IT-102", "--duration", "20",
               "--raw"])
    out = capsys.readouterr()
    assert rc == 0, out.err
    last = out.err.replace("\r", "\n").strip().splitlines()[-1]
    assert "done" in last and "waiting for broker" not in last, last
    assert "csv read: 201 rows, 601 samples" in out.out  # 20 s at 10 Hz, and the row past
    ds = read_dataset(tmp_path / "ds", min_windows=1)
    assert 18 <= ds.n_windows <= 20 and ds.window_end.max() <= OLD_T0 + 20
    assert (tmp_path / "ds.raw.jsonl").is_file()


def test_record_cli_from_capture_matches_the_csv_route(tmp_path: Path) -> None:
    """The capture `record --from-csv --raw` writes, recorded again with --from-capture,
    gives the same dataset rows as the CSV did."""
    cfg_path = write_config(tmp_path / "c.yaml", 1883, 1883, [asset_doc("P-1", None)])
    rows = _rows_from_readings(list(readings("P-1", OLD_T0, 20, seed=6)))
    csv_path = _write_csv(tmp_path / "e.csv", rows, iso=True)
    base = ["record", "-c", str(cfg_path), "--asset", "P-1"]
    assert main([*base, "--out", str(tmp_path / "a"), "--from-csv", str(csv_path),
                 "--raw"]) == 0
    assert main([*base, "--out", str(tmp_path / "b"), "--from-capture",
                 str(tmp_path / "a.raw.jsonl")]) == 0
    a, b = read_dataset(tmp_path / "a"), read_dataset(tmp_path / "b")
    assert a.n_windows >= 19
    assert np.array_equal(a.features, b.features)
    assert np.array_equal(a.window_start, b.window_start)


def test_record_cli_names_a_missing_column(tmp_path: Path,
                                           capsys: pytest.CaptureFixture[str]) -> None:
    """A channel without a column is one clear error naming the channel and the columns."""
    cfg_path = write_config(tmp_path / "c.yaml", 1883, 1883, [asset_doc("P-1", None)])
    (tmp_path / "e.csv").write_text("time,temp,current\n1709251200,1,2\n")
    rc = main(["record", "-c", str(cfg_path), "--asset", "P-1", "--out", str(tmp_path / "ds"),
               "--from-csv", str(tmp_path / "e.csv")])
    err = capsys.readouterr().err
    assert rc != 0
    assert "pressure (column 'pressure')" in err and "'current'" in err, err


def test_live_record_ends_with_done_not_waiting_for_broker(
        tmp_path: Path, broker: Broker, capsys: pytest.CaptureFixture[str]) -> None:
    """The live record's last progress line says the recording is done."""
    cfg_path = write_config(tmp_path / "c.yaml", broker.port, broker.port,
                            [asset_doc("P-1", None)])
    doc = yaml.safe_load(cfg_path.read_text())
    assert doc["assets"][0]["name"] == "P-1"
    t0 = math.floor(time.time()) + 1.0
    msgs = list(readings("P-1", t0, 5, seed=2))
    done = threading.Event()

    def publish() -> None:
        time.sleep(1.0)
        pub = publisher(broker.port, "offline-test-pub2")
        try:
            for info in [pub.publish(t, p, qos=1) for t, p in msgs]:
                info.wait_for_publish(10)
        finally:
            pub.disconnect()
            pub.loop_stop()
            done.set()

    th = threading.Thread(target=publish)
    th.start()
    rc = main(["record", "-c", str(cfg_path), "--asset", "P-1", "--out", str(tmp_path / "ds"),
               "--duration", "3"])
    th.join(20)
    err = capsys.readouterr().err
    assert rc == 0, err
    last = err.replace("\r", "\n").strip().splitlines()[-1]
    assert last.rstrip().endswith("(done)"), last
