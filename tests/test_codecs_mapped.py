"""The field-mapped codec and its unit conversions, checked against astropy (8.0, with ERFA)."""

from __future__ import annotations

import json
import math

import astropy.units as u
import pytest
from astropy.time import Time

from matcher.errors import ConfigError, MessageError
from matcher.streams.codecs import MappedCodec, make_codec, parse_mapping
from matcher.streams.codecs.units import angle_to_deg, distance_to_mpc, gps_to_iso_us, rate_to_per_year, time_to_gps
from matcher.streams.messages import GWAlert, TransientReport
from matcher.streams.raw import RawItem
from matcher.timeconv import iso_to_gps

# A survey-style alert in an invented foreign schema.
FOREIGN = {
    "objectId": "ZZ26aaaaaab",
    "candidate": {"ra": 2.6223, "dec": -0.3578, "sigmapos": 0.9, "jd": 2461113.5428616898, "mag": "21.3"},
    "prv_candidates": [{"jd": 2461111.51}, {"jd": 2461112.49}],
    "host": {"z": "0.0123"},
}
SURVEY_FIELDS = {
    "type": {"const": "transient"},
    "class": {"const": "optical"},
    "transient_id": "objectId",
    "ra_deg": {"path": "candidate.ra", "unit": "rad"},
    "dec_deg": {"path": "candidate.dec", "unit": "rad"},
    "pos_err_deg": {"path": "candidate.sigmapos", "unit": "arcsec"},
    "time": {"path": "candidate.jd", "unit": "jd"},
    "last_nondetection": {"path": "prv_candidates.1.jd", "unit": "jd"},
    "redshift": "host.z",
    "mag": "candidate.mag",
}


def decode(fields, obj, base_dir=None):
    codec = MappedCodec(fields)
    return codec.decode(RawItem.from_bytes(json.dumps(obj).encode(), base_dir=base_dir))


# --------------------------------------------------------------------------- units
@pytest.mark.parametrize("mjd", [61113.0428616898, 60000.123456789, 44239.0,
                                 57753.5, 57753.99999])  # the last two: 2016-12-31 ended with a leap second
def test_mjd_to_gps_matches_astropy(mjd):
    # astropy Time(format="mjd", scale="utc").gps (ERFA stretches a leap-second day to 86401 s, as we do).
    # Tolerance 2 µs: an MJD float near 6e4 resolves ~1 µs.
    assert time_to_gps(mjd, "mjd") == pytest.approx(Time(mjd, format="mjd", scale="utc").gps, abs=2e-6)


@pytest.mark.parametrize("jd", [2461113.5428616898, 2457754.49999, 2444244.5])
def test_jd_to_gps_matches_astropy(jd):
    # A JD float near 2.46e6 resolves ~40 µs; allow 1e-4 s.
    assert time_to_gps(jd, "jd") == pytest.approx(Time(jd, format="jd", scale="utc").gps, abs=1e-4)


@pytest.mark.parametrize("iso", ["2026-03-14T01:02:03.25", "2017-01-01T00:00:00", "1999-06-30T12:00:00"])
def test_unix_and_gps_and_iso_match_astropy(iso):
    t = Time(iso, scale="utc")
    assert time_to_gps(t.unix, "unix") == pytest.approx(t.gps, abs=1e-6)
    assert time_to_gps(t.gps, "gps") == t.gps
    assert time_to_gps(iso + "Z", "iso") == pytest.approx(t.gps, abs=1e-6)
    # ISO with microseconds round-trips through our schema's ISO form.
    assert iso_to_gps(gps_to_iso_us(t.gps)) == pytest.approx(t.gps, abs=1e-6)


@pytest.mark.parametrize("unit, value", [("rad", 2.6223), ("arcmin", 95.5), ("arcsec", 0.9), ("hourangle", 7.25),
                                         ("deg", 12.5)])
