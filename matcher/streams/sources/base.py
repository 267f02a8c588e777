"""The source protocol and its registry of kinds.

A source yields :class:`~matcher.streams.raw.RawItem` objects in batches. It
never decides that an item is done by itself: the service first stores the
batch (messages, state, results, the batch's positions) in one transaction,
and only then calls :meth:`Source.commit` with how each item was settled; an
inbox moves its files then, a Kafka source (later) commits its offsets then.

A kind is registered with :func:`register_source_kind`: its option parser (which
validates the YAML under ``sources.NAME`` and raises ``ConfigError`` with the key
path) and its builder. A Kafka kind slots in beside ``inbox`` and ``archive``
without touching the loop.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping, Protocol, Sequence, runtime_checkable

from matcher.errors import ConfigError
from matcher.keycheck import ParseContext
from matcher.streams.raw import RawItem

__all__ = [
    "Source",
    "Settled",
    "SourceKind",
    "register_source_kind",
    "source_kind",
    "source_kinds",
    "build_source",
]


@runtime_checkable
class Settled(Protocol):
    """How the service settled an item: ``reason`` is ``None`` when it was accepted (or already stored)."""

    item: RawItem
    reason: str | None


@runtime_checkable
class Source(Protocol):
    """Where raw items come from.

    Attributes
    ----------
    name : str
        The configured name (``sources.NAME``); positions are stored under it.
    kind : str
    poll_ahead : bool, optional
        True when the next batch may be polled before :meth:`commit` of the last one (its
        position lives in the store, or it keeps the items in flight out of later polls); the
        service then overlaps a batch's store commit with the next poll. Absent means False.
    """

    name: str
    kind: str

    def resume(self, positions: Mapping[str, str]) -> None:
        """Continue after the positions the store holds for this source (stream → token)."""
        ...

    def poll(self, max_items: int = 500, timeout_s: float = 0.0) -> list[RawItem]:
        """Up to ``max_items`` new items, waiting at most ``timeout_s`` for the first."""
        ...

    def commit(self, settled: Sequence[Settled]) -> None:
        """Called after the store committed these items: finish them at the source."""
        ...

    @property
    def finished(self) -> bool:
        """True when no item will ever come again (the end of an archive)."""
        ...

    def close(self) -> None:
        ...


@dataclass(frozen=True)
class SourceKind:
    """A registered kind of source.

    Attributes
    ----------
    name : str
    parse_options : callable
        ``parse_options(raw: Mapping, keypath: str, ctx: ParseContext) -> options`` (a frozen
        object); ``raw`` is the YAML mapping without ``kind`` and ``codec``; relative paths
        resolve against ``ctx.base_dir`` (the configuration's folder); ``ctx.secret(name, keypath)``
        looks up a secret by name (for a Kafka kind's credentials).
    build : callable
        ``build(name: str, options, *, max_bytes: int) -> Source``.
    """

    name: str
    parse_options: Callable[[Mapping[str, Any], str, ParseContext], Any]
    build: Callable[..., Source]


_KINDS: dict[str, SourceKind] = {}


def register_source_kind(kind: SourceKind) -> None:
    _KINDS[kind.name] = kind


def source_kinds() -> tuple[str, ...]:
    return tuple(sorted(_KINDS))


def source_kind(name: str, keypath: str = "kind") -> SourceKind:
    """The registered kind ``name``; ``ConfigError`` at ``keypath`` if there is none."""
    try:
        return _KINDS[name]
    except (KeyError, TypeError):
        raise ConfigError(keypath, f"unknown source kind {name!r}; known: {', '.join(source_kinds())}") from None


def build_source(kind: str, name: str, options, *, max_bytes: int) -> Source:
    return source_kind(kind).build(name, options, max_bytes=max_bytes)
