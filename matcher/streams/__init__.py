"""Streams: message schema, codecs, sources and sinks (the I/O edge of the service)."""

from matcher.streams.messages import SCHEMA, GWAlert, Localization, Message, TransientReport, message_from_fields

__all__ = ["SCHEMA", "GWAlert", "TransientReport", "Localization", "Message", "message_from_fields"]
