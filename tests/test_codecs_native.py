"""The native codec: valid messages, and every kind of rejection naming codec, field and reason."""

from __future__ import annotations

import pytest

from matcher.errors import ConfigError, MessageError
from matcher.streams.codecs import Codec, NativeCodec, codec_names, make_codec
from matcher.streams.messages import GWAlert, TransientReport
from matcher.streams.raw import RawItem
from matcher.timeconv import iso_to_gps
from streams_helpers import gw, line, transient


def decode(data: bytes, **kw):
    return NativeCodec(**kw).decode(RawItem.from_bytes(data, base_dir="/data/inbox"))


def rejection(data: bytes, **kw) -> MessageError:
    with pytest.raises(MessageError) as info:
        decode(data, **kw)
    assert info.value.codec == "native"
    return info.value


def test_registry_has_the_three_codecs_and_builds_them():
    assert set(codec_names()) >= {"native", "mapped", "voevent"}
    assert isinstance(make_codec("native"), Codec)
    with pytest.raises(ConfigError, match="unknown codec 'nope'"):
        make_codec("nope", keypath="sources.x.codec")


def test_gw_alert_and_transient_decode():
    a = decode(line(gw()))
    assert isinstance(a, GWAlert) and a.event_id == "EV-TEST-1" and a.revision == 1
    # Times become GPS seconds once, at the edge (timeconv is checked against astropy in its own tests).
    assert a.merger_time == iso_to_gps("2026-03-14T01:02:03.250Z")
    assert a.localization.resolved_path() == "/data/inbox/map.fits"
    t = decode(line(transient()))
    assert isinstance(t, TransientReport) and t.klass == "optical" and t.ra_deg == 150.25


def test_received_at_is_envelope_not_message():
    t = decode(line(transient(received_at="2026-03-14T06:00:00Z")))
    assert "received_at" not in t.extra
    err = rejection(line(transient(received_at="yesterday")))
    assert err.field == "received_at" and "ISO-8601" in err.problem


@pytest.mark.parametrize("data, field, words", [
    (b'{"schema": "matcher/1", "type": ', None, "not valid JSON"),
    (b"[1, 2, 3]", None, "must be a JSON object"),
    (b"", None, "is empty"),
    (b"\xff\xfe{}", None, "not UTF-8"),
    (b"\xef\xbb\xbf{}", None, "byte-order mark"),
    (b"[" * 100000 + b"]" * 100000, None, "nested too deeply"),
])
def test_malformed_input(data, field, words):
    err = rejection(data)
    assert err.field == field and words in err.problem


def test_unknown_schema_and_type():
    err = rejection(line({**transient(), "schema": "other/2"}))
    assert err.field == "schema" and "'other/2'" in err.problem
    err = rejection(line({**transient(), "type": "neutrino"}))
    assert err.field == "type"


@pytest.mark.parametrize("field, value, words", [
    ("ra_deg", "150.25", "must be a number"),
    ("dec_deg", True, "must be a number"),
    ("transient_id", 17, "non-empty string"),
    ("time", 1234567890, "ISO-8601"),
    ("dec_deg", 97.2, "<= 90.0"),
    ("ra_deg", -0.5, ">= 0.0"),
    ("ra_deg", 360.5, "<= 360.0"),
])
def test_wrong_types_and_out_of_range(field, value, words):
    err = rejection(line(transient(**{field: value})))
    assert err.field == field and words in err.problem
    assert err.message_id in ("TR-1", None)


@pytest.mark.parametrize("literal", [b"NaN", b"Infinity", b"-Infinity", b"1e999"])
def test_non_finite_numbers_in_a_field(literal):
    data = line(transient()).replace(b'"ra_deg":150.25', b'"ra_deg":' + literal)
    err = rejection(data)
    assert err.field == "ra_deg" and "finite" in err.problem


def test_non_finite_number_in_an_extra_field_is_named():
    data = line(transient(snr=1)).replace(b'"snr":1', b'"snr":{"g":[1,NaN]}')
    err = rejection(data)
    assert err.field == "snr.g[1]" and "finite" in err.problem and err.message_id == "TR-1"


def test_size_limit_before_parsing():
    big = line(transient(note="x" * 5000))
    err = rejection(big, max_bytes=4096)
    assert "over the 4096-byte message limit" in err.problem
    truncated = RawItem(big[:100], RawItem.from_bytes(b"").origin, truncated=True, size=123456)
    with pytest.raises(MessageError, match="123456 bytes"):
        NativeCodec().decode(truncated)


def test_gw_specific_rules():
    err = rejection(line(gw(revision=-1)))
    assert err.field == "revision"
    err = rejection(line(gw(state="retracted")))
    assert err.field == "state"
    err = rejection(line(gw(localization=None)))
    assert err.field == "localization" and "required" in err.problem
    assert decode(line(gw(state="withdrawn", localization=None))).localization is None
    err = rejection(line(gw(localization={"url": "http://maps.example.org/x.fits"})))
    assert err.field == "localization.url" and "https" in err.problem
    err = rejection(line(gw(source_probs={"bns": 0.9, "bbh": 0.9})))
    assert err.field == "source_probs" and "more than 1" in err.problem


def test_error_text_names_codec_id_and_field():
    err = rejection(line(transient(tid="TR-XYZ", dec=97.2)))
    assert str(err) == "native message TR-XYZ: dec_deg must be <= 90.0 (got 97.2)"
