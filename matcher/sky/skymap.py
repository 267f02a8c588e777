"""The in-memory localization: a multi-order HEALPix map with optional distance layers.

:class:`SkyMap` is immutable: its arrays are read-only and everything derived
from them (sort order for credible regions, the lookup table) is computed once
on first use. It never touches files; :mod:`matcher.sky.fitsio` builds it from
bytes.

Conventions
-----------
* Pixels are NUNIQ ids (IVOA MOC), stored sorted by their NESTED start index
  at the map's finest order, covering the whole sphere exactly once.
* ``probdensity`` is per steradian; ``prob = probdensity * area``.
* Positions are RA/Dec in degrees (ICRS), areas are reported in deg².
* Credible-region areas interpolate within the pixel where the cumulative
  probability crosses the level, so that splitting a pixel into children of
  equal density never changes an area (flat and multi-order forms agree).
* The searched probability and searched area at a position include every pixel
  at least as dense as the position's own (ties included): the region
  "scoring at least as high", which keeps false-association probabilities
  conservative.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from functools import cached_property
from typing import Mapping

import healpy as hp
import numpy as np

from matcher.errors import MatcherWarning, SkyMapError
from matcher.sky import distance as _dist
from matcher.sky.coords import check_radec, radec_to_thetaphi, radec_to_vec, vec_to_radec
from matcher.sky.moc import MAX_ORDER, nested_ranges, order_ipix_to_uniq, pixel_area_sr, uniq_to_order_ipix

try:  # healpy's NESTED ang2pix kernel: healpy.ang2pix re-checks nside and theta on every call
    # (~20 µs, ten times the kernel on a small array); pixel_index passes checked angles.
    from healpy.pixelfunc import pixlib as _pixlib

    _ang2pix_kernel = _pixlib._ang2pix_nest
except (ImportError, AttributeError):  # a healpy without it: the public function
    _ang2pix_kernel = None


def _ang2pix_nest(nside: int, theta, phi):
    if _ang2pix_kernel is None:
        return hp.ang2pix(nside, theta, phi, nest=True)
    return _ang2pix_kernel(nside, theta, phi)


__all__ = ["SkyMap", "DEG2_PER_SR", "NORMALIZATION_SILENT", "NORMALIZATION_TOLERANCE"]

DEG2_PER_SR = (180.0 / math.pi) ** 2

#: |Σ prob − 1| up to this is float rounding: renormalized silently.
NORMALIZATION_SILENT = 1e-6
#: |Σ prob − 1| up to this is renormalized with a warning; beyond it the map is rejected.
NORMALIZATION_TOLERANCE = 1e-2

_LOOKUP_ORDER = 8  # 786,432-cell direct table (3 MB of int32) in front of the binary search
_GAUSS_POINTS = 128  # quadrature points for a Gaussian position error


def _readonly(a: np.ndarray | None) -> np.ndarray | None:
    if a is None:
        return None
    a = np.ascontiguousarray(a)
    a.flags.writeable = False
    return a


@dataclass(frozen=True, eq=False)
class SkyMap:
    """A whole-sky multi-order probability map, optionally with distance layers.

    Build it with :meth:`from_moc` or :meth:`from_flat` (which validate), not
    with the constructor.

    Attributes
    ----------
    uniq : ndarray of int64
        NUNIQ pixel ids, sorted by NESTED start at :attr:`max_order`.
    probdensity : ndarray of float64, sr**-1
    distmu, distsigma, distnorm : ndarray of float64 or None
        Distance-ansatz layers (Mpc, Mpc, Mpc**-2).
    meta : mapping
        Header facts worth keeping (object id, observation time, ...).
    source : str
        Where the map came from, for messages.
    """

    uniq: np.ndarray
    probdensity: np.ndarray
    distmu: np.ndarray | None = None
    distsigma: np.ndarray | None = None
    distnorm: np.ndarray | None = None
    meta: Mapping[str, object] = field(default_factory=dict)
    source: str = "<arrays>"

    # ------------------------------------------------------------------ builders
    @classmethod
    def from_moc(
        cls,
        uniq,
        probdensity,
        distmu=None,
        distsigma=None,
        distnorm=None,
        *,
        meta: Mapping[str, object] | None = None,
        source: str = "<arrays>",
    ) -> "SkyMap":
        """Validate and build a map from NUNIQ ids and densities (per sr).

        Raises
        ------
        SkyMapError
            Invalid ids, overlapping or missing sky coverage, negative or
            non-finite densities, a map that does not normalize, or
            inconsistent distance layers.
        """
        uniq = np.asarray(uniq)
        if uniq.ndim != 1 or uniq.size == 0:
            raise SkyMapError(source, "UNIQ must be a non-empty 1-D column")
        if not np.issubdtype(uniq.dtype, np.integer):
            if not np.all(np.isfinite(uniq)) or np.any(np.asarray(uniq) != np.round(uniq)):
                raise SkyMapError(source, "UNIQ values must be integers")
        uniq = uniq.astype(np.int64)
        dens = _as_float_column(probdensity, uniq.size, "PROBDENSITY", source)
        layers = _distance_layers(distmu, distsigma, distnorm, uniq.size, source)
        try:
            order, ipix = uniq_to_order_ipix(uniq)
        except ValueError as exc:
            raise SkyMapError(source, str(exc)) from None
        if np.any(ipix >= 12 * (np.int64(1) << (2 * order))):
            raise SkyMapError(source, "a UNIQ id has a pixel index beyond its order's 12·4^order pixels")
        max_order = int(order.max())
        start, end = nested_ranges(uniq, max_order)
        perm = np.argsort(start, kind="stable")
        start, end = start[perm], end[perm]
        total = 12 * (np.int64(1) << (2 * max_order))
        if np.any(start[1:] < end[:-1]):
            raise SkyMapError(source, "pixels overlap (a UNIQ id is repeated or nested inside another)")
        covered = int(np.sum(end - start))
        if start[0] != 0 or end[-1] != total or np.any(start[1:] != end[:-1]):
            frac = covered / float(total)
            raise SkyMapError(
                source, f"pixels cover {100 * frac:.4f}% of the sky; a localization must cover the whole sphere"
            )
        uniq = uniq[perm]
        dens = dens[perm]
        layers = tuple(None if a is None else a[perm] for a in layers)
        if np.any(~np.isfinite(dens)):
            raise SkyMapError(source, f"{int(np.sum(~np.isfinite(dens)))} pixels have non-finite probability density")
        if np.any(dens < 0):
            raise SkyMapError(source, f"{int(np.sum(dens < 0))} pixels have negative probability (min {dens.min():.3g})")
        area = pixel_area_sr(order[perm])
        dens = _normalize(dens, float(np.sum(dens * area)), source)
        return cls(uniq, dens, *layers, meta=dict(meta or {}), source=source)

    @classmethod
    def from_flat(
        cls,
        prob,
        *,
        nest: bool,
        distmu=None,
        distsigma=None,
        distnorm=None,
        meta: Mapping[str, object] | None = None,
        source: str = "<arrays>",
    ) -> "SkyMap":
        """Build from a flat map of probability per pixel (RING if ``nest`` is False).

        The conversion is lossless: every flat pixel becomes one multi-order
        pixel at the same order with density ``prob / pixel area``.
        """
        prob = _as_float_column(prob, None, "PROB", source)
        npix = prob.size
        try:
            nside = hp.npix2nside(npix)
        except ValueError:
            raise SkyMapError(source, f"{npix} pixels is not 12·NSIDE² for any NSIDE") from None
        order = int(round(math.log2(nside)))
        if 2**order != nside:
            raise SkyMapError(source, f"NSIDE={nside} is not a power of two (not representable in NESTED order)")
        if order > MAX_ORDER:
            raise SkyMapError(source, f"NSIDE={nside} exceeds the deepest supported order {MAX_ORDER}")
        layers = _distance_layers(distmu, distsigma, distnorm, npix, source)
        if not nest:
            ring_of_nested = hp.nest2ring(nside, np.arange(npix))
            prob = prob[ring_of_nested]
            layers = tuple(None if a is None else a[ring_of_nested] for a in layers)
        uniq = order_ipix_to_uniq(np.full(npix, order), np.arange(npix, dtype=np.int64))
        dens = prob / hp.nside2pixarea(nside)
        return cls.from_moc(uniq, dens, *layers, meta=meta, source=source)

    # ------------------------------------------------------------ pixel geometry
    @cached_property
    def order(self) -> np.ndarray:
        """HEALPix order of each pixel."""
        return _readonly(uniq_to_order_ipix(self.uniq)[0])

    @cached_property
    def ipix(self) -> np.ndarray:
        """NESTED index of each pixel at its own order."""
        return _readonly(uniq_to_order_ipix(self.uniq)[1])

    @property
    def max_order(self) -> int:
        return int(self.order.max())

    @property
    def npix(self) -> int:
        return int(self.uniq.size)

    @cached_property
    def area_sr(self) -> np.ndarray:
        """Pixel areas (sr)."""
        return _readonly(pixel_area_sr(self.order))

    @cached_property
    def prob(self) -> np.ndarray:
        """Probability in each pixel (sums to 1)."""
        return _readonly(self.probdensity * self.area_sr)

    @property
    def has_distance(self) -> bool:
        return self.distmu is not None

    def to_flat(self, order: int | None = None, *, nest: bool = True):
        """Flatten to one order: ``prob`` per pixel, plus distance layers when exact.

        At or below the finest order's resolution (``order >= max_order``) each
        pixel's density is copied to its children, which is lossless, and the
        distance layers are copied too. At a coarser order probability is
        summed; the distance layers cannot be coarsened exactly and are None.

        Returns
        -------
        prob, distmu, distsigma, distnorm : ndarray (the last three may be None)
        """
        order = self.max_order if order is None else int(order)
        if not 0 <= order <= MAX_ORDER:
            raise SkyMapError(self.source, f"order {order} is outside [0, {MAX_ORDER}]")
        npix = 12 * 4**order
        prob = np.zeros(npix)
        fine = self.order >= order
        # Pixels finer than the target: sum their probability into the parent.
        parent = self.ipix[fine] >> (2 * (self.order[fine] - order))
        np.add.at(prob, parent, self.prob[fine])
        coarse = ~fine
        layers = [None, None, None]
        exact = not np.any(fine & (self.order > order))
        if np.any(coarse):
            reps = 4 ** (order - self.order[coarse])
            start = self.ipix[coarse] << (2 * (order - self.order[coarse]))
            idx = np.repeat(start, reps) + _ranges_within(reps)
            prob[idx] = np.repeat(self.probdensity[coarse], reps) * float(pixel_area_sr(order))
        if exact and self.has_distance:
            target = np.arange(npix, dtype=np.int64) << (2 * (self.max_order - order))
            src = self._index_of_fine(target)
            layers = [self.distmu[src], self.distsigma[src], self.distnorm[src]]
        if not nest:
            ring_to_nest = hp.ring2nest(1 << order, np.arange(npix))
            prob = prob[ring_to_nest]
            layers = [None if a is None else a[ring_to_nest] for a in layers]
        return (prob, *layers)

    def ranges(self, at_order: int) -> tuple[np.ndarray, np.ndarray]:
        """NESTED ``[start, end)`` of every pixel at ``at_order`` (≥ :attr:`max_order`)."""
        return nested_ranges(self.uniq, at_order)

    @cached_property
    def _starts(self) -> np.ndarray:
        return _readonly(self.ranges(self.max_order)[0])

    @cached_property
    def _table(self) -> tuple[np.ndarray, int]:
        """Direct lookup at a coarse order: pixel index, or -1 where a cell holds several."""
        m = self.max_order
        c = min(m, _LOOKUP_ORDER)
        shift = 2 * (m - c)
        # The map covers the sphere once, so a cell holds one pixel exactly when a pixel of order
        # <= c covers it (every such pixel covers 4**(c - order) whole cells, from its first one);
        # a cell split among finer pixels keeps -1. (Equal to the two binary searches per cell
        # this replaced: tests/test_sky_maps.py; ten times faster on a 786,432-cell table.)
        table = np.full(12 * 4**c, -1, dtype=np.int32 if self.npix < 2**31 else np.int64)
        whole = np.flatnonzero(self.order <= c)
        orders = self.order[whole]
        # One order at a time: a pixel of order o covers an aligned run of 4**(c - o) cells, a row
        # of the table seen as rows of that length, so each order is one broadcast assignment.
        for o in np.unique(orders).tolist():
            sel = whole[orders == o]
            run = 1 << (2 * (c - o))
            table.reshape(-1, run)[(self._starts[sel] >> shift) // run] = sel[:, None]
        return _readonly(table), shift

    # ----------------------------------------------------------------- lookups
    def pixel_index(self, ra_deg, dec_deg, *, checked: bool = False) -> np.ndarray:
        """Index (into this map's arrays) of the pixel containing each position.

        Vectorized: one ``healpy.ang2pix`` at the finest order, a direct table
        at order 8, and a binary search only for cells holding several pixels.
        """
        if not checked:
            ra_deg, dec_deg = check_radec(ra_deg, dec_deg)
        theta, phi = radec_to_thetaphi(ra_deg, dec_deg)
        fine = _ang2pix_nest(1 << self.max_order, theta, phi)
        return self._index_of_fine(fine)

    def _index_of_fine(self, fine: np.ndarray) -> np.ndarray:
        table, shift = self._table
        fine = np.asarray(fine, dtype=np.int64)
        shape = fine.shape
        fine = fine.reshape(-1)
        idx = table[fine >> shift].astype(np.int64)
        amb = idx < 0
        if amb.any():
            idx[amb] = np.searchsorted(self._starts, fine[amb], side="right") - 1
        return idx.reshape(shape)

    def density(self, ra_deg, dec_deg) -> np.ndarray:
        """Probability density (sr**-1) at each position."""
        return self.probdensity[self.pixel_index(ra_deg, dec_deg)]

    # --------------------------------------------------------- credible regions
    @cached_property
    def _ranking(self):
        """Pixels sorted by density (descending) with cumulative sums, ties grouped."""
        rank_order = np.argsort(-self.probdensity, kind="stable")
        d_sorted = self.probdensity[rank_order]
        cumprob = np.cumsum(self.prob[rank_order])
        cumarea = np.cumsum(self.area_sr[rank_order])
        # Last index of each tie group: positions with equal density share one value.
        group_end = np.searchsorted(-d_sorted, -d_sorted, side="right") - 1
        rank = np.empty(self.npix, dtype=np.int64)
        rank[rank_order] = np.arange(self.npix)
        level = cumprob[group_end][rank]
        area = cumarea[group_end][rank]
        total = cumprob[-1]
        return rank_order, cumprob / total, cumarea, _readonly(np.minimum(level / total, 1.0)), _readonly(area)

    def credible_areas(self, levels) -> np.ndarray:
        """Area (deg²) of the smallest region holding each probability level.

        Parameters
        ----------
        levels : array_like
            Probabilities in [0, 1].
        """
        levels = np.atleast_1d(np.asarray(levels, dtype=np.float64))
        if np.any(~np.isfinite(levels)) or np.any((levels < 0) | (levels > 1)):
            raise SkyMapError(self.source, f"credible levels must lie in [0, 1], got {levels.tolist()}")
        rank_order, cumprob, cumarea, _, _ = self._ranking
        i = np.searchsorted(cumprob, levels, side="left")
        i = np.minimum(i, self.npix - 1)
        prev_p = np.where(i > 0, cumprob[np.maximum(i - 1, 0)], 0.0)
        prev_a = np.where(i > 0, cumarea[np.maximum(i - 1, 0)], 0.0)
        pix = rank_order[i]
        p_here = self.prob[pix] / self.prob.sum()
        frac = np.divide(levels - prev_p, p_here, out=np.ones_like(levels), where=p_here > 0)
        area = prev_a + np.clip(frac, 0.0, 1.0) * self.area_sr[pix]
        return area * DEG2_PER_SR

    def credible_level(self, ra_deg, dec_deg) -> np.ndarray:
        """Searched probability: probability of all pixels at least as dense as the position's."""
        return self._ranking[3][self.pixel_index(ra_deg, dec_deg)]

    def searched_area(self, ra_deg, dec_deg) -> np.ndarray:
        """Searched area (deg²): area of all pixels at least as dense as the position's."""
        return self._ranking[4][self.pixel_index(ra_deg, dec_deg)] * DEG2_PER_SR

    def searched(self, ra_deg, dec_deg):
        """``(density_per_sr, credible_level, searched_area_deg2)`` with one lookup."""
        idx = self.pixel_index(ra_deg, dec_deg)
        _, _, _, level, area = self._ranking
        return self.probdensity[idx], level[idx], area[idx] * DEG2_PER_SR

    def pixel_credible_level(self) -> np.ndarray:
        """Credible level of every pixel (read-only array aligned with :attr:`uniq`)."""
        return self._ranking[3]

    def top_pixels(self, fraction: float) -> np.ndarray:
        """Indices of the densest pixels that together hold ``fraction`` of the probability."""
        if not 0.0 < fraction <= 1.0:
            raise SkyMapError(self.source, f"fraction={fraction!r} must lie in (0, 1]")
        rank_order, cumprob, _, _, _ = self._ranking
        n = int(np.searchsorted(cumprob, fraction, side="left")) + 1
        return rank_order[: min(n, self.npix)]

    # ---------------------------------------------------------------- overlaps
    def overlap_gaussian(self, ra_deg, dec_deg, sigma_deg, *, points: int = _GAUSS_POINTS) -> np.ndarray:
        """``∫ ρ_gw(Ω) g(Ω) dΩ`` (sr**-1) for a circular Gaussian position error.

        The error is a Fisher (von Mises-Fisher) density with concentration
        ``κ = 1/σ²`` (σ in radians), the spherical form of a circular Gaussian
        that stays exact from arcseconds to tens of degrees. ``σ = 0`` gives the
        density at the point. Where a disc of 4σ lies inside one pixel (tested
        on eight points of its rim) the result is that pixel's density (the
        mass outside 4σ is e^-8 ≈ 3e-4); elsewhere it is the mean density at
        ``points`` equal-mass quantile points of the Fisher density arranged in
        a sunflower pattern.
        """
        ra, dec = check_radec(ra_deg, dec_deg)
        sigma = np.asarray(sigma_deg, dtype=np.float64)
        ra, dec, sigma = np.broadcast_arrays(ra, dec, sigma)
        shape = ra.shape
        ra, dec, sigma = (np.array(a, dtype=np.float64).reshape(-1) for a in (ra, dec, sigma))
        if np.any(~np.isfinite(sigma)) or np.any(sigma < 0):
            i = int(np.flatnonzero(~(np.isfinite(sigma) & (sigma >= 0)))[0])
            raise SkyMapError(self.source, f"position error #{i}: sigma_deg={float(sigma[i])!r} must be finite and >= 0")
        if np.any(sigma > 90.0):
            i = int(np.flatnonzero(sigma > 90.0)[0])
            raise SkyMapError(self.source, f"position error #{i}: sigma_deg={float(sigma[i])!r} exceeds 90 degrees")
        centre = self.pixel_index(ra, dec, checked=True)
        out = self.probdensity[centre].astype(np.float64)
        todo = np.flatnonzero(sigma > 0)
        if todo.size:
            psi = np.arange(8) * (np.pi / 4)
            rim = _ring_points(ra[todo], dec[todo], np.radians(4.0 * sigma[todo]), psi)
            rim_idx = self.pixel_index(*rim, checked=True)
            inside = np.all(rim_idx == centre[todo, None], axis=1)
            todo = todo[~inside]
        if todo.size:
            # Broad errors (σ ≥ 3 × the side of the pixel under the point): the error density is
            # smooth across every pixel that matters, so sum prob_j × g(centre_j) over the map's
            # pixels (midpoint rule, relative error ≲ (side/σ)²/24 ≈ 0.5%). Narrow errors: the map
            # is piecewise constant on scales ≳ σ/3, so average it over quantile points of g.
            side = np.degrees(np.sqrt(self.area_sr[centre[todo]]))
            broad = sigma[todo] >= 3.0 * side
            self._overlap_pixel_sum(ra, dec, sigma, todo[broad], out)
            todo = todo[~broad]
        chunk = max(1, 2_000_000 // points)
        for s in range(0, todo.size, chunk):
            sel = todo[s : s + chunk]
            qra, qdec = _fisher_quadrature(ra[sel], dec[sel], np.radians(sigma[sel]), points)
            vals = self.probdensity[self.pixel_index(qra, qdec, checked=True)]
            out[sel] = vals.mean(axis=1)
        return out.reshape(shape)

    @cached_property
    def _support(self):
        """Centres (unit vectors) and probabilities of the pixels holding all but 1e-6 of it."""
        top = self.top_pixels(1.0 - 1e-6)
        vec = np.empty((top.size, 3))
        for o in np.unique(self.order[top]):
            sel = self.order[top] == o
            vec[sel] = np.stack(hp.pix2vec(1 << int(o), self.ipix[top][sel], nest=True), axis=-1)
        return vec, self.prob[top]

    def _overlap_pixel_sum(self, ra, dec, sigma, sel, out) -> None:
        if sel.size == 0:
            return
        vec, prob = self._support
        c = radec_to_vec(ra[sel], dec[sel])
        kappa = 1.0 / np.radians(sigma[sel]) ** 2
        norm = kappa / (2 * np.pi * -np.expm1(-2 * kappa))
        step = max(1, 4_000_000 // max(vec.shape[0], 1))
        for s in range(0, sel.size, step):
            sl = slice(s, s + step)
            cosang = np.clip(c[sl] @ vec.T, -1.0, 1.0)
            g = norm[sl, None] * np.exp(kappa[sl, None] * (cosang - 1.0))
            out[sel[sl]] = g @ prob

    def overlap_map(self, other: "SkyMap") -> float:
        """``∫ ρ_self ρ_other dΩ`` (sr**-1), exact for two piecewise-constant maps."""
        m = max(self.max_order, other.max_order)
        s1, _ = self.ranges(m)
        s2, _ = other.ranges(m)
        bounds = np.union1d(s1, s2)
        total = 12 * (np.int64(1) << (2 * m))
        seg_len = np.diff(np.append(bounds, total))
        i1 = np.searchsorted(s1, bounds, side="right") - 1
        i2 = np.searchsorted(s2, bounds, side="right") - 1
        seg_area = seg_len.astype(np.float64) * float(pixel_area_sr(m))
        return float(np.sum(self.probdensity[i1] * other.probdensity[i2] * seg_area))

    # ---------------------------------------------------------------- distance
    def _require_distance(self):
        if not self.has_distance:
            raise SkyMapError(self.source, "this map has no distance layers (DISTMU, DISTSIGMA, DISTNORM)")

    def distance_parameters(self, ra_deg, dec_deg):
        """Ansatz ``(mu, sigma, norm)`` of the pixel containing each position."""
        self._require_distance()
        idx = self.pixel_index(ra_deg, dec_deg)
        return self.distmu[idx], self.distsigma[idx], self.distnorm[idx]

    def distance_along(self, ra_deg, dec_deg):
        """Conditional distance mean and std (Mpc) along each line of sight (NaN where none)."""
        mu, sigma, _ = self.distance_parameters(ra_deg, dec_deg)
        return _dist.conditional_moments(mu, sigma)

    @cached_property
    def _marginal(self):
        self._require_distance()
        return _dist.marginal_moments(self.prob, self.distmu, self.distsigma)

    def distance_marginal(self) -> tuple[float, float]:
        """Mean and std (Mpc) of the sky-marginal distance distribution."""
        return self._marginal

    def distance_marginal_pdf(self, r_mpc) -> np.ndarray:
        """Sky-marginal distance density (Mpc**-1) on a grid; only the top 99.9% of pixels are summed."""
        self._require_distance()
        top = self.top_pixels(0.999)
        return _dist.marginal_pdf(r_mpc, self.prob[top], self.distmu[top], self.distsigma[top], self.distnorm[top])

    def volume_density(self, ra_deg, dec_deg, r_mpc) -> np.ndarray:
        """``dP/dV`` (Mpc**-3) at each (position, distance)."""
        self._require_distance()
        idx = self.pixel_index(ra_deg, dec_deg)
        return _dist.volume_density(
            self.probdensity[idx], r_mpc, self.distmu[idx], self.distsigma[idx], self.distnorm[idx]
        )

    # ---------------------------------------------------------------- sampling
    def sample(self, n: int, rng: np.random.Generator, *, with_distance: bool = True):
        """Draw positions (and distances) from the map's own 3D posterior.

        Returns ``(ra_deg, dec_deg)`` or ``(ra_deg, dec_deg, distance_mpc)``.
        Positions are uniform within the chosen pixel (to 1/1024 of its side);
        distances are drawn exactly from the pixel's ansatz by inverting its
        closed-form cumulative distribution.
        """
        pix = rng.choice(self.npix, size=n, p=self.prob / self.prob.sum())
        sub = min(10, MAX_ORDER - self.max_order)
        order = self.order[pix] + sub
        fine = (self.ipix[pix] << (2 * sub)) + rng.integers(0, 4**sub, size=n)
        theta = np.empty(n)
        phi = np.empty(n)
        for o in np.unique(order):
            sel = order == o
            theta[sel], phi[sel] = hp.pix2ang(1 << int(o), fine[sel], nest=True)
        ra = np.degrees(phi) % 360.0
        dec = 90.0 - np.degrees(theta)
        if not (with_distance and self.has_distance):
            return ra, dec
        mu, sig = self.distmu[pix], self.distsigma[pix]
        r = np.full(n, np.nan)
        ok = np.isfinite(mu) & (sig > 0)
        r[ok] = _sample_ansatz(mu[ok], sig[ok], rng)
        return ra, dec, r


# --------------------------------------------------------------------- helpers
def _as_float_column(values, size, name, source) -> np.ndarray:
    try:
        arr = np.asarray(values, dtype=np.float64).ravel()
    except (TypeError, ValueError):
        raise SkyMapError(source, f"column {name} is not numeric") from None
    if size is not None and arr.size != size:
        raise SkyMapError(source, f"column {name} has {arr.size} values for {size} pixels")
    return arr


def _distance_layers(distmu, distsigma, distnorm, size, source):
    given = [a is not None for a in (distmu, distsigma, distnorm)]
    if not any(given):
        return (None, None, None)
    if not all(given):
        missing = [n for n, g in zip(("DISTMU", "DISTSIGMA", "DISTNORM"), given) if not g]
        raise SkyMapError(source, f"distance layers incomplete: missing {', '.join(missing)}")
    mu = _as_float_column(distmu, size, "DISTMU", source)
    sig = _as_float_column(distsigma, size, "DISTSIGMA", source)
    norm = _as_float_column(distnorm, size, "DISTNORM", source)
    if np.any(np.isnan(mu)) or np.any(np.isnan(sig)) or np.any(np.isnan(norm)):
        raise SkyMapError(source, "distance layers contain NaN (use DISTMU=inf, DISTNORM=0 where the ansatz does not apply)")
    usable = np.isfinite(mu)
    if np.any(usable & ~(np.isfinite(sig) & (sig > 0))):
        raise SkyMapError(source, "DISTSIGMA must be finite and positive wherever DISTMU is finite")
    if np.any(usable & ~(np.isfinite(norm) & (norm >= 0))):
        raise SkyMapError(source, "DISTNORM must be finite and non-negative wherever DISTMU is finite")
    return mu, sig, norm


def _normalize(dens: np.ndarray, total: float, source: str) -> np.ndarray:
    if not total > 0:
        raise SkyMapError(source, "total probability is zero")
    off = total - 1.0
    if abs(off) > NORMALIZATION_TOLERANCE:
        raise SkyMapError(
            source,
            f"probabilities sum to {total:.6g}, off by {100 * off:+.4g}% "
            f"(more than the {100 * NORMALIZATION_TOLERANCE:g}% tolerance for renormalizing)",
        )
    if abs(off) > NORMALIZATION_SILENT:
        warnings.warn(
            f"{source}: probabilities sum to {total:.8g} ({100 * off:+.4g}%); renormalized",
            MatcherWarning,
            stacklevel=3,
        )
    return dens / total


def _ring_points(ra, dec, radius_rad, psi):
    """Points at angular ``radius`` from each centre at position angles ``psi``: shapes (n, k)."""
    c = radec_to_vec(ra, dec)
    e1, e2 = _tangent_basis(c)
    r = radius_rad[:, None]
    v = (
        np.cos(r)[..., None] * c[:, None, :]
        + np.sin(r)[..., None] * (np.cos(psi)[None, :, None] * e1[:, None, :] + np.sin(psi)[None, :, None] * e2[:, None, :])
    )
    return vec_to_radec(v)


def _tangent_basis(c):
    """Two unit vectors orthogonal to each row of ``c`` (east and north where defined).

    ``east = ẑ × c`` and ``north = c × east``, written out (the same operations as
    ``np.cross``, bit for bit, without its overhead on small arrays).
    """
    x, y, z = c[:, 0], c[:, 1], c[:, 2]
    east = np.empty_like(c)
    east[:, 0] = -y
    east[:, 1] = x
    east[:, 2] = 0.0
    polar = np.sqrt(x * x + y * y) < 1e-12
    if polar.any():
        east[polar] = np.array([0.0, 1.0, 0.0])
    east /= np.sqrt(np.add.reduce(east * east, axis=1))[:, None]  # as np.linalg.norm(axis=1) computes it
    ex, ey, ez = east[:, 0], east[:, 1], east[:, 2]
    north = np.empty_like(c)
    north[:, 0] = y * ez - z * ey
    north[:, 1] = z * ex - x * ez
    north[:, 2] = x * ey - y * ex
    return east, north


def _fisher_quadrature(ra, dec, sigma_rad, points: int):
    """Equal-mass quantile points of a Fisher density around each centre: shapes (n, points).

    Radial quantiles use the exact Fisher CDF in ``1 - cos θ``:
    ``1 - cos θ = -ln(1 - u (1 - e^{-2κ})) / κ`` (Fisher 1953), with
    ``u = (j + 1/2)/points``; position angles follow the golden angle.
    """
    kappa = 1.0 / sigma_rad**2
    u = (np.arange(points) + 0.5) / points
    one_minus_cos = -np.log1p(-u[None, :] * -np.expm1(-2.0 * kappa[:, None])) / kappa[:, None]
    theta = 2.0 * np.arcsin(np.sqrt(np.clip(one_minus_cos / 2.0, 0.0, 1.0)))
    psi = np.arange(points) * (np.pi * (3.0 - np.sqrt(5.0)))
    c = radec_to_vec(ra, dec)
    e1, e2 = _tangent_basis(c)
    st, ct = np.sin(theta)[..., None], np.cos(theta)[..., None]
    v = ct * c[:, None, :] + st * (np.cos(psi)[None, :, None] * e1[:, None, :] + np.sin(psi)[None, :, None] * e2[:, None, :])
    return vec_to_radec(v)


def _sample_ansatz(mu, sigma, rng):
    """Exact draws from ``r² φ((r-μ)/σ)`` on r ≥ 0 by bisection on the closed-form CDF.

    With ``u = r/σ - x`` and ``x = μ/σ``, ``∫ (u+x)² φ(u) du = (1+x²)Φ(u) - (u+2x)φ(u)``.
    """
    from scipy.special import ndtr

    x = mu / sigma

    def F(y):
        u = y - x
        return (1 + x * x) * ndtr(u) - (u + 2 * x) * np.exp(-0.5 * u * u) / np.sqrt(2 * np.pi)

    f0 = F(np.zeros_like(x))
    f_inf = 1 + x * x
    target = f0 + rng.uniform(size=x.size) * (f_inf - f0)
    lo = np.zeros_like(x)
    hi = np.maximum(x, 0) + 40.0
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        below = F(mid) < target
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    return 0.5 * (lo + hi) * sigma


def _ranges_within(reps: np.ndarray) -> np.ndarray:
    """``concatenate([arange(n) for n in reps])`` without a Python loop."""
    total = int(reps.sum())
    offsets = np.repeat(np.cumsum(reps) - reps, reps)
    return np.arange(total, dtype=np.int64) - offsets
