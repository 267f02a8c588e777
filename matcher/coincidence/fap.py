r"""False-association probability: a Poisson tail over the region scoring at least as high.

Derivation
----------
Unrelated reports of class k form a Poisson process with intensity ``r``
(sr**-1 s**-1) in sky position and onset time, each carrying a measured
distance ``d`` drawn from the background distribution (below). A report's
score against event g is the statistic

    s = I(Ω) · T(u) · D(Ω, d)         (∝ the odds; π and r are constants per class)

with ``u`` its trigger / first-detection time minus the merger time. The FAP of
a candidate with score ``s_c`` is the probability that background alone yields
at least one report with ``s >= s_c``:

    FAP = 1 - exp(-μ),   μ = r · ∫ dΩ ∫ du ∫ dd  p_bg,obs(d) · 1[s(Ω, u, d) >= s_c].

**Time.** Background reports are taken to have the candidate's bracket length
``L`` (0 for a sharp trigger; conditioning on the observing cadence). With
``W`` the window length, ``T(u) = |[u-L, u] ∩ [lo, hi]| / (W L)`` is a
trapezoid in ``u``: it rises over ``min(L, W)``, holds ``1/max(L, W)`` over
``|L - W|`` and falls over ``min(L, W)``. Its superlevel set ``{u: T(u) >= τ}``
has length

    ℓ(τ) = (L + W) - 2 L W τ    for τ <= 1/max(L, W),   else 0

(``ℓ = W`` for a sharp trigger, ``L + W`` for ``τ → 0``).

**Sky and distance.** Writing ``y = I(Ω) D(Ω, d)`` for the part that does not
depend on time, ``s >= s_c ⟺ T(u) >= s_c / y``, so

    μ = r ∫∫ dΩ dd p_bg,obs(d) ℓ(s_c / y)
      = r [ (L + W) Σ_{y >= y*} w  -  2 L W s_c Σ_{y >= y*} w / y ],    y* = s_c max(L, W),

where the sums run over cells of (sky pixel × distance bin) with weight
``w = area × p_bg,obs(d) Δd``. A :class:`BackgroundTable` holds the cells sorted
by ``y`` with both cumulative sums, so every candidate costs one binary search.
Cells with equal ``y`` are all counted ("at least as high"), keeping the FAP
conservative on ties.

* Without a distance the cells are the map's pixels, ``y = ρ_gw``; for a sharp
  trigger ``μ = r W A(ρ >= I_c)``: rate × window × searched area.
* With a measured distance of error ``s_d`` the background's measured
  distance has density ``p_bg,obs(d) = ∫ p_bg(r) φ((d-r)/s_d)/s_d dr`` — the
  denominator of ``D`` itself — and ``y = ρ_gw(Ω) D(Ω, d)``. Tables are built
  at error nodes ``s_d = 2^(k/4)`` Mpc; a candidate between nodes interpolates
  ``ln μ`` linearly in ``ln s_d``. Pixels beyond the densest
  :data:`MAX_DISTANCE_PIXELS` get :data:`COARSE_DISTANCE_BINS` distance bins
  instead of :data:`DISTANCE_BINS` (they matter only for low scores).
* A Gaussian position error ``σ >= 1°`` smooths the statistic: the cells are
  pixels of a flat grid (pixel ≲ σ, order ≤ 6) with ``y`` the Gaussian overlap
  at their centres, tabulated at nodes ``σ = 2^(k/4)`` deg; at each of the two
  nodes around a report's σ the report is ranked by its own overlap at that
  node's σ, and ``ln μ`` is interpolated in ``ln σ``.
  Smaller errors use the map itself (the region differs from the smoothed one
  only where the map has structure finer than a degree). A report with its own
  map is ranked as a Gaussian of the same 39.35 % credible area.

On pure background (positions isotropic, times uniform, distances from the
background distribution) ``μ / μ_max`` is uniform on [0, 1] with
``μ_max = r (L + W) 4π``: the calibration tests check it.

Approximations (documented, not hidden): the background bracket length is the
candidate's; a Gaussian-error report with a distance uses the unsmoothed map;
``D`` is evaluated with the ansatz of the pixel at the report's centre.
"""

from __future__ import annotations

import math
import weakref
from dataclasses import dataclass

import healpy as hp
import numpy as np

from matcher.coincidence.distance_term import background_likelihood_overlap, distance_factor
from matcher.sky.skymap import SkyMap

