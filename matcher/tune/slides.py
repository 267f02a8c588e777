"""Time slides: the archive's own background against shifted GW alerts.

Shifting the report stream against an alert by more than the longest window
destroys any true coincidence while keeping the background's real clustering
in sky and time. A class's stream is treated as periodic over its span ``S``
(first report to last, plus one mean spacing), so every shift has a full
stream behind it. Offsets run evenly from ``Δ_min`` to ``S - Δ_min``:

    Δ_k = Δ_min + k (S - 2 Δ_min) / (N - 1),    k = 0 … N-1,

with ``Δ_min`` the longest window scanned (``max hi - min lo``) plus the
99th percentile of the class's brackets, so that no report that met a window
at zero lag meets any window after a shift (either way round the period).
Consecutive offsets may be closer than a window: such slides share reports
and are correlated, which the bootstrap over alerts (not a Poisson error)
accounts for.

Sliding the stream by ``+Δ`` is scoring each report at ``t - Δ`` (and its last
non-detection likewise) against the alert as it is; all slides of an alert are
scored together, tagged by slide.

A conservative sky bound (:func:`sky_bound_keep`) drops, before scoring, the
point-like reports that cannot reach the largest FAP threshold scanned; the
numbers come from the engine for every report kept.
"""

from __future__ import annotations

from dataclasses import dataclass

import healpy as hp
import numpy as np

from matcher.coincidence.fap import SMOOTH_MIN_SIGMA_DEG, sky_table
from matcher.sky.skymap import SkyMap

__all__ = [
    "SlidePlan",
    "plan_slides",
    "slid_candidates",
    "SkyBound",
    "sky_bound",
    "sky_bound_keep",
    "density_bound",
    "area_denser_than",
    "BOUND_ORDER",
    "BOUND_MAX_SIGMA_DEG",
]

#: HEALPix order of the cells of the sky bound (1.8° cells).
BOUND_ORDER = 5
#: Reports with a 1σ error up to this (deg) are bounded; broader ones are always scored.
#: It must stay below the engine's SMOOTH_MIN_SIGMA_DEG: bounded reports are ranked on the map itself.
BOUND_MAX_SIGMA_DEG = min(0.05, 0.5 * SMOOTH_MIN_SIGMA_DEG)


@dataclass(frozen=True)
class SlidePlan:
    """The offsets of one class.

    Attributes
    ----------
    offsets_s : ndarray, s
        Empty when the archive is too short for any slide.
    min_offset_s : float, s
        ``Δ_min``.
    period_s : float, s
        ``S``.
    start_s : float, GPS s
        Start of the period (the class's first report).
    requested : int
    reason : str
        Why fewer offsets than requested (empty when all fit).
    """

    offsets_s: np.ndarray
    min_offset_s: float
    period_s: float
    start_s: float
    requested: int
    reason: str = ""

    @property
    def step_s(self) -> float:
        return float(np.diff(self.offsets_s).min()) if self.offsets_s.size > 1 else float("nan")


def plan_slides(times_s, brackets_s, windows_s, n: int) -> SlidePlan:
    """Offsets for ``n`` slides of a class (see the module docstring).

    Parameters
    ----------
    times_s : array_like, GPS s
        The class's report times.
    brackets_s : array_like, s
        Their bracket lengths (0 for sharp classes).
    windows_s : sequence of (lo, hi), s
        Every window that will be scored.
    n : int
        Slides requested.
    """
    t = np.sort(np.asarray(times_s, dtype=np.float64))
    los = [w[0] for w in windows_s]
    his = [w[1] for w in windows_s]
    L99 = float(np.percentile(brackets_s, 99)) if np.size(brackets_s) else 0.0
    dmin = (max(his) - min(los)) + L99
    spacing = (t[-1] - t[0]) / max(t.size - 1, 1) if t.size > 1 else 0.0
    period = float(t[-1] - t[0] + spacing)
    room = period - 2.0 * dmin
    if t.size < 2 or room < 0:
        return SlidePlan(np.zeros(0), dmin, period, float(t[0]), n,
                         f"the stream spans {period / 86400:.3g} d, less than twice the smallest offset "
                         f"{dmin / 86400:.3g} d (longest window plus brackets): no slide fits")
    if n == 1:
        return SlidePlan(np.array([0.5 * period]), dmin, period, float(t[0]), n)
    return SlidePlan(dmin + np.arange(n) * (room / (n - 1)), dmin, period, float(t[0]), n)


