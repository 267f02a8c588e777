"""Seeded synthetic localizations for the demo and the tests.

Two shapes: a von Mises-Fisher blob (what a three-detector network gives for a
loud event) and an elongated arc (a segment of a ring, the typical
two-detector shape). A map is a weighted mixture, rasterized adaptively into
multi-order pixels (split while a pixel holds more than ``pixel_prob``), with
optional distance layers whose line-of-sight mean varies smoothly across the
sky.

The von Mises-Fisher density (Fisher 1953, Proc. R. Soc. A 217, 295) is
``f(n) = κ exp(κ μ·n) / (4π sinh κ)``; its p-credible area is
``A_p = -2π ln(1 - p (1 - e^{-2κ})) / κ`` sr, which the tests check.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import healpy as hp
import numpy as np
from scipy.optimize import brentq

from matcher.sky.coords import radec_to_vec
from matcher.sky.distance import parameters_from_moments
from matcher.sky.moc import order_ipix_to_uniq, pixel_area_sr
from matcher.sky.skymap import DEG2_PER_SR, SkyMap

__all__ = [
    "Blob",
    "Arc",
    "synthetic_skymap",
    "random_skymap",
    "kappa_for_area",
    "vmf_area_deg2",
    "vmf_density",
]


@dataclass(frozen=True)
class Blob:
    """A von Mises-Fisher blob centred at (ra, dec) with concentration ``kappa``."""

    ra_deg: float
    dec_deg: float
    kappa: float
    weight: float = 1.0


@dataclass(frozen=True)
class Arc:
    """A segment of a ring of angular ``radius_deg`` around a pole.

    ``width_deg`` is the Gaussian width across the ring; along it the
    density follows a von Mises profile in position angle, centred at
    ``pa_deg`` with a 1σ half-extent of ``extent_deg``.
    """

    pole_ra_deg: float
    pole_dec_deg: float
    radius_deg: float
    width_deg: float
    pa_deg: float
    extent_deg: float
    weight: float = 1.0


def vmf_density(vec, centre_vec, kappa):
    """Fisher density (sr**-1) at unit vectors ``vec``, in an overflow-free form."""
    cosang = np.clip(vec @ np.asarray(centre_vec), -1.0, 1.0)
    return kappa / (2 * np.pi * -np.expm1(-2 * kappa)) * np.exp(kappa * (cosang - 1.0))


def vmf_area_deg2(kappa: float, level: float) -> float:
    """Area (deg²) of the ``level`` credible region of a Fisher density (Fisher 1953)."""
    return float(-2 * np.pi * np.log1p(-level * -np.expm1(-2 * kappa)) / kappa * DEG2_PER_SR)


def kappa_for_area(area_deg2: float, level: float = 0.9) -> float:
    """Concentration whose ``level`` credible area is ``area_deg2``."""
    if not 0 < area_deg2 < 4 * np.pi * DEG2_PER_SR * level:
        raise ValueError(f"area {area_deg2} deg² is not a possible {level:.0%} area")
    return float(brentq(lambda k: vmf_area_deg2(k, level) - area_deg2, 1e-6, 1e9, xtol=1e-12, rtol=1e-14))


def _arc_density_unnorm(vec, arc: Arc):
    pole = radec_to_vec(arc.pole_ra_deg, arc.pole_dec_deg)
    ang = np.degrees(np.arccos(np.clip(vec @ pole, -1.0, 1.0)))
    radial = np.exp(-0.5 * ((ang - arc.radius_deg) / arc.width_deg) ** 2)
    # Position angle around the pole, measured from the direction to the north pole.
    north = np.array([0.0, 0.0, 1.0])
    e1 = north - pole * (north @ pole)
    if np.linalg.norm(e1) < 1e-12:
        e1 = np.array([1.0, 0.0, 0.0])
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(pole, e1)
    psi = np.arctan2(vec @ e2, vec @ e1)
    k_az = 1.0 / np.radians(arc.extent_deg) ** 2
    along = np.exp(k_az * (np.cos(psi - np.radians(arc.pa_deg)) - 1.0))
    return radial * along


def _mixture(components: Sequence[Blob | Arc]):
    """A vectorized density function (sr**-1, normalized) for the mixture."""
    weights = np.array([c.weight for c in components], dtype=float)
    if np.any(weights <= 0):
        raise ValueError("component weights must be positive")
    weights = weights / weights.sum()
    # Arcs are normalized numerically on an order-8 grid (786k points; relative error ~1e-6
    # for widths above ~1 degree); blobs are normalized analytically.
    grid_vec = None
    norms = []
    for c in components:
        if isinstance(c, Arc):
            if grid_vec is None:
                nside = 256
                grid_vec = np.stack(hp.pix2vec(nside, np.arange(12 * nside * nside)), axis=-1)
            norms.append(_arc_density_unnorm(grid_vec, c).sum() * hp.nside2pixarea(nside))
        else:
            norms.append(1.0)

    def density(vec):
        out = np.zeros(vec.shape[0])
        for w, c, n in zip(weights, components, norms):
            if isinstance(c, Blob):
                out += w * vmf_density(vec, radec_to_vec(c.ra_deg, c.dec_deg), c.kappa)
            else:
                out += w * _arc_density_unnorm(vec, c) / n
        return out

    return density


def _rasterize(density, *, min_order: int, max_order: int, pixel_prob: float, supersample: int):
    order = min_order
    ipix = np.arange(12 * 4**order, dtype=np.int64)
    done_o, done_i = [], []
    while True:
        vec = np.stack(hp.pix2vec(1 << order, ipix, nest=True), axis=-1)
        prob = density(vec) * pixel_area_sr(order)
        split = prob > pixel_prob if order < max_order else np.zeros(ipix.size, bool)
        done_o.append(np.full(int((~split).sum()), order))
        done_i.append(ipix[~split])
        if not split.any():
            break
        ipix = (ipix[split][:, None] * 4 + np.arange(4)).ravel()
        order += 1
    orders = np.concatenate(done_o)
    ipixs = np.concatenate(done_i)
    # Average the density over 4**supersample sub-pixel centres for a better cell integral.
    dens = np.empty(orders.size)
    for o in np.unique(orders):
        sel = orders == o
        sub = (ipixs[sel][:, None] << (2 * supersample)) + np.arange(4**supersample)
        vec = np.stack(hp.pix2vec(1 << (int(o) + supersample), sub.ravel(), nest=True), axis=-1)
        dens[sel] = density(vec).reshape(sub.shape).mean(axis=1)
    return order_ipix_to_uniq(orders, ipixs), dens


def synthetic_skymap(
    components: Sequence[Blob | Arc],
    *,
    distance: tuple[float, float] | None = None,
    distance_gradient: float = 0.1,
    max_order: int = 10,
    min_order: int = 3,
    pixel_prob: float = 2e-5,
    supersample: int = 2,
    meta: dict | None = None,
    source: str = "<synthetic>",
) -> SkyMap:
    """Rasterize a mixture of blobs and arcs into a multi-order :class:`SkyMap`.

    Parameters
    ----------
    components : sequence of Blob or Arc
    distance : (mean, std) in Mpc, optional
        Line-of-sight mean and std at the first component's centre; the mean
        varies by ``±distance_gradient`` (fraction) across the sky, the
        ratio std/mean is constant.
    pixel_prob : float
        Pixels holding more probability than this are split, down to ``max_order``.
    """
    if not components:
        raise ValueError("a synthetic map needs at least one component")
    density = _mixture(components)
    # Start fine enough that no component can hide between pixel centres: the side of a
    # starting pixel (≈ 1.0233 rad / 2**order) is at most the smallest component's scale.
    scales = [1.0 / np.sqrt(c.kappa) if isinstance(c, Blob) else np.radians(c.width_deg) for c in components]
    needed = int(np.ceil(np.log2(1.0233 / max(min(scales), 1e-9))))
    min_order = int(min(max(min_order, needed), max_order))
    uniq, dens = _rasterize(density, min_order=min_order, max_order=max_order,
                            pixel_prob=pixel_prob, supersample=supersample)
    # The cell averages integrate the mixture to ~1e-4; normalize exactly here so the
    # map is a proper distribution (the reader's tolerance is for files, not for us).
    from matcher.sky.moc import uniq_to_order_ipix as _split

    dens = dens / np.sum(dens * pixel_area_sr(_split(uniq)[0]))
    layers = (None, None, None)
    if distance is not None:
        mean0, std0 = distance
        first = components[0]
        anchor = (first.ra_deg, first.dec_deg) if isinstance(first, Blob) else (first.pole_ra_deg, first.pole_dec_deg)
        from matcher.sky.moc import uniq_to_order_ipix

        o, i = uniq_to_order_ipix(uniq)
        vec = np.empty((uniq.size, 3))
        for oo in np.unique(o):
            sel = o == oo
            vec[sel] = np.stack(hp.pix2vec(1 << int(oo), i[sel], nest=True), axis=-1)
        # A smooth gradient: nearer on one side of the anchor, farther on the other.
        tilt = radec_to_vec((anchor[0] + 90.0) % 360.0, 0.0)
        mean = mean0 * (1.0 + distance_gradient * (vec @ tilt))
        std = mean * (std0 / mean0)
        layers = parameters_from_moments(mean, std)
    return SkyMap.from_moc(uniq, dens, *layers, meta=meta or {}, source=source)


def random_skymap(
    rng: np.random.Generator,
    *,
    kind: str = "blob",
    area90_deg2: float = 100.0,
    distance: tuple[float, float] | None = (150.0, 40.0),
    max_order: int = 10,
    pixel_prob: float = 2e-5,
    meta: dict | None = None,
) -> SkyMap:
    """A seeded random map: a ``blob`` of given 90% area, or a two-detector-like ``arc``."""
    ra = float(rng.uniform(0, 360))
    dec = float(np.degrees(np.arcsin(rng.uniform(-0.9, 0.9))))
    if kind == "blob":
        comps = [Blob(ra, dec, kappa_for_area(area90_deg2))]
    elif kind == "arc":
        radius = float(rng.uniform(30, 80))
        pa = float(rng.uniform(0, 360))
        extent = float(rng.uniform(10, 30))
        width = 1.0
        # The 90% area grows about linearly with the width: two secant steps get close
        # to the requested area (within a few per cent), which is all a demo needs.
        for _ in range(2):
            trial = synthetic_skymap([Arc(ra, dec, radius, width, pa, extent)], distance=None,
                                     max_order=min(max_order, 8), pixel_prob=10 * pixel_prob)
            width *= area90_deg2 / float(trial.credible_areas([0.9])[0])
        comps = [Arc(ra, dec, radius_deg=radius, width_deg=width, pa_deg=pa, extent_deg=extent)]
    else:
        raise ValueError(f"kind={kind!r}: expected 'blob' or 'arc'")
    return synthetic_skymap(comps, distance=distance, max_order=max_order, pixel_prob=pixel_prob, meta=meta)
