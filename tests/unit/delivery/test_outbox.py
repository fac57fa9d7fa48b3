"""The SQLite outbox on real files: order, durability settings, bounds, disk full, corruption."""

from __future__ import annotations

import logging
import sqlite3
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry

from agent.config.load import OutboxConfig, Synchronous
from agent.delivery.outbox import Outbox
from agent.delivery.outbox_drops import plan_drops
from agent.delivery.outbox_file import (
    INSERT_CHUNKS,
    SCHEMA_VERSION,
    Row,
    chunk_sizes,
    corrupt_name,
    id_runs,
    message_size,
)
from agent.delivery.upstream import RECONNECT_MAX_S, RECONNECT_MIN_S, backoff_delay
from agent.errors import OutboxError
from agent.ops.metrics import Metrics
from agent.pipeline.messages import Kind, OutMessage

LOG = logging.getLogger("watchkeep.test.outbox")


def make(path: Path, **kw: object) -> tuple[Outbox, CollectorRegistry]:
    reg = CollectorRegistry()
    ob = Outbox(OutboxConfig(path=path, **kw), Metrics(reg), LOG,  # type: ignore[arg-type]
                clock=lambda: 1_800_000_000.0).open()
    return ob, reg


def msg(name: str, kind: Kind, key: str | None = None, size: int = 10) -> OutMessage:
    return OutMessage(f"t/{name}", name.encode().ljust(size, b"."), kind,
                      qos=0 if kind is Kind.SCORE else 1, retain=kind is Kind.STATE, key=key)


def names(ob: Outbox) -> list[str]:
    return [r.payload.rstrip(b".").decode() for r in ob.fetch_after(0, 10_000)]


def drops(reg: CollectorRegistry) -> dict[str, float]:
    return {k.label: reg.get_sample_value("watchkeep_outbox_dropped_total", {"kind": k.label})
            or 0.0 for k in Kind}


def test_rows_come_back_in_id_order_and_delete_removes_only_those(tmp_path: Path) -> None:
    """Submitted rows are fetched in order; delete takes only the given ids."""
    ob, _ = make(tmp_path / "o.sqlite")
    ob.submit([msg(f"m{i}", Kind.ANOMALY) for i in range(5)])
    rows = ob.fetch_after(0, 100)
    assert [r.topic for r in rows] == [f"t/m{i}" for i in range(5)]
    assert [r.id for r in rows] == sorted(r.id for r in rows)
    assert ob.fetch_after(rows[1].id, 2) == rows[2:4]
    assert ob.delete([rows[0].id, rows[2].id, 999_999]) == 2
    assert names(ob) == ["m1", "m3", "m4"]
    assert ob.counts() == (3, sum(message_size(msg(f"m{i}", Kind.ANOMALY)) for i in (1, 3, 4)))


@pytest.mark.parametrize(("sync", "code"), [(Synchronous.FULL, 2), (Synchronous.NORMAL, 1)])
def test_wal_synchronous_and_schema_version_are_set(tmp_path: Path, sync: Synchronous,
                                                    code: int) -> None:
    """WAL journal, the configured synchronous level (SQLite: FULL=2, NORMAL=1), user_version."""
    ob, _ = make(tmp_path / "o.sqlite", synchronous=sync)
    db = ob._conn()
    assert db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert db.execute("PRAGMA synchronous").fetchone()[0] == code
    assert db.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
    assert db.execute("PRAGMA auto_vacuum").fetchone()[0] == 2  # 2 = INCREMENTAL
    assert db.execute("PRAGMA secure_delete").fetchone()[0] == 2  # 2 = FAST
    ob.close()


@pytest.mark.parametrize(("sync", "code"), [(Synchronous.FULL, 2), (Synchronous.NORMAL, 1)])
def test_a_delete_leaves_the_configured_synchronous_level(tmp_path: Path, sync: Synchronous,
                                                          code: int) -> None:
    """Deletes commit under NORMAL; submits after them are FULL again when configured so."""
    ob, _ = make(tmp_path / "o.sqlite", synchronous=sync)
    ob.submit([msg("a", Kind.ANOMALY), msg("b", Kind.ANOMALY)])
    ob.delete([ob.fetch_after(0, 1)[0].id])
    assert ob._conn().execute("PRAGMA synchronous").fetchone()[0] == code
    assert names(ob) == ["b"]
    ob.close()


