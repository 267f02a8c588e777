"""The sink protocol, its registry of kinds, and the outbox publisher.

Outputs are never written to a sink straight from the batch: the batch's
transaction puts them in the store's outbox (each row has an increasing ``seq``),
and a :class:`Publisher` copies outbox rows to a sink, waits until the sink says
they are durable (:meth:`Sink.flush`), and only then advances the sink's cursor in
the store. A crash in between re-sends rows; a sink that can read back what it has
(a file, a table) reports its own high-water mark from :meth:`Sink.open` and skips
them, so it never holds a row twice. A sink that cannot (a Kafka topic, later)
returns the store's cursor, publishes at least once, and consumers de-duplicate by key.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping, Protocol, Sequence, runtime_checkable

from matcher.errors import ConfigError, InputError
from matcher.keycheck import ParseContext, get_str_list, sub
from matcher.store import OutboxRow, Store

__all__ = [
    "Sink",
    "SinkError",
    "SinkKind",
    "Publisher",
    "register_sink_kind",
    "sink_kind",
    "sink_kinds",
    "build_sink",
    "parse_kinds",
]


class SinkError(InputError):
    """A sink's target cannot be used (unreadable, or written by something else)."""


@runtime_checkable
class Sink(Protocol):
    """Where outputs go.

    Attributes
    ----------
    name : str
        The configured name (``sinks.NAME``); the store keeps a cursor under it.
    kind : str
    kinds : tuple of str or None
        The outbox kinds it takes (``("match",)``), or None for all.
    """

    name: str
    kind: str
    kinds: tuple[str, ...] | None

    def open(self, sent_seq: int) -> int:
        """Prepare to write; return the ``seq`` after which to resume.

        ``sent_seq`` is the store's cursor for this sink. A sink that can read back its own
        high-water mark returns that instead (it may be higher, after a crash between
        flush and cursor update; or lower, when its file was removed and must be rebuilt).
        """
        ...

    def write(self, rows: Sequence[OutboxRow]) -> None:
        """Write rows (already filtered to ``kinds``), in ``seq`` order."""
        ...

    def flush(self) -> None:
        """Return only when everything written is durable (fsync'ed, committed, acknowledged)."""
        ...

    def close(self) -> None:
        ...


@dataclass(frozen=True)
class SinkKind:
    """A registered kind of sink: ``parse_options(raw, keypath, ctx: ParseContext)`` and ``build(name, options)``."""

    name: str
    parse_options: Callable[[Mapping[str, Any], str, ParseContext], Any]
    build: Callable[[str, Any], Sink]


_KINDS: dict[str, SinkKind] = {}


def register_sink_kind(kind: SinkKind) -> None:
    _KINDS[kind.name] = kind


def sink_kinds() -> tuple[str, ...]:
    return tuple(sorted(_KINDS))


def sink_kind(name: str, keypath: str = "kind") -> SinkKind:
    try:
        return _KINDS[name]
    except (KeyError, TypeError):
        raise ConfigError(keypath, f"unknown sink kind {name!r}; known: {', '.join(sink_kinds())}") from None


def build_sink(kind: str, name: str, options) -> Sink:
    return sink_kind(kind).build(name, options)


def parse_kinds(raw: Mapping[str, Any], keypath: str, default=("match",)) -> tuple[str, ...] | None:
    """A sink's ``kinds`` option: a non-empty list of outbox kinds, or null for every kind."""
    if "kinds" in raw and raw["kinds"] is None:
        return None
    kinds = get_str_list(raw, "kinds", keypath, default)
    if not kinds:
        raise ConfigError(sub(keypath, "kinds"), "must list at least one outbox kind (or be null for every kind)")
    return kinds


class Publisher:
    """Copies a store's outbox to one sink: write, flush, then advance the cursor.

    Parameters
    ----------
    store : Store
    sink : Sink
    batch : int
        Rows read from the outbox per round.

    Raises
    ------
    SinkError
        The sink already holds rows beyond the store's outbox (it belongs to another store).
    """

    def __init__(self, store: Store, sink: Sink, *, batch: int = 2000):
        self.store, self.sink, self.batch = store, sink, int(batch)
        cursor = store.sink_cursor(sink.name)
        self._after = sink.open(cursor)
        last = store.last_seq()
        if self._after > last:
            sink.close()
            raise SinkError(f"sink {sink.name}: it already holds output up to seq {self._after}, beyond this "
                            f"store's outbox (last seq {last}); it was written from another store (move it away)")
        if self._after > cursor:  # flushed before a crash, cursor not yet advanced
            store.mark_sent(sink.name, self._after)

    def publish(self, max_rows: int | None = None) -> int:
        """Publish pending outbox rows (all, or up to ``max_rows``); returns how many were read."""
        done = 0
        kinds = self.sink.kinds
        while max_rows is None or done < max_rows:
            limit = self.batch if max_rows is None else min(self.batch, max_rows - done)
            rows = self.store.outbox_after(self._after, limit)
            if not rows:
                break
            chosen = rows if kinds is None else [r for r in rows if r.kind in kinds]
            if chosen:
                self.sink.write(chosen)
                self.sink.flush()
            self.store.mark_sent(self.sink.name, rows[-1].seq)
            self._after = rows[-1].seq
            done += len(rows)
        return done

    def close(self) -> None:
        self.sink.close()
