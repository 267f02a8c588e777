"""Ranking the galaxies of a localization volume as hosts.

For galaxy ``i`` at sky position ``Ω_i`` with luminosity distance ``d_i ± σ_d,i``
and weight ``w_i``,

    P(host = i) ∝ w_i ρ(Ω_i) N_i φ((d_i - μ_i)/s_i) / s_i,   s_i² = σ_i² + σ_d,i²,

with ``ρ`` the sky density (sr⁻¹) and ``μ_i, σ_i, N_i`` the distance ansatz
of the pixel holding the galaxy (Singer et al. 2016, ApJS 226, 10; the
weighting of Gehrels et al. 2016, ApJ 820, 136). It is the volume density
``dP/dV = ρ N φ((r-μ)/σ)/σ`` averaged over the galaxy's Gaussian distance
error — exact, since the convolution of two Gaussians in ``r`` is the
Gaussian of summed variances. For a map without distance layers the
ranking is by ``w_i ρ(Ω_i)`` alone.

Only galaxies in the densest pixels holding ``fraction`` (default 99.9%) of
the sky probability are touched: each pixel's galaxies are one slice of the
index (see :mod:`matcher.catalog.index`). The galaxy probabilities are
normalized over those galaxies to ``1 - p_outside_catalog``, the rest being
the probability that the host is not in the catalogue (see
:mod:`matcher.catalog.completeness`); without a completeness model
``p_outside_catalog`` is NaN (not assessed) and the probabilities sum to 1,
i.e. they are conditional on the host being catalogued.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from matcher.catalog.completeness import Completeness, p_outside_catalog
from matcher.catalog.index import GalaxyIndex
from matcher.errors import CatalogError
from matcher.sky.skymap import SkyMap

__all__ = ["DEFAULT_FRACTION", "host_weight", "rank_hosts", "HostRanking", "select_pixels"]

#: Sky probability whose pixels are searched for hosts.
DEFAULT_FRACTION = 0.999
_INV_SQRT2PI = 1.0 / math.sqrt(2.0 * math.pi)


def host_weight(density_per_sr, distmu, distsigma, distnorm, distance_mpc, distance_err_mpc, weight):
    """Unnormalized host probability ``w ρ N φ((d-μ)/s)/s`` (weight × Mpc⁻³).

    Zero where the ansatz does not apply (non-finite μ, σ ≤ 0 or N ≤ 0).
    All arguments broadcast; units sr⁻¹, Mpc, Mpc, Mpc⁻², Mpc, Mpc, weight.
    """
    rho, mu, sig, nrm, d, de, w = (np.asarray(a, dtype=np.float64) for a in
                                   (density_per_sr, distmu, distsigma, distnorm, distance_mpc,
                                    distance_err_mpc, weight))
    s = np.sqrt(sig * sig + de * de)
    with np.errstate(invalid="ignore", over="ignore"):
        z = (d - mu) / s
        val = w * rho * nrm * np.exp(-0.5 * z * z) * _INV_SQRT2PI / s
    ok = np.isfinite(mu) & (sig > 0) & (nrm > 0) & np.isfinite(val)
    return np.where(ok, val, 0.0)


def select_pixels(skymap: SkyMap, fraction: float) -> np.ndarray:
    """Indices of the densest pixels holding ``fraction`` of the probability, in NESTED order.

    ``fraction = 1`` means every pixel with non-zero probability.
    """
    if not (isinstance(fraction, (int, float)) and 0.0 < fraction <= 1.0):
        raise CatalogError(f"fraction={fraction!r} must lie in (0, 1]")
    if fraction >= 1.0:
        pix = np.flatnonzero(skymap.prob > 0)
    else:
        pix = skymap.top_pixels(fraction)
        pix = pix[skymap.prob[pix] > 0]
    return np.sort(pix)


@dataclass(frozen=True, eq=False)
class HostRanking:
    """Galaxies of a localization ranked as hosts, best first.

    Attributes
    ----------
    galaxy_id, ra_deg, dec_deg, distance_mpc, distance_err_mpc, weight : ndarray
        The galaxies (catalogue values).
    prob : ndarray
        ``P(host = galaxy)``; sums to ``1 - p_outside_catalog`` (to 1 when
        that is NaN).
    cum_prob : ndarray
        Running sum of ``prob``.
    dp_dv : ndarray, Mpc⁻³
        The galaxy's distance-error-averaged volume density ``ρ N φ/s``
        (sky density alone, sr⁻¹, for a map without distance).
    rows : ndarray of int64
        Rows in the index (for further look-ups).
    p_outside_catalog : float
        NaN when no completeness model was given (not assessed).
    norm : float
        ``Σ w_i dP/dV_i`` over the galaxies considered (weight × Mpc⁻³);
        ``host_weight(...) / norm × (1 - p_outside_catalog)`` is the
        probability of any galaxy on the same scale.
    fraction : float
        Sky probability of the pixels searched.
    sky_prob_searched : float
        Their actual probability (≥ ``fraction``).
    n_pixels : int
        Pixels searched.
    three_d : bool
        Whether the map had distance layers.
    meta : mapping
        Map and catalogue facts for output (event id, sources).
    """

    galaxy_id: np.ndarray
    ra_deg: np.ndarray
    dec_deg: np.ndarray
    distance_mpc: np.ndarray
    distance_err_mpc: np.ndarray
    weight: np.ndarray
    prob: np.ndarray
    cum_prob: np.ndarray
    dp_dv: np.ndarray
    rows: np.ndarray
    p_outside_catalog: float
    norm: float
    fraction: float
    sky_prob_searched: float
    n_pixels: int
    three_d: bool
    meta: Mapping[str, object] = field(default_factory=dict)

    _ROW_FIELDS = ("galaxy_id", "ra_deg", "dec_deg", "distance_mpc", "distance_err_mpc", "weight", "prob",
                   "cum_prob", "dp_dv", "rows")

    def __len__(self) -> int:
        return int(self.prob.shape[0])

    @property
    def p_in_catalog(self) -> float:
        """``1 - p_outside_catalog`` (1 when not assessed)."""
        p = self.p_outside_catalog
        return 1.0 if not math.isfinite(p) else 1.0 - p

    def top(self, n: int | None) -> "HostRanking":
        """The best ``n`` galaxies (all when ``n`` is None or 0)."""
        if not n:
            return self
        kw = {k: getattr(self, k)[:n] for k in self._ROW_FIELDS}
        return HostRanking(**kw, **{k: getattr(self, k) for k in ("p_outside_catalog", "norm", "fraction",
                                                                  "sky_prob_searched", "n_pixels", "three_d",
                                                                  "meta")})

    def credible_count(self, p: float) -> int:
        """Number of galaxies in the smallest set holding ``p`` of the in-catalogue probability."""
        if not 0.0 <= p <= 1.0:
            raise CatalogError(f"credible level p={p!r} must lie in [0, 1]")
        if len(self) == 0 or p == 0.0:
            return 0
        target = p * self.p_in_catalog
        return int(min(np.searchsorted(self.cum_prob, target * (1 - 1e-12), side="left") + 1, len(self)))

    def galaxies(self, n: int | None = None) -> list[dict]:
        """The best ``n`` galaxies as dictionaries (JSON keys), best first."""
        t = self.top(n)
        ids = t.galaxy_id.tolist()
        out = []
        for i in range(len(t)):
            out.append({
                "rank": i + 1,
                "galaxy_id": ids[i],
                "prob": float(t.prob[i]),
                "cum_prob": float(t.cum_prob[i]),
                "ra_deg": float(t.ra_deg[i]),
                "dec_deg": float(t.dec_deg[i]),
                "distance_mpc": float(t.distance_mpc[i]),
                "distance_err_mpc": float(t.distance_err_mpc[i]),
                "weight": float(t.weight[i]),
                "dp_dv": float(t.dp_dv[i]),
            })
        return out

    def to_dict(self, n: int | None = None) -> dict:
        """JSON-ready summary: ``p_outside_catalog`` and ``galaxies`` (best first), plus context."""
        p_out = self.p_outside_catalog
        return {
            **{k: v for k, v in self.meta.items()},
            "p_outside_catalog": p_out if math.isfinite(p_out) else None,
            "n_galaxies": len(self),
            "n_galaxies_90": self.credible_count(0.9),
            "fraction": self.fraction,
            "sky_prob_searched": self.sky_prob_searched,
            "n_pixels": self.n_pixels,
            "three_d": self.three_d,
            "galaxies": self.galaxies(n),
        }

    def to_table(self, n: int | None = None):
        """An astropy ``Table`` of the best ``n`` galaxies (with units and the summary in ``meta``)."""
        from astropy.table import Table

        t = self.top(n)
        table = Table(
            {
                "rank": np.arange(1, len(t) + 1),
                "galaxy_id": np.asarray(t.galaxy_id),
                "prob": np.asarray(t.prob),
                "cum_prob": np.asarray(t.cum_prob),
                "ra_deg": np.asarray(t.ra_deg),
                "dec_deg": np.asarray(t.dec_deg),
                "distance_mpc": np.asarray(t.distance_mpc),
                "distance_err_mpc": np.asarray(t.distance_err_mpc),
                "weight": np.asarray(t.weight),
                "dp_dv": np.asarray(t.dp_dv),
            }
        )
        for name, unit in (("ra_deg", "deg"), ("dec_deg", "deg"), ("distance_mpc", "Mpc"),
                           ("distance_err_mpc", "Mpc"), ("dp_dv", "Mpc-3" if self.three_d else "sr-1")):
            table[name].unit = unit
        summary = self.to_dict(0)
        summary.pop("galaxies")
        table.meta.update({k: v for k, v in summary.items() if v is not None})
        return table


def rank_hosts(
    skymap: SkyMap,
    index: GalaxyIndex,
    *,
    fraction: float = DEFAULT_FRACTION,
    completeness: Completeness | None = None,
    meta: Mapping[str, object] | None = None,
) -> HostRanking:
    """Rank the catalogue's galaxies as hosts of a localization.

    Parameters
    ----------
    skymap : SkyMap
        The localization (with distance layers for a 3D ranking).
    index : GalaxyIndex
        Loaded once, reused for every event and revision.
    fraction : float
        Search the densest pixels holding this much sky probability (0, 1].
    completeness : Completeness, optional
        For ``p_outside_catalog``; defaults to the index's recorded model
        (NaN if there is none).
    meta : mapping, optional
        Extra facts carried into the output (event id, revision, ...).

    Returns
    -------
    HostRanking
    """
    if completeness is None and index.header.completeness:
        from matcher.catalog.completeness import completeness_from_dict

        completeness = completeness_from_dict(index.header.completeness, path="index completeness")
    pix = select_pixels(skymap, fraction)
    rows, counts = index.rows_in_uniq(skymap.uniq[pix])
    cat = index.catalog
    on_pix = np.repeat(pix, counts)
    rho = skymap.probdensity[on_pix]
    d = np.asarray(cat.distance_mpc)[rows]
    de = np.asarray(cat.distance_err_mpc)[rows]
    w = np.asarray(cat.weight)[rows]
    three_d = skymap.has_distance
    if three_d:
        dens = host_weight(rho, skymap.distmu[on_pix], skymap.distsigma[on_pix], skymap.distnorm[on_pix], d, de, 1.0)
    else:
        dens = rho
    raw = w * dens
    total = float(raw.sum())
    p_out = float("nan")
    if completeness is not None and three_d:
        p_out = p_outside_catalog(completeness, skymap.prob[pix], skymap.distmu[pix], skymap.distsigma[pix],
                                  skymap.distnorm[pix])
    if total > 0:
        scale = (1.0 if not math.isfinite(p_out) else 1.0 - p_out) / total
    else:
        scale = 0.0
        if completeness is not None:
            p_out = 1.0  # no catalogued galaxy can be the host
    order = np.argsort(-raw, kind="stable")
    prob = raw[order] * scale
    dp_dv = dens[order]
    cover = float(skymap.prob[pix].sum())
    info = {"map": skymap.source}
    if skymap.meta.get("OBJECT"):
        info["object"] = str(skymap.meta["OBJECT"])
    info.update(meta or {})
    best_first = rows[order]
    return HostRanking(
        galaxy_id=np.asarray(cat.galaxy_id)[best_first],
        ra_deg=np.asarray(cat.ra_deg)[best_first],
        dec_deg=np.asarray(cat.dec_deg)[best_first],
        distance_mpc=d[order],
        distance_err_mpc=de[order],
        weight=w[order],
        prob=prob,
        cum_prob=np.cumsum(prob),
        dp_dv=dp_dv,
        rows=best_first,
        p_outside_catalog=p_out,
        norm=total,
        fraction=float(fraction),
        sky_prob_searched=cover,
        n_pixels=int(pix.size),
        three_d=three_d,
        meta=info,
    )
