"""The SQLite store: durability settings, de-duplication, revision rules, results under
deterministic keys, quarantine, positions, the outbox, and rebuilding state after a restart."""

from __future__ import annotations

import hashlib
import sqlite3

import pytest

from matcher.store import Store, StoreError, result_key
from matcher.streams.codecs import NativeCodec
from matcher.streams.intake import Accepted, Rejected, decode_item, record
from matcher.streams.localization import LocalizationLimits
from matcher.streams.raw import Origin, RawItem
from streams_helpers import gw, line, tiny_map_bytes, transient


@pytest.fixture
def folder(tmp_path):
    (tmp_path / "map.fits").write_bytes(tiny_map_bytes())
    return tmp_path


@pytest.fixture
def store(folder):
    s = Store(folder / "state" / "matcher.sqlite")
    yield s
    s.close()


def item(obj, folder, n=1, source="arc"):
    data = obj if isinstance(obj, bytes) else line(obj)
    return RawItem(data, Origin(source, "archive", str(folder / "a.jsonl"), None, n), ("archive:a", f"{n}"),
                   1.7e9 + n, str(folder))


def put(store, *items):
    codec = NativeCodec()
    out = []
    with store.transaction() as tx:
        for it in items:
            d = decode_item(it, codec, LocalizationLimits())
            out.append((d, record(tx, d)))
    return out


def test_durability_settings(store):
    # WAL with synchronous=FULL (2): NORMAL could lose a committed batch on power loss (SQLite docs).
    assert store.pragma("journal_mode") == "wal"
    assert store.pragma("synchronous") == 2
    assert store.pragma("foreign_keys") == 1


def test_refuses_memory_and_non_sqlite_files(tmp_path):
    with pytest.raises(StoreError, match="in-memory"):
        Store(":memory:")
    bad = tmp_path / "not.sqlite"
    bad.write_bytes(b"this is not a database file at all" * 100)
    with pytest.raises(StoreError, match="not a usable SQLite database"):
        Store(bad)


def test_refuses_another_schema_version(tmp_path):
    path = tmp_path / "s.sqlite"
    Store(path).close()
    db = sqlite3.connect(path)
    db.execute("UPDATE meta SET value='99' WHERE name='schema_version'")
    db.commit()
    db.close()
    with pytest.raises(StoreError, match="schema version 99"):
        Store(path)


def test_messages_are_stored_once_by_bytes_and_origin(store, folder):
    a = item(transient(), folder, 1)
    (d, r1), = put(store, a)
    assert isinstance(d, Accepted) and r1.effect == "new"
    (_, r2), = put(store, a)
    assert r2 is None  # re-delivery of the same line: nothing new
    # The same bytes from another line are another message (but the same transient, unchanged).
    (_, r3), = put(store, item(transient(), folder, 2))
    assert r3.effect == "same"
    assert store.counts()["messages"] == 2 and store.counts()["transients"] == 1
    assert store.message_raw(r1.message_id) == a.data
    assert a.dedup_key == hashlib.sha256(a.origin.identity() + b"\x00" + a.data).digest()


def test_transient_updates_replace_the_stored_report(store, folder):
    put(store, item(transient(ra=10.0), folder, 1))
    (_, r), = put(store, item(transient(ra=11.0), folder, 2))
    assert r.effect == "updated"
    (st,) = store.transients_between(-1e12, 1e12)
    assert st.report.ra_deg == 11.0 and st.reports == 2


def test_revision_rules(store, folder):
    (_, r), = put(store, item(gw(revision=2), folder, 1))
    assert r.effect == "new_event"
    (_, r), = put(store, item(gw(revision=1, far_per_year=9.0), folder, 2))
    assert r.effect == "older" and r.previous_revision == 2
    assert store.current_revision("EV-TEST-1").alert.revision == 2  # older stored, not current
    assert [x.alert.revision for x in store.revisions("EV-TEST-1")] == [1, 2]
    (_, r), = put(store, item(gw(revision=2, far_per_year=7.0), folder, 3))
    assert r.effect == "same_revision"  # kept as a message; the first revision 2 stays
    assert store.current_revision("EV-TEST-1").alert.far_per_year == 0.5
    (_, r), = put(store, item(gw(revision=3, state="revised"), folder, 4))
    assert r.effect == "newer" and r.previous_revision == 2
    cur = store.current_revision("EV-TEST-1")
    assert cur.alert.state == "revised" and cur.is_current and cur.event_state == "revised"


def test_localization_bytes_are_kept(store, folder):
    (d, r), = put(store, item(gw(), folder, 1))
    cur = store.current_revision("EV-TEST-1")
    assert store.localization_data(cur.localization_sha) == tiny_map_bytes()
    assert cur.alert.localization.resolved_path() == str(folder / "map.fits")


