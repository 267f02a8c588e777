"""A seeded generator of invented galaxy catalogues for demos, tests and benchmarks.

Galaxies are placed uniformly in comoving volume out to a luminosity
distance (optionally inside a sky cone, optionally a fraction of them in
groups: 3D Gaussian clumps around centres that are themselves uniform in
volume). Luminosities follow a Schechter function
``φ(x) ∝ x^α e^{-x}``, ``x = L/L* ≥ x_min``, drawn by rejection from a power
law. Apparent magnitudes are ``M* - 2.5 log10 x + 5 log10(D_L/Mpc) + 25``
(no K-correction), and a magnitude limit drops the faint ones — so the
luminosity-weighted completeness of the result is exactly
:class:`~matcher.catalog.completeness.SchechterCompleteness` (up to the
``x_min`` cut, which removes a fraction ``γ(α+2, x_min)/Γ(α+2)`` ≈ 2e-6 of
the luminosity for the defaults).

Reported distances carry a fractional Gaussian error; a chosen fraction of
galaxies report only a redshift. Weights are luminosities in 10¹⁰ L_sun
(B band, M_sun = 5.48, from memory). Half-light radii follow an invented
size–luminosity relation ``R_h = 4 kpc (L/L*)^0.3``. The true luminosity
distance is kept in ``true_distance_mpc`` (not one of the catalogue columns
the loader reads). Everything here is invented data.
"""

from __future__ import annotations

import math

import numpy as np

from matcher.catalog.completeness import NORBERG02_ALPHA, NORBERG02_M_STAR
from matcher.cosmology import DistanceTable, planck18_table

__all__ = ["synthetic_catalog", "sample_schechter", "M_SUN_B"]

#: Absolute B magnitude of the Sun (from memory).
M_SUN_B = 5.48
_X_MAX = 40.0  # e^-40: nothing brighter than this is ever accepted anyway


def sample_schechter(n: int, rng: np.random.Generator, *, alpha: float = NORBERG02_ALPHA,
                     x_min: float = 1e-3) -> np.ndarray:
    """``n`` draws of ``x = L/L*`` from ``x^α e^{-x}`` on ``[x_min, 40]``.

    Proposal: the power law ``x^α`` by its inverse CDF; acceptance ``e^{-x}``.
    """
    if alpha <= -2 or not 0 < x_min < _X_MAX:
        raise ValueError(f"alpha={alpha} must be > -2 and x_min={x_min} in (0, {_X_MAX})")
    out = np.empty(0)
    a = alpha + 1.0
    while out.size < n:
        m = int(1.3 * (n - out.size)) + 1000
        u = rng.uniform(size=m)
        if abs(a) < 1e-12:
            x = x_min * (_X_MAX / x_min) ** u
        else:
            x = (x_min**a + u * (_X_MAX**a - x_min**a)) ** (1.0 / a)
        x = x[rng.uniform(size=m) < np.exp(-x)]
        out = np.concatenate([out, x])
    return out[:n]


def _cone_directions(m, rng, cone):
    if cone is None:
        ra = rng.uniform(0.0, 360.0, m)
        dec = np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, m)))
        return ra, dec
    ra0, dec0, radius = (float(v) for v in cone)
    cos_t = rng.uniform(math.cos(math.radians(radius)), 1.0, m)
    psi = rng.uniform(0.0, 2 * math.pi, m)
    sin_t = np.sqrt(1.0 - cos_t**2)
    # Around the north pole, then rotate the pole to (ra0, dec0).
    x, y, z = sin_t * np.cos(psi), sin_t * np.sin(psi), cos_t
    colat = math.radians(90.0 - dec0)
    x, z = x * math.cos(colat) + z * math.sin(colat), -x * math.sin(colat) + z * math.cos(colat)
    lon = math.radians(ra0)
    x, y = x * math.cos(lon) - y * math.sin(lon), x * math.sin(lon) + y * math.cos(lon)
    ra = np.degrees(np.arctan2(y, x)) % 360.0
    dec = np.degrees(np.arcsin(np.clip(z, -1.0, 1.0)))
    return ra, dec


