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
from matcher.streams.sources.kafka import KafkaSource, KafkaSourceOptions  # registers kind kafka

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
    "KafkaSource",
    "KafkaSourceOptions",
]