def test_results_upsert_without_duplicates_and_status_rules(store, folder):
    put(store, item(gw(revision=1), folder, 1), item(transient(tid="T1"), folder, 2))
    rec = {"class": "optical", "p_assoc": 0.25, "fap": 0.01, "odds": 0.3, "rank": 1}
    with store.transaction() as tx:
        first = tx.put_result("EV-TEST-1", 1, "T1", rec)
        assert tx.put_result("EV-TEST-1", 1, "T1", rec) is None  # identical: no new output
    assert first.key == result_key("EV-TEST-1", 1, "T1") == "EV-TEST-1/1/T1"
    assert first.record["status"] == "current" and store.counts()["outbox"] == 1
    # A new revision: the old result is superseded (published once), the new one is current.
    put(store, item(gw(revision=2, state="revised"), folder, 3))
    with store.transaction() as tx:
        sup = tx.supersede("EV-TEST-1", 2)
        tx.put_result("EV-TEST-1", 2, "T1", {**rec, "p_assoc": 0.5})
        # A late computation for revision 1 cannot make it current again.
        late = tx.put_result("EV-TEST-1", 1, "T1", {**rec, "p_assoc": 0.3})
        with pytest.raises(ValueError, match="newer than its stored revision"):
            tx.put_result("EV-TEST-1", 5, "T1", rec)
        with pytest.raises(ValueError, match="unknown event"):
            tx.put_result("EV-NOPE", 1, "T1", rec)
    assert [r.status for r in sup] == ["superseded"] and late.status == "superseded"
    # Withdrawal marks every result withdrawn, and later results of the event stay withdrawn.
    put(store, item(gw(revision=3, state="withdrawn", localization=None), folder, 4))
    with store.transaction() as tx:
        w = tx.withdraw("EV-TEST-1")
        again = tx.put_result("EV-TEST-1", 3, "T1", rec)
    assert sorted(r.key for r in w) == ["EV-TEST-1/1/T1", "EV-TEST-1/2/T1"]
    assert again.status == "withdrawn"
    c = store.counts()
    assert c["results"] == 3 and c["results.withdrawn"] == 3
    assert [r.seq for r in store.outbox_after(0, 100)] == sorted(r.seq for r in store.outbox_after(0, 100))


def test_result_keys_are_unambiguous():
    assert result_key("a/1", 2, "b") != result_key("a", 1, "2/b")
    assert result_key("EV 1", 0, "T%2F") == "EV%201/0/T%252F"


def test_quarantine_is_byte_identical_and_once(store, folder):
    raw = b'{"schema": "matcher/1", "type": "transient", "ra_deg": NaN, \xff}'
    it = item(raw, folder, 7)
    (d, r), = put(store, it)
    assert isinstance(d, Rejected) and r is True
    (_, r2), = put(store, it)
    assert r2 is False
    (q,) = store.quarantined()
    assert q.raw == raw and q.origin == f"{folder / 'a.jsonl'} line 7" and q.origin_offset == 7
    assert q.codec == "native" and "UTF-8" in q.reason


def test_a_failed_batch_leaves_nothing(store, folder):
    with pytest.raises(RuntimeError):
        with store.transaction() as tx:
            record(tx, decode_item(item(transient(), folder, 1), NativeCodec()))
            tx.set_positions("arc", {"archive:a": "1"})
            raise RuntimeError("crash inside the batch")
    assert store.counts()["messages"] == 0 and store.positions("arc") == {}
    with store.transaction() as tx:
        with pytest.raises(RuntimeError, match="do not nest"):
            with store.transaction():
                pass


def test_positions(store):
    with store.transaction() as tx:
        tx.set_positions("arc", {"archive:/a": '{"offset":10}'})
        tx.set_positions("arc", {"archive:/a": '{"offset":20}', "archive:/b": "x"})
        tx.set_positions("other", {"t/0": "5"})
    assert store.positions("arc") == {"archive:/a": '{"offset":20}', "archive:/b": "x"}
    assert store.positions("nobody") == {}


