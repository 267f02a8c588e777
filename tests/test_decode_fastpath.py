"""The native decode's fast paths give exactly what the checked paths give, on a varied set of inputs.

The reference is the decode made only of the checked steps (``check_size`` and
``_parse_checked`` for the bytes, ``_checked_message`` for the fields, ``check_finite``
for every extra field): the same message (type, every attribute, repr) or the same
rejection (text, codec, message id, field) for every input, good or bad.
"""

from __future__ import annotations

import dataclasses
import json
import pickle
import random
from collections import Counter, OrderedDict
from types import MappingProxyType

import pytest

from matcher.errors import MessageError
from matcher.streams.codecs import NativeCodec
from matcher.streams.codecs.jsonbytes import _parse_checked, check_finite, check_size, load_json
from matcher.streams.codecs.native import ENVELOPE_FIELDS, check_received_at
from matcher.streams.intake import Accepted, decode_item
from matcher.streams.messages import TransientReport, _checked_message, _fast_transient, message_from_fields
from matcher.streams.raw import RawItem

# ---------------------------------------------------------------------------- inputs (invented)
NAN, INF, NINF = "__NaN__", "__Inf__", "__-Inf__"  # written as the bare literals Python's parser reads


def _transient(**over):
    m = {"schema": "matcher/1", "type": "transient", "transient_id": "TR-1", "class": "optical", "ra_deg": 150.25,
         "dec_deg": -20.5, "pos_err_deg": 0.0003, "time": "2026-03-14T05:00:00.125Z",
         "last_nondetection": "2026-03-13T05:00:00Z", "mag": 20.5}
    m.update(over)
    return m


def _gw(**over):
    m = {"schema": "matcher/1", "type": "gw_alert", "event_id": "EV-1", "revision": 1, "state": "issued",
         "merger_time": "2026-03-14T01:02:03.250Z", "far_per_year": 0.5, "p_astro": 0.9,
         "source_probs": {"bns": 0.8, "terrestrial": 0.1}, "localization": "map.fits"}
    m.update(over)
    return m


TIMES = ["2026-03-14T05:00:00Z", "2026-03-14T05:00:00.123456Z", "2026-03-14T05:00:00.1Z", "2026-03-14T05:00:00z",
         "2026-03-14 05:00:00Z", "2026-03-14T05:00:00", "2026-03-14T05:00:00+02:00", "2026-03-14", "yesterday", "",
         " 2026-03-14T05:00:00Z", "2016-12-31T23:59:60Z", "2026-02-29T00:00:00Z", "2026-03-14T24:00:00Z",
         "2026-03-13T05:00:00Z", "2026-03-14T05:00:00.126Z", "2026-03-14T05:00:\u0661\u0662Z", "0001-01-01T00:00:00Z"]
VALUES = [None, "", " ", "\t", "x", "x" * 256, "x" * 257, "\u3000", True, False, 0, 1, -1, 7, 2 ** 70, 1.5, -0.0, 0.0,
          90.0, 90.0000001, 360.0, 360.5, -90.0, -90.5, 20.0, 20.5, 1e308, -1e-300, NAN, INF, NINF, [], [1, NAN],
          {}, {"a": [1, NAN]}, {"g": 1.0}, "150.25"] + TIMES
LOCALIZATIONS = ["map.fits", "/abs/map.fits", "https://maps.example.org/x.fits", "http://maps.example.org/x.fits",
                 {"path": "m.fits"}, {"url": "https://a.example.org/m"}, {"fits_base64": "AAAA"}, {"nope": 1},
                 {"path": "a", "url": "https://b.example.org"}, {"path": ""}, {"path": 3}, {}, 5, []]
PROBS = [{"bns": 0.5}, {"bns": 0.9, "bbh": 0.9}, {"xx": 0.1}, {"bns": NAN}, {"bns": "a"}, {"bns": 1.2}, [], {}]
TR_KEYS = ["schema", "type", "transient_id", "class", "ra_deg", "dec_deg", "pos_err_deg", "time", "last_nondetection",
           "redshift", "redshift_err", "distance_mpc", "distance_err_mpc", "localization", "received_at", "mag"]
GW_KEYS = ["schema", "type", "event_id", "revision", "state", "merger_time", "far_per_year", "p_astro",
           "source_probs", "localization", "received_at", "note"]


