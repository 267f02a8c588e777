"""The VOEvent codec against a hand-written notice that follows the IVOA VOEvent 2.0
Recommendation (Seaman et al., IVOA REC-VOEvent-2.0, 2011; element names and nesting of
WhereWhen/ObsDataLocation/ObservationLocation/AstroCoords from its schema, from memory of the
document). Time-scale conversions are checked against astropy's Time (ERFA)."""

from __future__ import annotations

import math

import pytest
from astropy.time import Time
from scipy.stats import chi2

from matcher.errors import ConfigError, MessageError
from matcher.streams.codecs import VOEventCodec, make_codec
from matcher.streams.codecs.voevent import parse_xml_safely, sigma_from_containment
from matcher.streams.raw import RawItem


@pytest.fixture
def notice(fixtures_dir) -> bytes:
    return (fixtures_dir / "voevent" / "gamma_trigger.xml").read_bytes()


def decode(data: bytes, **options):
    return make_codec("voevent", options).decode(RawItem.from_bytes(data))


def rejection(data: bytes, **options) -> MessageError:
    with pytest.raises(MessageError) as info:
        decode(data, **options)
    assert info.value.codec == "voevent"
    return info.value


def test_the_example_notice(notice):
    t = decode(notice, params={"redshift": "redshift"})
    assert t.transient_id == "GM-260314-01" and t.klass == "gamma_ray"
    assert (t.ra_deg, t.dec_deg, t.pos_err_deg) == (150.5, -20.25, 4.5)
    # UTC ISOTime → GPS seconds, as astropy computes it.
    assert t.time == pytest.approx(Time("2026-03-14T01:02:04.75", scale="utc").gps, abs=1e-6)
    assert t.redshift == pytest.approx(0.051)  # a Param inside a Group, value as a <Value> child
    assert t.extra["voevent_ivorn"] == "ivo://example.invalid/gamma-monitor#trigger-260314-0102"
    assert t.extra["voevent_role"] == "observation"


@pytest.mark.parametrize("scale", ["TT", "TAI", "GPS"])
def test_time_scales_match_astropy(notice, scale):
    data = notice.replace(b"UTC-ICRS-GEO", f"{scale}-ICRS-TOPO".encode())
    t = decode(data)
    # The ISOTime is read on that scale: astropy Time(iso, scale=...).gps (TT = TAI + 32.184 s). astropy has
    # no GPS scale: a GPS clock reading is the TAI reading minus 19 s, so its TAI reading is iso + 19 s.
    ref = Time("2026-03-14T01:02:04.75", scale=scale.lower() if scale != "GPS" else "tai")
    expected = ref.gps if scale != "GPS" else ref.gps + 19.0
    assert t.time == pytest.approx(expected, abs=1e-6)


def test_position_units_and_containment(notice):
    data = notice.replace(b'unit="deg"', b'unit="rad"').replace(b"<C1>150.5", b"<C1>2.5").replace(b"<C2>-20.25", b"<C2>-0.35") \
        .replace(b"<Error2Radius>4.5", b"<Error2Radius>0.05")
    t = decode(data)
    assert t.ra_deg == pytest.approx(math.degrees(2.5), rel=1e-14)
    assert t.dec_deg == pytest.approx(math.degrees(-0.35), rel=1e-14)
    assert t.pos_err_deg == pytest.approx(math.degrees(0.05), rel=1e-14)  # Error2Radius shares Position2D's unit
    # Error2Radius as a 90% radius of a circular Gaussian: r²/σ² ~ χ²(2 dof), so σ = r/√χ²₂(0.9)
    # (scipy.stats.chi2). Tolerance: floating point only.
    t90 = decode(notice, error_containment=0.9)
    assert t90.pos_err_deg == pytest.approx(4.5 / math.sqrt(chi2.ppf(0.9, 2)), rel=1e-12)
    assert sigma_from_containment(1.0, 0.6826894921370859) == pytest.approx(1 / math.sqrt(chi2.ppf(0.6826894921370859, 2)))


def test_roles(notice):
    err = rejection(notice.replace(b'role="observation"', b'role="test"'))
    assert err.field == "role" and "'test'" in err.problem and "accept_roles" in err.problem
    assert err.message_id == "GM-260314-01"
    err = rejection(notice.replace(b'role="observation"', b'role="utility"'))
    assert err.field == "role"
    assert decode(notice.replace(b'role="observation"', b'role="test"'), accept_roles=["observation", "test"])
    err = rejection(notice.replace(b'role="observation"', b'role="rehearsal"'))
    assert "must be one of" in err.problem


