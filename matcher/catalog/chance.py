"""Chance-coincidence probability of a transient and a galaxy.

Bloom, Kulkarni & Djorgovski (2002, AJ 123, 1111): the probability of finding
an unrelated galaxy at least as bright as ``m`` within an effective radius
``r`` of a position is Poissonian,

    P_cc = 1 - exp(-π r² σ(≤m)),
    r = max(2 R_h, 3 σ_loc, √(R0² + 4 R_h²)),

with ``R0`` the transient–galaxy offset, ``R_h`` the galaxy's half-light
radius and ``σ_loc`` the transient's 1σ position error (all arcsec). The
surface density of galaxies brighter than ``m`` takes the form used by
Berger (2010, ApJ 722, 1946) for optical number counts:

    σ(≤m) = 10^{0.33 (m - 24) - 2.44} / (0.33 ln 10)  arcsec⁻².

When a galaxy's magnitude is unknown, the counts cannot be used; then the
density is that of the catalogue itself around the position (galaxies per
arcsec² within a wider disc), so ``P_cc`` is the chance that *some catalogued
galaxy* lies that close — the offset alone, measured against how crowded
the catalogue is there.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["number_density_berger", "effective_radius_arcsec", "chance_coincidence"]

_LN10 = math.log(10.0)


def number_density_berger(mag) -> np.ndarray:
    """Galaxies brighter than ``mag`` per arcsec² (Berger 2010 form of the counts)."""
    m = np.asarray(mag, dtype=np.float64)
    return 10.0 ** (0.33 * (m - 24.0) - 2.44) / (0.33 * _LN10)


def effective_radius_arcsec(offset_arcsec, half_light_arcsec=0.0, pos_err_arcsec=0.0) -> np.ndarray:
    """``max(2 R_h, 3 σ_loc, √(R0² + 4 R_h²))`` (arcsec); unknown (NaN) sizes count as 0."""
    r0 = np.asarray(offset_arcsec, dtype=np.float64)
    rh = np.nan_to_num(np.asarray(half_light_arcsec, dtype=np.float64), nan=0.0)
    sl = np.nan_to_num(np.asarray(pos_err_arcsec, dtype=np.float64), nan=0.0)
    return np.maximum(np.maximum(2.0 * rh, 3.0 * sl), np.sqrt(r0 * r0 + 4.0 * rh * rh))


def chance_coincidence(radius_arcsec, density_per_arcsec2) -> np.ndarray:
    """``1 - exp(-π r² σ)``: the Poisson chance of at least one unrelated galaxy within ``r``."""
    r = np.asarray(radius_arcsec, dtype=np.float64)
    sig = np.asarray(density_per_arcsec2, dtype=np.float64)
    return -np.expm1(-math.pi * r * r * sig)
