"""Scoring many reports against one GW event: the entry points the service calls.

:func:`score_reports` evaluates, for every report, the terms of
``O = π/(1-π) · I · T · D / r`` (see :mod:`.odds`), the association
probability within its class, the false-association probability (:mod:`.fap`)
and, for sharp triggers, the joint FAR (:mod:`.joint_far`). Everything is
vectorized over the reports; per-map background tables are cached on the
:class:`~matcher.sky.skymap.SkyMap` object (weakly), so re-scoring new reports
against the same revision is cheap.

:func:`window_mask`, :func:`classes_in_window` and :func:`merger_time_range`
answer "could this report match this event at all" without a sky map, for
deciding what to score; :func:`association_probabilities` recomputes ``P_i``
from stored odds when new candidates join an event.
"""

from __future__ import annotations

from typing import Mapping, Sequence

import numpy as np

from matcher.coincidence.batch import ReportBatch
from matcher.coincidence.classes import CounterpartClass
from matcher.coincidence.distance_term import distance_factor, measured_distances
from matcher.coincidence.fap import (
    SMOOTH_MIN_SIGMA_DEG,
    distance_table,
    false_association_probability,
    interpolated_measure,
    sky_table,
    smoothed_sky_table,
    node_value,
)
from matcher.coincidence.joint_far import joint_far
from matcher.coincidence.odds import association_probabilities, group_codes, posterior_odds
from matcher.coincidence.prior import class_prior, event_probabilities
from matcher.coincidence.sky_term import equivalent_sigma_deg, sky_overlap
from matcher.coincidence.table import DISTANCE_SOURCE_NAMES, ScoreTable
from matcher.coincidence.time_term import time_term
from matcher.errors import InputError
from matcher.sky.skymap import SkyMap

__all__ = [
    "score_reports",
    "association_probabilities",
    "window_mask",
    "classes_in_window",
    "merger_time_range",
]


def _class_columns(classes: Mapping[str, CounterpartClass], klass: np.ndarray, ids: np.ndarray):
    names, inv = group_codes(klass)
    missing = [n for n in names if n not in classes]
    if missing:
        i = int(np.flatnonzero(klass == missing[0])[0])
        raise InputError(f"transient {ids[i]}: class {str(missing[0])!r} is not configured "
                         f"(known classes: {', '.join(sorted(classes))})")
    cl = [classes[n] for n in names]

    def col(f, dtype=np.float64):
        return np.array([f(c) for c in cl], dtype=dtype)[inv]

    return {
        "lo": col(lambda c: c.window_lo_s),
        "hi": col(lambda c: c.window_hi_s),
        "rate": col(lambda c: c.rate_per_sr_per_s),
        "allsky": col(lambda c: c.all_sky_rate_per_s),
        "eff": col(lambda c: c.efficiency),
        "ns": col(lambda c: c.needs_neutron_star, bool),
        "reach": col(lambda c: c.reach_mpc),
        "pos_err": col(lambda c: c.pos_err_deg),
        "sharp": col(lambda c: c.sharp_time, bool),
        "cadence": col(lambda c: c.cadence_s if c.cadence_s is not None else 0.0),
    }


def _brackets(cols, time, last_nondetection):
    """Bracket length L (s): 0 for sharp classes, else first detection minus last non-detection."""
    lnd = np.asarray(last_nondetection, dtype=np.float64)
    L = np.where(np.isfinite(lnd), np.asarray(time, float) - lnd, cols["cadence"])
    return np.where(cols["sharp"], 0.0, np.maximum(L, 0.0))