__all__ = [
    "BackgroundTable",
    "false_association_probability",
    "poisson_fap",
    "sky_table",
    "smoothed_sky_table",
    "distance_table",
    "background_measure",
    "node_value",
    "interpolated_measure",
    "SMOOTH_MIN_SIGMA_DEG",
    "MAX_DISTANCE_PIXELS",
    "DISTANCE_BINS",
    "COARSE_DISTANCE_BINS",
]

#: Gaussian errors at least this large (deg) are ranked on a smoothed map.
SMOOTH_MIN_SIGMA_DEG = 1.0
#: Pixels resolved in distance in a distance table (the densest ones).
MAX_DISTANCE_PIXELS = 8000
#: Distance bins of a distance table (densest pixels / the others).
DISTANCE_BINS = 160
COARSE_DISTANCE_BINS = 16
_TIE = 1.0 - 1e-12  # a candidate ties with its own cell despite float rounding
_Y_FLOOR = 1e-280


@dataclass(frozen=True, eq=False)
class BackgroundTable:
    """Cells of background measure sorted by the time-free statistic ``y`` (descending).

    Attributes
    ----------
    y : ndarray, sr**-1
        Statistic of each cell, descending.
    cum_w : ndarray, sr
        Cumulative weight (sky area × distance probability).
    cum_w_over_y : ndarray, sr**2
        Cumulative ``w / y`` (only over cells with ``y > 0``).
    """

    y: np.ndarray
    cum_w: np.ndarray
    cum_w_over_y: np.ndarray

    @classmethod
    def from_cells(cls, y, w) -> "BackgroundTable":
        y = np.asarray(y, dtype=np.float64).ravel()
        w = np.asarray(w, dtype=np.float64).ravel()
        order = np.argsort(-y, kind="stable")
        y, w = y[order], w[order]
        # w / y overflows for y near the float minimum; such cells only matter for
        # scores below 1e-280, whose FAP is at its maximum anyway.
        wy = np.divide(w, np.maximum(y, _Y_FLOOR), out=np.zeros_like(w), where=y > 0)
        return cls(y, np.cumsum(w), np.cumsum(wy))

    def measure(self, score, bracket_s, window_s) -> np.ndarray:
        """``∫ ℓ(score / y) dw`` (sr·s) for candidates of statistic ``score = I·T·D`` (sr**-1 s**-1)."""
        s, L, W = np.broadcast_arrays(*(np.asarray(a, dtype=np.float64) for a in (score, bracket_s, window_s)))
        ystar = s * np.maximum(L, W)
        k = np.searchsorted(-self.y, -ystar * _TIE, side="right")
        idx = np.maximum(k - 1, 0)
        cw = np.where(k > 0, self.cum_w[idx], 0.0)
        cwy = np.where(k > 0, self.cum_w_over_y[idx], 0.0)
        ramp = np.where(L > 0, 2.0 * L * W * s * cwy, 0.0)  # no 0·inf for sharp triggers
        m = (L + W) * cw - ramp
        return np.maximum(m, 0.0)


def background_measure(table: BackgroundTable, score, bracket_s, window_s) -> np.ndarray:
    """Alias of :meth:`BackgroundTable.measure`."""
    return table.measure(score, bracket_s, window_s)


def false_association_probability(mu) -> np.ndarray:
    """``1 - exp(-μ)`` without cancellation for small ``μ``."""
    return -np.expm1(-np.asarray(mu, dtype=np.float64))


def poisson_fap(rate_per_deg2_per_day, area_deg2, window_days) -> np.ndarray:
    """``1 - exp(-rate × area × window)``, the simple form (Singer et al. 2014, ApJ 795, 105).

    Examples
    --------
    >>> round(float(poisson_fap(1e-3, 30.0, 2.0)), 9)
    0.058235466
    """
    return false_association_probability(np.asarray(rate_per_deg2_per_day, float) * np.asarray(area_deg2, float)
                                         * np.asarray(window_days, float))


# ---------------------------------------------------------------- table builders
_CACHE: "weakref.WeakKeyDictionary[SkyMap, dict]" = weakref.WeakKeyDictionary()


def _cached(skymap: SkyMap, key, build):
    tables = _CACHE.setdefault(skymap, {})
    if key not in tables:
        tables[key] = build()
    return tables[key]


def sky_table(skymap: SkyMap) -> BackgroundTable:
    """Cells = the map's pixels, ``y = ρ_gw`` (cached per map)."""
    return _cached(skymap, ("sky",), lambda: BackgroundTable.from_cells(skymap.probdensity, skymap.area_sr))