def test_state_is_rebuilt_after_reopening(folder):
    path = folder / "state" / "s.sqlite"
    s = Store(path)
    put(s, item(gw(event_id="EV-A", revision=1), folder, 1), item(gw(event_id="EV-A", revision=2), folder, 2),
        item(gw(event_id="EV-B"), folder, 3), item(gw(event_id="EV-C", state="withdrawn", localization=None), folder, 4),
        item(gw(event_id="EV-D"), folder, 5))
    with s.transaction() as tx:
        tx.set_expiry("EV-D", 1000.0)
    s.close()
    s = Store(path)
    active = s.active_events()
    assert [(r.alert.event_id, r.alert.revision) for r in active] == [("EV-A", 2), ("EV-B", 1), ("EV-D", 1)]
    assert [r.alert.event_id for r in s.active_events(now=2000.0)] == ["EV-A", "EV-B"]
    assert all(s.localization_data(r.localization_sha) == tiny_map_bytes() for r in active)
    s.close()


def test_transients_between_uses_the_detection_bracket(store, folder):
    put(store, item(transient(tid="early", time="2026-03-10T00:00:00Z", last_nondetection="2026-03-09T00:00:00Z"), folder, 1),
        item(transient(tid="bracket", time="2026-03-15T00:00:00Z", last_nondetection="2026-03-13T00:00:00Z"), folder, 2),
        item(transient(tid="late", time="2026-03-20T00:00:00Z", last_nondetection=None), folder, 3))
    from matcher.timeconv import iso_to_gps

    lo, hi = iso_to_gps("2026-03-14T00:00:00Z"), iso_to_gps("2026-03-16T00:00:00Z")
    assert [t.report.transient_id for t in store.transients_between(lo, hi)] == ["bracket"]


def test_outbox_cursor(store, folder):
    put(store, item(gw(), folder, 1))
    with store.transaction() as tx:
        for i in range(5):
            tx.put_result("EV-TEST-1", 1, f"T{i}", {"p_assoc": i / 10})
    assert store.last_seq() == 5 and store.sink_cursor("m") == 0
    store.mark_sent("m", 3)
    store.mark_sent("m", 2)  # never moves back
    assert store.sink_cursor("m") == 3
    assert [r.key for r in store.outbox_after(3)] == ["EV-TEST-1/1/T3", "EV-TEST-1/1/T4"]
    with store.transaction():
        with pytest.raises(RuntimeError, match="after the batch"):
            store.mark_sent("m", 5)


def table_rows(store, table, cols="*"):
    return store._db.execute(f"SELECT {cols} FROM {table} ORDER BY 1").fetchall()


def test_bulk_writes_equal_one_by_one(folder):
    from matcher.streams.intake import record_batch

    items = [item(transient(tid="A"), folder, 1), item(transient(tid="B"), folder, 2),
             item(transient(tid="A"), folder, 3),  # same content, another line
             item(transient(tid="A", ra=12.0), folder, 4),  # updated within the batch
             item(transient(tid="B"), folder, 2),  # the very same item again: a duplicate
             item(gw(revision=2), folder, 5), item(gw(revision=1), folder, 6), item(gw(revision=2), folder, 7),
             item(b"{oops", folder, 8), item(transient(tid="C", dec=99.0), folder, 9),
             item(transient(tid="A", ra=13.0), folder, 10)]
    codec = NativeCodec()
    decoded = [decode_item(it, codec) for it in items]
    one, bulk = Store(folder / "one.sqlite"), Store(folder / "bulk.sqlite")
    with one.transaction() as tx:
        a = [record(tx, d) for d in decoded[:5]]
    with one.transaction() as tx:
        a += [record(tx, d) for d in decoded[5:]]
    with bulk.transaction() as tx:
        b = record_batch(tx, decoded[:5])
    with bulk.transaction() as tx:
        b += record_batch(tx, decoded[5:])
    assert a == b
    assert [x.effect if x not in (None, True, False) else x for x in a] == [
        "new", "new", "same", "updated", None, "new_event", "older", "same_revision", True, True, "updated"]
    for table in ("messages", "transients", "events", "revisions", "quarantine"):
        cols = "*" if table not in ("events", "quarantine") else "event_id, revision, state" if table == "events" else "raw, reason"
        if table == "messages":
            cols = "id, dedup, origin, kind, message_key, raw"
        assert table_rows(one, table, cols) == table_rows(bulk, table, cols), table
    one.close()
    bulk.close()


def _store_contents(s):
    rows = [(r.key, r.status, r.record) for r in s.results()]
    out = [(o.kind, o.key, o.payload) for o in s.outbox_after(0, 10_000)]
    return rows, out