def slid_candidates(times_s, plan: SlidePlan, merger_time_s: float, lo_s: float, hi_s: float, bracket_max_s: float):
    """Reports that may meet a window ``[lo, hi]`` around the alert in each slide.

    Parameters
    ----------
    times_s : ndarray, GPS s
        The class's report times, sorted.
    plan : SlidePlan
    merger_time_s : float, GPS s
    lo_s, hi_s : float, s
        The widest extent of the windows scanned.
    bracket_max_s : float, s
        The longest bracket of the class (a first detection up to this after the window still meets it).

    Returns
    -------
    rows : ndarray of int
        Indices into ``times_s``.
    shift_s : ndarray, s
        What to add to each row's times (and last non-detection) to put it in the alert's frame.
    slide : ndarray of int
        The slide of each row.
    """
    t = np.asarray(times_s, dtype=np.float64)
    S, t0 = plan.period_s, plan.start_s
    rows, shifts, slides = [], [], []
    for k, d in enumerate(plan.offsets_s):
        # The slid stream is the stream at t - d (periodic): a report at time t meets the alert
        # at merger_time when t - d + m S lies in [merger + lo, merger + hi + L].
        a = merger_time_s + lo_s + d
        b = merger_time_s + hi_s + bracket_max_s + d
        # Copies m of the period that [a - mS, b - mS] can meet: a - mS < t0 + S and b - mS >= t0.
        for m in range(int(np.floor((a - t0 - S) / S)), int(np.ceil((b - t0) / S)) + 1):
            i0 = np.searchsorted(t, a - m * S, side="left")
            i1 = np.searchsorted(t, b - m * S, side="right")
            if i1 > i0:
                rows.append(np.arange(i0, i1))
                shifts.append(np.full(i1 - i0, m * S - d))
                slides.append(np.full(i1 - i0, k))
    if not rows:
        return np.zeros(0, np.int64), np.zeros(0), np.zeros(0, np.int64)
    return np.concatenate(rows), np.concatenate(shifts), np.concatenate(slides)


@dataclass(frozen=True, eq=False)
class SkyBound:
    """For one GW map: an upper bound on the density within ~1° of any point, and the sky table.

    Attributes
    ----------
    cell_max : ndarray, sr**-1
        Largest map density over each order-:data:`BOUND_ORDER` cell and its neighbours.
    y_desc : ndarray, sr**-1
        Map densities, descending (the engine's sky table).
    cum_area : ndarray, sr
        Cumulative pixel area along ``y_desc``.
    """

    cell_max: np.ndarray
    y_desc: np.ndarray
    cum_area: np.ndarray


def sky_bound(skymap: SkyMap) -> SkyBound:
    """Build the bound of :func:`sky_bound_keep` for a map (once per alert)."""
    o = BOUND_ORDER
    npix = 12 * 4**o
    cm = np.zeros(npix)
    dens = skymap.probdensity
    order = skymap.order
    ipix = skymap.ipix
    fine = order >= o
    np.maximum.at(cm, (ipix[fine] >> (2 * (order[fine] - o))).astype(np.int64), dens[fine])
    for oo in np.unique(order[~fine]):
        sel = np.flatnonzero(order == oo)
        k = 4 ** (o - int(oo))
        cells = (ipix[sel][:, None] * k + np.arange(k)).ravel()
        np.maximum.at(cm, cells.astype(np.int64), np.repeat(dens[sel], k))
    nb = hp.get_all_neighbours(1 << o, np.arange(npix), nest=True)
    dil = cm.copy()
    for row in nb:
        ok = row >= 0
        dil[ok] = np.maximum(dil[ok], cm[row[ok]])
    table = sky_table(skymap)
    return SkyBound(dil, table.y, table.cum_w)


