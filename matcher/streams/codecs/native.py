"""The native codec: one JSON object in our own ``matcher/1`` schema per item.

``received_at`` (ISO-8601 UTC), which archives may carry on each line, belongs to
the envelope, not the message: it is read by the source; here it is only checked
(a malformed one is rejected like any bad field) and then left out.
"""

from __future__ import annotations

from math import isfinite as _isfinite
from typing import Any, Mapping

from matcher.errors import ConfigError, MessageError
from matcher.streams.codecs.base import DEFAULT_MAX_MESSAGE_BYTES, register_codec
from matcher.streams.codecs.jsonbytes import check_finite, load_json
from matcher.streams.messages import Message, message_from_fields
from matcher.streams.raw import RawItem
from matcher.timeconv import iso_to_gps

__all__ = ["NativeCodec", "ENVELOPE_FIELDS", "check_received_at"]

#: Top-level keys that describe delivery, not the message; dropped before validation.
ENVELOPE_FIELDS = frozenset({"received_at"})


def check_received_at(fields: Mapping[str, Any], codec: str) -> None:
    """A ``received_at`` envelope field, when present, must be an ISO-8601 UTC string."""
    value = fields.get("received_at")
    if value is None:
        return
    mid = fields.get("event_id") or fields.get("transient_id")
    mid = mid if isinstance(mid, str) else None
    if not isinstance(value, str):
        raise MessageError(codec, mid, "received_at", f"must be an ISO-8601 UTC string, got {type(value).__name__}")
    try:
        iso_to_gps(value)
    except ValueError as exc:
        raise MessageError(codec, mid, "received_at", str(exc)) from None


class NativeCodec:
    """Decode ``matcher/1`` JSON.

    Parameters
    ----------
    max_bytes : int, bytes
        Larger items are rejected unparsed.

    Examples
    --------
    >>> from matcher.streams.raw import RawItem
    >>> item = RawItem.from_bytes(b'{"schema": "matcher/1", "type": "transient", "transient_id": "T1",'
    ...                           b' "class": "optical", "ra_deg": 10, "dec_deg": -5, "time": "2026-01-02T03:04:05Z"}')
    >>> NativeCodec().decode(item).transient_id
    'T1'
    """

    name = "native"
    decode_ahead = True  # decode() reads only the item's bytes, size and folder: it may run on a child process

    def __init__(self, *, max_bytes: int = DEFAULT_MAX_MESSAGE_BYTES):
        self.max_bytes = int(max_bytes)

    def decode(self, item: RawItem) -> Message:
        fields = load_json(item, self.name, self.max_bytes)
        if isinstance(fields, dict) and not fields.keys().isdisjoint(ENVELOPE_FIELDS):
            check_received_at(fields, self.name)
            fields = {k: v for k, v in fields.items() if k not in ENVELOPE_FIELDS}
        message = message_from_fields(fields, codec=self.name, base_dir=item.base_dir)
        for k, v in message.extra.items():
            kind = type(v)
            if kind is str or kind is int or kind is float and _isfinite(v):
                continue  # the usual values, finite as they are
            mid = getattr(message, "event_id", None) or getattr(message, "transient_id", None)
            check_finite(v, self.name, mid, k)
        return message


def _factory(options: Mapping[str, Any], *, keypath: str, max_bytes: int) -> NativeCodec:
    unknown = sorted(set(options) - {"name"})
    if unknown:
        raise ConfigError(f"{keypath}.{unknown[0]}", "the native codec takes no options")
    return NativeCodec(max_bytes=max_bytes)


register_codec("native", _factory)