def test_angles_match_astropy_units(unit, value):
    assert angle_to_deg(value, unit) == pytest.approx((value * u.Unit(unit)).to_value(u.deg), rel=1e-15)


def test_distance_and_rate_units_match_astropy():
    assert distance_to_mpc(3.2, "kpc") == pytest.approx((3.2 * u.kpc).to_value(u.Mpc), rel=1e-15)
    assert distance_to_mpc(1.1, "Gpc") == pytest.approx((1.1 * u.Gpc).to_value(u.Mpc), rel=1e-15)
    # A false-alarm rate in Hz per Julian year (astropy's u.yr is the Julian year).
    assert rate_to_per_year(1e-8, "hz") == pytest.approx((1e-8 * u.Hz).to_value(1 / u.yr), rel=1e-15)


def test_unit_errors():
    with pytest.raises(ValueError, match="finite"):
        time_to_gps(float("nan"), "mjd")
    with pytest.raises(ValueError, match="string"):
        time_to_gps(5.0, "iso")
    with pytest.raises(ValueError, match="years 1-9999"):
        gps_to_iso_us(1e13)


# --------------------------------------------------------------------------- the codec
def test_survey_alert_is_translated():
    t = decode(SURVEY_FIELDS, FOREIGN)
    assert isinstance(t, TransientReport) and t.transient_id == "ZZ26aaaaaab"
    assert t.ra_deg == pytest.approx(math.degrees(2.6223), rel=1e-12)
    assert t.dec_deg == pytest.approx(math.degrees(-0.3578), rel=1e-12)
    assert t.pos_err_deg == pytest.approx(0.9 / 3600, rel=1e-12)
    assert t.time == pytest.approx(Time(2461113.5428616898, format="jd", scale="utc").gps, abs=1e-4)
    assert t.last_nondetection == pytest.approx(Time(2461112.49, format="jd", scale="utc").gps, abs=1e-4)
    assert t.redshift == pytest.approx(0.0123)  # a numeric string, as foreign streams often send
    assert t.extra["mag"] == "21.3"  # unknown targets are kept as extra fields, untouched


def test_gw_alert_with_value_table_and_nested_targets():
    fields = {
        "type": {"const": "gw_alert"},
        "event_id": "superevent",
        "revision": "seq",
        "state": {"path": "alert_type", "values": {"PRELIMINARY": "issued", "UPDATE": "revised",
                                                    "RETRACTION": "withdrawn"}},
        "merger_time": {"path": "event.t0", "unit": "gps"},
        "far_per_year": {"path": "event.far", "unit": "hz"},
        "source_probs.bns": "event.classification.BNS",
        "source_probs.bbh": "event.classification.BBH",
        "localization.url": {"path": "event.skymap_url", "default": None},
    }
    obj = {"superevent": "EV26x", "seq": 3, "alert_type": "UPDATE",
           "event": {"t0": 1457485321.25, "far": 3.2e-10, "classification": {"BNS": 0.7, "BBH": 0.2},
                     "skymap_url": "https://maps.example.org/EV26x/3.fits"}}
    a = decode(fields, obj)
    assert isinstance(a, GWAlert) and a.state == "revised" and a.revision == 3
    assert a.merger_time == pytest.approx(1457485321.25, abs=1e-6)
    assert a.far_per_year == pytest.approx(3.2e-10 * 365.25 * 86400, rel=1e-12)
    assert a.source_probs == {"bns": 0.7, "bbh": 0.2}
    assert a.localization.url == "https://maps.example.org/EV26x/3.fits"
    # Retraction: no localization needed; the default (null) makes the field absent.
    obj2 = {**obj, "alert_type": "RETRACTION", "event": {**obj["event"]}}
    del obj2["event"]["skymap_url"]
    assert decode(fields, obj2).state == "withdrawn"
    err = pytest.raises(MessageError, decode, fields, {**obj, "alert_type": "EARLY_WARNING"}).value
    assert err.codec == "mapped" and err.field == "state" and "EARLY_WARNING" in err.problem
    assert err.message_id == "EV26x"


