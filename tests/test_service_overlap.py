"""The loop that overlaps a batch's store commit with the next batch's poll and decode.

Our own contract (DESIGN.md "Streams, state and scale": nothing reaches a source or a sink
before the store has committed it): the overlapped loop must give exactly the results,
outbox and positions of the one-batch-at-a-time loop, stop without dropping what it read,
and report a failed commit as a rolled-back batch.
"""

from __future__ import annotations

import dataclasses
import json
import sqlite3

import pytest

from matcher.replay import default_config
from matcher.service import Service
from matcher.store import Store, StoreError
from matcher.streams.sinks import JsonlSink
from matcher.streams.sources import ArchiveSource
from service_scenarios import results_by_key, small_stream, write_archive


class _NoPollAhead:
    """An archive source that does not allow polling ahead: the service uses the plain loop."""

    def __init__(self, inner):
        self._inner = inner
        self.name, self.kind = inner.name, inner.kind

    def __getattr__(self, name):
        if name == "poll_ahead":
            raise AttributeError(name)
        return getattr(self._inner, name)


class _Recording:
    """Wraps a source; records the order of polls and commits."""

    poll_ahead = True

    def __init__(self, inner, log):
        self._inner, self.log = inner, log
        self.name, self.kind = inner.name, inner.kind

    def poll(self, max_items=500, timeout_s=0.0):
        items = self._inner.poll(max_items, timeout_s)
        if items:
            self.log.append(("poll", len(items)))
        return items

    def commit(self, settled):
        self.log.append(("commit", len(settled)))
        self._inner.commit(settled)

    def __getattr__(self, name):
        return getattr(self._inner, name)


@pytest.fixture(scope="module")
def stream(tmp_path_factory):
    folder = tmp_path_factory.mktemp("overlap")
    return write_archive(folder, small_stream(folder))


def _config(batch):
    cfg = default_config()
    return dataclasses.replace(cfg, service=dataclasses.replace(cfg.service, batch_size=batch))


def _run(tmp_path, name, source, batch=37, **run):
    out = tmp_path / name
    out.mkdir()
    with Service(_config(batch), sources=[source], sinks=[], extra_sinks=[JsonlSink("out", out / "m.jsonl")],
                 store_path=out / "s.sqlite") as svc:
        svc.run(until_finished=True, **run)
        stats = svc.stats
    with Store(out / "s.sqlite") as st:
        outbox = [(r.seq, r.kind, r.key, r.payload) for r in st.outbox_after(0, 10**9)]
        return results_by_key(st), outbox, st.positions(source.name), stats, (out / "m.jsonl").read_bytes()


def test_overlapped_loop_equals_the_plain_loop(stream, tmp_path):
    plain = _run(tmp_path, "plain", _NoPollAhead(ArchiveSource("replay", stream)))
    over = _run(tmp_path, "over", ArchiveSource("replay", stream))
    assert plain[0] and over[0] == plain[0]  # results, by key and value
    assert over[1] == plain[1]  # the outbox, row for row
    assert over[2] == plain[2]  # where the source resumes
    assert over[4] == plain[4]  # what the sink received, byte for byte
    assert over[3].batches == plain[3].batches
    assert dataclasses.asdict(over[3].totals) == dataclasses.asdict(plain[3].totals)


def test_overlapped_loop_commits_each_batch_after_the_next_poll_and_before_the_one_after(stream, tmp_path):
    log: list = []
    _run(tmp_path, "rec", _Recording(ArchiveSource("replay", stream), log), batch=50)
    polls = [i for i, e in enumerate(log) if e[0] == "poll"]
    commits = [i for i, e in enumerate(log) if e[0] == "commit"]
    assert len(polls) == len(commits) >= 3
    # Batch k is committed at the source after batch k+1 was polled, and before batch k+2 is.
    for k in range(len(commits)):
        if k + 1 < len(polls):
            assert polls[k + 1] < commits[k]
        if k + 2 < len(polls):
            assert commits[k] < polls[k + 2]
    assert [e[1] for e in log if e[0] == "poll"] == [e[1] for e in log if e[0] == "commit"]


