"""Coordinate checks and conversions, vectorized (degrees in, radians/unit vectors out)."""

from __future__ import annotations

import numpy as np

from matcher.errors import InputError

__all__ = ["check_radec", "radec_to_thetaphi", "radec_to_vec", "vec_to_radec", "angular_separation_deg"]


def check_radec(ra_deg, dec_deg, *, what: str = "position"):
    """Return float arrays ``(ra, dec)`` after checking ranges.

    RA must be finite and in [0, 360] degrees, Dec in [-90, 90]. The error
    names the first offending entry and its value.
    """
    ra = np.asarray(ra_deg, dtype=np.float64)
    dec = np.asarray(dec_deg, dtype=np.float64)
    try:
        ra, dec = np.broadcast_arrays(ra, dec)
    except ValueError as exc:
        raise InputError(f"{what}: RA and Dec have incompatible shapes {ra.shape} and {dec.shape}") from exc
    bad_ra = ~(np.isfinite(ra) & (ra >= 0.0) & (ra <= 360.0))
    if bad_ra.any():
        i = int(np.flatnonzero(bad_ra.ravel())[0])
        raise InputError(f"{what} #{i}: ra_deg={float(ra.ravel()[i])!r} is outside [0, 360]")
    bad_dec = ~(np.isfinite(dec) & (dec >= -90.0) & (dec <= 90.0))
    if bad_dec.any():
        i = int(np.flatnonzero(bad_dec.ravel())[0])
        raise InputError(f"{what} #{i}: dec_deg={float(dec.ravel()[i])!r} is outside [-90, 90]")
    return ra, dec


def radec_to_thetaphi(ra_deg, dec_deg):
    """HEALPix colatitude and longitude (radians) from RA/Dec (degrees)."""
    theta = np.radians(90.0 - np.asarray(dec_deg, dtype=np.float64))
    phi = np.radians(np.asarray(ra_deg, dtype=np.float64))
    return theta, phi


def radec_to_vec(ra_deg, dec_deg):
    """Unit vectors, shape ``(..., 3)``."""
    ra = np.radians(np.asarray(ra_deg, dtype=np.float64))
    dec = np.radians(np.asarray(dec_deg, dtype=np.float64))
    cd = np.cos(dec)
    return np.stack([cd * np.cos(ra), cd * np.sin(ra), np.sin(dec)], axis=-1)


def vec_to_radec(vec):
    """RA in [0, 360) and Dec (degrees) from vectors of shape ``(..., 3)``."""
    vec = np.asarray(vec, dtype=np.float64)
    x, y, z = vec[..., 0], vec[..., 1], vec[..., 2]
    ra = np.degrees(np.arctan2(y, x)) % 360.0
    dec = np.degrees(np.arctan2(z, np.hypot(x, y)))
    return ra, dec


def angular_separation_deg(ra1, dec1, ra2, dec2):
    """Great-circle separation (degrees), Vincenty's formula (stable at all angles)."""
    ra1, dec1, ra2, dec2 = (np.radians(np.asarray(a, dtype=np.float64)) for a in (ra1, dec1, ra2, dec2))
    dra = ra2 - ra1
    s1, c1 = np.sin(dec1), np.cos(dec1)
    s2, c2 = np.sin(dec2), np.cos(dec2)
    num = np.hypot(c2 * np.sin(dra), c1 * s2 - s1 * c2 * np.cos(dra))
    den = s1 * s2 + c1 * c2 * np.cos(dra)
    return np.degrees(np.arctan2(num, den))
