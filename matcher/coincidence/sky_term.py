"""The sky overlap ``I = ∫ ρ_gw(Ω) ρ_c(Ω) dΩ`` (sr**-1), vectorized over reports.

Three shapes of report position:

* a point: ``I = ρ_gw(Ω_c)``;
* a circular Gaussian error of 1σ radius ``σ`` (deg): the Fisher density with
  ``κ = 1/σ²`` integrated against the map (:meth:`SkyMap.overlap_gaussian`);
* the report's own HEALPix map: the exact overlap of two piecewise-constant
  maps (:meth:`SkyMap.overlap_map`).

The equivalent Gaussian width of a report's own map (used only to rank it
against the background in the false-association probability) is the radius
of its ``1 - e^{-1/2}`` (39.35 %) credible region, which for a circular
Gaussian has area ``π σ²`` exactly.
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

from matcher.sky.skymap import SkyMap

__all__ = ["sky_overlap", "equivalent_sigma_deg", "ONE_SIGMA_CONTAINMENT"]

#: Probability inside the 1σ radius of a 2-D circular Gaussian.
ONE_SIGMA_CONTAINMENT = -math.expm1(-0.5)


def sky_overlap(skymap: SkyMap, ra_deg, dec_deg, sigma_deg, *, density=None,
                report_maps: Sequence[SkyMap | None] | None = None) -> np.ndarray:
    """``I`` (sr**-1) for each report.

    Parameters
    ----------
    skymap : SkyMap
        The GW localization.
    ra_deg, dec_deg : array_like, deg
    sigma_deg : array_like, deg
        1σ position error; 0 for a point.
    density : array_like, sr**-1, optional
        ``ρ_gw`` at the positions if already looked up (saves a lookup for points).
    report_maps : sequence of SkyMap or None, optional
        Aligned with the reports; where given, the map overlap replaces the Gaussian.
    """
    ra = np.asarray(ra_deg, dtype=np.float64)
    dec = np.asarray(dec_deg, dtype=np.float64)
    sigma = np.broadcast_to(np.asarray(sigma_deg, dtype=np.float64), ra.shape)
    out = np.array(skymap.density(ra, dec) if density is None else density, dtype=np.float64, copy=True)
    g = np.flatnonzero(sigma > 0)
    if report_maps is not None:
        has_map = np.array([m is not None for m in report_maps], dtype=bool)
        g = g[~has_map[g]]
        for i in np.flatnonzero(has_map):
            out[i] = skymap.overlap_map(report_maps[i])
    if g.size:
        out[g] = skymap.overlap_gaussian(ra[g], dec[g], sigma[g])
    return out


def equivalent_sigma_deg(report_map: SkyMap) -> float:
    """1σ radius (deg) of the circular Gaussian with the same 39.35 % credible area."""
    area = float(report_map.credible_areas([ONE_SIGMA_CONTAINMENT])[0])
    return math.sqrt(area / math.pi)