def test_max_batches_and_stop_keep_every_batch_read(stream, tmp_path):
    # Stopping part-way (max_batches, or a stop requested from on_batch) stores every batch that
    # was polled; a second run continues and the end equals an uninterrupted run.
    whole = _run(tmp_path, "whole", ArchiveSource("replay", stream))
    out = tmp_path / "parts"
    out.mkdir()
    cfg = _config(37)
    sink = lambda: JsonlSink("out", out / "m.jsonl")  # noqa: E731
    with Service(cfg, sources=[ArchiveSource("replay", stream)], sinks=[], extra_sinks=[sink()],
                 store_path=out / "s.sqlite") as svc:
        svc.run(until_finished=True, max_batches=2)
        assert svc.stats.batches == 2
        first = svc.stats.totals.messages
        assert first == 74
    stops = []

    def stop_soon(svc, stats):
        if stats.messages:
            stops.append(stats.messages)
            svc.request_stop()

    with Service(cfg, sources=[ArchiveSource("replay", stream)], sinks=[], extra_sinks=[sink()],
                 store_path=out / "s.sqlite", on_batch=stop_soon) as svc:
        svc.run(until_finished=True)
        # the stop came after the first batch; the one already polled was stored too
        assert svc.stats.batches == 2
    with Service(cfg, sources=[ArchiveSource("replay", stream)], sinks=[], extra_sinks=[sink()],
                 store_path=out / "s.sqlite") as svc:
        svc.run(until_finished=True)
    with Store(out / "s.sqlite") as st:
        assert results_by_key(st) == whole[0]
        assert st.counts()["messages"] == len(stream.read_bytes().splitlines())
    lines = (out / "m.jsonl").read_bytes().splitlines()
    assert len(lines) == len(set(lines))  # nothing published twice
    assert {json.loads(x)["key"] for x in lines} == {json.loads(x)["key"] for x in whole[4].splitlines()}


def test_a_deferred_commit_is_visible_to_every_later_use(tmp_path):
    with Store(tmp_path / "s.sqlite") as st:
        with st.transaction_committed_later() as tx:
            tx.set_positions("src", {"a": "1"})
        # a read waits for the commit under way
        assert st.positions("src") == {"a": "1"}
        with st.transaction_committed_later() as tx:
            tx.set_positions("src", {"a": "2"})
        with st.transaction() as tx:  # a new transaction waits too
            tx.set_positions("src", {"b": "3"})
        assert st.positions("src") == {"a": "2", "b": "3"}
        with st.transaction_committed_later() as tx:
            tx.set_positions("src", {"a": "4"})
    with Store(tmp_path / "s.sqlite") as st:  # close() waited: the last one is durable
        assert st.positions("src")["a"] == "4"


def test_a_failed_deferred_commit_rolls_back_and_names_the_store(tmp_path):
    # SQLite checks deferred foreign keys at COMMIT (sqlite.org/foreignkeys.html, "Deferred
    # Foreign Key Constraints"): the commit fails on the writer thread and the error comes back.
    with Store(tmp_path / "s.sqlite") as st:
        with st.transaction_committed_later() as tx:
            tx.set_positions("src", {"a": "1"})
            tx._db.execute("PRAGMA defer_foreign_keys=ON")
            tx._db.execute("INSERT INTO events VALUES ('EV-X', 1, 'issued', 0.0, 999, 0.0, 0.0, NULL)")
        with pytest.raises(StoreError, match=r"s\.sqlite: commit failed, the batch was rolled back.*FOREIGN KEY"):
            st.wait_commit()
        assert st.positions("src") == {}
        assert st.pragma("foreign_keys") == 1
        with st.transaction() as tx:  # the store is usable again
            tx.set_positions("src", {"a": "2"})
        assert st.positions("src") == {"a": "2"}


