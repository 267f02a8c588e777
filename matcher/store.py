"""SQLite state: the service's source of truth across restarts.

One file holds every accepted message (raw bytes and where they came from), the
localizations they referenced (exact bytes), GW events and all their revisions,
transients, results under deterministic keys, quarantined input (raw bytes,
byte-identical, with origin and reason), the sources' positions, and an outbox of
outputs to publish.

Durability: WAL journal with ``synchronous=FULL`` (with NORMAL, a committed
transaction can be rolled back by a power loss), and one ``BEGIN IMMEDIATE``
transaction per batch. The service loop does, in this order::

    items = source.poll()                      # raw bytes + origin + position
    decoded = [decode(item) for item in items] # message, or a reason to quarantine
    with store.transaction() as tx:            # one transaction per batch:
        tx.add_message(...) / tx.quarantine(...)    messages and state
        tx.put_result(...)                          results (+ outbox rows)
        tx.set_positions(source.name, positions_of(items))
    source.commit(settled)                     # only now: move files, commit offsets
    publish_pending(store, sink)               # outbox → sinks, then mark sent

A crash anywhere re-delivers at most the last batch; the dedup key (SHA-256 of the
origin and the raw bytes) makes re-delivered messages no-ops, and results are
upserts under ``(event_id, revision, transient_id)``, so nothing is lost or doubled.

Threads: bulk writes of a transaction (message and transient rows, positions) and, for
:meth:`Store.transaction_committed_later`, its COMMIT run in order on the store's writer
thread; any other use of the connection first waits for the writer (``Store._db``), so the
connection is never used by two threads at once. A deferred write that fails fails its
transaction at the next use, as :class:`StoreError`, and the transaction is rolled back.

The outbox rows a transaction wrote are kept in memory once it has committed, and
:meth:`Store.outbox_after` serves them from there (what the sinks read next); anything not
kept is read from the table.

Lifecycle rules the store enforces itself, so no caller can break them:

- a GW revision older than the event's current one is stored but does not replace it;
- a second message with an already stored ``(event_id, revision)`` is kept as a message
  but changes nothing;
- a result of a withdrawn event is stored as ``withdrawn``; a result of a revision older
  than the current one as ``superseded``.

Times: ``received_at`` and ``stored_at`` are Unix seconds; event and transient times
are GPS seconds (as in :mod:`matcher.streams.messages`).
"""

from __future__ import annotations

import base64
import json
import math
import os
import queue
import re
import sqlite3
import threading
import time
import urllib.parse
from contextlib import contextmanager
from dataclasses import dataclass
from itertools import chain
from typing import TYPE_CHECKING, Any, Callable, Iterator, Mapping, NamedTuple, Sequence

import orjson

from matcher.errors import InputError
from matcher.streams.messages import GWAlert, Localization, Message, TransientReport
from matcher.streams.raw import RawItem, dedup_key

if TYPE_CHECKING:  # only named in annotations: the store imports no sky-map code (the decode process imports it)
    from matcher.streams.localization import LoadedLocalization

__all__ = [
    "Store",
    "Transaction",
    "StoreError",
    "StoredMessage",
    "StoredRevision",
    "StoredTransient",
    "ResultRow",
    "QuarantineRow",
    "OutboxRow",
    "result_key",
    "RESULT_STATUSES",
    "SCHEMA_VERSION",
]

SCHEMA_VERSION = 1
# The connection's page cache (KiB). A batch's pages stay in memory until its commit writes
# them once, instead of spilling the default 2 MiB to the WAL mid-batch: ~5 % more reports/s
# in ``matcher bench service`` here.
CACHE_KIB = 65536
# Rows a statement for bulk writes on the writer thread (see _insert_rows).
BIG_ROWS = 1000
# Committed outbox rows kept in memory for the sinks to read (:meth:`Store.outbox_after`).
OUTBOX_KEPT = 50_000
RESULT_STATUSES = ("current", "superseded", "withdrawn")


class StoreError(InputError):
    """The store file cannot be used (wrong schema version, not SQLite, WAL unavailable)."""


def result_key(event_id: str, revision: int, transient_id: str) -> str:
    """The deterministic key of a result: ``EVENT/REVISION/TRANSIENT`` with ids percent-encoded.

    Percent-encoding ``/`` and ``%`` keeps the key unambiguous whatever the ids contain.

    Examples
    --------
    >>> result_key("S260101a", 2, "AT 2026abc")
    'S260101a/2/AT%202026abc'
    """
    return f"{_quote(event_id)}/{int(revision)}/{_quote(transient_id)}"


_UNRESERVED = re.compile(r"[A-Za-z0-9_.~-]*")


def _quote(text: str) -> str:
    """``urllib.parse.quote(text, safe='')``, without the call for the usual ids (letters, digits, ``_.~-``)."""
    return text if _UNRESERVED.fullmatch(text) else urllib.parse.quote(text, safe="")


