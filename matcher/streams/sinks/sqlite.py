"""An SQLite results sink: one row per result key, always its latest state.

For downstream tools that want a table rather than a stream. The table
(``matches`` by default) holds ``key`` (primary key), ``seq``, ``kind``, ``status``,
``event_id``, ``revision``, ``transient_id``, ``record`` (the JSON record) and
``updated_at`` (Unix s). An upsert replaces a row only with a higher ``seq``, so a
re-sent older row never undoes a newer one; its high-water mark is ``MAX(seq)``.
WAL journal, ``synchronous=FULL``; each flush is one committed transaction.
"""

from __future__ import annotations

import json
import sqlite3
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping, Sequence

from matcher.errors import ConfigError
from matcher.keycheck import ParseContext, check_keys, get_path, get_str
from matcher.store import OutboxRow
from matcher.streams.sinks.base import SinkError, SinkKind, parse_kinds, register_sink_kind

__all__ = ["SqliteSink", "SqliteSinkOptions"]


@dataclass(frozen=True)
class SqliteSinkOptions:
    """``sinks.NAME`` with ``kind: sqlite``: ``path``, ``table`` (default ``matches``), ``kinds``."""

    path: Path
    table: str = "matches"
    kinds: tuple[str, ...] | None = ("match",)


class SqliteSink:
    """Upsert outbox rows into an SQLite table (see the module docstring)."""

    kind = "sqlite"

    def __init__(self, name: str, path, *, table: str = "matches", kinds: tuple[str, ...] | None = ("match",)):
        if not table.isidentifier():
            raise ValueError(f"sink {name}: table name must be an identifier, got {table!r}")
        self.name = name
        self.path = Path(path).resolve()
        self.table = table
        self.kinds = None if kinds is None else tuple(kinds)
        self._db: sqlite3.Connection | None = None

    def open(self, sent_seq: int) -> int:
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self._db = sqlite3.connect(self.path, isolation_level=None, timeout=30.0)
            self._db.execute("PRAGMA journal_mode=WAL")
            self._db.execute("PRAGMA synchronous=FULL")
            self._db.execute(
                f"CREATE TABLE IF NOT EXISTS {self.table} (key TEXT PRIMARY KEY, seq INTEGER NOT NULL,"
                " kind TEXT NOT NULL, status TEXT, event_id TEXT, revision INTEGER, transient_id TEXT,"
                " record TEXT NOT NULL, updated_at REAL NOT NULL)")
            return self._db.execute(f"SELECT COALESCE(MAX(seq), 0) FROM {self.table}").fetchone()[0]
        except sqlite3.Error as exc:
            raise SinkError(f"sink {self.name}: cannot use {self.path} table {self.table}: {exc}") from None

    def write(self, rows: Sequence[OutboxRow]) -> None:
        if not self._db.in_transaction:
            self._db.execute("BEGIN IMMEDIATE")
        now = time.time()
        values = []
        for r in rows:
            rec = json.loads(r.payload)
            values.append((r.key, r.seq, r.kind, rec.get("status"), rec.get("event_id"), rec.get("revision"),
                           rec.get("transient_id"), r.payload, now))
        self._db.executemany(
            f"INSERT INTO {self.table} VALUES (?,?,?,?,?,?,?,?,?) ON CONFLICT(key) DO UPDATE SET"
            " seq=excluded.seq, kind=excluded.kind, status=excluded.status, event_id=excluded.event_id,"
            " revision=excluded.revision, transient_id=excluded.transient_id, record=excluded.record,"
            f" updated_at=excluded.updated_at WHERE excluded.seq > {self.table}.seq", values)

    def flush(self) -> None:
        if self._db is not None and self._db.in_transaction:
            self._db.execute("COMMIT")

    def close(self) -> None:
        if self._db is not None:
            if self._db.in_transaction:
                self._db.execute("ROLLBACK")  # unflushed rows were never counted as sent
            self._db.close()
            self._db = None


def _parse(raw: Mapping[str, Any], keypath: str, ctx: ParseContext) -> SqliteSinkOptions:
    check_keys(raw, ("path", "table", "kinds"), keypath, required=("path",))
    table = get_str(raw, "table", keypath, "matches")
    if not table.isidentifier():
        raise ConfigError(f"{keypath}.table", f"must be an identifier (letters, digits, _), got {table!r}")
    return SqliteSinkOptions(get_path(raw, "path", keypath, ctx.base_dir), table, parse_kinds(raw, keypath))


def _build(name: str, options: SqliteSinkOptions) -> SqliteSink:
    return SqliteSink(name, options.path, table=options.table, kinds=options.kinds)


register_sink_kind(SinkKind("sqlite", _parse, _build))