def _in_cone(ra, dec, cone):
    if cone is None:
        return np.ones(np.shape(ra), dtype=bool)
    from matcher.sky.coords import angular_separation_deg

    return angular_separation_deg(cone[0], cone[1], ra, dec) <= cone[2]


def _positions(m, rng, r_max, cone, clustering, group_size, group_radius):
    """Comoving distance, RA, Dec of ``m`` galaxies (a ``clustering`` fraction in groups)."""
    n_group = int(round(clustering * m))
    n_field = m - n_group
    r = r_max * rng.uniform(size=n_field) ** (1.0 / 3.0)
    ra, dec = _cone_directions(n_field, rng, cone)
    if n_group:
        n_centres = max(1, n_group // max(group_size, 1))
        rc = r_max * rng.uniform(size=n_centres) ** (1.0 / 3.0)
        cra, cdec = _cone_directions(n_centres, rng, cone)
        which = rng.integers(0, n_centres, n_group)
        cvec = np.stack([np.cos(np.radians(cdec)) * np.cos(np.radians(cra)),
                         np.cos(np.radians(cdec)) * np.sin(np.radians(cra)),
                         np.sin(np.radians(cdec))], axis=-1) * rc[:, None]
        pos = cvec[which] + rng.normal(0.0, group_radius, (n_group, 3))
        gr = np.linalg.norm(pos, axis=1)
        gra = np.degrees(np.arctan2(pos[:, 1], pos[:, 0])) % 360.0
        gdec = np.degrees(np.arcsin(np.clip(pos[:, 2] / np.maximum(gr, 1e-300), -1, 1)))
        inside = (gr <= r_max) & (gr > 0) & _in_cone(gra, gdec, cone)
        r = np.concatenate([r, gr[inside]])
        ra = np.concatenate([ra, gra[inside]])
        dec = np.concatenate([dec, gdec[inside]])
    return r, ra, dec


def synthetic_catalog(
    n: int,
    seed: int | np.random.Generator = 0,
    *,
    max_distance_mpc: float = 400.0,
    mag_limit: float | None = None,
    m_star: float = NORBERG02_M_STAR,
    alpha: float = NORBERG02_ALPHA,
    x_min: float = 1e-3,
    distance_err_frac: float = 0.1,
    redshift_fraction: float = 0.0,
    redshift_err: float = 1e-3,
    clustering: float = 0.0,
    group_size: int = 20,
    group_radius_mpc: float = 1.5,
    cone: tuple[float, float, float] | None = None,
    with_sizes: bool = True,
    distances: DistanceTable | None = None,
):
    """An invented catalogue of exactly ``n`` galaxies (after the magnitude limit).

    Parameters
    ----------
    n : int
    seed : int or numpy Generator
    max_distance_mpc : float, Mpc
        Luminosity-distance reach of the volume.
    mag_limit : float, optional
        Apparent-magnitude limit (None keeps every galaxy).
    m_star, alpha : float
        Schechter parameters (defaults: Norberg et al. 2002 b_J, from memory).
    x_min : float
        Faintest luminosity drawn, in L*.
    distance_err_frac : float
        Fractional 1σ error of the reported distances.
    redshift_fraction : float
        Fraction of galaxies that report only a redshift (``redshift_err`` 1σ).
    clustering : float
        Fraction of galaxies placed in groups of ``group_size`` with 3D
        Gaussian radius ``group_radius_mpc``.
    cone : (ra_deg, dec_deg, radius_deg), optional
        Restrict the sky to a cone.

    Returns
    -------
    astropy.table.Table
        Columns ``id, ra_deg, dec_deg, distance_mpc, distance_err_mpc, weight, mag``
        (and ``radius_arcsec``; ``redshift, redshift_err`` when
        ``redshift_fraction > 0``; ``true_distance_mpc``); generator
        parameters in ``meta``.
    """
    from astropy.table import Table

    if n < 0:
        raise ValueError(f"n={n} must be >= 0")
    for name, v, lo, hi in (("distance_err_frac", distance_err_frac, 0, 1), ("redshift_fraction", redshift_fraction, 0, 1),
                            ("clustering", clustering, 0, 1)):
        if not lo <= v <= hi:
            raise ValueError(f"{name}={v} must lie in [{lo}, {hi}]")
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    table = distances or planck18_table()
    z_max = float(table.redshift_at_luminosity_distance(max_distance_mpc))
    r_max = float(table.comoving_distance(z_max))
    parts = {k: [] for k in ("dl", "ra", "dec", "x")}
    have = 0
    accept = 1.0
    while have < n:
        m = int(min(max(1.3 * (n - have) / max(accept, 0.02), 10_000), 4_000_000))
        r, ra, dec = _positions(m, rng, r_max, cone, clustering, group_size, group_radius_mpc)
        z = table.redshift_at_comoving_distance(r)
        dl = (1.0 + z) * r
        x = sample_schechter(r.size, rng, alpha=alpha, x_min=x_min)
        if mag_limit is not None:
            with np.errstate(divide="ignore"):
                mag = m_star - 2.5 * np.log10(x) + 5.0 * np.log10(dl) + 25.0
            keep = mag <= mag_limit
        else:
            keep = np.ones(r.size, dtype=bool)
        accept = max(float(keep.mean()) if keep.size else 1.0, 1e-3)
        for k, v in (("dl", dl), ("ra", ra), ("dec", dec), ("x", x)):
            parts[k].append(v[keep])
        have += int(keep.sum())
    dl, ra, dec, x = (np.concatenate(parts[k])[:n] if n else np.zeros(0) for k in ("dl", "ra", "dec", "x"))
    mag = m_star - 2.5 * np.log10(x) + 5.0 * np.log10(np.maximum(dl, 1e-300)) + 25.0
    l_star_l10 = 10.0 ** (-0.4 * (m_star - M_SUN_B)) / 1e10
    cols = {"id": np.arange(1, n + 1, dtype=np.int64), "ra_deg": ra, "dec_deg": dec}
    d_obs = dl * (1.0 + distance_err_frac * rng.standard_normal(n))
    d_obs = np.where(d_obs > 0, d_obs, 0.01 * dl)
    only_z = rng.uniform(size=n) < redshift_fraction
    cols["distance_mpc"] = np.where(only_z, np.nan, d_obs)
    cols["distance_err_mpc"] = np.where(only_z, np.nan, distance_err_frac * d_obs)
    if redshift_fraction > 0:
        z_true = table.redshift_at_luminosity_distance(dl)
        z_obs = np.abs(z_true + redshift_err * rng.standard_normal(n))
        cols["redshift"] = np.where(only_z, z_obs, np.nan)
        cols["redshift_err"] = np.where(only_z, redshift_err, np.nan)
    cols["weight"] = x * l_star_l10
    cols["mag"] = mag
    if with_sizes:
        d_a = table.angular_diameter_distance_at(dl)
        cols["radius_arcsec"] = 4.0 * x**0.3 / (1000.0 * d_a) * (180 * 3600 / math.pi)
    cols["true_distance_mpc"] = dl
    out = Table(cols)
    # Short upper-case keys so the meta survives as FITS header cards.
    meta = {"GENERATR": "matcher.catalog.synthetic", "NGAL": n, "DMAXMPC": max_distance_mpc, "MSTAR": m_star,
            "ALPHA": alpha, "XMIN": x_min, "DERRFRAC": distance_err_frac, "ZFRAC": redshift_fraction,
            "CLUSTER": clustering, "NOTE": "invented data"}
    if mag_limit is not None:
        meta["MAGLIM"] = mag_limit
    if cone is not None:
        meta["CONE"] = ",".join(f"{v:g}" for v in cone)
    out.meta.update(meta)
    return out
