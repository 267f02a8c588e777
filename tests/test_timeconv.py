"""ISO-8601 UTC → GPS seconds: against astropy, and the fast path of iso_to_gps against its general path."""

from __future__ import annotations

import random
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest
from astropy.time import Time

from matcher.timeconv import _iso_to_gps_general, gps_to_iso, iso_to_gps

_GPS_EPOCH = datetime(1980, 1, 6, tzinfo=timezone.utc)


def _isos(rng: random.Random, n: int) -> list[str]:
    """Invented UTC times from 1980-01-06 to 2028 (ERFA calls later years dubious), 0 to 6 fraction digits."""
    out = []
    for _ in range(n):
        dt = _GPS_EPOCH + timedelta(seconds=rng.uniform(0.0, 1.51e9))
        digits = rng.choice([0, 1, 3, 3, 6, 6])
        frac = f".{dt.microsecond:06d}"[:digits + 1] if digits else ""
        out.append(dt.strftime("%Y-%m-%dT%H:%M:%S") + frac + "Z")
    return out


def _around_leap_seconds() -> list[str]:
    # The first instants after each leap second inserted 1981-2017 (IERS Bulletin C, from memory),
    # and the last whole and half second before each.
    starts = ["1981-07-01", "1982-07-01", "1983-07-01", "1985-07-01", "1988-01-01", "1990-01-01", "1991-01-01",
              "1992-07-01", "1993-07-01", "1994-07-01", "1996-01-01", "1997-07-01", "1999-01-01", "2006-01-01",
              "2009-01-01", "2012-07-01", "2015-07-01", "2017-01-01"]
    out = []
    for day in starts:
        before = (datetime.fromisoformat(day) - timedelta(days=1)).strftime("%Y-%m-%d")
        out += [f"{day}T00:00:00Z", f"{day}T00:00:00.000001Z", f"{before}T23:59:59Z", f"{before}T23:59:59.5Z"]
    return out


def test_iso_to_gps_matches_astropy():
    # Reference: astropy Time(iso, scale="utc").gps, which counts leap seconds from ERFA's table.
    # Tolerance 1 µs: a float64 GPS time near 1.5e9 s resolves 0.24 µs, and astropy reaches
    # .gps through its two-double Julian date, good to well under that.
    isos = _isos(random.Random(2026), 3000) + _around_leap_seconds()
    ref = Time([s[:-1] for s in isos], format="isot", scale="utc").gps
    ours = np.array([iso_to_gps(s) for s in isos])
    assert np.max(np.abs(ours - ref)) < 1e-6


def test_offsets_and_zone_free_times_match_astropy():
    # A "+HH:MM" offset is the UTC time that much earlier; no zone means UTC (our schema's rule).
    # astropy reads only the zone-free UTC form, so the reference is the same instant written in UTC.
    ref = Time("2026-03-14T03:30:00.25", format="isot", scale="utc").gps
    for text in ("2026-03-14T05:00:00.25+01:30", "2026-03-14T03:30:00.25", "2026-03-14T03:30:00.25+00:00",
                 "2026-03-14T03:30:00.25z", " 2026-03-14T03:30:00.25Z "):
        assert iso_to_gps(text) == pytest.approx(ref, abs=1e-6), text


def _varied() -> list[object]:
    """Texts of every kind the fast path sees: usual, unusual but valid, and invalid."""
    rng = random.Random(7)
    texts: list[object] = _isos(rng, 3000) + _around_leap_seconds()
    texts += ["2026-03-14T05:00:00Z", "2026-03-14T05:00:00.1234567Z", "2026-03-14T05:00Z", "2026-03-14Z",
              "2026-03-14 05:00:00Z", "20260314T050000Z", "2026-W11-6T05:00:00Z", "2026-073T05:00:00Z",
              "2026-03-14T05:00:00+00:00Z", "2026-03-14T05:00:00+02:00Z", "2026-03-14T05:00:00ZZ",
              "2026-03-14T05:00:00 Z", " 2026-03-14T05:00:00Z", "2026-03-14T05:00:00Z ", "2016-12-31T23:59:60Z",
              "2026-02-29T00:00:00Z", "2024-02-29T12:00:00Z", "2026-13-01T00:00:00Z", "2026-03-14T24:00:00Z",
              "2026-03-14T05:00:00,5Z", "2026-03-14T05:00:0aZ", "2026-03-14T05:00:\u0661\u0662Z",
              "0001-01-01T00:00:00Z", "9999-12-31T23:59:59.999999Z", "Z", "", "yesterday", "2026-03-14T05:00:00z",
              "2026-03-14T05:00:00", "2026-03-14T05:00:00-05:30", None, 1457000000.0, b"2026-03-14T05:00:00Z"]
    chars = "0123456789-:T.+Z ,W"
    for _ in range(20000):  # random edits of a valid time, still ending in Z
        s = list("2026-03-14T05:00:00.125+00:00"[: rng.randint(4, 28)])
        for _ in range(rng.randint(0, 3)):
            i = rng.randrange(len(s))
            op = rng.random()
            if op < 0.4:
                s[i] = rng.choice(chars)
            elif op < 0.7:
                del s[i]
            else:
                s.insert(i, rng.choice(chars))
        texts.append("".join(s) + "Z")
    return texts


def _outcome(fn, text):
    try:
        return repr(fn(text))
    except ValueError as exc:
        return f"ValueError: {exc}"


def test_fast_path_agrees_with_general_path_bit_for_bit():
    texts = _varied()
    fast_accepted = 0
    for text in texts:
        got, want = _outcome(iso_to_gps, text), _outcome(_iso_to_gps_general, text)
        assert got == want, text  # repr: the same float to the last bit, or the same error text
        fast_accepted += not got.startswith("ValueError")
    assert fast_accepted > 3000  # the usual shapes were among them


def test_round_trip_through_gps_to_iso():
    for text in _isos(random.Random(3), 500):
        gps = iso_to_gps(text)
        back = iso_to_gps(gps_to_iso(gps))  # gps_to_iso truncates to whole milliseconds
        assert gps - 1e-3 - 1e-6 < back <= gps + 1e-6
