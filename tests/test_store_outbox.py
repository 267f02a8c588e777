"""Store.outbox_after serves the rows a batch just committed from memory: they must be the table's rows.

The reference is the outbox table itself, read with plain SQL on a second connection
(sqlite3, which sees only committed rows: WAL readers, sqlite.org/wal.html).
"""

from __future__ import annotations

import random
import sqlite3

import pytest

from matcher import store as store_module
from matcher.store import OutboxRow, Store, StoreError
from test_store import folder, item, put  # noqa: F401  (fixtures and helpers)
from streams_helpers import gw


def table(path, after, limit):
    with sqlite3.connect(path) as con:
        return [OutboxRow(*r) for r in con.execute(
            "SELECT seq, kind, key, payload FROM outbox WHERE seq > ? ORDER BY seq LIMIT ?", (after, limit))]


def every_read_equals_the_table(st, limits=(1, 3, 1000)):
    last = st.last_seq()
    for after in range(0, last + 2):
        for limit in limits:
            assert st.outbox_after(after, limit) == table(st.path, after, limit), (after, limit)


def test_committed_rows_are_served_as_the_table_holds_them(folder, monkeypatch):  # noqa: F811
    monkeypatch.setattr(store_module, "OUTBOX_KEPT", 7)  # fewer kept than written: older reads go to the table
    rng = random.Random(5)
    with Store(folder / "s.sqlite") as st:
        put(st, item(gw(), folder, 1))
        n = 0
        for batch in range(6):
            later = batch % 2 == 1
            opened = st.transaction_committed_later() if later else st.transaction()
            with opened as tx:
                items = []
                for _ in range(rng.randint(1, 5)):
                    items.append(("EV-TEST-1", 1, f"T{n}", {"p_assoc": rng.random()}))
                    n += 1
                tx.put_results(items)
                tx.enqueue("event", f"note{batch}", {"batch": batch})
            every_read_equals_the_table(st)
        assert st.last_seq() > 7 and len(st._outbox_recent) == 7


def test_rolled_back_rows_are_never_served(folder):  # noqa: F811
    with Store(folder / "s.sqlite") as st:
        put(st, item(gw(), folder, 1))
        with st.transaction() as tx:
            tx.put_results([("EV-TEST-1", 1, "A", {"p_assoc": 0.5})])
        with pytest.raises(ValueError, match="boom"):
            with st.transaction() as tx:
                tx.put_results([("EV-TEST-1", 1, "B", {"p_assoc": 0.5})])
                tx.enqueue("event", "x", {})
                raise ValueError("boom")
        every_read_equals_the_table(st)
        # A deferred commit that fails (a deferred foreign key, checked at COMMIT:
        # sqlite.org/foreignkeys.html) keeps none of its rows either.
        with st.transaction_committed_later() as tx:
            tx.put_results([("EV-TEST-1", 1, "C", {"p_assoc": 0.5})])
            tx._db.execute("PRAGMA defer_foreign_keys=ON")
            tx._db.execute("INSERT INTO events VALUES ('EV-X', 1, 'issued', 0.0, 999, 0.0, 0.0, NULL)")
        with pytest.raises(StoreError, match="commit failed"):
            st.wait_commit()
        every_read_equals_the_table(st)
        with st.transaction() as tx:  # the next rows follow on, and are served again
            tx.put_results([("EV-TEST-1", 1, "D", {"p_assoc": 0.5})])
        every_read_equals_the_table(st)
        assert [r.key for r in st.outbox_after(0)] == ["EV-TEST-1/1/A", "EV-TEST-1/1/D"]


def test_rows_another_connection_wrote_are_read_from_the_table(folder):  # noqa: F811
    path = folder / "s.sqlite"
    with Store(path) as st:
        put(st, item(gw(), folder, 1))
        with st.transaction() as tx:
            tx.put_results([("EV-TEST-1", 1, "A", {"p_assoc": 0.5})])
        with Store(path) as other:  # a second writer of the same file
            with other.transaction() as tx:
                tx.enqueue("event", "from-other", {"n": 1})
        every_read_equals_the_table(st)
        with st.transaction() as tx:  # numbered after the other's row: the run starts again
            tx.put_results([("EV-TEST-1", 1, "B", {"p_assoc": 0.5})])
        every_read_equals_the_table(st)
        assert [r.key for r in st.outbox_after(0)][-2:] == ["from-other", "EV-TEST-1/1/B"]