def smoothed_sky_table(skymap: SkyMap, sigma_deg: float) -> BackgroundTable:
    """Cells = a flat grid, ``y`` = the Gaussian overlap (σ in deg) at pixel centres (cached)."""
    sigma = float(sigma_deg)

    def build():
        order = int(np.clip(math.ceil(math.log2(58.63 / sigma)), 2, 6))
        nside = 1 << order
        theta, phi = hp.pix2ang(nside, np.arange(12 * nside * nside), nest=True)
        ra, dec = np.degrees(phi) % 360.0, 90.0 - np.degrees(theta)
        y = skymap.overlap_gaussian(ra, dec, np.full(ra.size, sigma))
        return BackgroundTable.from_cells(y, np.full(ra.size, hp.nside2pixarea(nside)))

    return _cached(skymap, ("smooth", sigma), build)


def distance_table(skymap: SkyMap, sigma_d_mpc: float, reach_mpc: float) -> BackgroundTable:
    """Cells = (pixel × measured-distance bin), ``y = ρ_gw D``, ``w = A p_bg,obs(d) Δd`` (cached)."""
    s = float(sigma_d_mpc)
    R = float(reach_mpc)

    def build():
        # The densest pixels get fine distance bins, the rest coarse ones (they only
        # matter for low scores); every pixel keeps its own D, so the statistic of a
        # cell is the one a report there would get.
        rank = np.argsort(-skymap.probdensity, kind="stable")
        ys, ws = [], []
        for part, nb in ((rank[:MAX_DISTANCE_PIXELS], DISTANCE_BINS), (rank[MAX_DISTANCE_PIXELS:], COARSE_DISTANCE_BINS)):
            if part.size == 0:
                continue
            edges = np.linspace(0.0, R + 6.0 * s, nb + 1)
            d = 0.5 * (edges[1:] + edges[:-1])
            pd = background_likelihood_overlap(R, d, s) * np.diff(edges)
            mu, sg, nm = skymap.distmu[part], skymap.distsigma[part], skymap.distnorm[part]
            rho, area = skymap.probdensity[part], skymap.area_sr[part]
            chunk = max(1, 2_000_000 // nb)
            for i in range(0, part.size, chunk):
                sl = slice(i, i + chunk)
                D = distance_factor(mu[sl, None], sg[sl, None], nm[sl, None], d[None, :], s, R)
                ys.append((rho[sl, None] * D).ravel())
                ws.append((area[sl, None] * pd[None, :]).ravel())
        return BackgroundTable.from_cells(np.concatenate(ys), np.concatenate(ws))

    return _cached(skymap, ("dist", s, R), build)


def node_value(k: int) -> float:
    """The table node ``2^(k/4)`` (Mpc for distance errors, deg for position errors)."""
    return float(2.0 ** (k / 4.0))


def interpolated_measure(table_at, values, score, bracket_s, window_s) -> np.ndarray:
    """Measure for candidates whose table parameter ``values`` lies between nodes.

    ``table_at(node)`` returns the :class:`BackgroundTable` at a node
    (:func:`node_value`); ``ln μ`` is interpolated linearly in ``ln value``
    between the two nodes around each value (exact at a node).
    """
    v, s, L, W = np.broadcast_arrays(*(np.asarray(a, dtype=np.float64) for a in (values, score, bracket_s, window_s)))
    lg = 4.0 * np.log2(v)
    k = np.floor(lg + 1e-9)
    t = np.clip(lg - k, 0.0, 1.0)
    t[t < 1e-9] = 0.0
    out = np.empty(v.shape)
    for kk in np.unique(k):
        sel = k == kk
        m_lo = table_at(node_value(int(kk))).measure(s[sel], L[sel], W[sel])
        ts = t[sel]
        if not np.any(ts > 0):
            out[sel] = m_lo
            continue
        m_hi = table_at(node_value(int(kk) + 1)).measure(s[sel], L[sel], W[sel])
        both = (m_lo > 0) & (m_hi > 0)
        with np.errstate(divide="ignore"):
            mix = np.exp((1 - ts) * np.log(np.where(both, m_lo, 1.0)) + ts * np.log(np.where(both, m_hi, 1.0)))
        out[sel] = np.where(ts == 0, m_lo, np.where(both, mix, (1 - ts) * m_lo + ts * m_hi))
    return out