def test_ids_and_classes_from_params_constants_or_ivorn(notice):
    no_params = notice.replace(b'<Param name="id" value="GM-260314-01" dataType="string"/>', b"") \
                      .replace(b'<Param name="class" value="gamma_ray" dataType="string"/>', b"")
    err = rejection(no_params)
    assert err.field == "class" and "no Param named 'class'" in err.problem
    t = decode(no_params, constants={"class": "gamma_ray"})
    assert t.transient_id == "ivo://example.invalid/gamma-monitor#trigger-260314-0102"
    err = rejection(no_params, constants={"class": "gamma_ray"}, id_from_ivorn=False)
    assert err.field == "transient_id"
    t = decode(notice, params={"transient_id": "snr"})
    assert t.transient_id == "12.3"


@pytest.mark.parametrize("old, new, field, words", [
    (b"UTC-ICRS-GEO", b"UTC-GALACTIC-GEO", "coord_system_id", "frame GALACTIC"),
    (b"UTC-ICRS-GEO", b"TDB-ICRS-BARY", "coord_system_id", "time scale TDB"),
    (b"UTC-ICRS-GEO", b"UTC-ICRS-BARY", "coord_system_id", "barycentric"),
    (b"UTC-ICRS-GEO", b"UTC_ICRS", "coord_system_id", "TIMESCALE-FRAME-REFPOS"),
    (b"<ISOTime>2026-03-14T01:02:04.75</ISOTime>", b"<ISOTime>soon</ISOTime>", "ISOTime", "not an ISO-8601"),
    (b"<ISOTime>2026-03-14T01:02:04.75</ISOTime>", b"", "ISOTime", "required"),
    (b"<C2>-20.25</C2>", b"<C2>-95</C2>", "dec_deg", ">= -90"),
    (b"<C1>150.5</C1>", b"<C1>NaN</C1>", "C1 (right ascension)", "finite"),
    (b"<C1>150.5</C1>", b"<C1>east</C1>", "C1 (right ascension)", "not a number"),
    (b"<Error2Radius>4.5</Error2Radius>", b"<Error2Radius>-1</Error2Radius>", "Error2Radius", ">= 0"),
    (b'unit="deg"', b'unit="furlong"', "Position2D", "not an angle unit"),
    (b"<Value>0.051</Value>", b"<Value>near</Value>", "redshift", "not a number"),
])
def test_field_rejections(notice, old, new, field, words):
    assert old in notice
    err = rejection(notice.replace(old, new), params={"redshift": "redshift"})
    assert err.field == field and words in err.problem, err


def test_document_rejections(notice):
    assert "not well-formed" in rejection(notice[:-40]).problem
    err = rejection(notice.replace(b"http://www.ivoa.net/xml/VOEvent/v2.0\"", b"http://www.ivoa.net/xml/VOEvent/v1.1\"", 1))
    assert "not VOEvent 2.0" in err.problem
    assert "not <VOEvent>" in rejection(b"<?xml version='1.0'?><Other/>").problem
    assert rejection(notice.replace(b' ivorn="ivo://example.invalid/gamma-monitor#trigger-260314-0102"', b"")).field == "ivorn"
    with pytest.raises(MessageError, match="over the 1000-byte message limit"):
        VOEventCodec(max_bytes=1000).decode(RawItem.from_bytes(notice))


BILLION_LAUGHS = b"""<?xml version="1.0"?>
<!DOCTYPE lolz [<!ENTITY lol "lol"><!ENTITY lol2 "&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;">]>
<voe:VOEvent xmlns:voe="http://www.ivoa.net/xml/VOEvent/v2.0" ivorn="ivo://x.invalid/a#1" role="observation"
 version="2.0"><What><Param name="class" value="&lol2;"/></What></voe:VOEvent>"""

EXTERNAL_ENTITY = b"""<?xml version="1.0"?>
<!DOCTYPE v [<!ENTITY xxe SYSTEM "file:///etc/hostname">]>
<voe:VOEvent xmlns:voe="http://www.ivoa.net/xml/VOEvent/v2.0" ivorn="ivo://x.invalid/a#1" role="observation"
 version="2.0"><What><Param name="class" value="&xxe;"/></What></voe:VOEvent>"""


@pytest.mark.parametrize("doc", [BILLION_LAUGHS, EXTERNAL_ENTITY, b"<!DOCTYPE VOEvent><VOEvent/>"])
def test_dtds_and_entities_are_refused(doc):
    err = rejection(doc)
    assert "refused" in err.problem
    with pytest.raises(ValueError, match="refused"):
        parse_xml_safely(doc)


def test_options_are_validated():
    with pytest.raises(ConfigError, match=r"codec\.accept_roles"):
        make_codec("voevent", {"accept_roles": ["observation", "drill"]})
    with pytest.raises(ConfigError, match=r"codec\.params\.ra_deg"):
        make_codec("voevent", {"params": {"ra_deg": "ra"}})
    with pytest.raises(ConfigError, match=r"codec\.error_containment"):
        make_codec("voevent", {"error_containment": 1.5})
    with pytest.raises(ConfigError, match=r"codec\.colour"):
        make_codec("voevent", {"colour": "blue"})