def window_mask(classes: Mapping[str, CounterpartClass], klass, merger_time: float, time,
                last_nondetection=None) -> np.ndarray:
    """Whether each report's onset (bracket) meets its own class window around ``merger_time``.

    Parameters
    ----------
    classes : mapping of str to CounterpartClass
    klass : array_like of str
        Each report's class (or one class for all).
    merger_time : float, GPS s
    time : array_like, GPS s
        Trigger time or first detection.
    last_nondetection : array_like, GPS s, optional
        NaN (or None) → the class cadence.

    Returns
    -------
    ndarray of bool
    """
    t = np.atleast_1d(np.asarray(time, dtype=np.float64))
    kl = np.broadcast_to(np.asarray(klass).astype(str), t.shape)
    lnd = np.full(t.shape, np.nan) if last_nondetection is None else np.broadcast_to(
        np.asarray(last_nondetection, dtype=np.float64), t.shape)
    cols = _class_columns(classes, kl, np.asarray(["<report>"] * t.size))
    L = _brackets(cols, t, lnd)
    return time_term(t - float(merger_time), L, cols["lo"], cols["hi"]) > 0


def classes_in_window(classes: Mapping[str, CounterpartClass], merger_time: float, time: float,
                      last_nondetection: float | None = None) -> list[str]:
    """Names of the classes whose window around ``merger_time`` meets a report at ``time``.

    Examples
    --------
    For a merger at GPS 1e9, a trigger 2 s later is inside a [-1, 5] s window
    but not inside a window that starts 10 s after the merger.
    """
    names = sorted(classes)
    if not names:
        return []
    lnd = np.nan if last_nondetection is None else float(last_nondetection)
    ok = window_mask(classes, names, merger_time, np.full(len(names), float(time)), np.full(len(names), lnd))
    return [n for n, k in zip(names, ok) if k]


def merger_time_range(klass: CounterpartClass, time: float, last_nondetection: float | None = None):
    """``(earliest, latest)`` merger times (GPS s) for which a report of this class can be in the window.

    Sharp: ``[t - hi, t - lo]`` (closed). Bracketed, with onset in
    ``[a, t]``: ``(a - hi, t - lo)`` (open: a bracket that only touches the
    window has zero overlap).
    """
    t = float(time)
    if klass.sharp_time:
        return t - klass.window_hi_s, t - klass.window_lo_s
    a = t - klass.cadence_s if last_nondetection is None else float(last_nondetection)
    return a - klass.window_hi_s, t - klass.window_lo_s


def _aligned_maps(report_maps, batch: ReportBatch):
    if report_maps is None:
        return None
    if isinstance(report_maps, Mapping):
        unknown = sorted(set(report_maps) - set(batch.transient_id.tolist()))
        if unknown:
            raise InputError(f"report_maps: no report has transient id {unknown[0]!r}")
        maps = [report_maps.get(t) for t in batch.transient_id.tolist()]
    else:
        maps = list(report_maps)
        if len(maps) != len(batch):
            raise InputError(f"report_maps: {len(maps)} entries for {len(batch)} reports")
    for t, m in zip(batch.transient_id, maps):
        if m is not None and not isinstance(m, SkyMap):
            raise InputError(f"transient {t}: its localization must be a SkyMap, got {type(m).__name__}")
    return maps if any(m is not None for m in maps) else None


def _optional_column(values, n: int, name: str) -> np.ndarray | None:
    if values is None:
        return None
    arr = np.asarray(values, dtype=np.float64)
    arr = np.broadcast_to(arr, (n,)) if arr.ndim == 0 else arr.ravel()
    if arr.size != n:
        raise InputError(f"{name}: {arr.size} values for {n} reports")
    bad = ~np.isnan(arr) & ~(np.isfinite(arr) & (arr > 0))
    if np.any(bad):
        raise InputError(f"{name} #{int(np.flatnonzero(bad)[0])}: must be finite and > 0 (or NaN for none)")
    return arr