def test_fetched_rows_carry_their_kind_and_flags(tmp_path: Path) -> None:
    """A fetched row has its Kind, payload bytes, qos and retain flag as submitted."""
    ob, _ = make(tmp_path / "o.sqlite")
    ob.submit([msg("s", Kind.STATE, key="k"), msg("c", Kind.SCORE)])
    state, score = ob.fetch_after(0, 10)
    assert isinstance(state, Row) and state.kind is Kind.STATE and state.retain is True
    assert state.qos == 1 and state.payload == b"s".ljust(10, b".")
    assert score.kind is Kind.SCORE and score.retain is False and score.qos == 0


@pytest.mark.parametrize("n", [1, 50, 63, 64, 65, 200, 1000])
def test_a_large_tick_keeps_its_order_across_insert_chunks(tmp_path: Path, n: int) -> None:
    """However many rows a tick has, they are stored in order with growing ids."""
    ob, _ = make(tmp_path / "o.sqlite")
    ob.submit([msg("first", Kind.EVENT)])
    ob.submit([msg(f"m{i}", Kind.ANOMALY if i % 3 else Kind.STATE, key=f"s{i}")
               for i in range(n)])
    rows = ob.fetch_after(0, n + 10)
    assert names(ob) == ["first"] + [f"m{i}" for i in range(n)]
    assert [r.id for r in rows] == list(range(rows[0].id, rows[0].id + n + 1))
    assert ob.max_id == rows[-1].id
    assert ob.counts() == (n + 1, sum(message_size(msg(x, Kind.EVENT)) for x in names(ob)))


@pytest.mark.parametrize(("n", "want"), [
    (0, []), (1, [1]), (50, [32, 16, 2]), (64, [64]), (65, [64, 1]),
    (200, [64, 64, 64, 8]), (127, [64, 32, 16, 8, 4, 2, 1]),
])
def test_chunk_sizes(n: int, want: list[int]) -> None:
    """A tick's rows split into the few prepared INSERT sizes, largest first."""
    assert chunk_sizes(n) == want
    assert sum(want) == n and set(want) <= set(INSERT_CHUNKS)


@pytest.mark.parametrize(("ids", "want"), [
    ([], []),
    ([7], [(7, 7)]),
    ([1, 2, 3], [(1, 3)]),
    ([3, 1, 2, 2, 7, 8, 10], [(1, 3), (7, 8), (10, 10)]),  # unsorted, repeated, gaps
    ([5, 3, 1], [(1, 1), (3, 3), (5, 5)]),
])
def test_id_runs(ids: list[int], want: list[tuple[int, int]]) -> None:
    """Distinct ids as runs of consecutive integers, ascending."""
    assert id_runs(ids) == want


def test_delete_by_runs_leaves_every_id_between_runs(tmp_path: Path) -> None:
    """Deleting runs of ids removes exactly those: a row in a gap is kept, repeats count once."""
    ob, _ = make(tmp_path / "o.sqlite")
    ob.submit([msg(f"m{i}", Kind.ANOMALY) for i in range(10)])
    ids = [r.id for r in ob.fetch_after(0, 10)]
    gone = [ids[i] for i in (2, 0, 1, 1, 6, 7, 9)] + [ids[-1] + 5]  # + one that never was
    assert ob.delete(gone) == 6
    assert names(ob) == ["m3", "m4", "m5", "m8"]
    assert ob.counts() == (4, 4 * message_size(msg("m0", Kind.ANOMALY)))


def test_message_size_counts_utf8_bytes_of_the_topic() -> None:
    """max_bytes counts the topic's UTF-8 bytes, not its characters."""
    assert message_size(OutMessage("t/P-1", b"xy", Kind.EVENT)) == 5 + 2
    assert message_size(OutMessage("t/Pümpe", b"xy", Kind.EVENT)) == 8 + 2  # ü is 2 bytes