def density_bound(bound: SkyBound, ra_deg, dec_deg) -> np.ndarray:
    """Upper bound (sr**-1) on the engine's sky term ``I`` of a report with a 1σ error up to
    :data:`BOUND_MAX_SIGMA_DEG` at each position: the largest density within one
    order-:data:`BOUND_ORDER` cell, ×1.05 for the engine's quadrature."""
    theta = np.radians(90.0 - np.asarray(dec_deg, dtype=np.float64))
    phi = np.radians(np.asarray(ra_deg, dtype=np.float64))
    return 1.05 * bound.cell_max[hp.ang2pix(1 << BOUND_ORDER, theta, phi, nest=True)]


def area_denser_than(bound: SkyBound, density) -> np.ndarray:
    """Sky area (sr) of the map's pixels denser than ``density`` (strictly: fewer pixels, still a bound)."""
    k = np.searchsorted(-bound.y_desc, -np.asarray(density, dtype=np.float64), side="left")
    return np.where(k > 0, bound.cum_area[np.maximum(k - 1, 0)], 0.0)


def sky_bound_keep(bound: SkyBound, i_upper, sigma_deg, eligible, time_term_s, bracket_s, window_s,
                   rate_per_sr_per_s: float, mu_cap: float) -> np.ndarray:
    """Which reports to score: False only where the engine's ``μ`` surely exceeds ``mu_cap``.

    For a point-like report (1σ error ≤ :data:`BOUND_MAX_SIGMA_DEG`, no own map, no
    distance: ``eligible``) of sky term ``I`` and time term ``T``, the engine's background
    measure is ``μ = r Σ_{y ≥ y*} w ℓ(s/y)`` with ``s = I T``, ``y* = s max(L, W)`` and
    ``ℓ(τ) = L + W - 2 L W τ`` (see :mod:`matcher.coincidence.fap`). On the cells with
    ``y ≥ 2 y*``, ``τ ≤ 1/(2 max(L, W))`` so ``ℓ ≥ max(L, W)``; hence

        μ ≥ r max(L, W) A(ρ ≥ 2 y*),

    and with ``I`` replaced by an upper bound (:func:`density_bound`) the bound still holds:
    ``I`` is the density under the point or its mean over points within 3.4σ ≤ 0.17°,
    all inside the cell's neighbourhood.

    Parameters
    ----------
    bound : SkyBound
    i_upper : ndarray, sr**-1
        :func:`density_bound` at each report.
    sigma_deg : ndarray, deg
        Effective 1σ errors.
    eligible : ndarray of bool
        No own map and no measured distance (the error is checked here).
    time_term_s : ndarray, s**-1
        ``T`` for each report (0: outside the window, dropped).
    bracket_s : ndarray, s
    window_s : float, s
    rate_per_sr_per_s : float
    mu_cap : float
        The largest ``μ`` (``-ln(1 - FAP)``) that will be counted.
    """
    T = np.asarray(time_term_s, dtype=np.float64)
    keep = T > 0
    el = keep & np.asarray(eligible, bool) & (np.asarray(sigma_deg) <= BOUND_MAX_SIGMA_DEG)
    idx = np.flatnonzero(el)
    if idx.size == 0:
        return keep
    L = np.asarray(bracket_s, dtype=np.float64)[idx]
    M = np.maximum(L, window_s)
    area = area_denser_than(bound, 2.0 * np.asarray(i_upper, dtype=np.float64)[idx] * T[idx] * M)
    mu_lb = rate_per_sr_per_s * M * area
    keep[idx] = mu_lb <= mu_cap
    return keep
