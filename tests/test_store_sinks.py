"""Publishing the outbox to sinks: never a duplicate line in a JSON Lines file across crashes
and restarts, a removed file rebuilt from the outbox, an SQLite table holding each key's latest state."""

from __future__ import annotations

import json
import sqlite3

import pytest

from matcher.store import Store
from matcher.streams.codecs import NativeCodec
from matcher.streams.intake import decode_item, record
from matcher.streams.raw import RawItem
from matcher.streams.sinks import JsonlSink, Publisher, Sink, SinkError, SqliteSink, sink_kinds
from streams_helpers import gw, line


@pytest.fixture
def store(tmp_path):
    s = Store(tmp_path / "s.sqlite")
    with s.transaction() as tx:
        record(tx, decode_item(RawItem.from_bytes(line(gw(state="withdrawn", localization=None, revision=0))),
                               NativeCodec()))
    yield s
    s.close()


def add_results(store, n, start=0, **fields):
    with store.transaction() as tx:
        for i in range(start, start + n):
            tx.put_result("EV-TEST-1", 0, f"T{i:03d}", {"p_assoc": 0.5, **fields})


def lines(path):
    return [json.loads(x) for x in path.read_text().splitlines()]


def test_registry_and_protocol(tmp_path):
    assert {"jsonl", "sqlite"} <= set(sink_kinds())
    assert isinstance(JsonlSink("m", tmp_path / "m.jsonl"), Sink)


def test_jsonl_appends_once_per_row(store, tmp_path):
    path = tmp_path / "out" / "matches.jsonl"
    add_results(store, 3)
    pub = Publisher(store, JsonlSink("m", path))
    assert pub.publish() == 3
    add_results(store, 2, start=3)
    assert pub.publish() == 2 and pub.publish() == 0
    pub.close()
    got = lines(path)
    assert [r["seq"] for r in got] == [1, 2, 3, 4, 5]
    assert [r["key"] for r in got] == [f"EV-TEST-1/0/T{i:03d}" for i in range(5)]
    assert store.sink_cursor("m") == 5
    assert path.read_text().startswith('{"seq":1,"event_id":"EV-TEST-1",')


def test_jsonl_crash_between_flush_and_cursor(store, tmp_path):
    path = tmp_path / "m.jsonl"
    add_results(store, 4)
    sink = JsonlSink("m", path)
    sink.open(0)
    sink.write(store.outbox_after(0))
    sink.flush()
    sink.close()  # crash: the rows are durable in the file, the store's cursor never moved
    assert store.sink_cursor("m") == 0
    pub = Publisher(store, JsonlSink("m", path))
    assert store.sink_cursor("m") == 4  # caught up from the file's own mark
    add_results(store, 1, start=4)
    pub.publish()
    pub.close()
    keys = [r["key"] for r in lines(path)]
    assert len(keys) == len(set(keys)) == 5
    # Even handed every row again, the sink writes none it already holds.
    sink = JsonlSink("m", path)
    assert sink.open(0) == 5
    sink.write(store.outbox_after(0))
    sink.flush()
    sink.close()
    assert len(lines(path)) == 5


def test_jsonl_partial_last_line_is_cut(store, tmp_path):
    path = tmp_path / "m.jsonl"
    add_results(store, 3)
    pub = Publisher(store, JsonlSink("m", path))
    pub.publish(max_rows=2)
    pub.close()
    with open(path, "ab") as fh:
        fh.write(b'{"seq":3,"event_id":"EV-TE')  # a crash mid-write
    pub = Publisher(store, JsonlSink("m", path))
    pub.publish()
    pub.close()
    assert [r["seq"] for r in lines(path)] == [1, 2, 3]


def test_jsonl_removed_file_is_rebuilt_and_foreign_file_refused(store, tmp_path):
    path = tmp_path / "m.jsonl"
    add_results(store, 3)
    pub = Publisher(store, JsonlSink("m", path))
    pub.publish()
    pub.close()
    path.unlink()
    pub = Publisher(store, JsonlSink("m", path))
    pub.publish()
    pub.close()
    assert [r["seq"] for r in lines(path)] == [1, 2, 3]
    other = tmp_path / "other.jsonl"
    other.write_text('{"seq": 999}\n')
    with pytest.raises(SinkError, match="beyond this store's outbox"):
        Publisher(store, JsonlSink("o", other))
    other.write_text("hello\n")
    with pytest.raises(SinkError, match="not a record with an integer seq"):
        Publisher(store, JsonlSink("o", other))


def test_status_changes_are_new_lines(store, tmp_path):
    path = tmp_path / "m.jsonl"
    add_results(store, 1)
    add_results(store, 1, p_assoc=0.7)  # the same key, a changed value
    pub = Publisher(store, JsonlSink("m", path))
    pub.publish()
    pub.close()
    got = lines(path)
    assert [(r["key"], r["p_assoc"]) for r in got] == [("EV-TEST-1/0/T000", 0.5), ("EV-TEST-1/0/T000", 0.7)]


def test_sqlite_sink_keeps_latest_per_key(store, tmp_path):
    db_path = tmp_path / "results.sqlite"
    add_results(store, 3)
    add_results(store, 1, p_assoc=0.9)
    pub = Publisher(store, SqliteSink("db", db_path))
    assert pub.publish() == 4
    pub.close()
    # Re-sending everything (a lost cursor) changes nothing, and an older row never wins.
    sink = SqliteSink("db", db_path)
    assert sink.open(0) == 4
    sink.write(list(reversed(store.outbox_after(0))))
    sink.flush()
    sink.close()
    db = sqlite3.connect(db_path)
    rows = db.execute("SELECT key, seq, status, record FROM matches ORDER BY key").fetchall()
    db.close()
    assert [(k, s, st) for k, s, st, _ in rows] == [("EV-TEST-1/0/T000", 4, "withdrawn"),
                                                     ("EV-TEST-1/0/T001", 2, "withdrawn"),
                                                     ("EV-TEST-1/0/T002", 3, "withdrawn")]
    assert json.loads(rows[0][3])["p_assoc"] == 0.9


def test_kinds_filter(store, tmp_path):
    add_results(store, 2)
    with store.transaction() as tx:
        tx.enqueue("hosts", "EV-TEST-1/0", {"hosts": []})
    pub = Publisher(store, JsonlSink("m", tmp_path / "m.jsonl"))
    assert pub.publish() == 3
    pub.close()
    assert len(lines(tmp_path / "m.jsonl")) == 2 and store.sink_cursor("m") == 3
    pub = Publisher(store, JsonlSink("h", tmp_path / "h.jsonl", kinds=("hosts",)))
    pub.publish()
    pub.close()
    assert lines(tmp_path / "h.jsonl") == [{"seq": 3, "hosts": []}]
