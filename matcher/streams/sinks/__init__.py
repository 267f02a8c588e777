"""Sinks for outputs: JSON Lines files and an SQLite table (a Kafka kind slots in beside them)."""

from matcher.streams.sinks.base import (
    Publisher,
    Sink,
    SinkError,
    SinkKind,
    build_sink,
    parse_kinds,
    register_sink_kind,
    sink_kind,
    sink_kinds,
)
from matcher.streams.sinks.jsonl import JsonlOptions, JsonlSink
from matcher.streams.sinks.kafka import KafkaSink, KafkaSinkOptions  # registers kind kafka
from matcher.streams.sinks.sqlite import SqliteSink, SqliteSinkOptions

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
    "JsonlSink",
    "JsonlOptions",
    "SqliteSink",
    "SqliteSinkOptions",
    "KafkaSink",
    "KafkaSinkOptions",
]