def test_bulk_put_results_equals_one_by_one(tmp_path):
    # put_results is a faster path for the service; it must leave exactly what the same
    # put_result calls leave (results, statuses, outbox rows in order), unchanged rows skipped.
    (tmp_path / "map.fits").write_bytes(tiny_map_bytes())
    stores = [Store(tmp_path / f"s{i}" / "m.sqlite") for i in range(2)]
    recs = [("EV-TEST-1", 1, f"T{i}", {"class": "optical", "p_assoc": i / 10, "odds": i / 3, "rank": i})
            for i in range(5)]
    try:
        for s in stores:
            put(s, item(gw(revision=1), tmp_path, 1), *[item(transient(tid=f"T{i}"), tmp_path, 2 + i) for i in range(5)])
        with stores[0].transaction() as tx:
            for r in recs:
                tx.put_result(*r)
            tx.put_result(*recs[2])  # unchanged: nothing new
            tx.put_result("EV-TEST-1", 1, "T3", {**recs[3][3], "p_assoc": 0.99})
        with stores[1].transaction() as tx:
            assert len(tx.put_results(recs)) == 5
            assert tx.put_results([recs[2]]) == []
            changed = tx.put_results([("EV-TEST-1", 1, "T3", {**recs[3][3], "p_assoc": 0.99})])
            assert [r.key for r in changed] == ["EV-TEST-1/1/T3"]
            with pytest.raises(ValueError, match="given twice"):
                tx.put_results([recs[0], recs[0]])
        assert _store_contents(stores[0]) == _store_contents(stores[1])
    finally:
        for s in stores:
            s.close()


def test_multi_row_inserts_equal_one_statement_per_row():
    # _insert_rows packs rows into multi-row VALUES statements; sqlite3's executemany with one
    # row per statement is the reference: same table, same rowids, same upsert outcome.
    import sqlite3

    from matcher.store import _insert_rows

    for n in (0, 1, 49, 50, 51, 137, 1000):
        rows = [(f"k{i % 300}", i, f"v{i}") for i in range(n)]  # repeated keys exercise the upsert
        dbs = []
        for packed in (False, True):
            db = sqlite3.connect(":memory:")
            db.execute("CREATE TABLE t (k TEXT PRIMARY KEY, n INTEGER, v TEXT, c INTEGER)")
            tail = " ON CONFLICT(k) DO UPDATE SET n=excluded.n, v=excluded.v, c=c+1"
            if packed:
                _insert_rows(db, "INSERT INTO t VALUES", "(?,?,?,0)", rows, tail)
            else:
                db.executemany("INSERT INTO t VALUES (?,?,?,0)" + tail, rows)
            dbs.append(db.execute("SELECT rowid, * FROM t ORDER BY rowid").fetchall())
        assert dbs[0] == dbs[1], n


def test_none_bound_as_nan_is_the_same_null():
    # The bulk writes bind None as NaN (faster in Python's sqlite3). SQLite's own rule, the
    # reference here: a NaN bound to any column is stored as NULL, and a NOT NULL column refuses
    # it as it refuses None. Checked on the linked SQLite, for every column affinity.
    import math

    from matcher.store import _insert_rows

    db = sqlite3.connect(":memory:")
    db.execute("CREATE TABLE t (r REAL, s TEXT, i INTEGER, b BLOB, a)")
    db.execute("INSERT INTO t VALUES (?,?,?,?,?)", (math.nan,) * 5)
    assert db.execute("SELECT typeof(r), typeof(s), typeof(i), typeof(b), typeof(a) FROM t").fetchone() == (
        "null",) * 5
    assert db.execute("SELECT * FROM t").fetchone() == (None,) * 5
    db.execute("CREATE TABLE nn (x REAL NOT NULL)")
    for value in (None, math.nan):
        with pytest.raises(sqlite3.IntegrityError, match="NOT NULL"):
            db.execute("INSERT INTO nn VALUES (?)", (value,))
    # _insert_rows with None among other values: the table equals plain executemany's.
    rows = [(i, None if i % 3 else f"s{i}", None, b"\x00\xff" if i % 2 else None, 0.5 * i) for i in range(120)]
    for big in (False, True):
        db.execute("CREATE TABLE u (a INTEGER, b TEXT, c REAL, d BLOB, e REAL)")
        db.execute("CREATE TABLE ref (a INTEGER, b TEXT, c REAL, d BLOB, e REAL)")
        _insert_rows(db, "INSERT INTO u VALUES", "(?,?,?,?,?)", rows, big=big)
        db.executemany("INSERT INTO ref VALUES (?,?,?,?,?)", rows)
        got = db.execute("SELECT *, typeof(b), typeof(c), typeof(d) FROM u ORDER BY rowid").fetchall()
        assert got == db.execute("SELECT *, typeof(b), typeof(c), typeof(d) FROM ref ORDER BY rowid").fetchall()
        assert got[1][:5] == rows[1] and got[0][:5] == rows[0]
        db.execute("DROP TABLE u")
        db.execute("DROP TABLE ref")