def test_rows_and_sequences_survive_reopen_and_ids_never_repeat(tmp_path: Path) -> None:
    """Rows and sequence numbers persist; ids keep growing after the outbox empties."""
    p = tmp_path / "o.sqlite"
    ob, _ = make(p)
    ob.submit([msg("a", Kind.ANOMALY), msg("b", Kind.STATE, key="s")], sequences={"P-1": 7})
    first = ob.fetch_after(0, 10)
    ob.close()
    ob, _ = make(p)
    assert names(ob) == ["a", "b"] and ob.sequences() == {"P-1": 7}
    ob.delete([r.id for r in first])
    ob.close()
    ob, _ = make(p)
    ob.submit([msg("c", Kind.ANOMALY)], sequences={"P-1": 8, "P-2": 1})
    assert ob.fetch_after(0, 10)[0].id > first[-1].id
    assert ob.sequences() == {"P-1": 8, "P-2": 1}


def test_drop_policy_is_honoured_exactly_with_matching_counts(tmp_path: Path,
                                                               caplog: pytest.LogCaptureFixture
                                                               ) -> None:
    """Past max_rows: scores, then superseded states, events, current states, anomalies last."""
    ob, reg = make(tmp_path / "o.sqlite", max_rows=10)
    A, E, S, C = Kind.ANOMALY, Kind.EVENT, Kind.STATE, Kind.SCORE
    ob.submit([msg("A1", A), msg("S1a", S, "s1"), msg("C1", C), msg("E1", E), msg("A2", A),
               msg("S1b", S, "s1"), msg("S2a", S, "s2"), msg("C2", C), msg("E2", E),
               msg("A3", A)])
    assert ob.counts()[0] == 10 and drops(reg) == {"score": 0, "state": 0, "event": 0,
                                                   "anomaly": 0}
    # 15 rows: the three scores go first, then the two s1 states that S1c supersedes.
    ob.submit([msg("C3", C), msg("A4", A), msg("E3", E), msg("S1c", S, "s1"), msg("A5", A)])
    assert names(ob) == ["A1", "E1", "A2", "S2a", "E2", "A3", "A4", "E3", "S1c", "A5"]
    assert drops(reg) == {"score": 3, "state": 2, "event": 0, "anomaly": 0}
    # Nothing superseded is left: the oldest non-anomaly events go next.
    ob.submit([msg("A6", A), msg("A7", A), msg("A8", A)])
    assert names(ob) == ["A1", "A2", "S2a", "A3", "A4", "S1c", "A5", "A6", "A7", "A8"]
    assert drops(reg) == {"score": 3, "state": 2, "event": 3, "anomaly": 0}
    # Then the current states, and only then the oldest anomaly.
    ob.submit([msg("A9", A), msg("A10", A), msg("A11", A)])
    assert names(ob) == [f"A{i}" for i in range(2, 12)]
    assert drops(reg) == {"score": 3, "state": 4, "event": 3, "anomaly": 1}
    assert ob.counts()[0] == 10
    assert any("outbox full: messages dropped" in r.getMessage() for r in caplog.records)


def test_byte_bound_drops_oldest_anomalies_until_it_fits(tmp_path: Path) -> None:
    """max_bytes alone: just enough of the oldest anomalies go."""
    size = message_size(msg("A0", Kind.ANOMALY, size=1000))
    ob, reg = make(tmp_path / "o.sqlite", max_rows=1000, max_bytes=5 * size)
    ob.submit([msg(f"A{i}", Kind.ANOMALY, size=1000) for i in range(8)])
    assert names(ob) == [f"A{i}" for i in range(3, 8)]
    assert ob.counts() == (5, 5 * size)
    assert drops(reg)["anomaly"] == 3


@pytest.mark.parametrize(("sizes", "rows", "nbytes", "max_rows", "max_bytes", "want"), [
    ([1, 1, 1], 3, 3, 3, 100, []),  # within bounds: nothing
    ([1, 1, 1], 5, 5, 3, 100, [0, 1]),  # two rows over
    ([10, 10, 10], 3, 30, 100, 15, [0, 1]),  # bytes: 30 -> 20 -> 10
    ([10, 10], 3, 30, 2, 25, [0]),  # both bounds, one drop fixes both
    ([5], 10, 10, 1, 100, [0]),  # not enough candidates: all of them
])
def test_plan_drops(sizes: list[int], rows: int, nbytes: int, max_rows: int, max_bytes: int,
                    want: list[int]) -> None:
    """Drops in the given order, no more than needed."""
    ids, freed = plan_drops(enumerate(sizes), rows, nbytes, max_rows, max_bytes)
    assert ids == want and freed == sum(sizes[i] for i in want)


