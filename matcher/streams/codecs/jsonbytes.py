"""Bytes to JSON values, with errors a sender can act on.

Shared by the JSON codecs. Checks, in order: size (before anything is parsed),
UTF-8 (RFC 8259 section 8.1: JSON exchanged between systems is UTF-8), syntax
(with line and column), nesting depth. ``NaN`` and ``Infinity`` literals, which
RFC 8259 does not allow but Python's parser reads, are left for the field checks
so the error can name the field; :func:`check_finite` finds them in fields no
validator looks at.
"""

from __future__ import annotations

import json
import math
import sys
from typing import Any

import orjson

from matcher.errors import MessageError
from matcher.streams.raw import RawItem

__all__ = ["load_json", "check_finite", "check_size"]

# A decoder with json.loads's default options: ``json.loads(text)`` is its ``raw_decode``
# at the first non-blank character, then a check that only blanks follow.
_DECODER = json.JSONDecoder()
# orjson parses the usual object about five times faster than json.loads and gives the same
# values (floats correctly rounded: 1.5 million random literals compared equal in value, type and
# repr; tests/test_json_parsing.py keeps a share of that), with two exceptions, both sent to the
# standard parser after the fact: an integer beyond 64 bits becomes a float (always one of
# magnitude >= 2**63, so any float that large is re-read), and orjson reads nesting up to 1024
# levels where Python's parser may stop earlier (so anything deeper than _FAST_MAX_DEPTH is
# re-read, and keeps its "nested too deeply" rejection). What orjson refuses (NaN, 1e400, lone
# surrogates, bad syntax) goes to the standard parser too, which reads it or names the problem.
_FAST_MAX_DEPTH = 200
_BIG = 9.2e18  # just below 2**63


def _plain(value, depth: int = 0) -> bool:
    """No float of magnitude >= 2**63 and no deeper than _FAST_MAX_DEPTH (see above)."""
    if depth > _FAST_MAX_DEPTH:
        return False
    for v in value.values() if type(value) is dict else value:
        t = type(v)
        if t is float:
            if v >= _BIG or v <= -_BIG:
                return False
        elif (t is dict or t is list) and not _plain(v, depth + 1):
            return False
    return True


def check_size(item: RawItem, codec: str, max_bytes: int) -> None:
    """Reject an item over ``max_bytes`` (or one its source already truncated)."""
    if item.truncated or item.size > max_bytes:
        raise MessageError(codec, None, None,
                           f"is {item.size} bytes, over the {max_bytes}-byte message limit (limits.message_max_bytes)")


def load_json(item: RawItem, codec: str, max_bytes: int) -> Any:
    """Parse the item's bytes as one JSON value.

    Raises
    ------
    MessageError
        Too large, not UTF-8, not JSON, or nested too deeply.
    """
    check_size(item, codec, max_bytes)
    data = item.data
    if data[:1] == b"{" and data[-1:] == b"}":
        try:
            value = orjson.loads(data)
        except orjson.JSONDecodeError:  # left to the standard parser, which reads or names it
            pass
        else:
            if _plain(value):
                return value
        # The usual shape, one object and nothing around it, parsed straight away: what
        # json.loads does after its checks for a byte-order mark and blanks, which such
        # text cannot have. Whatever goes wrong here (not UTF-8, bad syntax, too deep,
        # more after the object) is left to the checked parse, which finds it again and
        # names it.
        try:
            text = data.decode("utf-8")
            value, end = _DECODER.raw_decode(text)
        except (ValueError, RecursionError):  # UnicodeDecodeError and JSONDecodeError are ValueErrors
            pass
        else:
            if end == len(text):
                return value
    return _parse_checked(data, codec)


def _parse_checked(data: bytes, codec: str) -> Any:
    """Bytes to a JSON value, each step checked and named in the error (the reference for the fast path)."""
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise MessageError(codec, None, None,
                           f"is not UTF-8 text: byte 0x{data[exc.start]:02x} at offset {exc.start}") from None
    if text.startswith("\ufeff"):
        raise MessageError(codec, None, None, "starts with a byte-order mark (JSON must not, RFC 8259 section 8.1)")
    if not text.strip():
        raise MessageError(codec, None, None, "is empty")
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise MessageError(codec, None, None,
                           f"is not valid JSON: {exc.msg} at line {exc.lineno} column {exc.colno}") from None
    except RecursionError:
        raise MessageError(codec, None, None, "is nested too deeply to parse") from None
    except ValueError:  # Python refuses integer literals of more than sys.get_int_max_str_digits() digits
        raise MessageError(codec, None, None, "is not usable JSON: it has an integer literal of more than "
                                              f"{sys.get_int_max_str_digits()} digits") from None


def check_finite(value: Any, codec: str, message_id: str | None, path: str) -> None:
    """Raise ``MessageError`` at the first non-finite number inside ``value``.

    ``path`` names ``value`` in the error (``"extra.snr"``, ``"extra.list[3]"``).
    """
    if isinstance(value, float):
        if not math.isfinite(value):
            raise MessageError(codec, message_id, path, f"must be finite, got {value!r} (not valid JSON, RFC 8259)")
    elif isinstance(value, dict):
        for k, v in value.items():
            check_finite(v, codec, message_id, f"{path}.{k}")
    elif isinstance(value, list):
        for i, v in enumerate(value):
            check_finite(v, codec, message_id, f"{path}[{i}]")
