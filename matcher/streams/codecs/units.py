"""Unit conversions for foreign messages: angles, times, distances, rates.

Pure functions on floats. Angles go to degrees; times go to GPS seconds (and on
to an ISO-8601 UTC string with microseconds, the form our schema takes); distances
to Mpc; false-alarm rates to per year.

Time scales: ``unix`` is POSIX seconds (UTC, no leap seconds counted); ``gps`` is
GPS seconds; ``mjd`` and ``jd`` are UTC Modified/Julian Dates. On a UTC day that
ends with a leap second the day has 86401 SI seconds, and its fraction is
stretched to cover them, as the IAU SOFA/ERFA routines that astropy uses do.
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone

from matcher.timeconv import gps_to_unix, iso_to_gps, unix_to_gps

__all__ = [
    "ANGLE_UNITS",
    "TIME_UNITS",
    "DISTANCE_UNITS",
    "RATE_UNITS",
    "angle_to_deg",
    "time_to_gps",
    "gps_to_iso_us",
    "distance_to_mpc",
    "rate_to_per_year",
    "MJD_UNIX_EPOCH",
    "JD_MINUS_MJD",
]

#: Degrees per unit.
ANGLE_UNITS = {
    "deg": 1.0,
    "rad": 180.0 / math.pi,
    "arcmin": 1.0 / 60.0,
    "arcsec": 1.0 / 3600.0,
    "hourangle": 15.0,
}
TIME_UNITS = ("iso", "unix", "gps", "mjd", "jd")
#: Mpc per unit.
DISTANCE_UNITS = {"Mpc": 1.0, "Gpc": 1.0e3, "kpc": 1.0e-3, "pc": 1.0e-6}
#: Per-year rate per unit; a year is the Julian year of 365.25 days (IAU).
RATE_UNITS = {"per_year": 1.0, "per_day": 365.25, "hz": 365.25 * 86400.0}

#: MJD of the Unix epoch 1970-01-01T00:00:00 UTC.
MJD_UNIX_EPOCH = 40587
#: JD = MJD + 2400000.5.
JD_MINUS_MJD = 2400000.5


def _finite(value: float, what: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ValueError(f"{what} must be a number, got {type(value).__name__}")
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"{what} must be finite, got {value!r}")
    return value


def angle_to_deg(value: float, unit: str) -> float:
    """``value`` in ``unit`` (a key of :data:`ANGLE_UNITS`) as degrees."""
    return _finite(value, "angle") * ANGLE_UNITS[unit]


def distance_to_mpc(value: float, unit: str) -> float:
    """``value`` in ``unit`` (a key of :data:`DISTANCE_UNITS`) as Mpc."""
    return _finite(value, "distance") * DISTANCE_UNITS[unit]


def rate_to_per_year(value: float, unit: str) -> float:
    """A rate in ``unit`` (a key of :data:`RATE_UNITS`) per Julian year."""
    return _finite(value, "rate") * RATE_UNITS[unit]


def _mjd_day_to_gps(day: int, frac: float) -> float:
    start = (day - MJD_UNIX_EPOCH) * 86400.0
    g0 = unix_to_gps(start)
    length = unix_to_gps(start + 86400.0) - g0  # 86400, or 86401 on a leap-second day
    return g0 + frac * length


def time_to_gps(value, unit: str) -> float:
    """A time in ``unit`` (``iso``, ``unix``, ``gps``, ``mjd``, ``jd``) as GPS seconds.

    Raises
    ------
    ValueError
        Not a number (or, for ``iso``, not an ISO-8601 string), not finite, or out of range.
    """
    if unit == "iso":
        if not isinstance(value, str):
            raise ValueError(f"an ISO-8601 time must be a string, got {type(value).__name__}")
        return iso_to_gps(value)
    v = _finite(value, "time")
    if unit == "gps":
        return v
    if unit == "unix":
        return unix_to_gps(v)
    if unit == "mjd":
        day = math.floor(v)
        return _mjd_day_to_gps(int(day), v - day)
    if unit == "jd":
        shifted = v - 0.5  # exact for 1 <= v < 2**52: 0.5 is a multiple of the float spacing there
        day = math.floor(shifted)
        return _mjd_day_to_gps(int(day) - 2400000, shifted - day)
    raise ValueError(f"unknown time unit {unit!r}; known: {', '.join(TIME_UNITS)}")


def gps_to_iso_us(t_gps: float) -> str:
    """ISO-8601 UTC with microseconds and a ``Z`` (an instant inside a leap second maps to its end).

    Raises
    ------
    ValueError
        Not finite, or outside the years 1..9999.
    """
    if not math.isfinite(t_gps):
        raise ValueError(f"GPS time {t_gps!r} is not finite")
    try:
        dt = datetime(1970, 1, 1, tzinfo=timezone.utc) + timedelta(seconds=gps_to_unix(t_gps))
    except OverflowError:
        raise ValueError(f"GPS time {t_gps!r} is outside the years 1-9999") from None
    return dt.strftime("%Y-%m-%dT%H:%M:%S.%fZ")