def test_a_failed_commit_in_the_loop_raises_and_keeps_nothing_of_the_batch(stream, tmp_path, monkeypatch):
    # The service rebuilds its state from the store and raises; a new service then continues.
    from matcher import store as store_mod

    calls = {"n": 0}
    real = store_mod.Transaction.set_positions

    def set_positions(self, source, positions):
        real(self, source, positions)
        if source == "replay":
            calls["n"] += 1
            if calls["n"] == 3:  # the third batch breaks a deferred foreign key: its COMMIT fails
                self._db.execute("PRAGMA defer_foreign_keys=ON")
                self._db.execute("INSERT INTO events VALUES ('EV-BROKEN', 1, 'issued', 0.0, 1000000000, 0.0, 0.0, NULL)")

    monkeypatch.setattr(store_mod.Transaction, "set_positions", set_positions)
    out = tmp_path / "fail"
    out.mkdir()
    with Service(_config(37), sources=[ArchiveSource("replay", stream)], sinks=[], store_path=out / "s.sqlite") as svc:
        with pytest.raises(StoreError, match="commit failed"):
            svc.run(until_finished=True)
        assert svc.stats.batches == 2  # the two before it were finished
    monkeypatch.setattr(store_mod.Transaction, "set_positions", real)
    with Store(out / "s.sqlite") as st:
        assert st.counts()["messages"] == 74
        assert "EV-BROKEN" not in {r[0] for r in st._db.execute("SELECT event_id FROM events")}
    whole = _run(tmp_path, "whole", ArchiveSource("replay", stream))
    with Service(_config(37), sources=[ArchiveSource("replay", stream)], sinks=[], store_path=out / "s.sqlite") as svc:
        svc.run(until_finished=True)
    with Store(out / "s.sqlite") as st:
        assert results_by_key(st) == whole[0]


def test_sqlite_reports_a_deferred_foreign_key_at_commit(tmp_path):
    # The premise of the two tests above, checked on plain sqlite3 (sqlite.org/foreignkeys.html).
    db = sqlite3.connect(tmp_path / "p.sqlite", isolation_level=None)
    db.execute("PRAGMA foreign_keys=ON")
    db.execute("CREATE TABLE a (id INTEGER PRIMARY KEY)")
    db.execute("CREATE TABLE b (x INTEGER REFERENCES a(id))")
    db.execute("BEGIN")
    db.execute("PRAGMA defer_foreign_keys=ON")
    db.execute("INSERT INTO b VALUES (5)")
    with pytest.raises(sqlite3.IntegrityError, match="FOREIGN KEY"):
        db.execute("COMMIT")
    db.execute("ROLLBACK")


def test_a_failed_deferred_write_fails_the_transaction_at_the_next_use(tmp_path):
    # A bulk write handed to the writer thread that SQLite refuses (NOT NULL, sqlite.org/lang_createtable.html)
    # surfaces at the next use of the store inside the block, naming the store; nothing of the block is kept.
    with Store(tmp_path / "s.sqlite") as st:
        with pytest.raises(StoreError, match=r"s\.sqlite: write failed, the batch was rolled back.*NOT NULL"):
            with st.transaction() as tx:
                tx.set_positions("src", {"a": "1"})
                tx._write_rows("INSERT INTO positions VALUES", "(?,?,?,?)", [("src", "b", None, 0.0)])
                st.positions("src")  # a read: waits for the writer, which failed
        assert st.positions("src") == {}
        with st.transaction() as tx:
            tx.set_positions("src", {"a": "2"})
        assert st.positions("src") == {"a": "2"}
        # the same failure found only at the commit
        with pytest.raises(StoreError, match="rolled back.*NOT NULL"):
            with st.transaction() as tx:
                tx._write_rows("INSERT INTO positions VALUES", "(?,?,?,?)", [("src", "c", None, 0.0)])
        assert st.positions("src") == {"a": "2"}


def test_bulk_rows_are_written_alike_in_every_statement_size(tmp_path):
    # _insert_rows with big statements, fifty-row ones and single rows: the same table, row for row,
    # as plain executemany (sqlite3's own, the reference).
    from matcher.store import _insert_rows

    rows = [(i, f"t{i}", i * 0.5) for i in range(2347)]
    for big in (False, True):
        db = sqlite3.connect(tmp_path / f"r{big}.sqlite")
        db.execute("CREATE TABLE t (a INTEGER, b TEXT, c REAL)")
        db.execute("CREATE TABLE ref (a INTEGER, b TEXT, c REAL)")
        _insert_rows(db, "INSERT INTO t VALUES", "(?,?,?)", rows, big=big)
        db.executemany("INSERT INTO ref VALUES (?,?,?)", rows)
        assert db.execute("SELECT * FROM t ORDER BY rowid").fetchall() == db.execute(
            "SELECT * FROM ref ORDER BY rowid").fetchall()
        db.close()
