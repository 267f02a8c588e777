"""Simulated counterparts of an archived GW alert, observed through the archive's own coverage.

For each injection (pure computation, seeded):

1. position and distance from the alert's own 3D posterior (:meth:`SkyMap.sample`);
2. onset ``t_g + δ`` with ``δ`` from the class's delay model;
3. observed or not through the archive's coverage (:mod:`.background`): a bracketed
   class reports it at the first epoch of its cell at or after the onset, with the
   epoch before as last non-detection; a sharp class reports it at the onset if the
   place was in the footprint and the stream was live;
4. the reported position scattered by the class's 1σ error (a Fisher density with
   ``κ = 1/σ²``, sampled exactly: ``1 - cos θ = -ln(1 - u (1 - e^{-2κ}))/κ``,
   Fisher 1953, Proc. R. Soc. A 217, 295), and, for a fraction of them, a measured
   distance: either a host redshift ``z(d) + σ_z N(0, 1)`` with error ``σ_z`` (as the
   archive's reports give theirs; ``z(d)`` from the engine's cosmology), or a
   distance ``d (1 + e N(0, 1))`` with error ``e`` times the measured value.

Injections that are not observed stay in the count (they are missed at every threshold).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from matcher.coincidence.batch import ReportBatch
from matcher.coincidence.cosmology import redshift_at_distance
from matcher.sky.coords import radec_to_vec, vec_to_radec
from matcher.sky.skymap import SkyMap
from matcher.tune.settings import DelayModel

__all__ = ["InjectionSet", "draw_injections", "scatter_positions"]


@dataclass(frozen=True, eq=False)
class InjectionSet:
    """Injections for one alert and class.

    Attributes
    ----------
    drawn : int
    observed : ndarray of bool, (drawn,)
    delay_s : ndarray, s, (drawn,)
        Onset minus merger time.
    batch : ReportBatch
        The observed ones, as the stream would have reported them.
    """

    drawn: int
    observed: np.ndarray
    delay_s: np.ndarray
    batch: ReportBatch


def scatter_positions(ra_deg, dec_deg, sigma_deg: float, rng: np.random.Generator):
    """Positions scattered by a Fisher density of 1σ radius ``sigma_deg`` (exact sampling)."""
    ra = np.asarray(ra_deg, dtype=np.float64)
    dec = np.asarray(dec_deg, dtype=np.float64)
    n = ra.size
    u = rng.uniform(size=n)
    psi = rng.uniform(0.0, 2.0 * np.pi, size=n)
    if not sigma_deg > 0:
        return ra.copy(), dec.copy()
    kappa = 1.0 / np.radians(sigma_deg) ** 2
    one_minus_cos = -np.log1p(-u * -np.expm1(-2.0 * kappa)) / kappa
    theta = 2.0 * np.arcsin(np.sqrt(np.clip(one_minus_cos / 2.0, 0.0, 1.0)))
    c = radec_to_vec(ra, dec)
    z = np.array([0.0, 0.0, 1.0])
    east = np.cross(np.broadcast_to(z, c.shape), c)
    norm = np.linalg.norm(east, axis=1)
    east[norm < 1e-12] = np.array([0.0, 1.0, 0.0])
    east /= np.linalg.norm(east, axis=1)[:, None]
    north = np.cross(c, east)
    v = (np.cos(theta)[:, None] * c
         + np.sin(theta)[:, None] * (np.cos(psi)[:, None] * east + np.sin(psi)[:, None] * north))
    out_ra, out_dec = vec_to_radec(v)
    return out_ra, np.clip(out_dec, -90.0, 90.0)


def draw_injections(klass_name: str, merger_time_s: float, skymap: SkyMap, delay: DelayModel, coverage, n: int,
                    rng: np.random.Generator, *, pos_err_deg: float, distance_fraction: float,
                    distance_rel_err: float, redshift_err: float | None = None) -> InjectionSet:
    """Draw ``n`` counterparts and observe them (see the module docstring).

    Parameters
    ----------
    klass_name : str
    merger_time_s : float, GPS s
    skymap : SkyMap
        The alert's localization (with distance layers if it has them).
    delay : DelayModel
    coverage : Cadence or TriggerCoverage
        ``coverage.observe(ra, dec, onset) -> (observed, time, last_nondetection)``.
    n : int
    rng : numpy Generator
    pos_err_deg : float, deg
        1σ error of the reported positions.
    distance_fraction : float
        Fraction of injections reported with a measured distance.
    distance_rel_err : float
        Relative 1σ error of those distances (when ``redshift_err`` is None).
    redshift_err : float, optional
        Give the measured distance as a host redshift with this 1σ error instead.
    """
    drawn = skymap.sample(n, rng)
    ra, dec = drawn[0], drawn[1]
    dist = drawn[2] if len(drawn) == 3 else np.full(n, np.nan)
    delta = delay.sample(n, rng)
    onset = float(merger_time_s) + delta
    rep_ra, rep_dec = scatter_positions(ra, dec, pos_err_deg, rng)
    with_d = rng.uniform(size=n) < distance_fraction
    noise = rng.standard_normal(n)
    observed, t_rep, lnd = coverage.observe(ra, dec, onset)
    has = with_d & np.isfinite(dist) & (dist > 0)
    nan = np.full(n, np.nan)
    z = z_err = d_obs = d_err = nan
    if redshift_err is not None:
        z_true = np.full(n, np.nan)
        if np.any(has):
            z_true[has] = redshift_at_distance(dist[has])
        z = np.where(has, np.clip(z_true + redshift_err * noise, 1e-5, 20.0), np.nan)
        z_err = np.where(has, float(redshift_err), np.nan)
    else:
        d_obs = np.where(has, np.maximum(dist * (1.0 + distance_rel_err * noise), 1e-3 * dist), np.nan)
        d_err = np.where(has, distance_rel_err * d_obs, np.nan)
    idx = np.flatnonzero(observed)
    ids = np.char.add(f"INJ-{klass_name}-", idx.astype(str))
    batch = ReportBatch.from_arrays(
        ids, klass_name, rep_ra[idx], rep_dec[idx], t_rep[idx],
        pos_err_deg=np.full(idx.size, float(pos_err_deg)), last_nondetection=lnd[idx],
        redshift=z[idx], redshift_err=z_err[idx], distance_mpc=d_obs[idx], distance_err_mpc=d_err[idx],
    )
    return InjectionSet(n, observed, delta, batch)
