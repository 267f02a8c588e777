"""JSON bytes → values: the fast parse gives what Python's own ``json.loads`` gives.

The reference is the standard library's parser (``json.loads`` on the UTF-8 text), which
the checked path uses; the fast path (orjson for the usual ``{...}`` line) must return
equal values of the same types, and anything it does not take must reach the checked
path and get its answer or its error.
"""

from __future__ import annotations

import json
import random
import struct

import pytest

from matcher.errors import MessageError
from matcher.streams.codecs import NativeCodec
from matcher.streams.codecs.jsonbytes import load_json
from matcher.streams.intake import Rejected, decode_item
from matcher.streams.raw import RawItem


def _same(a, b) -> bool:
    """Equal, same types all the way down, same float repr (so -0.0 and 0.0 differ)."""
    if type(a) is not type(b):
        return False
    if isinstance(a, dict):
        return list(a) == list(b) and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, list):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    if isinstance(a, float):
        return repr(a) == repr(b)
    return a == b


def _parse(data: bytes):
    return load_json(RawItem.from_bytes(data), "native", 1 << 20)


def _literals(rng: random.Random, n: int):
    for _ in range(n):
        bits = rng.getrandbits(64)
        x = struct.unpack("d", struct.pack("Q", bits))[0]
        if x == x and abs(x) != float("inf"):
            yield repr(x)
            yield f"{x:.{rng.randrange(1, 25)}e}"
        yield f"{rng.uniform(-400, 400):.{rng.randrange(0, 18)}f}"
        yield f"{rng.randrange(1, 10**17)}e{rng.randrange(-330, 310)}"
        yield str(rng.randrange(-10**18, 10**18))


def test_numbers_parse_as_the_standard_library_parses_them():
    # 50,000 random doubles (bit patterns), long mantissas, fixed-point and exponent forms,
    # integers up to 18 digits: json.loads is the reference (equal value, type and repr).
    rng = random.Random(20261202)
    for lit in _literals(rng, 10_000):
        data = b'{"a":' + lit.encode() + b',"b":[' + lit.encode() + b"]}"
        assert _same(_parse(data), json.loads(data.decode())), lit


@pytest.mark.parametrize("text", [
    '{"a":1,"b":2,"a":3}',                      # duplicate keys: the last value, the first position
    '{"a":18446744073709551615}',               # 64-bit unsigned
    '{"a":18446744073709551616}',               # beyond 64 bits: must stay an int
    '{"a":-9223372036854775809}',
    '{"a":123456789012345678901234567890}',
    '{"a":0.1234567890123456789012}',           # a long fraction (19+ digits: the standard parser)
    '{"a":NaN,"b":Infinity,"c":-Infinity}',     # read by Python's parser; the field checks reject them
    '{"a":1e400}',                              # inf by Python's parser
    '{"a":"\\ud800"}',                          # a lone surrogate escape
    '{"\\ud83d\\ude00":"\\u0000\\/\\t"}',
    '{"a":-0.0,"b":-0,"c":5e-324,"d":2.2250738585072011e-308}',
    '{ "a" : [ ] , "b" : { } }',
])
def test_edge_cases_match_the_standard_library(text):
    assert _same(_parse(text.encode()), json.loads(text))


@pytest.mark.parametrize("data", [
    b'{"a":1,}', b'{"a":01}', b'{"a":.5}', b'{"a":"\t"}', b'{"a":1}{"b":2}', b'{"a":tru}',
    b'{"a":"\xed\xa0\x80"}', b'{"a":"\xc0\xaf"}',
])
def test_what_json_refuses_is_refused_with_a_reason(data):
    with pytest.raises(MessageError) as exc:
        _parse(data)
    assert "native" in str(exc.value)


def _line(ra_literal: str) -> bytes:
    return ('{"schema":"matcher/1","type":"transient","transient_id":"T-BIG","class":"optical",'
            f'"ra_deg":{ra_literal},"dec_deg":1.0,"time":"2026-02-10T09:00:00Z"}}').encode()


@pytest.mark.parametrize("literal, words", [
    ("1" + "0" * 400, ("ra_deg", "float range")),      # OverflowError in float(): once uncaught
    ("7" * 5000, ("integer literal", "digits")),       # Python's int-digits limit: once uncaught
])
def test_integers_no_float_can_hold_are_rejections_not_crashes(literal, words):
    d = decode_item(RawItem.from_bytes(_line(literal)), NativeCodec(max_bytes=1 << 20))
    assert isinstance(d, Rejected)
    for w in words:
        assert w in d.reason, d.reason


def test_a_revision_beyond_an_sqlite_integer_is_rejected():
    line = (b'{"schema":"matcher/1","type":"gw_alert","event_id":"EV-X","revision":' + str(2**64).encode()
            + b',"state":"withdrawn","merger_time":"2026-02-10T09:00:00Z"}')
    d = decode_item(RawItem.from_bytes(line), NativeCodec())
    assert isinstance(d, Rejected) and d.field == "revision" and "2147483647" in d.reason
