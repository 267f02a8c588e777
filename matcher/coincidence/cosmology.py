"""Redshift ↔ luminosity distance (Planck18) for the distance term, vectorized.

A thin layer over :func:`matcher.cosmology.planck18_table` (one table
integrated from astropy's Planck18 ``efunc``, then splines), adding the range
checks the engine wants: redshifts outside ``[0, Z_MAX]`` are errors here, not
NaN. The tests compare with astropy's own values.
"""

from __future__ import annotations

import numpy as np

from matcher.cosmology import Z_MAX, planck18_table

__all__ = [
    "luminosity_distance_mpc",
    "luminosity_distance_derivative_mpc",
    "redshift_at_distance",
    "Z_MAX",
]


def _check_z(z):
    z = np.asarray(z, dtype=np.float64)
    if np.any(~np.isfinite(z)) or np.any((z < 0) | (z > Z_MAX)):
        bad = z.ravel()[np.flatnonzero(~(np.isfinite(z) & (z >= 0) & (z <= Z_MAX)).ravel())[0]]
        raise ValueError(f"redshift {float(bad)!r} is outside [0, {Z_MAX:g}]")
    return z


def luminosity_distance_mpc(z) -> np.ndarray:
    """Luminosity distance (Mpc) at redshift ``z`` (Planck18, astropy).

    Examples
    --------
    >>> round(float(luminosity_distance_mpc(0.1)), 2)
    475.82
    """
    return planck18_table().luminosity_distance(_check_z(z))


def luminosity_distance_derivative_mpc(z) -> np.ndarray:
    """``dD_L/dz`` (Mpc) at redshift ``z`` (Planck18)."""
    return planck18_table().luminosity_distance_derivative(_check_z(z))


def redshift_at_distance(d_mpc) -> np.ndarray:
    """Redshift whose Planck18 luminosity distance is ``d_mpc``."""
    d = np.asarray(d_mpc, dtype=np.float64)
    table = planck18_table()
    if np.any(~np.isfinite(d)) or np.any((d < 0) | (d > table.max_distance_mpc)):
        raise ValueError(f"luminosity distance must lie in [0, {table.max_distance_mpc:.6g}] Mpc")
    return table.redshift_at_luminosity_distance(d)