def test_disk_full_is_counted_kept_and_retried_in_order(tmp_path: Path) -> None:
    """SQLITE_FULL: no exception, counted; the rows are written first at the next submit."""
    ob, reg = make(tmp_path / "o.sqlite")
    ob.submit([msg("A0", Kind.ANOMALY)])
    db = ob._conn()
    pages = db.execute("PRAGMA page_count").fetchone()[0]
    db.execute(f"PRAGMA max_page_count = {pages}")  # the "disk" is now full
    ob.submit([msg("A1", Kind.ANOMALY, size=20_000)], sequences={"P-1": 1})
    assert not ob.last_write_ok
    assert reg.get_sample_value("watchkeep_outbox_write_errors_total",
                                {"reason": "disk_full"}) == 1
    assert names(ob) == ["A0"] and ob.status()["pending_in_memory"] == 1
    db.execute("PRAGMA max_page_count = 1073741823")  # space again
    ob.submit([msg("A2", Kind.ANOMALY)])
    assert ob.last_write_ok
    assert names(ob) == ["A0", "A1", "A2"] and ob.sequences() == {"P-1": 1}
    assert ob.status()["pending_in_memory"] == 0


def test_the_backlog_in_memory_is_bounded_by_bytes_and_every_drop_counted(
        tmp_path: Path) -> None:
    """File full: the backlog kept in memory stays within max_memory_bytes by the drop
    policy (scores before anomalies), each drop counted by kind and reason memory_full."""
    ob, reg = make(tmp_path / "o.sqlite", max_memory_bytes=65536)
    ob.submit([msg("A0", Kind.ANOMALY)])
    db = ob._conn()
    db.execute(f"PRAGMA max_page_count = {db.execute('PRAGMA page_count').fetchone()[0]}")
    ob.submit([msg(f"S{i}", Kind.SCORE, size=1000) for i in range(40)])
    ob.submit([msg(f"A{i}", Kind.ANOMALY, size=1000) for i in range(1, 41)])
    status = ob.status()
    kept = status["pending_in_memory"]
    sizes = [message_size(msg(f"S{i}", Kind.SCORE, size=1000)) for i in range(40)] + \
        [message_size(msg(f"A{i}", Kind.ANOMALY, size=1000)) for i in range(1, 41)]
    k = next(k for k in range(41) if sum(sizes[k:]) <= 65536)  # the oldest scores go
    assert status["pending_in_memory_bytes"] == sum(sizes[k:]) <= 65536
    assert kept == 80 - k and k > 0
    assert drops(reg) == {"score": k, "state": 0, "event": 0, "anomaly": 0}
    assert reg.get_sample_value("watchkeep_outbox_dropped_by_reason_total",
                                {"reason": "memory_full"}) == k
    assert reg.get_sample_value("watchkeep_outbox_memory_rows") == kept
    db.execute("PRAGMA max_page_count = 1073741823")
    ob.submit([msg("A41", Kind.ANOMALY)])
    got = names(ob)
    assert got == ["A0"] + [f"S{i}" for i in range(k, 40)] + \
        [f"A{i}" for i in range(1, 42)]
    assert reg.get_sample_value("watchkeep_outbox_memory_rows") == 0


def _garbage(p: Path) -> None:
    p.write_bytes(b"this is not an outbox, just noise " * 200)


def _damaged_pages(p: Path) -> None:
    db = sqlite3.connect(p)
    db.execute("CREATE TABLE outbox (id INTEGER PRIMARY KEY, payload BLOB)")
    db.execute("CREATE INDEX outbox_p ON outbox (payload)")
    db.executemany("INSERT INTO outbox (payload) VALUES (?)",
                   [(bytes([i % 251]) * 300,) for i in range(2000)])
    db.commit()
    db.close()
    raw = bytearray(p.read_bytes())
    page = 4096
    for pg in range(3, len(raw) // page, 4):  # smash every fourth page's header
        raw[pg * page: pg * page + 64] = b"\xa5" * 64
    p.write_bytes(bytes(raw))


@pytest.mark.parametrize("damage", [_garbage, _damaged_pages], ids=["garbage", "pages"])
def test_corrupt_file_is_moved_aside_and_a_new_outbox_starts(tmp_path: Path, damage) -> None:
    """quick_check fails -> renamed with a timestamp, counted, reported; the new one works."""
    p = tmp_path / "o.sqlite"
    damage(p)
    ob, reg = make(p)
    moved = corrupt_name(p, 1_800_000_000.0)
    assert moved.name == "o.sqlite.corrupt-20270115T080000Z"
    assert moved.exists()
    assert reg.get_sample_value("watchkeep_outbox_corrupt_resets_total") == 1
    st = ob.status()["corrupt_reset"]
    assert st["moved_to"] == str(moved) and st["problem"]
    ob.submit([msg("A1", Kind.ANOMALY)])
    assert names(ob) == ["A1"]


def test_a_newer_schema_version_is_refused_not_destroyed(tmp_path: Path) -> None:
    """An outbox written by a newer watchkeep stays untouched and start-up says why."""
    p = tmp_path / "o.sqlite"
    db = sqlite3.connect(p)
    db.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 1}")
    db.close()
    with pytest.raises(OutboxError, match="newer watchkeep"):
        make(p)
    assert p.exists() and not list(tmp_path.glob("*.corrupt-*"))