def score_reports(
    alert,
    skymap: SkyMap,
    reports: ReportBatch | Sequence,
    classes: Mapping[str, CounterpartClass],
    *,
    report_maps: Mapping[str, SkyMap] | Sequence[SkyMap | None] | None = None,
    external_distance_mpc=None,
    external_distance_err_mpc=None,
) -> ScoreTable:
    """Score reports against one GW event revision.

    Parameters
    ----------
    alert : GWAlert
        Uses ``event_id``, ``revision``, ``state`` (must not be ``withdrawn``),
        ``merger_time`` (GPS s), ``far_per_year``, ``p_astro``, ``source_probs``.
    skymap : SkyMap
        The alert's localization (with distance layers for ``D``).
    reports : ReportBatch or sequence of TransientReport
    classes : mapping of str to CounterpartClass
        Every report's class must be a key.
    report_maps : mapping transient_id → SkyMap, or a sequence aligned with the reports, optional
        Reports' own localizations; their sky term is the exact map overlap.
    external_distance_mpc, external_distance_err_mpc : array_like, Mpc, optional
        Aligned with the reports (NaN where none): a distance from outside (the
        best host galaxy's), used only where a report has neither redshift nor
        distance. A missing error means 20 % of the distance.

    Returns
    -------
    ScoreTable
        Rows aligned with the input order; ``ScoreTable.records()`` ranks them.

    Raises
    ------
    InputError
        A withdrawn alert, an unconfigured class, misaligned columns.
    """
    if not isinstance(skymap, SkyMap):
        raise InputError(f"event {getattr(alert, 'event_id', '?')}: skymap must be a SkyMap, got {type(skymap).__name__}")
    if getattr(alert, "state", None) == "withdrawn":
        raise InputError(f"event {alert.event_id}: revision {alert.revision} is withdrawn; there is nothing to score")
    batch = reports if isinstance(reports, ReportBatch) else ReportBatch.from_reports(list(reports))
    n = len(batch)
    ext_d = _optional_column(external_distance_mpc, n, "external_distance_mpc")
    ext_s = _optional_column(external_distance_err_mpc, n, "external_distance_err_mpc")
    maps = _aligned_maps(report_maps, batch)
    if n == 0:
        e = np.zeros(0)
        s = np.zeros(0, dtype=str)
        return ScoreTable(alert.event_id, alert.revision, s, s, np.zeros(0, bool), *([e] * 14), s)

    cols = _class_columns(classes, batch.klass, batch.transient_id)
    t_g = float(alert.merger_time)
    dt = batch.time - t_g
    L = _brackets(cols, batch.time, batch.last_nondetection)
    W = cols["hi"] - cols["lo"]
    T = time_term(dt, L, cols["lo"], cols["hi"])
    inw = T > 0
    idx = np.flatnonzero(inw)

    dens, level, area = skymap.searched(batch.ra_deg, batch.dec_deg)
    sigma = np.where(np.isnan(batch.pos_err_deg), cols["pos_err"], batch.pos_err_deg)
    sub_maps = None if maps is None else [maps[i] for i in idx]
    I = np.zeros(n)
    I[idx] = sky_overlap(skymap, batch.ra_deg[idx], batch.dec_deg[idx], sigma[idx], density=dens[idx],
                         report_maps=sub_maps)

    p_astro, p_ns = event_probabilities(alert.p_astro, alert.source_probs)
    prior = class_prior(cols["eff"], cols["ns"], p_astro, p_ns)

    d, s, src = measured_distances(batch.redshift, batch.redshift_err, batch.distance_mpc, batch.distance_err_mpc,
                                   ext_d, ext_s)
    D = np.ones(n)
    use_d = inw & np.isfinite(d) & skymap.has_distance
    if np.any(use_d):
        mu, sg, nm = skymap.distance_parameters(batch.ra_deg[use_d], batch.dec_deg[use_d])
        D[use_d] = distance_factor(mu, sg, nm, d[use_d], s[use_d], cols["reach"][use_d])

    odds = np.zeros(n)
    odds[idx] = posterior_odds(prior[idx], I[idx], T[idx], D[idx], cols["rate"][idx])
    p = association_probabilities(odds, batch.klass)

    mu_bg = np.full(n, np.inf)
    score = I * T * D
    live = inw & (score > 0)
    if np.any(live):
        mu_bg[live] = cols["rate"][live] * _background_measure(skymap, batch, live, score, I, T, L, W, sigma,
                                                              use_d, s, cols["reach"], maps)
    fap = false_association_probability(mu_bg)

    jf = np.full(n, np.nan)
    if alert.far_per_year is not None:
        sel = inw & cols["sharp"]
        jf[sel] = joint_far(alert.far_per_year, cols["allsky"][sel], W[sel], I[sel])

    dist_used = np.where(use_d, d, np.nan)
    err_used = np.where(use_d, s, np.nan)
    src_names = np.asarray(DISTANCE_SOURCE_NAMES)[np.where(use_d, src, 0)]
    return ScoreTable(
        alert.event_id, alert.revision, batch.transient_id, batch.klass, inw, odds, p, fap, mu_bg, area, level, dt,
        I, T, D, prior, jf, dist_used, err_used, src_names,
    )


