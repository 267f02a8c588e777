"""Time at the edge: ISO-8601 UTC strings ↔ GPS seconds (float), with leap seconds.

Inside the engine time is float GPS seconds. Conversion uses the table of
UTC leap seconds since the GPS epoch (1980-01-06); the tests check it against
astropy's ``Time(...).gps``, which takes them from ERFA. No leap second has been
announced after 2017-01-01 (IERS Bulletin C, from memory); when one is, add a row.
"""

from __future__ import annotations

import bisect
import math
from datetime import datetime, timedelta, timezone

__all__ = ["iso_to_gps", "gps_to_iso", "unix_to_gps", "gps_to_unix", "GPS_EPOCH_UNIX"]

#: Unix time of the GPS epoch, 1980-01-06T00:00:00 UTC.
GPS_EPOCH_UNIX = 315964800.0

# Unix times (UTC) from which GPS-UTC takes the next value: 1 s at the first row, ...
_LEAP_UNIX = [
    datetime(y, m, 1, tzinfo=timezone.utc).timestamp()
    for y, m in [
        (1981, 7), (1982, 7), (1983, 7), (1985, 7), (1988, 1), (1990, 1), (1991, 1),
        (1992, 7), (1993, 7), (1994, 7), (1996, 1), (1997, 7), (1999, 1), (2006, 1),
        (2009, 1), (2012, 7), (2015, 7), (2017, 1),
    ]
]
# The same instants on the GPS time scale.
_LEAP_GPS = [u - GPS_EPOCH_UNIX + (i + 1) for i, u in enumerate(_LEAP_UNIX)]


def unix_to_gps(t_unix: float) -> float:
    """GPS seconds from Unix (POSIX, UTC) seconds."""
    n = bisect.bisect_right(_LEAP_UNIX, t_unix)
    return t_unix - GPS_EPOCH_UNIX + n


def gps_to_unix(t_gps: float) -> float:
    """Unix seconds from GPS seconds (a time inside a leap second maps to its end)."""
    n = bisect.bisect_right(_LEAP_GPS, t_gps)
    return t_gps + GPS_EPOCH_UNIX - n


def iso_to_gps(text: str) -> float:
    """Parse ISO-8601 (UTC; ``Z``, an offset, or no zone meaning UTC) into GPS seconds.

    Raises ``ValueError`` with the offending text when it does not parse.
    """
    if type(text) is str and text[-1:] == "Z":
        # The usual shape first: datetime.fromisoformat reads a final "Z" itself (Python
        # 3.11) as the same UTC datetime as "+00:00"; whatever it refuses here (a leading
        # blank, say) goes the general way, and gets its error there. The sum is
        # unix_to_gps's, inline.
        try:
            t_unix = _fromisoformat(text).timestamp()
        except ValueError:
            pass
        else:
            return t_unix - GPS_EPOCH_UNIX + _bisect_right(_LEAP_UNIX, t_unix)
    return _iso_to_gps_general(text)


_fromisoformat = datetime.fromisoformat
_bisect_right = bisect.bisect_right


def _iso_to_gps_general(text: str) -> float:
    """:func:`iso_to_gps` for any text (the reference for its fast path)."""
    if not isinstance(text, str):
        raise ValueError(f"expected an ISO-8601 string, got {type(text).__name__}")
    s = text.strip()
    if s.endswith(("Z", "z")):
        s = s[:-1] + "+00:00"
    try:
        dt = datetime.fromisoformat(s)
    except ValueError:
        raise ValueError(f"{text!r} is not an ISO-8601 date-time") from None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=timezone.utc)
    return unix_to_gps(dt.timestamp())


def gps_to_iso(t_gps: float) -> str:
    """ISO-8601 UTC string (millisecond precision, ``Z`` suffix) for GPS seconds."""
    if not math.isfinite(t_gps):
        raise ValueError(f"GPS time {t_gps!r} is not finite")
    unix = gps_to_unix(t_gps)
    dt = datetime(1970, 1, 1, tzinfo=timezone.utc) + timedelta(seconds=unix)
    return dt.strftime("%Y-%m-%dT%H:%M:%S.") + f"{dt.microsecond // 1000:03d}Z"
