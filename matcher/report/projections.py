"""Sky projections for plots: astropy WCS for an all-sky Mollweide and a gnomonic zoom.

Conventions
-----------
* Images are sampled at pixel centres; pixel coordinates are 0-based
  (matplotlib's ``imshow(origin="lower")`` convention), so a pixel ``(x, y)``
  covers ``[x - 0.5, x + 0.5] × [y - 0.5, y + 0.5]``.
* RA increases to the left (east left, as on the sky seen from inside).
* The Mollweide projection (WCS code ``MOL``; Calabretta & Greisen 2002,
  A&A 395, 1077, section 5.3.2) has intermediate coordinates
  ``x = (2√2/π) φ cos γ``, ``y = √2 sin γ`` in units of 180°/π, so the whole
  sky spans ``±2√2·180/π ≈ ±162.0`` by ``±√2·180/π ≈ ±81.0`` degrees: a 2:1 image.
* The gnomonic projection (``TAN``) maps a point at angle θ from the centre
  to ``tan θ`` (in units of 180°/π); the view's half-width is given as an angle.
"""

from __future__ import annotations

import math

import healpy as hp
import numpy as np
from astropy.wcs import WCS

__all__ = [
    "MOLLWEIDE_HALF_WIDTH",
    "allsky_wcs",
    "gnomonic_wcs",
    "pixel_centres_world",
    "world_to_pixel",
    "small_circle",
    "break_at_jumps",
    "region_centre",
]

#: Half-width of the Mollweide plane (intermediate degrees): 2√2·180/π.
MOLLWEIDE_HALF_WIDTH = 2.0 * math.sqrt(2.0) * 180.0 / math.pi


def allsky_wcs(width_px: int, center_ra_deg: float) -> WCS:
    """A Mollweide WCS of ``width_px × width_px/2`` pixels centred on (``center_ra_deg``, 0)."""
    width_px = int(width_px)
    height_px = width_px // 2
    step = 2.0 * MOLLWEIDE_HALF_WIDTH / width_px
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---MOL", "DEC--MOL"]
    w.wcs.crval = [float(center_ra_deg) % 360.0, 0.0]
    w.wcs.crpix = [width_px / 2.0 + 0.5, height_px / 2.0 + 0.5]  # FITS pixels are 1-based
    w.wcs.cdelt = [-step, step]
    w.wcs.set()
    w.pixel_shape = (width_px, height_px)
    return w


def gnomonic_wcs(size_px: int, center_ra_deg: float, center_dec_deg: float, half_width_deg: float) -> WCS:
    """A square gnomonic WCS whose edges lie ``half_width_deg`` from the centre along the axes."""
    size_px = int(size_px)
    if not 0.0 < half_width_deg < 80.0:
        raise ValueError(f"half_width_deg={half_width_deg!r} must lie in (0, 80) for a gnomonic view")
    step = 2.0 * math.degrees(math.tan(math.radians(half_width_deg))) / size_px
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    w.wcs.crval = [float(center_ra_deg) % 360.0, float(center_dec_deg)]
    w.wcs.crpix = [size_px / 2.0 + 0.5, size_px / 2.0 + 0.5]
    w.wcs.cdelt = [-step, step]
    w.wcs.set()
    w.pixel_shape = (size_px, size_px)
    return w


def pixel_centres_world(wcs: WCS):
    """RA in [0, 360) and Dec (deg) of every image pixel centre, shape ``(ny, nx)``; NaN off the sky."""
    nx, ny = wcs.pixel_shape
    yy, xx = np.mgrid[0:ny, 0:nx]
    with np.errstate(invalid="ignore"):
        ra, dec = wcs.wcs_pix2world(xx.ravel().astype(float), yy.ravel().astype(float), 0)
    ra = np.where(np.isfinite(ra), np.mod(ra, 360.0), np.nan)
    return ra.reshape(ny, nx), dec.reshape(ny, nx)


def world_to_pixel(wcs: WCS, ra_deg, dec_deg):
    """0-based pixel coordinates ``(x, y)`` of positions; NaN where the projection is undefined.

    For a gnomonic view that is the far hemisphere (θ ≥ 90° from the centre).
    """
    ra = np.atleast_1d(np.asarray(ra_deg, dtype=float))
    dec = np.atleast_1d(np.asarray(dec_deg, dtype=float))
    if ra.size == 0:
        return np.zeros(0), np.zeros(0)
    with np.errstate(invalid="ignore"):
        x, y = wcs.wcs_world2pix(ra, dec, 0)
    return np.asarray(x, float), np.asarray(y, float)


def small_circle(ra_deg: float, dec_deg: float, radius_deg: float, n: int = 181):
    """``n`` points (closed: first = last) at angular ``radius_deg`` around a position."""
    c = np.radians([ra_deg, dec_deg])
    centre = np.array([math.cos(c[1]) * math.cos(c[0]), math.cos(c[1]) * math.sin(c[0]), math.sin(c[1])])
    pole = np.array([0.0, 0.0, 1.0]) if abs(centre[2]) < 0.999 else np.array([1.0, 0.0, 0.0])
    e1 = np.cross(pole, centre)
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(centre, e1)
    r = math.radians(radius_deg)
    psi = np.linspace(0.0, 2.0 * math.pi, n)
    v = math.cos(r) * centre[None, :] + math.sin(r) * (np.cos(psi)[:, None] * e1 + np.sin(psi)[:, None] * e2)
    ra = np.degrees(np.arctan2(v[:, 1], v[:, 0])) % 360.0
    dec = np.degrees(np.arcsin(np.clip(v[:, 2], -1.0, 1.0)))
    return ra, dec


def break_at_jumps(x, y, max_jump: float):
    """Insert NaN between consecutive points farther apart than ``max_jump`` pixels.

    A polyline that crosses the Mollweide seam (RA = centre ± 180°) jumps from
    one edge of the map to the other; matplotlib leaves a gap at a NaN.
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    if x.size < 2:
        return x, y
    jump = np.hypot(np.diff(x), np.diff(y)) > max_jump
    if not np.any(jump):
        return x, y
    at = np.flatnonzero(jump) + 1
    return np.insert(x, at, np.nan), np.insert(y, at, np.nan)


def region_centre(skymap, level: float):
    """Centre and angular radius of the ``level`` credible region.

    Returns
    -------
    ra_deg, dec_deg : float
        Direction of the probability-weighted mean of the region's pixel centres
        (for a region that wraps around the sphere this direction is poorly
        defined; the radius then comes out large).
    radius_deg : float
        Largest angle from that centre to a region pixel's centre, plus the
        pixel's own half-diagonal.
    """
    top = skymap.top_pixels(level)
    order = skymap.order[top]
    ipix = skymap.ipix[top]
    vec = np.empty((top.size, 3))
    for o in np.unique(order):
        sel = order == o
        vec[sel] = np.stack(hp.pix2vec(1 << int(o), ipix[sel], nest=True), axis=-1)
    mean = (skymap.prob[top, None] * vec).sum(axis=0)
    norm = float(np.linalg.norm(mean))
    if norm < 1e-9:
        mean = vec[0]
        norm = float(np.linalg.norm(mean))
    mean = mean / norm
    ra = math.degrees(math.atan2(mean[1], mean[0])) % 360.0
    dec = math.degrees(math.asin(max(-1.0, min(1.0, mean[2]))))
    ang = np.degrees(np.arccos(np.clip(vec @ mean, -1.0, 1.0)))
    half_diag = np.degrees(np.sqrt(skymap.area_sr[top])) / math.sqrt(2.0)
    return ra, dec, float(np.max(ang + half_diag))