def test_missing_path_is_named_in_the_error():
    obj = json.loads(json.dumps(FOREIGN))
    del obj["candidate"]["dec"]
    err = pytest.raises(MessageError, decode, SURVEY_FIELDS, obj).value
    assert err.field == "dec_deg" and "'candidate.dec'" in err.problem and err.message_id == "ZZ26aaaaaab"


@pytest.mark.parametrize("path, value, field, words", [
    (("candidate", "ra"), "east", "ra_deg", "must be a number"),
    (("candidate", "ra"), None, "ra_deg", "required"),
    (("candidate", "dec"), 2.0, "dec_deg", "<= 90"),  # 2 rad = 114.6 deg
    (("candidate", "jd"), [1], "time", "must be a number"),
])
def test_bad_foreign_values(path, value, field, words):
    obj = json.loads(json.dumps(FOREIGN))
    obj[path[0]][path[1]] = value
    err = pytest.raises(MessageError, decode, SURVEY_FIELDS, obj).value
    assert err.field == field and words in err.problem


def test_non_finite_foreign_value_is_rejected_only_where_mapped():
    text = json.dumps(FOREIGN).replace('"sigmapos": 0.9', '"sigmapos": NaN')
    with pytest.raises(MessageError, match="pos_err_deg.*finite"):
        MappedCodec(SURVEY_FIELDS).decode(RawItem.from_bytes(text.encode()))
    # NaN in a field nobody maps is not our business.
    text = json.dumps({**FOREIGN, "unused": 1}).replace('"unused": 1', '"unused": NaN')
    assert MappedCodec(SURVEY_FIELDS).decode(RawItem.from_bytes(text.encode())).transient_id == "ZZ26aaaaaab"


def test_not_an_object_and_malformed():
    with pytest.raises(MessageError, match="mapped message: must be a JSON object"):
        MappedCodec(SURVEY_FIELDS).decode(RawItem.from_bytes(b"[]"))
    with pytest.raises(MessageError, match="not valid JSON"):
        MappedCodec(SURVEY_FIELDS).decode(RawItem.from_bytes(b"{"))


@pytest.mark.parametrize("spec, keypath, words", [
    ({}, "codec.fields", "non-empty mapping"),
    ({"ra_deg": {"path": "a", "unit": "furlong"}}, "codec.fields.ra_deg.unit", "unknown angle unit"),
    ({"time": {"path": "a", "unit": "deg"}}, "codec.fields.time.unit", "unknown time unit"),
    ({"class": {"path": "a", "unit": "deg"}}, "codec.fields.class.unit", "takes no unit"),
    ({"ra_deg": {"path": "a", "const": 1}}, "codec.fields.ra_deg", "exactly one of path or const"),
    ({"ra_deg": {"pth": "a"}}, "codec.fields.ra_deg.pth", "unknown key"),
    ({"ra_deg": "a..b"}, "codec.fields.ra_deg", "empty segment"),
    ({"ra_deg": 5}, "codec.fields.ra_deg", "path string or a mapping"),
    ({"source_probs": "p", "source_probs.bns": "q"}, "codec.fields.source_probs", "conflicts"),
    ({"state": {"path": "s", "values": []}}, "codec.fields.state.values", "non-empty mapping"),
])
def test_mapping_errors_name_the_key_path(spec, keypath, words):
    with pytest.raises(ConfigError) as info:
        parse_mapping(spec)
    assert info.value.path == keypath and words in info.value.problem


def test_factory_options():
    with pytest.raises(ConfigError, match=r"sources\.s\.codec\.fields: is required"):
        make_codec("mapped", {}, keypath="sources.s.codec")
    with pytest.raises(ConfigError, match=r"sources\.s\.codec\.mapping"):
        make_codec("mapped", {"mapping": {}}, keypath="sources.s.codec")
    assert make_codec("mapped", {"fields": SURVEY_FIELDS}).name == "mapped"
