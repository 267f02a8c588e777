"""Seeded invented archives where the truth is known, for tests, demos and the benchmark.

An archive is a JSON Lines file of native messages in arrival order (GW alerts
and transient reports) beside a ``maps/`` folder of multi-order FITS
localizations. Everything is invented: ids, times, places.

Streams of transient reports:

* :class:`SurveySim` (a bracketed class): each footprint cell (HEALPix NESTED at
  ``order``) is visited every ``cadence_s`` from a random phase; at each visit
  after the first, the transients that appeared since the previous visit are
  reported (Poisson, ``rate × cell area × interval``, uniform in the cell), with
  the previous visit as last non-detection.
* :class:`TriggerSim` (a sharp class): a Poisson stream uniform in time and over
  the footprint.
* :class:`Clump`: extra reports of a stream gathered around a place (a Fisher
  density of 1σ radius ``radius_deg``), at ``rate_per_day`` — clustered background.
* :class:`CounterpartSim`: a true counterpart for a fraction of the alerts, with
  onset delay uniform in ``delay_s`` and position and distance from the alert's
  own map, reported where and when the stream would have seen it.

:func:`write_synthetic_archive` returns a :class:`SyntheticArchive` with the truth
(simulated rates and footprints, visit epochs of every cell, the alerts).
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import healpy as hp
import numpy as np

from matcher.coincidence.classes import DEG2_PER_SR, SECONDS_PER_DAY
from matcher.coincidence.cosmology import redshift_at_distance
from matcher.sky import Blob, kappa_for_area, moc_fits_bytes, synthetic_skymap
from matcher.sky.skymap import SkyMap
from matcher.timeconv import gps_to_iso
from matcher.tune.injections import scatter_positions

__all__ = [
    "Clump",
    "SurveySim",
    "TriggerSim",
    "CounterpartSim",
    "SyntheticArchive",
    "write_synthetic_archive",
    "cells_in_dec_band",
    "T0_GPS",
]

#: Start of invented archives (GPS s; an invented date in late 2025).
T0_GPS = 1_450_000_000.0


@dataclass(frozen=True)
class Clump:
    """Extra reports around a place: ``rate_per_day`` of them, Fisher-scattered by ``radius_deg``."""

    ra_deg: float
    dec_deg: float
    radius_deg: float
    rate_per_day: float


@dataclass(frozen=True)
class SurveySim:
    """A survey (bracketed class) visiting each footprint cell every ``cadence_s``.

    ``cells=None`` is the whole sky. ``redshift_fraction`` of the reports carry a
    host redshift (error 0.001) at a distance drawn uniformly in volume out to
    ``redshift_reach_mpc`` (the engine's background distance model).
    """

    name: str
    rate_per_deg2_per_day: float
    cadence_s: float
    order: int = 3
    cells: tuple[int, ...] | None = None
    clumps: tuple[Clump, ...] = ()
    pos_err_deg: float = 0.0003
    redshift_fraction: float = 0.0
    redshift_reach_mpc: float = 1000.0


@dataclass(frozen=True)
class TriggerSim:
    """A trigger stream (sharp class): Poisson in time, uniform over the footprint (``cells=None``: all sky)."""

    name: str
    rate_per_deg2_per_day: float
    pos_err_deg: float = 0.0
    order: int = 3
    cells: tuple[int, ...] | None = None
    clumps: tuple[Clump, ...] = ()


@dataclass(frozen=True)
class CounterpartSim:
    """True counterparts of class ``name`` for a ``fraction`` of the alerts, delay uniform in ``delay_s``."""

    name: str
    delay_s: tuple[float, float]
    fraction: float = 1.0


@dataclass(frozen=True, eq=False)
class SyntheticArchive:
    """An invented archive and its truth.

    Attributes
    ----------
    path : Path
        The JSON Lines file.
    event_ids : tuple of str
    merger_times : ndarray, GPS s
    centres : ndarray, deg, (alerts, 2)
    skymaps : tuple of SkyMap
    reports : dict
        Stream name → number of background reports written (clumps included).
    footprint_deg2 : dict
        Stream name → simulated footprint area (deg²).
    rates : dict
        Stream name → simulated uniform rate (per deg² per day, clumps excluded).
    span_s : float
    visits : dict
        Survey name → {cell: sorted visit epochs (GPS s)}.
    counterparts : int
    """

    path: Path
    event_ids: tuple[str, ...]
    merger_times: np.ndarray
    centres: np.ndarray
    skymaps: tuple[SkyMap, ...]
    reports: dict
    footprint_deg2: dict
    rates: dict
    span_s: float
    visits: dict = field(default_factory=dict)
    counterparts: int = 0


def cells_in_dec_band(order: int, dec_min: float, dec_max: float) -> tuple[int, ...]:
    """NESTED cells at ``order`` whose centres lie in ``[dec_min, dec_max]`` (a survey footprint)."""
    nside = 1 << order
    theta, _ = hp.pix2ang(nside, np.arange(12 * nside * nside), nest=True)
    dec = 90.0 - np.degrees(theta)
    return tuple(int(c) for c in np.flatnonzero((dec >= dec_min) & (dec <= dec_max)))


def _uniform_in_cells(cells: np.ndarray, order: int, rng) -> tuple[np.ndarray, np.ndarray]:
    sub = 10
    fine = (cells.astype(np.int64) << (2 * sub)) + rng.integers(0, 4**sub, size=cells.size)
    theta, phi = hp.pix2ang(1 << (order + sub), fine, nest=True)
    return np.degrees(phi) % 360.0, 90.0 - np.degrees(theta)


def _cells_of(stream) -> np.ndarray:
    n = 12 * 4**stream.order
    return np.arange(n, dtype=np.int64) if stream.cells is None else np.asarray(sorted(set(stream.cells)), np.int64)


def _cell_area_deg2(order: int) -> float:
    return float(hp.nside2pixarea(1 << order) * DEG2_PER_SR)


def _survey(stream: SurveySim, t0: float, span: float, rng):
    cells = _cells_of(stream)
    area = _cell_area_deg2(stream.order)
    visits: dict[int, np.ndarray] = {}
    rows = []  # (time, lnd, ra, dec, redshift)
    for c in cells:
        phase = rng.uniform(0.0, stream.cadence_s)
        ep = np.round(t0 + phase + stream.cadence_s * np.arange(int((span - phase) // stream.cadence_s) + 1))
        ep = ep[ep <= t0 + span]
        visits[int(c)] = ep
        if ep.size < 2:
            continue
        lam = stream.rate_per_deg2_per_day * area * np.diff(ep) / SECONDS_PER_DAY
        n = rng.poisson(lam)
        k = np.repeat(np.arange(1, ep.size), n)
        if k.size == 0:
            continue
        ra, dec = _uniform_in_cells(np.full(k.size, c), stream.order, rng)
        rows.append((ep[k], ep[k - 1], ra, dec))
    for cl in stream.clumps:
        n = rng.poisson(cl.rate_per_day * span / SECONDS_PER_DAY)
        ra, dec = scatter_positions(np.full(n, cl.ra_deg), np.full(n, cl.dec_deg), cl.radius_deg, rng)
        cc = hp.ang2pix(1 << stream.order, np.radians(90.0 - dec), np.radians(ra), nest=True)
        t = np.empty(n)
        lnd = np.empty(n)
        for i in range(n):
            ep = visits.get(int(cc[i]))
            if ep is None or ep.size < 2:
                t[i] = np.round(t0 + rng.uniform(stream.cadence_s, span))
                lnd[i] = t[i] - stream.cadence_s
            else:
                k = int(rng.integers(1, ep.size))
                t[i], lnd[i] = ep[k], ep[k - 1]
        rows.append((t, lnd, ra, dec))
    if rows:
        t = np.concatenate([r[0] for r in rows])
        lnd = np.concatenate([r[1] for r in rows])
        ra = np.concatenate([r[2] for r in rows])
        dec = np.concatenate([r[3] for r in rows])
    else:
        t = lnd = ra = dec = np.zeros(0)
    with_z = rng.uniform(size=t.size) < stream.redshift_fraction
    r = stream.redshift_reach_mpc * np.cbrt(rng.uniform(1e-6, 1.0, t.size))  # uniform in volume
    z = np.full(t.size, np.nan)
    if np.any(with_z):
        z[with_z] = np.round(redshift_at_distance(r[with_z]), 5)
    return dict(time=t, lnd=lnd, ra=ra, dec=dec, z=z), visits, cells.size * area


def _trigger(stream: TriggerSim, t0: float, span: float, rng):
    cells = _cells_of(stream)
    area = cells.size * _cell_area_deg2(stream.order)
    n = rng.poisson(stream.rate_per_deg2_per_day * area * span / SECONDS_PER_DAY)
    ra, dec = _uniform_in_cells(cells[rng.integers(0, cells.size, size=n)], stream.order, rng)
    t = np.round(t0 + rng.uniform(0.0, span, n), 3)
    parts = [(t, ra, dec)]
    for cl in stream.clumps:
        m = rng.poisson(cl.rate_per_day * span / SECONDS_PER_DAY)
        cra, cdec = scatter_positions(np.full(m, cl.ra_deg), np.full(m, cl.dec_deg), cl.radius_deg, rng)
        parts.append((np.round(t0 + rng.uniform(0.0, span, m), 3), cra, cdec))
    t = np.concatenate([p[0] for p in parts])
    ra = np.concatenate([p[1] for p in parts])
    dec = np.concatenate([p[2] for p in parts])
    return dict(time=t, lnd=np.full(t.size, np.nan), ra=ra, dec=dec, z=np.full(t.size, np.nan)), area


def write_synthetic_archive(
    folder,
    *,
    seed: int,
    alerts: int,
    span_days: float,
    streams: Sequence[SurveySim | TriggerSim],
    counterparts: Sequence[CounterpartSim] = (),
    area90_deg2: tuple[float, float] = (20.0, 100.0),
    distance: tuple[float, float] | None = (150.0, 40.0),
    max_order: int = 7,
    pixel_prob: float = 2e-3,
    centres: Sequence[tuple[float, float]] | None = None,
    merger_range: tuple[float, float] = (0.1, 0.7),
    name: str = "archive.jsonl",
) -> SyntheticArchive:
    """Write an invented archive into ``folder`` (see the module docstring).

    Parameters
    ----------
    seed : int
    alerts : int
        GW alerts (one revision each).
    span_days : float, day
        Length of the report streams.
    streams : sequence of SurveySim or TriggerSim
    counterparts : sequence of CounterpartSim
    area90_deg2 : (float, float), deg²
        Range of the alerts' 90 % areas (von Mises-Fisher blobs, drawn log-uniformly).
    distance : (mean, std) in Mpc, optional
        Distance layers of the maps (None: no distance).
    max_order, pixel_prob
        Rasterization of the maps (see :func:`matcher.sky.synthetic_skymap`).
    centres : sequence of (ra, dec), deg, optional
        Map centres (cycled); default isotropic.
    merger_range : (float, float)
        Merger times uniform in this fraction of the span.
    name : str
        File name of the archive.
    """
    rng = np.random.default_rng(seed)
    d = Path(folder)
    (d / "maps").mkdir(parents=True, exist_ok=True)
    span = float(span_days) * SECONDS_PER_DAY
    t0 = T0_GPS
    lines: list[tuple[float, int, dict]] = []  # (arrival time, tie-break, message)
    reports, footprints, rates, visits = {}, {}, {}, {}
    stream_data = {}
    for s in streams:
        if isinstance(s, SurveySim):
            cols, vis, area = _survey(s, t0, span, rng)
            visits[s.name] = vis
        else:
            cols, area = _trigger(s, t0, span, rng)
        stream_data[s.name] = (s, cols)
        reports[s.name] = int(cols["time"].size)
        footprints[s.name] = area
        rates[s.name] = s.rate_per_deg2_per_day

    ids, times, cents, maps = [], [], [], []
    for a in range(alerts):
        if centres:
            ra, dec = centres[a % len(centres)]
        else:
            ra = float(rng.uniform(0, 360))
            dec = float(np.degrees(np.arcsin(rng.uniform(-0.95, 0.95))))
        area = float(np.exp(rng.uniform(np.log(area90_deg2[0]), np.log(area90_deg2[1]))))
        m = synthetic_skymap([Blob(ra, dec, kappa_for_area(area))], distance=distance, max_order=max_order,
                             pixel_prob=pixel_prob)
        eid = f"S-TUNE-{seed % 10000:04d}-{a:03d}"
        (d / "maps" / f"{eid}.fits").write_bytes(moc_fits_bytes(m))
        tg = float(np.round(t0 + span * rng.uniform(*merger_range), 3))
        ids.append(eid)
        times.append(tg)
        cents.append((ra, dec))
        maps.append(m)
        lines.append((tg + 60.0, 0, {
            "schema": "matcher/1", "type": "gw_alert", "event_id": eid, "revision": 1, "state": "issued",
            "merger_time": gps_to_iso(tg), "far_per_year": 0.5, "p_astro": 0.95,
            "source_probs": {"bns": 0.85, "nsbh": 0.05, "bbh": 0.05, "terrestrial": 0.05},
            "localization": {"path": f"maps/{eid}.fits"}}))

    n_cp = 0
    for cp in counterparts:
        s, cols = stream_data[cp.name]
        for a in range(alerts):
            if rng.uniform() >= cp.fraction:
                continue
            ra, dec, dist = (maps[a].sample(1, rng) + (np.array([np.nan]),))[:3]
            onset = times[a] + rng.uniform(*cp.delay_s)
            if isinstance(s, SurveySim):
                c = int(hp.ang2pix(1 << s.order, np.radians(90.0 - dec[0]), np.radians(ra[0]), nest=True))
                ep = visits[s.name].get(c)
                if ep is None:
                    continue
                k = int(np.searchsorted(ep, onset, side="left"))
                if k >= ep.size:
                    continue
                t_rep, lnd = float(ep[k]), (float(ep[k - 1]) if k > 0 else np.nan)
            else:
                t_rep, lnd = float(np.round(onset, 3)), np.nan
            for key, val in (("time", t_rep), ("lnd", lnd), ("ra", ra[0]), ("dec", dec[0]), ("z", np.nan)):
                cols[key] = np.append(cols[key], val)
            n_cp += 1

    for s_name, (s, cols) in stream_data.items():
        order = np.argsort(cols["time"], kind="stable")
        for j, i in enumerate(order):
            msg = {"schema": "matcher/1", "type": "transient", "transient_id": f"{s_name.upper()[:3]}-{j:06d}",
                   "class": s_name, "ra_deg": round(float(cols["ra"][i]) % 360.0, 6),
                   "dec_deg": round(float(np.clip(cols["dec"][i], -90, 90)), 6),
                   "time": gps_to_iso(float(cols["time"][i]))}
            if s.pos_err_deg > 0:
                msg["pos_err_deg"] = s.pos_err_deg
            if np.isfinite(cols["lnd"][i]):
                msg["last_nondetection"] = gps_to_iso(float(cols["lnd"][i]))
            if np.isfinite(cols["z"][i]):
                msg["redshift"] = float(cols["z"][i])
                msg["redshift_err"] = 0.001
            lines.append((float(cols["time"][i]), 1, msg))
    lines.sort(key=lambda x: (x[0], x[1]))
    path = d / name
    with open(path, "w", encoding="utf-8") as fh:
        for _, _, msg in lines:
            fh.write(json.dumps(msg, separators=(",", ":")) + "\n")
    return SyntheticArchive(path, tuple(ids), np.array(times), np.array(cents), tuple(maps), reports, footprints,
                            rates, span, visits, n_cp)