@pytest.mark.parametrize(("attempt", "u", "want"), [
    (1, 0.0, RECONNECT_MIN_S * 0.5),
    (1, 0.999999, RECONNECT_MIN_S),
    (2, 0.0, RECONNECT_MIN_S),
    (3, 0.5, RECONNECT_MIN_S * 4 * 0.75),
    (60, 0.999999, RECONNECT_MAX_S),  # capped, and no overflow for a long outage
    (60, 0.0, RECONNECT_MAX_S * 0.5),
])
def test_backoff_is_exponential_jittered_and_capped(attempt: int, u: float,
                                                    want: float) -> None:
    """min * 2^(n-1), capped, times a jitter factor in [0.5, 1)."""
    assert backoff_delay(attempt, u) == pytest.approx(want, rel=1e-5)


def _file_rows(path: Path, after_id: int, limit: int) -> list[tuple[object, ...]]:
    """What the file holds, read by a connection of its own (WAL lets it read)."""
    db = sqlite3.connect(path)
    try:
        found = db.execute("SELECT id, kind, topic, payload, qos, retain FROM outbox "
                           "WHERE id > ? ORDER BY id LIMIT ?", (after_id, limit)).fetchall()
    finally:
        db.close()
    return [(i, Kind(k), t, p, q, r == 1) for i, k, t, p, q, r in found]


_OPS = st.lists(st.one_of(
    st.tuples(st.just("submit"), st.lists(st.sampled_from(list(Kind)), max_size=9)),
    st.tuples(st.just("delete"), st.lists(st.integers(0, 60), max_size=6)),
    st.tuples(st.just("fetch"), st.integers(0, 60), st.integers(0, 12)),
    st.tuples(st.just("reopen"))), max_size=30)


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(ops=_OPS)
def test_fetch_after_from_the_memory_tail_is_what_the_file_holds(
        tmp_path_factory: pytest.TempPathFactory, monkeypatch: pytest.MonkeyPatch,
        ops: list[tuple[object, ...]]) -> None:
    """Whatever mix of submits, deletes, bound drops and reopens: every `fetch_after`
    answers exactly what a query of the file answers, whether the rows come from the
    in-memory tail (kept short here, so rows fall out of it) or from the file."""
    monkeypatch.setattr("agent.delivery.outbox_tail.TAIL_ROWS", 7)
    path = tmp_path_factory.mktemp("tail") / "o.sqlite"
    ob, _ = make(path, max_rows=20)  # small: submits drop rows by the policy
    n = 0
    try:
        for op in ops:
            if op[0] == "submit":
                batch = []
                for kind in op[1]:  # type: ignore[attr-defined]
                    n += 1
                    batch.append(msg(f"m{n}", kind, key=f"k{n % 3}" if kind is Kind.STATE
                                     else None))
                ob.submit(batch)
            elif op[0] == "delete":
                ob.delete(op[1])  # type: ignore[arg-type]
            elif op[0] == "fetch":
                after, limit = op[1], op[2]
                assert [tuple(r) for r in ob.fetch_after(after, limit)] == \
                    _file_rows(path, after, limit)  # type: ignore[arg-type]
            else:
                ob.close()
                ob, _ = make(path, max_rows=20)
            for after in (0, ob.max_id - 3, ob.max_id):
                assert [tuple(r) for r in ob.fetch_after(after, 100)] == \
                    _file_rows(path, after, 100)
    finally:
        ob.close()
