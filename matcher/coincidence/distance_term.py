"""The distance Bayes factor ``D``, in closed form and vectorized.

A report (or its host galaxy) with a measured luminosity distance ``d`` and
1σ error ``s`` (Mpc) has the likelihood ``L(r) = φ((d - r)/s)/s`` for its true
distance ``r``. With the GW line-of-sight posterior of the distance ansatz
(Singer et al. 2016), ``p_gw(r|Ω) = N r² φ((r-μ)/σ)/σ``, and a background
distance distribution uniform in volume to the class reach ``R``,
``p_bg(r) = 3 r²/R³`` on ``[0, R]``:

    D = ∫ p_gw(r|Ω) L(r) dr / ∫ p_bg(r) L(r) dr.

Both integrals are closed forms. The product of the two Gaussians is
``φ((μ-d)/S)/S · φ((r-m)/τ)/τ`` with ``S² = σ² + s²``,
``m = (μ s² + d σ²)/S²``, ``τ = σ s / S``, and
``∫_0^∞ r² φ((r-m)/τ)/τ dr = τ² m₂(m/τ)`` where
``m₂(x) = (x²+1)Φ(x) + xφ(x)`` is the ansatz's own normalization integral
(``1/N = σ² m₂(μ/σ)``, evaluated without cancellation for negative x by
:func:`matcher.sky.distance.ansatz_norm`). For the background, with
``u = (r - d)/s``, ``∫ r² φ((r-d)/s)/s dr = (d² + s²)Φ(u) - s(2d + s u)φ(u)``.

A redshift ``z ± σ_z`` becomes ``d = D_L(z)`` (Planck18) and
``s = D_L'(z) · sqrt(σ_z² + (v_pec/c)²)``, a linearization that is accurate
while ``σ_z`` is small compared to the curvature scale of ``D_L`` (true at the
redshifts of GW sources); ``v_pec`` is a peculiar velocity of 300 km/s
(common practice). A distance without an error gets a 20 % error
(from memory: typical of redshift-independent distance indicators).
When a report has both, the one with the smaller error is used; when it has
neither, an externally supplied distance (its host galaxy's) is used;
otherwise, or where the GW map has no distance layer, ``D = 1``.

``D`` is capped at :data:`MAX_DISTANCE_FACTOR`: beyond the class reach the
ratio is dominated by the hard edge of the background model, not by data.
"""

from __future__ import annotations

import numpy as np
from scipy.special import ndtr

from matcher.coincidence.cosmology import luminosity_distance_derivative_mpc, luminosity_distance_mpc
from matcher.sky.distance import ansatz_norm

__all__ = [
    "ansatz_likelihood_overlap",
    "background_likelihood_overlap",
    "distance_factor",
    "measured_distances",
    "PECULIAR_VELOCITY_KMS",
    "DEFAULT_DISTANCE_FRACTIONAL_ERROR",
    "MAX_DISTANCE_FACTOR",
    "SOURCE_NONE",
    "SOURCE_REDSHIFT",
    "SOURCE_DISTANCE",
    "SOURCE_EXTERNAL",
]

PECULIAR_VELOCITY_KMS = 300.0
DEFAULT_DISTANCE_FRACTIONAL_ERROR = 0.2
MAX_DISTANCE_FACTOR = 1e6
_C_KMS = 299792.458
_SQRT2PI = np.sqrt(2.0 * np.pi)

#: Codes for where a distance came from (see :func:`measured_distances`).
SOURCE_NONE, SOURCE_REDSHIFT, SOURCE_DISTANCE, SOURCE_EXTERNAL = 0, 1, 2, 3


def _phi(x):
    return np.exp(-0.5 * x * x) / _SQRT2PI


def _m2(x):
    # ∫_0^∞ y² φ(y - x) dy = 1 / ansatz_norm(x, 1), stable for negative x.
    return 1.0 / ansatz_norm(x, np.ones_like(x))


def ansatz_likelihood_overlap(mu, sigma, norm, d, s) -> np.ndarray:
    """``∫_0^∞ N r² φ((r-μ)/σ)/σ · φ((d-r)/s)/s dr`` (Mpc**-1); NaN where the ansatz does not apply."""
    mu, sigma, norm, d, s = np.broadcast_arrays(*(np.asarray(a, dtype=np.float64) for a in (mu, sigma, norm, d, s)))
    out = np.full(mu.shape, np.nan)
    ok = np.isfinite(mu) & np.isfinite(sigma) & (sigma > 0) & np.isfinite(norm) & (norm > 0)
    if np.any(ok):
        m_, sg, n_, d_, s_ = mu[ok], sigma[ok], norm[ok], d[ok], s[ok]
        S2 = sg * sg + s_ * s_
        S = np.sqrt(S2)
        m = (m_ * s_ * s_ + d_ * sg * sg) / S2
        tau = sg * s_ / S
        out[ok] = n_ * _phi((m_ - d_) / S) / S * tau * tau * _m2(m / tau)
    return out