def _dump(obj, rng: random.Random) -> bytes:
    text = json.dumps(obj, separators=(",", ":") if rng.random() < 0.5 else (", ", ": "),
                      ensure_ascii=rng.random() < 0.7)
    for tag, literal in ((NAN, "NaN"), (NINF, "-Infinity"), (INF, "Infinity")):
        text = text.replace(f'"{tag}"', literal)
    return text.encode()


def varied_lines(seed: int = 7, n_random: int = 3000) -> list[bytes]:
    """Native lines: the usual shapes, each field set to each odd value, random combinations, broken bytes."""
    rng = random.Random(seed)
    lines = []
    for key in TR_KEYS:
        for v in VALUES + LOCALIZATIONS:
            lines.append(_dump(_transient(**{key: v}), rng))
        lines.append(_dump({k: v for k, v in _transient().items() if k != key}, rng))
    for key in GW_KEYS:
        for v in VALUES + LOCALIZATIONS + PROBS:
            lines.append(_dump(_gw(**{key: v}), rng))
        lines.append(_dump({k: v for k, v in _gw().items() if k != key}, rng))
    for _ in range(n_random):
        base = _transient() if rng.random() < 0.7 else _gw()
        keys = TR_KEYS if base["type"] == "transient" else GW_KEYS
        for _ in range(rng.randint(0, 3)):
            k = rng.choice(keys)
            if rng.random() < 0.15:
                base.pop(k, None)
            else:
                base[k] = rng.choice({"localization": LOCALIZATIONS, "source_probs": PROBS}.get(k, VALUES))
        if rng.random() < 0.2:
            items = list(base.items())
            rng.shuffle(items)
            base = dict(items)
        lines.append(_dump(base, rng))
    for j in range(500):  # the usual shape with random values, ints among them
        t = rng.uniform(1.0e9, 1.5e9)
        lines.append(_dump(_transient(transient_id=f"R{j}", ra_deg=rng.choice([rng.uniform(0, 360), rng.randint(0, 360)]),
                                      dec_deg=rng.choice([rng.uniform(-90, 90), rng.randint(-90, 90)]),
                                      time=f"2026-03-{rng.randint(10, 28)}T{rng.randint(0, 23):02d}:"
                                           f"{rng.randint(0, 59):02d}:{rng.randint(0, 59):02d}.{int(t) % 1000:03d}Z",
                                      last_nondetection="2026-03-01T00:00:00Z",
                                      redshift=rng.choice([None, 0.05, 1]), distance_mpc=rng.choice([None, 120.5, 40]),
                                      mag=rng.choice([1, 2.5, "x", None, [1, 2], {"g": 1.0}, True])), rng))
    lines += [b"", b" ", b"\t", b"[1, 2]", b"1", b'"s"', b"null", b"NaN", b'{"a":1} x', b'{"a":1}{"b":2}', b"{", b"}",
              b"{}", b'  {"schema":"matcher/1"}', b'{"schema":"matcher/1"}  ', b"\xff\xfe{}", b"\xef\xbb\xbf{}",
              b'{"a":"\xc3\x28"}', b'{"a":"\xed\xa0\x80"}', b'{"a":"\\ud800"}', b"[" * 5000 + b"]" * 5000,
              b'{"a":' * 5000 + b"1" + b"}" * 5000, b'{"schema": "matcher/1", "type": ', b'{"x":1}\x00',
              b'{"schema":"matcher/1","schema":"matcher/1","type":"transient"}', b"\xc2\xa0{}"]
    return lines


# ---------------------------------------------------------------------------- the reference
def reference_decode(item: RawItem, max_bytes: int):
    """The native decode from the checked steps alone."""
    check_size(item, "native", max_bytes)
    fields = _parse_checked(item.data, "native")
    if isinstance(fields, dict) and not ENVELOPE_FIELDS.isdisjoint(fields):
        check_received_at(fields, "native")
        fields = {k: v for k, v in fields.items() if k not in ENVELOPE_FIELDS}
    message = _checked_message(fields, "native", item.base_dir)
    if message.extra:
        mid = getattr(message, "event_id", None) or getattr(message, "transient_id", None)
        for k, v in message.extra.items():
            check_finite(v, "native", mid, k)
    return message


def outcome(fn):
    try:
        m = fn()
    except MessageError as exc:
        return ("rejected", str(exc), exc.codec, exc.message_id, exc.field)
    return ("accepted", type(m), repr(m), list(vars(m).items()), type(m.extra))


