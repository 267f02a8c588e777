"""Sources of raw items: an inbox directory and an archive replay (a Kafka kind slots in beside them)."""

from matcher.streams.sources.archive import ArchiveOptions, ArchiveSource
from matcher.streams.sources.base import (
    Settled,
    Source,
    SourceKind,
    build_source,
    register_source_kind,
    source_kind,
    source_kinds,
)
from matcher.streams.sources.inbox import InboxOptions, InboxSource

__all__ = [
    "Source",
    "Settled",
    "SourceKind",
    "register_source_kind",
    "source_kind",
    "source_kinds",
    "build_source",
    "InboxSource",
    "InboxOptions",
    "ArchiveSource",
    "ArchiveOptions",
]
