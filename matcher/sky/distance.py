"""The distance ansatz of Singer et al. (2016, ApJL 829, L15; ApJS 226, 10).

Along a line of sight the luminosity distance posterior is

    p(r | n) = N r**2 exp(-(r - mu)**2 / (2 sigma**2)) / (sqrt(2 pi) sigma),  r >= 0,

with per-pixel parameters ``mu`` (DISTMU, Mpc, may be negative), ``sigma``
(DISTSIGMA, Mpc) and ``N`` (DISTNORM, Mpc**-2). Pixels where the ansatz does
not apply carry DISTMU=+inf, DISTSIGMA=1, DISTNORM=0 (a convention of the
trade's files, from memory); every function here returns NaN for them.

All functions are vectorized over numpy arrays and pure.

Writing ``x = mu / sigma`` and ``m_k = ∫_0^∞ y**k φ(y - x) dy`` (units of sigma),

    m2 = (x²+1)Φ + xφ,   m3 = (x³+3x)Φ + (x²+2)φ,   m4 = (x⁴+6x²+3)Φ + (x³+5x)φ,

so ``1/N = sigma² m2``, ``<r> = sigma m3/m2`` and ``<r²> = sigma² m4/m2``.
For ``x < 0`` these closed forms cancel badly; there we use the parabolic
cylinder function identity ``m_k = k! exp(-x²/4) D_{-k-1}(-x) / sqrt(2π)``
(Abramowitz & Stegun 19.5.3 / DLMF 12.5.1), which has no cancellation.
"""

from __future__ import annotations

import numpy as np
from scipy import special

__all__ = [
    "ansatz_norm",
    "conditional_moments",
    "parameters_from_moments",
    "conditional_pdf",
    "marginal_moments",
    "marginal_pdf",
    "volume_density",
    "MAX_STD_OVER_MEAN",
]

#: The ansatz cannot represent a posterior broader than this (the mu → -inf limit
#: is a Gamma(3) distribution, whose std/mean is 1/sqrt(3)).
MAX_STD_OVER_MEAN = 1.0 / np.sqrt(3.0)

_SQRT2PI = np.sqrt(2.0 * np.pi)
_X_MIN = -35.0  # below this even D_{-k-1} underflows in double precision


def _moment_ratios(x):
    """Return (m2, m3/m2, m4/m2) for an array of x = mu/sigma (finite)."""
    x = np.asarray(x, dtype=np.float64)
    m2 = np.empty_like(x)
    r3 = np.empty_like(x)
    r4 = np.empty_like(x)
    pos = x >= 0
    if np.any(pos):
        xp = x[pos]
        cdf = special.ndtr(xp)
        pdf = np.exp(-0.5 * xp * xp) / _SQRT2PI
        a2 = (xp * xp + 1) * cdf + xp * pdf
        a3 = (xp**3 + 3 * xp) * cdf + (xp * xp + 2) * pdf
        a4 = (xp**4 + 6 * xp * xp + 3) * cdf + (xp**3 + 5 * xp) * pdf
        m2[pos] = a2
        r3[pos] = a3 / a2
        r4[pos] = a4 / a2
    neg = ~pos
    if np.any(neg):
        z = -np.maximum(x[neg], _X_MIN)
        d3, _ = special.pbdv(-3.0, z)
        d4, _ = special.pbdv(-4.0, z)
        d5, _ = special.pbdv(-5.0, z)
        m2[neg] = 2.0 * np.exp(-z * z / 4.0) * d3 / _SQRT2PI
        r3[neg] = 3.0 * d4 / d3
        r4[neg] = 12.0 * d5 / d3
    return m2, r3, r4


def _valid(mu, sigma):
    return np.isfinite(mu) & np.isfinite(sigma) & (sigma > 0)


def ansatz_norm(mu, sigma):
    """Normalization ``N`` (Mpc**-2) of the ansatz for parameters ``mu``, ``sigma`` (Mpc).

    Returns NaN where ``mu`` is not finite or ``sigma <= 0``.

    Examples
    --------
    >>> round(float(ansatz_norm(0.0, 100.0)), 12)   # 2 / sigma**2
    0.0002
    """
    mu, sigma = np.broadcast_arrays(np.asarray(mu, float), np.asarray(sigma, float))
    out = np.full(mu.shape, np.nan)
    ok = _valid(mu, sigma)
    m2, _, _ = _moment_ratios(mu[ok] / sigma[ok])
    out[ok] = 1.0 / (sigma[ok] ** 2 * m2)
    return out[()] if out.ndim == 0 else out