@pytest.mark.parametrize("max_bytes", [16 * 1024 * 1024, 300])
def test_native_decode_equals_the_checked_decode(max_bytes):
    codec = NativeCodec(max_bytes=max_bytes)
    kinds = Counter()
    for data in varied_lines():
        item = RawItem.from_bytes(data, base_dir="/data/inbox", received_at=1.0)
        got = outcome(lambda: codec.decode(item))
        assert got == outcome(lambda: reference_decode(item, max_bytes)), data[:200]
        kinds[got[0] if got[0] == "accepted" else got[4]] += 1
    # Every kind of rejection was among the inputs (None: the whole item), and many accepted messages.
    assert kinds["accepted"] > 500
    expected = {None, "schema", "type", "transient_id", "class", "ra_deg", "dec_deg", "pos_err_deg", "time",
                "last_nondetection", "redshift", "redshift_err", "distance_mpc", "distance_err_mpc", "localization",
                "localization.url", "localization.path", "received_at", "mag", "event_id", "revision", "state",
                "merger_time", "far_per_year", "p_astro", "source_probs", "bns"}
    if max_bytes > 1000:
        assert expected <= set(kinds), expected - set(kinds)


def test_fast_transient_is_the_checked_transient_or_steps_aside():
    taken = 0
    for data in varied_lines(seed=11):
        try:
            fields = json.loads(data)
        except (ValueError, RecursionError):
            continue
        if not isinstance(fields, dict) or fields.get("type") != "transient" or fields.get("schema") != "matcher/1":
            continue
        fast = _fast_transient(fields, "/data")
        want = outcome(lambda: _checked_message(fields, "native", "/data"))
        if fast is not None:
            taken += 1
            assert want == outcome(lambda: fast), data[:200]
    assert taken > 400  # the usual shape does take the fast path


def test_other_mappings_and_codecs_get_the_same_messages():
    for data in varied_lines(seed=5, n_random=600):
        try:
            fields = json.loads(data)
        except (ValueError, RecursionError):
            continue
        want = outcome(lambda: _checked_message(fields, "mapped", None))
        assert outcome(lambda: message_from_fields(fields, codec="mapped")) == want
        if isinstance(fields, dict):
            for other in (MappingProxyType(fields), OrderedDict(fields)):
                assert outcome(lambda: message_from_fields(other, codec="mapped")) == want


@pytest.mark.parametrize("data", [
    b'{"a": 1}', b'{"a": [1, 2, {"b": null}], "c": "\\u00e9"}', '{"é": "ü"}'.encode(), b"{}",
    b"", b"   ", b"[1]", b"1", b'{"a": 1} ', b' {"a": 1}', b'{"a": 1}{}', b'{"a": 1} x', b'{"a": }', b"{",
    b'{"a": "\xff"}', b"\xef\xbb\xbf{}", b"{" + b'"a":[' * 100000 + b"]" * 100000 + b"}", b'{"a": NaN}',
    b'{"a": 1e999}', b'{"a": "\xed\xa0\x80"}', b'{"a": "\\ud800"}', b'{"a": 1,}', b"{'a': 1}",
])
def test_load_json_equals_the_checked_parse(data):
    item = RawItem.from_bytes(data)

    def parse(fn):
        try:
            return ("value", repr(fn()))
        except MessageError as exc:
            return ("rejected", str(exc), exc.field)

    assert parse(lambda: load_json(item, "native", 1 << 24)) == parse(lambda: _parse_checked(data, "native"))


def test_fast_results_are_the_objects_the_constructors_build():
    # The fast path builds the report and decode_item its Accepted without the dataclasses'
    # generated __init__: they must be the very objects the constructors give (equal, same
    # repr and fields, still frozen, the same after a pickle round trip).
    codec = NativeCodec()
    seen = 0
    for data in varied_lines(seed=3, n_random=300):
        item = RawItem.from_bytes(data, base_dir="/data", received_at=1.0)
        got = decode_item(item, codec)
        if not isinstance(got, Accepted) or not isinstance(got.message, TransientReport):
            continue
        m = got.message
        report = TransientReport(**{f.name: getattr(m, f.name) for f in dataclasses.fields(TransientReport)})
        accepted = Accepted(item, "native", report, got.localization)
        for fast, built in ((m, report), (got, accepted)):
            assert type(fast) is type(built) and fast == built and repr(fast) == repr(built)
            assert list(vars(fast).items()) == list(vars(built).items())
            assert pickle.loads(pickle.dumps(fast)) == built
            with pytest.raises(dataclasses.FrozenInstanceError):
                fast.codec = "x"
        seen += 1
    assert seen > 100
