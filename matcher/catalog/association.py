"""Host galaxies of one transient: nearby galaxies weighed by chance coincidence and 3D probability.

Candidates are the catalogued galaxies within a projected offset
``max_offset_kpc`` (at each galaxy's angular-diameter distance) or within
``max(3 σ_loc, min_radius_arcsec)`` of the transient. Each gets the chance-
coincidence probability ``P_cc`` of :mod:`matcher.catalog.chance` (Berger
counts where its magnitude is known; the catalogue's own surface density
around the position otherwise), and the association weight

    score_i = (1 - P_cc,i) × w_i × dP/dV_i

where ``dP/dV_i`` is the galaxy's distance-error-averaged GW volume density
(:func:`matcher.catalog.ranking.host_weight`; the sky density alone for a map
without distance; 1 without a map). ``prob_i = score_i / Σ score`` is the
probability that galaxy ``i`` is the host given that one of the candidates
is. The best host is the most probable candidate with ``P_cc ≤ max_p_cc``;
its distance is what the coincidence engine's distance term takes.

Note: choosing the host with the GW volume density and then testing the
host's distance against the GW distance uses the GW data twice, which makes
the distance term favour association. :meth:`TransientHosts.host_distance`
therefore offers ``by="position"`` (the candidate least likely to be a chance
alignment, GW data unused) beside the default ``by="combined"``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from matcher.catalog.chance import chance_coincidence, effective_radius_arcsec, number_density_berger
from matcher.cosmology import DistanceTable, planck18_table
from matcher.catalog.index import GalaxyIndex
from matcher.catalog.ranking import HostRanking, host_weight
from matcher.errors import CatalogError
from matcher.sky.coords import angular_separation_deg, check_radec
from matcher.sky.skymap import SkyMap

__all__ = ["HostCandidate", "TransientHosts", "hosts_for_transient", "hosts_for_report",
           "DEFAULT_MAX_OFFSET_KPC", "DEFAULT_MAX_P_CC"]

#: Largest projected host offset searched (kpc); transients of compact-binary mergers are
#: found out to tens of kpc from their hosts (common practice).
DEFAULT_MAX_OFFSET_KPC = 50.0
#: A candidate is a host only if its chance-coincidence probability is at most this (a choice).
DEFAULT_MAX_P_CC = 0.1
_ARCSEC_PER_RAD = 180.0 * 3600.0 / math.pi


@dataclass(frozen=True)
class HostCandidate:
    """One galaxy near a transient.

    Attributes
    ----------
    galaxy_id : int or str
    ra_deg, dec_deg : float, deg
    distance_mpc, distance_err_mpc : float, Mpc
    separation_arcsec : float, arcsec
    offset_kpc : float, kpc
        Projected offset at the galaxy's angular-diameter distance.
    p_cc : float
        Chance-coincidence probability.
    counts : str
        ``"berger"`` (magnitude known) or ``"catalogue"`` (surface density of the catalogue).
    prob : float
        Probability of being the host among the candidates.
    dp_dv : float, Mpc⁻³
        GW volume density at the galaxy (NaN without a map).
    prob_gw : float
        The galaxy's ``P(host)`` on the scale of the GW ranking given (NaN without one).
    """

    galaxy_id: object
    ra_deg: float
    dec_deg: float
    distance_mpc: float
    distance_err_mpc: float
    separation_arcsec: float
    offset_kpc: float
    p_cc: float
    counts: str
    prob: float
    dp_dv: float
    prob_gw: float

    def to_dict(self) -> dict:
        return {k: (v if not isinstance(v, float) or math.isfinite(v) else None) for k, v in self.__dict__.items()}


@dataclass(frozen=True)
class TransientHosts:
    """Host candidates of a transient, most probable first.

    Attributes
    ----------
    transient_id : str or None
    ra_deg, dec_deg, pos_err_deg : float, deg
    candidates : tuple of HostCandidate
    best : HostCandidate or None
        Most probable candidate with ``p_cc ≤ max_p_cc`` (None if there is none).
    best_by_position : HostCandidate or None
        Candidate with the lowest ``p_cc``, if ``≤ max_p_cc``.
    max_p_cc : float
    search_radius_arcsec : float
    """

    transient_id: str | None
    ra_deg: float
    dec_deg: float
    pos_err_deg: float
    candidates: tuple = ()
    best: HostCandidate | None = None
    best_by_position: HostCandidate | None = None
    max_p_cc: float = DEFAULT_MAX_P_CC
    search_radius_arcsec: float = 0.0
    meta: Mapping[str, object] = field(default_factory=dict)

    def host_distance(self, by: str = "combined") -> tuple[float, float] | None:
        """``(distance_mpc, distance_err_mpc)`` of the chosen host, or None.

        ``by="combined"`` uses :attr:`best`; ``by="position"`` uses :attr:`best_by_position`.
        """
        if by not in ("combined", "position"):
            raise CatalogError(f"by={by!r}: expected 'combined' or 'position'")
        host = self.best if by == "combined" else self.best_by_position
        if host is None:
            return None
        return host.distance_mpc, host.distance_err_mpc

    def to_dict(self, n: int | None = None) -> dict:
        cands = self.candidates[:n] if n else self.candidates
        return {
            "transient_id": self.transient_id,
            "ra_deg": self.ra_deg,
            "dec_deg": self.dec_deg,
            "pos_err_deg": self.pos_err_deg,
            "max_p_cc": self.max_p_cc,
            "search_radius_arcsec": self.search_radius_arcsec,
            **dict(self.meta),
            "best": None if self.best is None else self.best.to_dict(),
            "best_by_position": None if self.best_by_position is None else self.best_by_position.to_dict(),
            "n_candidates": len(self.candidates),
            "candidates": [c.to_dict() for c in cands],
        }


def hosts_for_transient(
    index: GalaxyIndex,
    ra_deg: float,
    dec_deg: float,
    *,
    pos_err_deg: float | None = 0.0,
    skymap: SkyMap | None = None,
    ranking: HostRanking | None = None,
    transient_id: str | None = None,
    max_offset_kpc: float = DEFAULT_MAX_OFFSET_KPC,
    min_radius_arcsec: float = 5.0,
    near_distance_mpc: float = 10.0,
    max_p_cc: float = DEFAULT_MAX_P_CC,
    density_radius_deg: float = 1.0,
    distances: DistanceTable | None = None,
) -> TransientHosts:
    """Host candidates for a transient at (``ra_deg``, ``dec_deg``).

    Parameters
    ----------
    index : GalaxyIndex
    ra_deg, dec_deg : float, deg
    pos_err_deg : float, deg
        1σ position error of the transient (0 or None for a precise position).
    skymap : SkyMap, optional
        The GW localization, for the 3D weight.
    ranking : HostRanking, optional
        The GW host ranking of the same map and index, to put ``prob_gw`` on its scale.
    max_offset_kpc : float, kpc
    min_radius_arcsec : float, arcsec
        Galaxies this close are candidates whatever their distance.
    near_distance_mpc : float, Mpc
        The search disc is wide enough for ``max_offset_kpc`` at this distance;
        nearer galaxies are searched only to that angle.
    max_p_cc : float
    density_radius_deg : float, deg
        Disc for the catalogue's surface density (galaxies without a magnitude).
    """
    ra, dec = check_radec(ra_deg, dec_deg, what=f"transient {transient_id or ''}".strip())
    ra, dec = float(ra), float(dec)
    sig = 0.0 if pos_err_deg is None else float(pos_err_deg)
    if not (math.isfinite(sig) and 0.0 <= sig <= 90.0):
        raise CatalogError(f"transient {transient_id or ''}: pos_err_deg={pos_err_deg!r} must be in [0, 90]")
    for name, v in (("max_offset_kpc", max_offset_kpc), ("min_radius_arcsec", min_radius_arcsec),
                    ("near_distance_mpc", near_distance_mpc), ("density_radius_deg", density_radius_deg)):
        if not (math.isfinite(v) and v > 0):
            raise CatalogError(f"{name}={v!r} must be finite and positive")
    if not 0.0 <= max_p_cc <= 1.0:
        raise CatalogError(f"max_p_cc={max_p_cc!r} must lie in [0, 1]")
    table = distances or planck18_table()
    sig_arcsec = sig * 3600.0
    fixed_arcsec = max(3.0 * sig_arcsec, float(min_radius_arcsec))
    d_a_near = float(table.angular_diameter_distance_at(near_distance_mpc))
    near_arcsec = max_offset_kpc / (1000.0 * d_a_near) * _ARCSEC_PER_RAD
    search_arcsec = min(max(fixed_arcsec, near_arcsec), 10.0 * 3600.0)
    rows = index.rows_in_cone(ra, dec, search_arcsec / 3600.0)
    cat = index.catalog
    g_ra = np.asarray(cat.ra_deg)[rows]
    g_dec = np.asarray(cat.dec_deg)[rows]
    d = np.asarray(cat.distance_mpc)[rows]
    de = np.asarray(cat.distance_err_mpc)[rows]
    w = np.asarray(cat.weight)[rows]
    sep = angular_separation_deg(ra, dec, g_ra, g_dec) * 3600.0
    d_a = table.angular_diameter_distance_at(d)
    d_a = np.where(np.isfinite(d_a), d_a, d)  # beyond the table (z > 10): no sensible D_A; D_L is an upper bound
    offset_kpc = np.radians(sep / 3600.0) * d_a * 1000.0
    keep = (offset_kpc <= max_offset_kpc) | (sep <= fixed_arcsec)
    rows, sep, offset_kpc = rows[keep], sep[keep], offset_kpc[keep]
    g_ra, g_dec, d, de, w = g_ra[keep], g_dec[keep], d[keep], de[keep], w[keep]
    mag = np.asarray(cat.mag)[rows] if cat.mag is not None else np.full(rows.size, np.nan)
    rh = np.asarray(cat.radius_arcsec)[rows] if cat.radius_arcsec is not None else np.full(rows.size, np.nan)
    r_eff = effective_radius_arcsec(sep, rh, sig_arcsec)
    known = np.isfinite(mag)
    density = np.where(known, number_density_berger(np.where(known, mag, 0.0)), np.nan)
    if np.any(~known):
        n_local = index.rows_in_cone(ra, dec, density_radius_deg).size
        cap_arcsec2 = 2 * math.pi * (1 - math.cos(math.radians(density_radius_deg))) * _ARCSEC_PER_RAD**2
        density = np.where(known, density, n_local / cap_arcsec2)
    p_cc = chance_coincidence(r_eff, density)

    dp_dv = np.full(rows.size, np.nan)
    prob_gw = np.full(rows.size, np.nan)
    if skymap is not None and rows.size:
        idx = skymap.pixel_index(g_ra, g_dec, checked=True)
        if skymap.has_distance:
            dp_dv = host_weight(skymap.probdensity[idx], skymap.distmu[idx], skymap.distsigma[idx],
                                skymap.distnorm[idx], d, de, 1.0)
        else:
            dp_dv = skymap.probdensity[idx].astype(np.float64)
        if ranking is not None and ranking.norm > 0:
            prob_gw = w * dp_dv / ranking.norm * ranking.p_in_catalog
    gw_term = dp_dv if skymap is not None else np.ones(rows.size)
    score = (1.0 - p_cc) * w * gw_term
    total = float(score.sum())
    prob = score / total if total > 0 else np.zeros(rows.size)
    order = np.lexsort((p_cc, -prob))
    ids = np.asarray(cat.galaxy_id)[rows].tolist()
    cands = tuple(
        HostCandidate(ids[i], float(g_ra[i]), float(g_dec[i]), float(d[i]), float(de[i]), float(sep[i]),
                      float(offset_kpc[i]), float(p_cc[i]), "berger" if known[i] else "catalogue",
                      float(prob[i]), float(dp_dv[i]), float(prob_gw[i]))
        for i in order
    )
    eligible = [c for c in cands if c.p_cc <= max_p_cc]
    best = next((c for c in eligible if c.prob > 0), None)
    by_pos = min(eligible, key=lambda c: c.p_cc) if eligible else None
    return TransientHosts(transient_id, ra, dec, sig, cands, best, by_pos, float(max_p_cc), float(search_arcsec))


def hosts_for_report(index: GalaxyIndex, report, *, skymap: SkyMap | None = None,
                     ranking: HostRanking | None = None, **options) -> TransientHosts:
    """:func:`hosts_for_transient` for a :class:`matcher.streams.messages.TransientReport`."""
    return hosts_for_transient(index, report.ra_deg, report.dec_deg, pos_err_deg=report.pos_err_deg,
                               skymap=skymap, ranking=ranking, transient_id=report.transient_id, **options)