def _smoothed_measure(skymap, ra, dec, sigma, T, L, W):
    """Measure on Gaussian-smoothed tables at the two nodes around each σ, each node ranked
    by the report's overlap at that node's σ (self-consistent), ``ln μ`` interpolated in ``ln σ``."""
    lg = 4.0 * np.log2(sigma)
    k = np.floor(lg + 1e-9)
    t = np.clip(lg - k, 0.0, 1.0)
    t[t < 1e-9] = 0.0
    out = np.empty(sigma.size)
    for kk in np.unique(k):
        sel = np.flatnonzero(k == kk)
        ms = []
        for node_k in (int(kk), int(kk) + 1):
            node = min(node_value(node_k), 90.0)
            y = skymap.overlap_gaussian(ra[sel], dec[sel], np.full(sel.size, node))
            ms.append(smoothed_sky_table(skymap, node).measure(y * T[sel], L[sel], W[sel]))
            if not np.any(t[sel] > 0):
                break
        if len(ms) == 1:
            out[sel] = ms[0]
            continue
        ts = t[sel]
        both = (ms[0] > 0) & (ms[1] > 0)
        with np.errstate(divide="ignore"):
            mix = np.exp((1 - ts) * np.log(np.where(both, ms[0], 1.0)) + ts * np.log(np.where(both, ms[1], 1.0)))
        out[sel] = np.where(both, mix, (1 - ts) * ms[0] + ts * ms[1])
    return out


def _background_measure(skymap, batch, live, score, I, T, L, W, sigma, use_d, s_d, reach, maps):
    """Background measure (sr·s) of the region scoring at least as high, per live report (see :mod:`.fap`)."""
    rows = np.flatnonzero(live)
    out = np.empty(rows.size)
    has_map = np.zeros(batch.ra_deg.size, bool)
    if maps is not None:
        has_map[[i for i, m in enumerate(maps) if m is not None]] = True
    dist = use_d[rows]
    mapped = has_map[rows] & ~dist
    smooth = ~dist & ~mapped & (sigma[rows] >= SMOOTH_MIN_SIGMA_DEG)
    plain = ~dist & ~mapped & ~smooth

    def part(mask):
        r = rows[mask]
        return r, score[r], L[r], W[r]

    if np.any(plain):
        r, sc, l_, w_ = part(plain)
        out[plain] = sky_table(skymap).measure(sc, l_, w_)
    if np.any(smooth) or np.any(mapped):
        eq = sigma.copy()
        if np.any(mapped):
            for i in rows[mapped]:
                eq[i] = equivalent_sigma_deg(maps[i])
        wide = smooth | (mapped & (eq[rows] >= SMOOTH_MIN_SIGMA_DEG))
        narrow_map = mapped & ~wide
        if np.any(narrow_map):
            r, sc, l_, w_ = part(narrow_map)
            out[narrow_map] = sky_table(skymap).measure(sc, l_, w_)
        if np.any(wide):
            r = rows[wide]
            out[wide] = _smoothed_measure(skymap, batch.ra_deg[r], batch.dec_deg[r], np.minimum(eq[r], 90.0),
                                          T[r], L[r], W[r])
    if np.any(dist):
        pos = np.flatnonzero(dist)
        r = rows[dist]
        for R in np.unique(reach[r]):
            sel = reach[r] == R
            rr = r[sel]
            out[pos[sel]] = interpolated_measure(lambda node, R=R: distance_table(skymap, node, R), s_d[rr],
                                                 score[rr], L[rr], W[rr])
    return out