def conditional_moments(mu, sigma):
    """Mean and standard deviation (Mpc) of ``p(r | n)`` for ansatz parameters.

    Returns ``(mean, std)``, NaN where the ansatz does not apply.
    """
    mu, sigma = np.broadcast_arrays(np.asarray(mu, float), np.asarray(sigma, float))
    mean = np.full(mu.shape, np.nan)
    std = np.full(mu.shape, np.nan)
    ok = _valid(mu, sigma)
    _, r3, r4 = _moment_ratios(mu[ok] / sigma[ok])
    s = sigma[ok]
    mean[ok] = s * r3
    std[ok] = s * np.sqrt(np.maximum(r4 - r3 * r3, 0.0))
    if mean.ndim == 0:
        return mean[()], std[()]
    return mean, std


def _std_over_mean(x):
    _, r3, r4 = _moment_ratios(x)
    return np.sqrt(np.maximum(r4 - r3 * r3, 0.0)) / r3


_X_GRID = None


def _solve_x(q):
    """``x`` with ``std/mean(x) = q``: table interpolation, then Newton steps, bisection as a fallback.

    ``std/mean`` is strictly decreasing in ``x``; for ``x`` beyond the table it tends to ``1/x``.
    """
    global _X_GRID
    if _X_GRID is None:
        xg = np.concatenate([np.linspace(_X_MIN, 50.0, 4251)[:-1], np.geomspace(50.0, 1e6, 1500)])
        _X_GRID = (xg, _std_over_mean(xg))
    xg, qg = _X_GRID
    q, inverse = np.unique(q, return_inverse=True)  # maps often repeat one std/mean ratio
    x = np.interp(q, qg[::-1], xg[::-1])
    far = q < qg[-1]
    x[far] = 1.0 / q[far]
    for _ in range(3):  # quadratic convergence: ~1e-5 -> 1e-10 -> 1e-12 (the float floor here)
        h = 1e-6 * np.maximum(1.0, np.abs(x))
        f = _std_over_mean(x) - q
        df = (_std_over_mean(x + h) - _std_over_mean(x - h)) / (2 * h)
        step = np.where(df < 0, f / np.where(df < 0, df, -1.0), 0.0)
        x = np.maximum(x - step, _X_MIN)
    bad = ~(np.abs(_std_over_mean(x) - q) <= 1e-11 * q)
    if np.any(bad):
        qb = q[bad]
        lo = np.full(qb.shape, _X_MIN)
        hi = 10.0 / qb + 10.0
        for _ in range(80):
            mid = 0.5 * (lo + hi)
            above = _std_over_mean(mid) > qb  # the ratio decreases with x: the root is to the right
            lo = np.where(above, mid, lo)
            hi = np.where(above, hi, mid)
        x[bad] = 0.5 * (lo + hi)
    return x[inverse]


def parameters_from_moments(mean, std, *, strict: bool = True):
    """Invert :func:`conditional_moments`: ``(mean, std)`` → ``(mu, sigma, norm)``.

    Solves for ``x = mu/sigma`` from ``std/mean`` (strictly decreasing in ``x``)
    by table interpolation and Newton steps (bisection where those have not
    converged to 1e-11), then ``sigma = mean / (m3/m2)``.

    Parameters
    ----------
    mean, std : array_like, Mpc
        Requested conditional mean and standard deviation.
    strict : bool
        If True, raise ``ValueError`` for inputs the ansatz cannot represent
        (non-finite, ``mean <= 0``, ``std <= 0`` or ``std/mean >= 1/sqrt(3)``);
        if False, return NaN for them.
    """
    mean, std = np.broadcast_arrays(np.asarray(mean, float), np.asarray(std, float))
    ratio = np.divide(std, mean, out=np.full(mean.shape, np.nan), where=mean > 0)
    limit = _std_over_mean(np.array([_X_MIN]))[0]
    ok = np.isfinite(ratio) & (ratio > 0) & (ratio < limit) & (std > 0)
    if strict and not np.all(ok):
        bad = np.flatnonzero(~ok.ravel())[0]
        m, s = float(mean.ravel()[bad]), float(std.ravel()[bad])
        raise ValueError(
            f"distance mean={m!r} Mpc, std={s!r} Mpc cannot be represented by the ansatz: "
            f"need mean > 0, std > 0 and std/mean < {limit:.6f} (the 1/sqrt(3) limit)"
        )
    x = _solve_x(ratio[ok])
    m2, r3, _ = _moment_ratios(x)
    sig = mean[ok] / r3
    mu_out = np.full(mean.shape, np.nan)
    sig_out = np.full(mean.shape, np.nan)
    norm_out = np.full(mean.shape, np.nan)
    mu_out[ok] = x * sig
    sig_out[ok] = sig
    norm_out[ok] = 1.0 / (sig * sig * m2)
    if mu_out.ndim == 0:
        return mu_out[()], sig_out[()], norm_out[()]
    return mu_out, sig_out, norm_out