# The dedup key (SHA-256 of origin and bytes) is unique by itself. Its index leads with the origin's
# line number or offset (-1 for whole files) so that a replay appends to the index instead of
# writing a random page per message: 200k inserts in batches of 500 took 0.9 s instead of 3.7 s
# (measured with plain sqlite3 on this machine). Statements are split at ";": none in comments.
_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (name TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS messages (
    id INTEGER PRIMARY KEY,
    dedup BLOB NOT NULL, origin_seq INTEGER NOT NULL,
    source TEXT NOT NULL, origin_kind TEXT NOT NULL, origin_where TEXT NOT NULL,
    origin_part INTEGER, origin_offset INTEGER, origin TEXT NOT NULL,
    codec TEXT NOT NULL, received_at REAL NOT NULL, stored_at REAL NOT NULL,
    kind TEXT NOT NULL, message_key TEXT NOT NULL,
    raw BLOB NOT NULL
);
CREATE UNIQUE INDEX IF NOT EXISTS messages_dedup ON messages(origin_seq, dedup);
CREATE TABLE IF NOT EXISTS localizations (
    sha256 TEXT PRIMARY KEY, data BLOB NOT NULL, nbytes INTEGER NOT NULL,
    where_from TEXT NOT NULL, stored_at REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS events (
    event_id TEXT PRIMARY KEY, revision INTEGER NOT NULL, state TEXT NOT NULL,
    merger_time REAL NOT NULL, message_id INTEGER NOT NULL REFERENCES messages(id),
    first_seen REAL NOT NULL, updated_at REAL NOT NULL, expires_at REAL
);
CREATE TABLE IF NOT EXISTS revisions (
    event_id TEXT NOT NULL, revision INTEGER NOT NULL, message_id INTEGER NOT NULL REFERENCES messages(id),
    state TEXT NOT NULL, merger_time REAL NOT NULL, merger_time_iso TEXT NOT NULL,
    far_per_year REAL, p_astro REAL, source_probs TEXT,
    localization_sha TEXT REFERENCES localizations(sha256), localization_ref TEXT,
    extra TEXT NOT NULL, received_at REAL NOT NULL,
    PRIMARY KEY (event_id, revision)
);
CREATE TABLE IF NOT EXISTS transients (
    transient_id TEXT PRIMARY KEY, message_id INTEGER NOT NULL REFERENCES messages(id),
    class TEXT NOT NULL, ra_deg REAL NOT NULL, dec_deg REAL NOT NULL, pos_err_deg REAL,
    time REAL NOT NULL, time_iso TEXT NOT NULL, last_nondetection REAL,
    redshift REAL, redshift_err REAL, distance_mpc REAL, distance_err_mpc REAL,
    localization_sha TEXT REFERENCES localizations(sha256), localization_ref TEXT,
    extra TEXT NOT NULL, content TEXT NOT NULL, reports INTEGER NOT NULL, received_at REAL NOT NULL
);
CREATE INDEX IF NOT EXISTS transients_time ON transients(time);
CREATE TABLE IF NOT EXISTS results (
    key TEXT PRIMARY KEY, event_id TEXT NOT NULL, revision INTEGER NOT NULL, transient_id TEXT NOT NULL,
    status TEXT NOT NULL, class TEXT, p_assoc REAL, fap REAL, odds REAL, rank INTEGER,
    record TEXT NOT NULL, seq INTEGER NOT NULL, updated_at REAL NOT NULL
);
CREATE INDEX IF NOT EXISTS results_event ON results(event_id, revision);
CREATE TABLE IF NOT EXISTS quarantine (
    id INTEGER PRIMARY KEY,
    dedup BLOB NOT NULL UNIQUE,
    source TEXT NOT NULL, origin_kind TEXT NOT NULL, origin_where TEXT NOT NULL,
    origin_part INTEGER, origin_offset INTEGER, origin TEXT NOT NULL,
    codec TEXT NOT NULL, field TEXT, reason TEXT NOT NULL,
    received_at REAL NOT NULL, stored_at REAL NOT NULL,
    size INTEGER NOT NULL, truncated INTEGER NOT NULL, raw BLOB NOT NULL
);
CREATE TABLE IF NOT EXISTS positions (
    source TEXT NOT NULL, stream TEXT NOT NULL, token TEXT NOT NULL, updated_at REAL NOT NULL,
    PRIMARY KEY (source, stream)
);
CREATE TABLE IF NOT EXISTS outbox (
    seq INTEGER PRIMARY KEY AUTOINCREMENT, kind TEXT NOT NULL, key TEXT NOT NULL,
    payload TEXT NOT NULL, created_at REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS sink_cursors (
    sink TEXT PRIMARY KEY, sent_seq INTEGER NOT NULL, updated_at REAL NOT NULL
);
"""


class StoredMessage(NamedTuple):  # a named tuple: built for every message or result, ~5x cheaper
    """What storing an accepted message did.

    Attributes
    ----------
    message_id : int
    kind : str
        ``gw_alert`` or ``transient``.
    effect : str
        For GW alerts: ``new_event`` (first revision seen), ``newer`` (became the current
        revision), ``older`` (kept, not current), ``same_revision`` (that revision was already
        stored from another message; kept as a message, changes nothing). For transients:
        ``new``, ``updated`` (a later report of a known id, different content; it replaces
        the stored one), ``same`` (identical content).
    previous_revision : int or None
        The event's current revision before this message (GW alerts).
    """

    message_id: int
    kind: str
    effect: str
    previous_revision: int | None = None

    @property
    def changes_state(self) -> bool:
        return self.effect in ("new_event", "newer", "new", "updated")


@dataclass(frozen=True)
class StoredRevision:
    """A stored GW revision, rebuilt into a :class:`GWAlert`.

    Attributes
    ----------
    alert : GWAlert
    localization_sha : str or None
        SHA-256 of the localization bytes held in the store (:meth:`Store.localization_data`).
    message_id : int
    is_current : bool
    event_state : str
        The state of the event's current revision.
    expires_at : float or None, GPS s
    received_at : float or None, Unix s
        When the revision's message was received.
    """

    alert: GWAlert
    localization_sha: str | None
    message_id: int
    is_current: bool
    event_state: str
    expires_at: float | None
    received_at: float | None = None


@dataclass(frozen=True)
class StoredTransient:
    """A stored transient, rebuilt into a :class:`TransientReport`, and how often it was reported."""

    report: TransientReport
    localization_sha: str | None
    message_id: int
    reports: int


class ResultRow(NamedTuple):  # a named tuple: built for every message or result, ~5x cheaper
    """A stored result; ``record`` is the full output record (it includes ``key`` and ``status``)."""

    key: str
    event_id: str
    revision: int
    transient_id: str
    status: str
    record: Mapping[str, Any]
    seq: int


@dataclass(frozen=True)
class QuarantineRow:
    """Rejected input: the exact bytes, where they came from, and why."""

    id: int
    source: str
    origin: str
    origin_kind: str
    origin_where: str
    origin_part: int | None
    origin_offset: int | None
    codec: str
    field: str | None
    reason: str
    received_at: float
    size: int
    truncated: bool
    raw: bytes


class OutboxRow(NamedTuple):  # a named tuple: built for every message or result, ~5x cheaper
    """One output to publish: ``seq`` increases with every change; ``payload`` is JSON text."""

    seq: int
    kind: str
    key: str
    payload: str


def _jsonable(value: Any) -> Any:
    """Plain JSON values: numpy scalars and arrays unwrapped, non-finite floats as null."""
    if isinstance(value, Mapping):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if hasattr(value, "tolist") and callable(value.tolist):  # numpy scalars and arrays
        return _jsonable(value.tolist())
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


# orjson writes the same JSON values as the standard library, about six times faster (a result record:
# 2.3 µs instead of 13 µs, measured here); numbers keep their exact value (shortest round-trip form,
# e.g. 1e-05 is written 0.00001). Non-finite floats become null, like _jsonable.
_OPTS = orjson.OPT_SORT_KEYS


def _dumps_plain(value: Any) -> tuple[str, bool]:
    """Canonical JSON text, and whether ``value`` was plain JSON already (str keys, no numpy, finite)."""
    try:
        return orjson.dumps(value, option=_OPTS | orjson.OPT_PASSTHROUGH_SUBCLASS).decode(), True
    except TypeError:  # orjson.JSONEncodeError: numpy values, non-str keys, subclasses, huge integers
        plain = _jsonable(value)
    try:
        return orjson.dumps(plain, option=_OPTS).decode(), False
    except TypeError:  # integers beyond 64 bits: the standard library's encoder takes them
        return json.dumps(plain, sort_keys=True, separators=(",", ":"), allow_nan=False), False


def _dumps(value: Any) -> str:
    """Canonical JSON text (sorted keys, no spaces); numpy values and non-finite floats converted."""
    return _dumps_plain(value)[0]


def _chunks(seq, size: int = 500):
    for i in range(0, len(seq), size):
        yield seq[i:i + size]


_NAN = float("nan")


def _nulls_as_nan(rows: Sequence[Sequence]) -> list[tuple]:
    """The rows with ``None`` given as NaN: the same NULL in the table, bound ~4x faster.

    SQLite stores a NaN bound to any column as NULL (a NOT NULL column refuses it just as it
    refuses None; the store's tests hold this). Python's sqlite3 binds ``None`` through its
    adapter lookup, ~1.0 µs a value against ~0.25 µs for a float, holding Python's lock
    (measured here with plain ``executemany``); a report's bulk rows carry ~8 such values, and
    the loop waits for that lock while the writer thread binds them.
    """
    nan = _NAN
    return [tuple([nan if v is None else v for v in r]) if None in r else r for r in rows]


def _insert_rows(db, head: str, row: str, rows: Sequence[Sequence], tail: str = "", *, big: bool = False) -> None:
    """``db.executemany(f"{head} {row}{tail}", rows)``, several rows to a statement.

    The same rows in the same order (a multi-row ``VALUES``; an upsert ``tail`` applies to
    each row), with fewer statement steps: 4.7 → 3.9 µs a row for the transients table,
    measured here; fifty rows a statement (at most 999 parameters, SQLite's old default
    limit). With ``big`` (the writer thread), up to ``BIG_ROWS`` rows a statement within the
    connection's limit, then fifty, then one: each statement is one step SQLite takes
    without Python's lock, so the thread needs that lock back less often.
    """
    if not rows:
        return
    rows = _nulls_as_nan(rows)
    width = max(1, row.count("?"))
    sizes = [max(1, min(50, 999 // width)), 1]
    if big:
        sizes.insert(0, max(1, min(BIG_ROWS, db.getlimit(sqlite3.SQLITE_LIMIT_VARIABLE_NUMBER) // width)))
    start = 0
    for per in sizes:
        full = start + (len(rows) - start) // per * per
        if full > start:
            if per == 1:
                db.executemany(f"{head} {row}{tail}", rows[start:full])
            else:
                stmt = f"{head} {','.join([row] * per)}{tail}"
                db.executemany(stmt, [list(chain.from_iterable(rows[i:i + per])) for i in range(start, full, per)])
        start = full


def _loc_ref(loc: Localization | None) -> str | None:
    if loc is None:
        return None
    if loc.path is not None:
        return json.dumps({"path": loc.path, "base_dir": loc.base_dir})
    if loc.url is not None:
        return json.dumps({"url": loc.url})
    return json.dumps({"fits_base64": True})


def _loc_from_ref(ref: str | None, data: bytes | None) -> Localization | None:
    if ref is None:
        return None
    d = json.loads(ref)
    if "path" in d:
        return Localization(path=d["path"], base_dir=d.get("base_dir"))
    if "url" in d:
        return Localization(url=d["url"])
    return Localization(fits_base64=base64.b64encode(data).decode("ascii") if data is not None else None)


class Transaction:
    """Writes inside one ``BEGIN IMMEDIATE`` transaction; get one from :meth:`Store.transaction`."""

    def __init__(self, store: Store):
        self._store = store
        self._now = time.time()

    @property
    def _db(self) -> sqlite3.Connection:
        return self._store._db  # after the writer thread has run what this transaction handed it

    def _write_rows(self, head: str, row: str, rows: Sequence[Sequence], tail: str = "") -> None:
        """:func:`_insert_rows` on the writer thread (bulk rows of this transaction; nothing read back)."""
        if rows:
            self._store._writer.submit(lambda conn: _insert_rows(conn, head, row, rows, tail, big=True))

    def _write_many(self, sql: str, rows: Sequence[Sequence]) -> None:
        """``executemany(sql, rows)`` on the writer thread (nothing read back)."""
        if rows:
            self._store._writer.submit(lambda conn: conn.executemany(sql, _nulls_as_nan(rows)))

    # ----------------------------------------------------------------- input
    def _origin_columns(self, item: RawItem):
        o = item.origin
        return (o.source, o.kind, o.where, o.part, o.offset, str(o))

    def _put_localization(self, loc: LoadedLocalization | None) -> str | None:
        if loc is None:
            return None
        self._db.execute("INSERT OR IGNORE INTO localizations VALUES (?, ?, ?, ?, ?)",
                         (loc.sha256, loc.data, len(loc.data), loc.where, self._now))
        return loc.sha256

    def add_message(self, item: RawItem, codec: str, message: Message,
                    localization: LoadedLocalization | None = None) -> StoredMessage | None:
        """Store an accepted message and apply it to the event or transient state.

        Parameters
        ----------
        item : RawItem
            Its bytes and origin are stored as they are.
        codec : str
            The codec that decoded it.
        message : GWAlert or TransientReport
        localization : LoadedLocalization, optional
            The message's loaded localization (its bytes are stored once, by SHA-256).

        Returns
        -------
        StoredMessage or None
            ``None`` when the same bytes from the same origin are already stored (a re-delivery).
        """
        return self.add_messages([(item, codec, message, localization)])[0]

    def _apply_alert(self, mid: int, a: GWAlert, sha: str | None, received_at: float) -> StoredMessage:
        db = self._db
        cur = db.execute(
            "INSERT OR IGNORE INTO revisions VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)",
            (a.event_id, a.revision, mid, a.state, a.merger_time, a.merger_time_iso, a.far_per_year, a.p_astro,
             None if a.source_probs is None else _dumps(a.source_probs), sha, _loc_ref(a.localization),
             _dumps(a.extra), received_at))
        row = db.execute("SELECT revision FROM events WHERE event_id = ?", (a.event_id,)).fetchone()
        prev = None if row is None else row[0]
        if cur.rowcount == 0:
            return StoredMessage(mid, "gw_alert", "same_revision", prev)
        if prev is None:
            db.execute("INSERT INTO events VALUES (?,?,?,?,?,?,?,NULL)",
                       (a.event_id, a.revision, a.state, a.merger_time, mid, self._now, self._now))
            return StoredMessage(mid, "gw_alert", "new_event", None)
        if a.revision > prev:
            db.execute("UPDATE events SET revision = ?, state = ?, merger_time = ?, message_id = ?, updated_at = ?"
                       " WHERE event_id = ?", (a.revision, a.state, a.merger_time, mid, self._now, a.event_id))
            return StoredMessage(mid, "gw_alert", "newer", prev)
        return StoredMessage(mid, "gw_alert", "older", prev)

    @staticmethod
    def transient_row(t: TransientReport, sha: str | None, extra_text: str | None = None) -> tuple:
        """The transients row's values for report ``t`` (``sha``: its stored localization's);
        ``extra_text``: the last value (``t.extra`` as canonical JSON), when already known."""
        if extra_text is None:
            extra_text = _dumps(t.extra) if t.extra else "{}"
        return (t.klass, t.ra_deg, t.dec_deg, t.pos_err_deg, t.time, t.time_iso, t.last_nondetection,
                t.redshift, t.redshift_err, t.distance_mpc, t.distance_err_mpc, sha, _loc_ref(t.localization),
                extra_text)

    @staticmethod
    def transient_values(t: TransientReport, sha: str | None) -> tuple[tuple, str]:
        """:meth:`transient_row`, and its canonical text (the ``content`` column, which tells a changed
        report from the same one)."""
        values = Transaction.transient_row(t, sha)
        # What "the same report" means: every stored field equal. orjson writes floats in their shortest
        # round-trip form and strings as they are, so equal texts mean equal fields (stores written before
        # held repr() here: a report re-delivered into one is seen as updated once, and re-scored to the
        # same records, which are then not written again).
        return values, orjson.dumps(values).decode()

    def add_messages(self, entries: Sequence[tuple[RawItem, str, Message, LoadedLocalization | None]]
                     ) -> list[StoredMessage | None]:
        """:meth:`add_message` for a whole batch at once, with the same results, in fewer statements.

        Parameters
        ----------
        entries : sequence of (item, codec, message, localization[, prepared])
            ``prepared``: ``(dedup key, extra_text, content, ...)`` of a report without a localization,
            computed already (on the decode process: the dedup key, and of ``transient_values(message,
            None)`` the last value and the text; what follows is not the store's).

        Returns
        -------
        list of StoredMessage or None
            One per entry, in order (``None``: already stored, or repeated earlier in the batch).
        """
        db = self._db
        now = self._now
        out: list[StoredMessage | None] = [None] * len(entries)
        keys, seqs, pairs, tids = [], [], [], set()
        given = [entry[4] if len(entry) > 4 else None for entry in entries]  # what the decode process computed
        for entry, prepared in zip(entries, given):
            item, message = entry[0], entry[2]
            o = item.origin
            key = dedup_key(item.data, o) if prepared is None else prepared[0]  # item.dedup_key
            seq = -1 if o.offset is None else int(o.offset)  # the dedup index's leading column (-1: a whole file)
            keys.append(key)
            seqs.append(seq)
            pairs += (seq, key)
            if isinstance(message, TransientReport):
                tids.add(message.transient_id)
        existing: set[bytes] = set()
        # A batch read past every stored line or offset (a replay into a new store, a live stream)
        # can have nothing stored yet: one look at the index's end instead of a search per pair.
        top = db.execute("SELECT MAX(origin_seq) FROM messages").fetchone()[0] if seqs else None
        if top is not None and min(seqs) <= top:
            for chunk in _chunks(pairs, 500):
                existing.update(r[0] for r in db.execute(  # a join, so that SQLite searches the index per pair
                    f"WITH v(s, d) AS (VALUES {','.join(['(?,?)'] * (len(chunk) // 2))})"
                    " SELECT m.dedup FROM v JOIN messages m ON m.origin_seq = v.s AND m.dedup = v.d", chunk))
        known: dict[str, str] = {}
        for chunk in _chunks(list(tids)):
            known.update(db.execute(f"SELECT transient_id, content FROM transients WHERE transient_id IN"
                                    f" ({','.join('?' * len(chunk))})", chunk))
        next_id = db.execute("SELECT COALESCE(MAX(id), 0) FROM messages").fetchone()[0] + 1
        # One pass: the message rows, and what each new report does to its transient (the rows are
        # written below in the order the foreign keys need: messages, then alerts and transients).
        rows, alerts, inserts, updates, same = [], [], [], [], []
        for i, entry in enumerate(entries):
            item, codec, message, loc = entry[:4]
            key = keys[i]
            if key in existing:
                continue
            existing.add(key)
            mid = next_id
            next_id += 1
            o = item.origin
            sha = None if loc is None else self._put_localization(loc)
            if isinstance(message, TransientReport):
                tid = message.transient_id
                rows.append((mid, key, seqs[i], o.source, o.kind, o.where, o.part, o.offset, str(o), codec,
                             item.received_at, now, "transient", tid, item.data))
                prepared = given[i] if sha is None else None
                if prepared is None:
                    values, content = self.transient_values(message, sha)
                else:  # the row's text and extra as the decode process computed them
                    values, content = self.transient_row(message, None, prepared[1]), prepared[2]
                prev = known.get(tid)
                if prev is None:
                    inserts.append((tid, mid, *values, content, item.received_at))
                    effect = "new"
                elif prev != content:
                    updates.append((mid, *values, content, item.received_at, tid))
                    effect = "updated"
                else:
                    same.append((tid,))
                    effect = "same"
                known[tid] = content
                out[i] = StoredMessage(mid, "transient", effect)
            elif isinstance(message, GWAlert):
                rows.append((mid, key, seqs[i], o.source, o.kind, o.where, o.part, o.offset, str(o), codec,
                             item.received_at, now, "gw_alert", f"{message.event_id}#{message.revision}", item.data))
                alerts.append((i, mid, message, sha, item.received_at))
            else:
                raise TypeError(f"expected a GWAlert or TransientReport, got {type(message).__name__}")
        self._write_rows("INSERT INTO messages (id, dedup, origin_seq, source, origin_kind, origin_where,"
                         " origin_part, origin_offset, origin, codec, received_at, stored_at, kind, message_key, raw)"
                         " VALUES", "(?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)", rows)
        for i, mid, alert, sha, received_at in alerts:
            out[i] = self._apply_alert(mid, alert, sha, received_at)
        # Inserts first: a report inserted and then updated within the batch keeps its order.
        self._write_rows("INSERT INTO transients VALUES", "(?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,1,?)", inserts)
        self._write_many(
            "UPDATE transients SET message_id=?, class=?, ra_deg=?, dec_deg=?, pos_err_deg=?, time=?, time_iso=?,"
            " last_nondetection=?, redshift=?, redshift_err=?, distance_mpc=?, distance_err_mpc=?,"
            " localization_sha=?, localization_ref=?, extra=?, content=?, reports=reports+1, received_at=?"
            " WHERE transient_id=?", updates)
        self._write_many("UPDATE transients SET reports = reports + 1 WHERE transient_id = ?", same)
        return out

    def quarantine(self, item: RawItem, codec: str, reason: str, field: str | None = None) -> bool:
        """Keep rejected input byte-identical with its origin and reason.

        Returns
        -------
        bool
            False when the same bytes from the same origin are already quarantined.
        """
        cur = self._db.execute(
            "INSERT OR IGNORE INTO quarantine (dedup, source, origin_kind, origin_where, origin_part, origin_offset,"
            " origin, codec, field, reason, received_at, stored_at, size, truncated, raw)"
            " VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
            (item.dedup_key, *self._origin_columns(item), codec, field, str(reason), item.received_at, self._now,
             item.size, int(item.truncated), item.data))
        return cur.rowcount == 1

    # ---------------------------------------------------------------- events
    def set_expiry(self, event_id: str, expires_at: float | None) -> None:
        """Set when an event stops being active (GPS s; ``None``: never)."""
        self._db.execute("UPDATE events SET expires_at = ? WHERE event_id = ?", (expires_at, event_id))

    # --------------------------------------------------------------- results
    def _event_state(self, event_id: str):
        return self._db.execute("SELECT revision, state FROM events WHERE event_id = ?", (event_id,)).fetchone()

    def enqueue(self, kind: str, key: str, payload: Mapping[str, Any] | str) -> int:
        """Add an output to the outbox; returns its sequence number."""
        text = payload if isinstance(payload, str) else _dumps(payload)
        cur = self._db.execute("INSERT INTO outbox (kind, key, payload, created_at) VALUES (?,?,?,?)",
                               (kind, key, text, self._now))
        self._store._outbox_new.append(OutboxRow(cur.lastrowid, kind, key, text))
        return cur.lastrowid

    def put_result(self, event_id: str, revision: int, transient_id: str, record: Mapping[str, Any],
                   status: str = "current") -> ResultRow | None:
        """Insert or update a result under its deterministic key; publish it when it changed.

        The store sets ``key``, ``event_id``, ``revision``, ``transient_id`` and ``status`` in the
        record. The status is clamped by the event's state: ``withdrawn`` for a withdrawn event,
        ``superseded`` for a revision older than the current one.

        Returns
        -------
        ResultRow or None
            The new row (with its outbox ``seq``), or ``None`` when nothing changed.
        """
        rows = self.put_results([(event_id, revision, transient_id, record, status)])
        return rows[0] if rows else None

    def put_results(self, items) -> list[ResultRow]:
        """Many :meth:`put_result` calls in one go (same rules, same rows, same outbox order).

        Parameters
        ----------
        items : iterable of ``(event_id, revision, transient_id, record)`` or
            ``(event_id, revision, transient_id, record, status)``; each key at most once.

        Returns
        -------
        list of ResultRow
            The rows that changed, in the order given (unchanged ones are skipped).
        """
        prepared = []
        states: dict[str, Any] = {}
        seen: set[str] = set()
        for item in items:
            event_id, revision, transient_id, record = item[:4]
            status = item[4] if len(item) > 4 else "current"
            if status not in RESULT_STATUSES:
                raise ValueError(f"status must be one of {', '.join(RESULT_STATUSES)}, got {status!r}")
            ev = states.get(event_id)
            if ev is None:
                ev = self._event_state(event_id)
                if ev is None:
                    raise ValueError(f"result for unknown event {event_id!r}: store the alert first")
                ev = states[event_id] = (*ev, _quote(event_id))
            if revision > ev[0]:
                raise ValueError(f"result for {event_id} revision {revision}, newer than its stored revision {ev[0]}")
            if ev[1] == "withdrawn":
                status = "withdrawn"
            elif revision < ev[0] and status == "current":
                status = "superseded"
            key = f"{ev[2]}/{int(revision)}/{_quote(transient_id)}"  # result_key, the event's part quoted once
            if key in seen:
                raise ValueError(f"result {key} given twice in one put_results call")
            seen.add(key)
            rec = {**record, "key": key, "event_id": event_id, "revision": int(revision),
                   "transient_id": transient_id, "status": status}
            text, plain = _dumps_plain(rec)
            if not plain:  # the stored record is what its text says (numpy values unwrapped, NaN as null)
                rec = json.loads(text)
            prepared.append((key, event_id, int(revision), transient_id, status, rec, text))
        if not prepared:
            return []
        old: dict[str, str] = {}
        keys = [p[0] for p in prepared]
        for i in range(0, len(keys), 900):  # SQLite's default limit on bound parameters is 999
            chunk = keys[i:i + 900]
            old.update(self._db.execute(
                f"SELECT key, record FROM results WHERE key IN ({','.join('?' * len(chunk))})", chunk).fetchall())
        changed = [p for p in prepared if old.get(p[0]) != p[6]]
        if not changed:
            return []
        # Explicit outbox sequence numbers continue AUTOINCREMENT's counter (we hold the write lock).
        row = self._db.execute("SELECT seq FROM sqlite_sequence WHERE name='outbox'").fetchone()
        top = self._db.execute("SELECT COALESCE(MAX(seq), 0) FROM outbox").fetchone()[0]
        base = max(row[0] if row else 0, top)
        now = self._now
        _insert_rows(self._db, "INSERT INTO outbox (seq, kind, key, payload, created_at) VALUES", "(?,?,?,?,?)",
                     [(base + n, "match", p[0], p[6], now) for n, p in enumerate(changed, 1)])
        self._store._outbox_new.extend(OutboxRow(base + n, "match", p[0], p[6]) for n, p in enumerate(changed, 1))
        _insert_rows(
            self._db, "INSERT INTO results VALUES", "(?,?,?,?,?,?,?,?,?,?,?,?,?)",
            [(k, e, r, t, s, rec.get("class"), rec.get("p_assoc"), rec.get("fap"), rec.get("odds"),
              rec.get("rank"), text, base + n, now)
             for n, (k, e, r, t, s, rec, text) in enumerate(changed, 1)],
            " ON CONFLICT(key) DO UPDATE SET"
            " status=excluded.status, class=excluded.class, p_assoc=excluded.p_assoc, fap=excluded.fap,"
            " odds=excluded.odds, rank=excluded.rank, record=excluded.record, seq=excluded.seq,"
            " updated_at=excluded.updated_at")
        return [ResultRow(k, e, r, t, s, rec, base + n) for n, (k, e, r, t, s, rec, text) in enumerate(changed, 1)]

    def _restatus(self, rows, status: str) -> list[ResultRow]:
        out = []
        for key, event_id, revision, transient_id, text in rows:
            rec = json.loads(text)
            rec["status"] = status
            new = _dumps(rec)
            seq = self.enqueue("match", key, new)
            self._db.execute("UPDATE results SET status=?, record=?, seq=?, updated_at=? WHERE key=?",
                             (status, new, seq, self._now, key))
            out.append(ResultRow(key, event_id, revision, transient_id, status, rec, seq))
        return out

    def supersede(self, event_id: str, current_revision: int) -> list[ResultRow]:
        """Mark ``current`` results of revisions before ``current_revision`` superseded (and publish them)."""
        rows = self._db.execute(
            "SELECT key, event_id, revision, transient_id, record FROM results WHERE event_id=? AND revision<?"
            " AND status='current' ORDER BY key", (event_id, int(current_revision))).fetchall()
        return self._restatus(rows, "superseded")

    def withdraw(self, event_id: str) -> list[ResultRow]:
        """Mark every result of the event withdrawn (and publish them)."""
        rows = self._db.execute(
            "SELECT key, event_id, revision, transient_id, record FROM results WHERE event_id=?"
            " AND status!='withdrawn' ORDER BY key", (event_id,)).fetchall()
        return self._restatus(rows, "withdrawn")

    # ------------------------------------------------------------- positions
    def set_positions(self, source: str, positions: Mapping[str, str]) -> None:
        """Record where ``source`` resumes, per stream (stored with the batch it belongs to)."""
        self._write_many(
            "INSERT INTO positions VALUES (?,?,?,?) ON CONFLICT(source, stream) DO UPDATE SET"
            " token=excluded.token, updated_at=excluded.updated_at",
            [(source, stream, str(token), self._now) for stream, token in positions.items()])


class _Writer:
    """The store's writer thread: runs deferred writes and commits in order on the connection.

    Whoever submits work does not touch the connection again until :meth:`drain` returned
    (:attr:`Store._db` drains first), so the connection is never used by two threads at once.
    After a job fails, later jobs are skipped until the failure was collected by :meth:`drain`.
    """

    def __init__(self, conn: sqlite3.Connection):
        self._conn = conn
        self._jobs: queue.SimpleQueue = queue.SimpleQueue()
        self._done = threading.Condition()
        self.pending = 0  # jobs submitted and not finished
        self.unsettled = False  # work submitted since the last drain
        self._error: BaseException | None = None
        self._thread: threading.Thread | None = None

    def submit(self, job: Callable[[sqlite3.Connection], Any]) -> None:
        if self._thread is None:
            self._thread = threading.Thread(target=self._run, name="matcher-store-writer", daemon=True)
            self._thread.start()
        with self._done:
            self.pending += 1
            self.unsettled = True
        self._jobs.put(job)

    def _run(self) -> None:
        while True:
            job = self._jobs.get()
            if job is None:
                return
            try:
                if self._error is None:
                    job(self._conn)
            except BaseException as exc:  # handed to the thread that drains
                self._error = exc
            finally:
                with self._done:
                    self.pending -= 1
                    if not self.pending:
                        self._done.notify_all()

    def drain(self) -> BaseException | None:
        """Wait until every submitted job has run; return the first failure since the last drain."""
        with self._done:
            while self.pending:
                self._done.wait()
            self.unsettled = False
        error, self._error = self._error, None
        return error

    def close(self) -> None:
        if self._thread is not None:
            self._jobs.put(None)
            self._thread.join()
            self._thread = None


class Store:
    """The SQLite store (see the module docstring).

    Parameters
    ----------
    path : str or os.PathLike
        The database file; its folder is created. ``":memory:"`` is refused (no WAL, no durability).
    busy_timeout_s : float, s
        How long to wait for another writer's lock.

    Raises
    ------
    StoreError
        Not an SQLite file, a newer schema, or WAL not available on that file system.
    """

    def __init__(self, path, *, busy_timeout_s: float = 30.0):
        path = os.fspath(path)
        if path == ":memory:" or path.startswith("file::memory:"):
            raise StoreError(f"store {path}: an in-memory database is not durable; give a file path")
        self.path = os.path.abspath(path)
        parent = os.path.dirname(self.path)
        try:
            os.makedirs(parent, exist_ok=True)
            # check_same_thread=False: bulk writes and a batch's COMMIT run on the store's writer
            # thread (_Writer); the store never uses the connection from two threads at once.
            self._conn = sqlite3.connect(self.path, isolation_level=None, timeout=busy_timeout_s,
                                       check_same_thread=False)
        except (OSError, sqlite3.Error) as exc:
            raise StoreError(f"store {self.path}: cannot open: {exc}") from None
        self._in_tx = False
        self._committing = False  # a COMMIT was handed to the writer
        self._writer = _Writer(self._conn)
        # Outbox rows of the open transaction, and the latest committed ones (what the sinks read next).
        self._outbox_new: list[OutboxRow] = []
        self._outbox_recent: list[OutboxRow] = []
        try:
            mode = self._db.execute("PRAGMA journal_mode=WAL").fetchone()[0]
            if mode.lower() != "wal":
                raise StoreError(f"store {self.path}: WAL journal not available here (got {mode!r})")
            self._db.execute("PRAGMA synchronous=FULL")
            self._db.execute("PRAGMA foreign_keys=ON")
            self._db.execute(f"PRAGMA cache_size=-{CACHE_KIB}")
            self._db.execute(f"PRAGMA busy_timeout={int(busy_timeout_s * 1000)}")
            self._db.execute("BEGIN IMMEDIATE")
            for stmt in _SCHEMA.split(";"):
                if stmt.strip():
                    self._db.execute(stmt)
            row = self._db.execute("SELECT value FROM meta WHERE name='schema_version'").fetchone()
            if row is None:
                self._db.execute("INSERT INTO meta VALUES ('schema_version', ?)", (str(SCHEMA_VERSION),))
            elif int(row[0]) != SCHEMA_VERSION:
                raise StoreError(f"store {self.path}: schema version {row[0]}, this program reads {SCHEMA_VERSION}")
            self._db.execute("COMMIT")
        except sqlite3.DatabaseError as exc:
            self._db.close()
            raise StoreError(f"store {self.path}: not a usable SQLite database: {exc}") from None
        except StoreError:
            if self._db.in_transaction:
                self._db.execute("ROLLBACK")
            self._db.close()
            raise

    @property
    def _db(self) -> sqlite3.Connection:
        """The connection, once the writer thread has run everything handed to it."""
        if self._writer.unsettled or self._committing:
            self._settle()
        return self._conn

    def _settle(self) -> None:
        """Wait for the writer; a failure there rolls the transaction back and raises StoreError."""
        error = self._writer.drain()
        committing, self._committing = self._committing, False
        if committing:
            self._in_tx = False
            if error is None:
                self._committed_outbox()
        if error is None:
            return
        if self._conn.in_transaction:
            self._conn.execute("ROLLBACK")
        what = "commit" if committing else "write"
        if isinstance(error, sqlite3.Error):
            raise StoreError(f"store {self.path}: {what} failed, the batch was rolled back: {error}") from error
        raise error

    # ----------------------------------------------------------- lifecycle
    def close(self) -> None:
        try:
            self._settle()
        finally:
            self._writer.close()
            self._conn.close()

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    @contextmanager
    def transaction(self) -> Iterator[Transaction]:
        """One ``BEGIN IMMEDIATE`` … ``COMMIT``; rolled back if the block raises."""
        with self._open_transaction() as tx:
            yield tx
        try:
            self._settle()
            self._conn.execute("COMMIT")
        finally:
            self._in_tx = False
        self._committed_outbox()

    @contextmanager
    def transaction_committed_later(self) -> Iterator[Transaction]:
        """Like :meth:`transaction`, but the ``COMMIT`` runs on the writer thread after the block.

        The block's reads run here; some of its bulk writes already run on the writer thread
        (:meth:`Transaction` defers them), and if the block raises, the transaction is rolled
        back. The commit (SQLite writes the batch's pages and waits for the disk, mostly without
        holding Python's lock) then overlaps whatever the caller does next that does not touch
        the store (reading and decoding the next batch). :meth:`wait_commit` waits for it and
        raises its error, after rolling back; every other use of the store waits for it first.
        Nothing is durable, and nothing may be acknowledged to a source or sink, before
        :meth:`wait_commit` returned.
        """
        with self._open_transaction() as tx:
            yield tx
        self._committing = True
        self._writer.submit(lambda conn: conn.execute("COMMIT"))

    @contextmanager
    def _open_transaction(self) -> Iterator[Transaction]:
        if self._in_tx and not self._committing:
            raise RuntimeError("store transactions do not nest")
        self._db.execute("BEGIN IMMEDIATE")
        self._in_tx = True
        self._outbox_new = []  # rows of a transaction that failed are never kept
        try:
            yield Transaction(self)
        except BaseException:
            try:
                self._writer.drain()  # its failure, if any, is part of what is being rolled back
                if self._conn.in_transaction:
                    self._conn.execute("ROLLBACK")
            finally:
                self._in_tx = False
            raise

    def _committed_outbox(self) -> None:
        """Keep the outbox rows just committed for :meth:`outbox_after` (the sinks read them next).

        Rows are kept while their sequence numbers run on without a gap from the ones kept
        already, at most :data:`OUTBOX_KEPT` of them (the latest); anything else is read back
        from the table as before.
        """
        new, self._outbox_new = self._outbox_new, []
        if not new:
            return
        if any(b.seq != a.seq + 1 for a, b in zip(new, new[1:])):
            self._outbox_recent = []  # a gap in the run: read back from the table
            return
        kept = self._outbox_recent
        kept = kept + new if kept and new[0].seq == kept[-1].seq + 1 else new
        self._outbox_recent = kept[-OUTBOX_KEPT:]

    def wait_commit(self) -> None:
        """Wait for a commit started by :meth:`transaction_committed_later` (and every write before it).

        Raises
        ------
        StoreError
            The commit or a write before it failed; the transaction was rolled back (none of
            its writes are stored).
        """
        self._settle()

    # ---------------------------------------------------------------- reads
    def pragma(self, name: str):
        """The value of a PRAGMA (``journal_mode``, ``synchronous``...)."""
        if not name.isidentifier():
            raise ValueError(f"not a pragma name: {name!r}")
        return self._db.execute(f"PRAGMA {name}").fetchone()[0]

    def positions(self, source: str) -> dict[str, str]:
        """Stream → token for ``source`` (empty when it never committed)."""
        return dict(self._db.execute("SELECT stream, token FROM positions WHERE source = ?", (source,)))

    def localization_data(self, sha256: str) -> bytes | None:
        row = self._db.execute("SELECT data FROM localizations WHERE sha256 = ?", (sha256,)).fetchone()
        return None if row is None else bytes(row[0])

    _REV_SQL = ("SELECT r.event_id, r.revision, r.message_id, r.state, r.merger_time, r.merger_time_iso,"
                " r.far_per_year, r.p_astro, r.source_probs, r.localization_sha, r.localization_ref, r.extra,"
                " e.revision, e.state, e.expires_at, r.received_at"
                " FROM revisions r JOIN events e ON e.event_id = r.event_id")

    def _revision(self, row) -> StoredRevision:
        (eid, rev, mid, state, t, t_iso, far, pa, probs, sha, ref, extra, cur_rev, ev_state, exp, received) = row
        loc = _loc_from_ref(ref, self.localization_data(sha) if (sha and ref and "fits_base64" in ref) else None)
        alert = GWAlert(eid, rev, state, t, t_iso, far, pa, None if probs is None else json.loads(probs), loc,
                        json.loads(extra))
        return StoredRevision(alert, sha, mid, rev == cur_rev, ev_state, exp, received)

    def active_events(self, now: float | None = None) -> list[StoredRevision]:
        """Current revisions of events not withdrawn and not expired at ``now`` (GPS s; ``None``: ignore expiry).

        This is what the service rebuilds its state from on start. Ordered by event id.
        """
        sql = self._REV_SQL + " WHERE r.revision = e.revision AND e.state != 'withdrawn'"
        args: tuple = ()
        if now is not None:
            sql += " AND (e.expires_at IS NULL OR e.expires_at > ?)"
            args = (float(now),)
        return [self._revision(r) for r in self._db.execute(sql + " ORDER BY r.event_id", args)]

    def revisions(self, event_id: str) -> list[StoredRevision]:
        """Every stored revision of an event, oldest first."""
        return [self._revision(r) for r in
                self._db.execute(self._REV_SQL + " WHERE r.event_id = ? ORDER BY r.revision", (event_id,))]

    def current_revision(self, event_id: str) -> StoredRevision | None:
        row = self._db.execute(self._REV_SQL + " WHERE r.event_id = ? AND r.revision = e.revision",
                               (event_id,)).fetchone()
        return None if row is None else self._revision(row)

    def transients_between(self, t_lo: float, t_hi: float) -> list[StoredTransient]:
        """Transients whose bracket [last non-detection (or time), time] meets [t_lo, t_hi] (GPS s)."""
        rows = self._db.execute(
            "SELECT transient_id, message_id, class, ra_deg, dec_deg, pos_err_deg, time, time_iso,"
            " last_nondetection, redshift, redshift_err, distance_mpc, distance_err_mpc, localization_sha,"
            " localization_ref, extra, reports FROM transients WHERE time >= ? AND COALESCE(last_nondetection, time) <= ?"
            " ORDER BY time, transient_id", (float(t_lo), float(t_hi)))
        out = []
        for (tid, mid, klass, ra, dec, err, t, t_iso, lnd, z, zerr, d, derr, sha, ref, extra, n) in rows:
            loc = _loc_from_ref(ref, self.localization_data(sha) if (sha and ref and "fits_base64" in ref) else None)
            rep = TransientReport(tid, klass, ra, dec, t, t_iso, err, lnd, z, zerr, d, derr, loc, json.loads(extra))
            out.append(StoredTransient(rep, sha, mid, n))
        return out

    def results(self, event_id: str | None = None, status: str | None = None) -> list[ResultRow]:
        """Stored results, optionally of one event and/or one status, ordered by key."""
        sql, args = "SELECT key, event_id, revision, transient_id, status, record, seq FROM results", []
        where = []
        if event_id is not None:
            where.append("event_id = ?")
            args.append(event_id)
        if status is not None:
            where.append("status = ?")
            args.append(status)
        if where:
            sql += " WHERE " + " AND ".join(where)
        return [ResultRow(k, e, r, t, s, json.loads(rec), seq)
                for k, e, r, t, s, rec, seq in self._db.execute(sql + " ORDER BY key", args)]

    def quarantined(self, limit: int | None = None) -> list[QuarantineRow]:
        """Quarantined input, oldest first."""
        sql = ("SELECT id, source, origin, origin_kind, origin_where, origin_part, origin_offset, codec, field,"
               " reason, received_at, size, truncated, raw FROM quarantine ORDER BY id")
        if limit is not None:
            sql += f" LIMIT {int(limit)}"
        return [QuarantineRow(*r[:12], bool(r[12]), bytes(r[13])) for r in self._db.execute(sql)]

    def message_raw(self, message_id: int) -> bytes | None:
        row = self._db.execute("SELECT raw FROM messages WHERE id = ?", (message_id,)).fetchone()
        return None if row is None else bytes(row[0])

    def counts(self) -> dict[str, int]:
        """Rows per table, and results per status (``results.current``...), for dashboards and tests."""
        out = {}
        for table in ("messages", "localizations", "events", "revisions", "transients", "results",
                      "quarantine", "outbox"):
            out[table] = self._db.execute(f"SELECT COUNT(*) FROM {table}").fetchone()[0]
        for status in RESULT_STATUSES:
            out[f"results.{status}"] = self._db.execute("SELECT COUNT(*) FROM results WHERE status=?",
                                                        (status,)).fetchone()[0]
        return out

    # --------------------------------------------------------------- outbox
    def outbox_after(self, seq: int, limit: int = 1000) -> list[OutboxRow]:
        """Outbox rows with a sequence number above ``seq``, in order.

        Rows this store committed last are taken from memory (the same rows: the sinks read
        what a batch just wrote without reading it back); others come from the table.
        """
        db = self._db  # a commit under way has ended (and kept its rows)
        kept = self._outbox_recent
        seq, limit = int(seq), int(limit)
        rows: list[OutboxRow] = []
        if kept and kept[0].seq <= seq + 1 <= kept[-1].seq:
            start = seq + 1 - kept[0].seq
            rows = kept[start:start + limit]
            seq = rows[-1].seq if rows else seq
        if len(rows) < limit:  # beyond what is kept (older rows, or rows another connection wrote after)
            rows += [OutboxRow(*r) for r in db.execute(
                "SELECT seq, kind, key, payload FROM outbox WHERE seq > ? ORDER BY seq LIMIT ?", (seq, limit - len(rows)))]
        return rows

    def last_seq(self) -> int:
        row = self._db.execute("SELECT MAX(seq) FROM outbox").fetchone()
        return row[0] or 0

    def sink_cursor(self, sink: str) -> int:
        """The last outbox sequence number ``sink`` has durably published (0 if none)."""
        row = self._db.execute("SELECT sent_seq FROM sink_cursors WHERE sink = ?", (sink,)).fetchone()
        return 0 if row is None else row[0]

    def mark_sent(self, sink: str, seq: int) -> None:
        """Record that ``sink`` has durably published every row up to ``seq`` (never moves back).

        This commit does not wait for the disk (``synchronous=NORMAL`` for it alone): it survives
        a crash of the process, and the next batch's ``FULL`` commit makes it durable. A power
        loss in between can only move the cursor back, and then rows are published again —
        at least once, as always (sinks and consumers de-duplicate by seq or key). It saves
        one fsync per published batch.
        """
        self.wait_commit()
        if self._in_tx:
            raise RuntimeError("mark_sent runs after the batch's transaction, not inside it")
        self._db.execute("PRAGMA synchronous=NORMAL")
        try:
            self._db.execute("BEGIN IMMEDIATE")
            try:
                self._db.execute(
                    "INSERT INTO sink_cursors VALUES (?,?,?) ON CONFLICT(sink) DO UPDATE SET"
                    " sent_seq=MAX(sent_seq, excluded.sent_seq), updated_at=excluded.updated_at",
                    (sink, int(seq), time.time()))
            except BaseException:
                self._db.execute("ROLLBACK")
                raise
            self._db.execute("COMMIT")
        finally:
            self._db.execute("PRAGMA synchronous=FULL")