def _r2_gauss_primitive(u, d, s):
    return (d * d + s * s) * ndtr(u) - s * (2.0 * d + s * u) * _phi(u)


def background_likelihood_overlap(reach_mpc, d, s) -> np.ndarray:
    """``∫_0^R (3 r²/R³) φ((d-r)/s)/s dr`` (Mpc**-1): the measured-distance density under the background."""
    R, d, s = np.broadcast_arrays(*(np.asarray(a, dtype=np.float64) for a in (reach_mpc, d, s)))
    val = _r2_gauss_primitive((R - d) / s, d, s) - _r2_gauss_primitive(-d / s, d, s)
    return np.maximum(val, 0.0) * 3.0 / R**3


def distance_factor(mu, sigma, norm, d, s, reach_mpc) -> np.ndarray:
    """``D`` for each report: 1 where ``d`` is NaN or the ansatz does not apply; capped at 1e6."""
    mu, sigma, norm, d, s, R = np.broadcast_arrays(
        *(np.asarray(a, dtype=np.float64) for a in (mu, sigma, norm, d, s, reach_mpc)))
    out = np.ones(mu.shape)
    use = np.isfinite(d) & np.isfinite(s) & (s > 0)
    if np.any(use):
        num = ansatz_likelihood_overlap(mu[use], sigma[use], norm[use], d[use], s[use])
        den = background_likelihood_overlap(R[use], d[use], s[use])
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(num > 0, num / den, 0.0)
        ratio = np.where(np.isnan(num), 1.0, np.minimum(ratio, MAX_DISTANCE_FACTOR))
        out[use] = ratio
    return out


def measured_distances(redshift, redshift_err, distance_mpc, distance_err_mpc,
                       external_mpc=None, external_err_mpc=None):
    """Pick each report's distance and error (Mpc) and say where it came from.

    Parameters
    ----------
    redshift, redshift_err, distance_mpc, distance_err_mpc : array_like
        NaN where absent.
    external_mpc, external_err_mpc : array_like, optional
        A distance supplied from outside (the best host galaxy's), used only
        where the report has neither redshift nor distance. NaN where absent;
        a missing error gets the default fractional error.

    Returns
    -------
    d, s : ndarray, Mpc
        NaN where no distance is known.
    source : ndarray of int8
        :data:`SOURCE_NONE`, :data:`SOURCE_REDSHIFT`, :data:`SOURCE_DISTANCE` or :data:`SOURCE_EXTERNAL`.
    """
    z = np.asarray(redshift, dtype=np.float64)
    n = z.shape
    zerr = np.broadcast_to(np.asarray(redshift_err, dtype=np.float64), n)
    dist = np.broadcast_to(np.asarray(distance_mpc, dtype=np.float64), n)
    derr = np.broadcast_to(np.asarray(distance_err_mpc, dtype=np.float64), n)
    d = np.full(n, np.nan)
    s = np.full(n, np.nan)
    src = np.zeros(n, dtype=np.int8)
    hz = np.isfinite(z)
    if np.any(hz):
        zz = z[hz]
        sz = np.hypot(np.where(np.isfinite(zerr[hz]), zerr[hz], 0.0), PECULIAR_VELOCITY_KMS / _C_KMS)
        d[hz] = luminosity_distance_mpc(zz)
        s[hz] = luminosity_distance_derivative_mpc(zz) * sz
        src[hz] = SOURCE_REDSHIFT
    hd = np.isfinite(dist)
    if np.any(hd):
        sd = np.where(np.isfinite(derr), derr, DEFAULT_DISTANCE_FRACTIONAL_ERROR * dist)
        better = hd & (~hz | (sd < s))
        d[better] = dist[better]
        s[better] = sd[better]
        src[better] = SOURCE_DISTANCE
    if external_mpc is not None:
        ext = np.broadcast_to(np.asarray(external_mpc, dtype=np.float64), n)
        eerr = np.broadcast_to(
            np.asarray(np.nan if external_err_mpc is None else external_err_mpc, dtype=np.float64), n)
        he = (src == SOURCE_NONE) & np.isfinite(ext) & (ext > 0)
        if np.any(he):
            d[he] = ext[he]
            s[he] = np.where(np.isfinite(eerr[he]) & (eerr[he] > 0), eerr[he],
                             DEFAULT_DISTANCE_FRACTIONAL_ERROR * ext[he])
            src[he] = SOURCE_EXTERNAL
    return d, s, src