def conditional_pdf(r, mu, sigma, norm):
    """``p(r | n)`` in Mpc**-1 for distances ``r`` (Mpc); zero for ``r < 0``."""
    r, mu, sigma, norm = np.broadcast_arrays(*(np.asarray(a, float) for a in (r, mu, sigma, norm)))
    out = np.zeros(r.shape)
    ok = _valid(mu, sigma) & (norm > 0) & (r >= 0)
    z = (r[ok] - mu[ok]) / sigma[ok]
    out[ok] = norm[ok] * r[ok] ** 2 * np.exp(-0.5 * z * z) / (_SQRT2PI * sigma[ok])
    return out[()] if out.ndim == 0 else out


def volume_density(density_per_sr, r, mu, sigma, norm):
    """``dP/dV`` (Mpc**-3) at distance ``r`` where the sky density is ``density_per_sr``.

    ``dP/dV = ρ(n) N φ((r-μ)/σ) / σ`` since ``dV = r² dr dΩ``.
    """
    rho, r, mu, sigma, norm = np.broadcast_arrays(
        *(np.asarray(a, float) for a in (density_per_sr, r, mu, sigma, norm))
    )
    out = np.zeros(r.shape)
    ok = _valid(mu, sigma) & (norm > 0) & (r >= 0)
    z = (r[ok] - mu[ok]) / sigma[ok]
    out[ok] = rho[ok] * norm[ok] * np.exp(-0.5 * z * z) / (_SQRT2PI * sigma[ok])
    return out[()] if out.ndim == 0 else out


def marginal_moments(prob, mu, sigma):
    """Mean and std (Mpc) of the sky-marginal distance distribution.

    The marginal is the mixture ``Σ_i prob_i p(r | n_i)``; its moments are the
    probability-weighted moments of the pixels, over the pixels where the
    ansatz applies (their probability renormalized). NaN if there are none.
    """
    prob = np.asarray(prob, float)
    mean_i, std_i = conditional_moments(mu, sigma)
    ok = np.isfinite(mean_i) & (prob > 0)
    w = prob[ok]
    total = w.sum()
    if total <= 0:
        return float("nan"), float("nan")
    m1 = np.sum(w * mean_i[ok]) / total
    m2 = np.sum(w * (std_i[ok] ** 2 + mean_i[ok] ** 2)) / total
    return float(m1), float(np.sqrt(max(m2 - m1 * m1, 0.0)))


def marginal_pdf(r, prob, mu, sigma, norm, *, chunk: int = 4096):
    """The sky-marginal distance density (Mpc**-1) on a grid ``r`` (Mpc).

    ``p(r) = Σ_i prob_i p(r | n_i) / Σ_i prob_i`` over pixels where the ansatz applies.
    """
    r = np.asarray(r, float)
    prob = np.asarray(prob, float)
    ok = _valid(np.asarray(mu, float), np.asarray(sigma, float)) & (np.asarray(norm, float) > 0) & (prob > 0)
    w, m, s, n = prob[ok], np.asarray(mu)[ok], np.asarray(sigma)[ok], np.asarray(norm)[ok]
    out = np.zeros(r.shape)
    for i in range(0, w.size, chunk):
        sl = slice(i, i + chunk)
        out += np.sum(
            w[sl, None] * conditional_pdf(r[None, :], m[sl, None], s[sl, None], n[sl, None]), axis=0
        )
    total = w.sum()
    return out / total if total > 0 else out
