"""Redshift ↔ luminosity distance in astropy's Planck18 cosmology, vectorized by a table.

astropy is called once (on first use) to tabulate ``D_L(z)`` on a grid uniform
in ``ln(1+z)`` for ``0 <= z <= 20``; afterwards every conversion is a cubic
spline evaluation of the smooth ratio ``D_L(z)/z`` (which tends to the Hubble
distance ``c/H0`` at ``z → 0``), so there is no per-report astropy call.
Planck18 is flat, so ``dD_L/dz = D_C + (1+z) D_H / E(z)`` is tabulated the same
way for error propagation. The tests compare with astropy's own values.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

__all__ = [
    "luminosity_distance_mpc",
    "luminosity_distance_derivative_mpc",
    "redshift_at_distance",
    "Z_MAX",
]

#: Largest redshift tabulated (the message schema's limit).
Z_MAX = 20.0
_N = 4096


@lru_cache(maxsize=1)
def _tables():
    from astropy.cosmology import Planck18
    from scipy.interpolate import CubicSpline

    u = np.linspace(0.0, np.log1p(Z_MAX), _N)
    z = np.expm1(u)
    z[0] = 0.0
    zz = z[1:]
    dc = Planck18.comoving_distance(zz).to_value("Mpc")
    dl = (1.0 + zz) * dc
    dh = Planck18.hubble_distance.to_value("Mpc")
    ez = Planck18.efunc(zz)
    ddl = dc + (1.0 + zz) * dh / ez
    ratio = np.concatenate([[dh], dl / zz])
    deriv = np.concatenate([[dh], ddl])
    return CubicSpline(u, ratio), CubicSpline(u, deriv), z, np.concatenate([[0.0], dl])


def _check_z(z):
    z = np.asarray(z, dtype=np.float64)
    if np.any(~np.isfinite(z)) or np.any((z < 0) | (z > Z_MAX)):
        bad = z.ravel()[np.flatnonzero(~(np.isfinite(z) & (z >= 0) & (z <= Z_MAX)).ravel())[0]]
        raise ValueError(f"redshift {bad!r} is outside [0, {Z_MAX:g}]")
    return z


def luminosity_distance_mpc(z) -> np.ndarray:
    """Luminosity distance (Mpc) at redshift ``z`` (Planck18, astropy).

    Examples
    --------
    >>> round(float(luminosity_distance_mpc(0.1)), 2)
    475.82
    """
    z = _check_z(z)
    ratio, _, _, _ = _tables()
    return z * ratio(np.log1p(z))


def luminosity_distance_derivative_mpc(z) -> np.ndarray:
    """``dD_L/dz`` (Mpc) at redshift ``z`` (Planck18, flat)."""
    z = _check_z(z)
    _, deriv, _, _ = _tables()
    return deriv(np.log1p(z))


def redshift_at_distance(d_mpc) -> np.ndarray:
    """Redshift whose Planck18 luminosity distance is ``d_mpc`` (Newton steps from a table guess)."""
    d = np.asarray(d_mpc, dtype=np.float64)
    _, _, zt, dlt = _tables()
    if np.any(~np.isfinite(d)) or np.any((d < 0) | (d > dlt[-1])):
        raise ValueError(f"luminosity distance must lie in [0, {dlt[-1]:.6g}] Mpc")
    z = np.interp(d, dlt, zt)
    for _ in range(4):
        z = np.clip(z - (luminosity_distance_mpc(z) - d) / luminosity_distance_derivative_mpc(z), 0.0, Z_MAX)
    return z
