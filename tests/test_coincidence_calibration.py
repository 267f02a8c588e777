"""Calibration of the coincidence engine on simulated data (fixed seeds).

* Pure background (isotropic positions, uniform times, the configured rate, and
  distances from the background distribution): ``μ/μ_max = -ln(1-FAP)/(r W' 4π)``
  is uniform on [0, 1], with ``W' = W`` for sharp triggers and ``W + L`` for a
  bracket of length L (the span of first-detection times that meet the window).
* The top candidate's FAP per simulated event is uniform (given at least one report).
* Injections drawn from the map's own 3D posterior: ``P_assoc`` is reliable in bins.

Uniformity is judged with scipy's one-sample KS test at a 1 % level; the seeds
are fixed, so the outcome is deterministic. Maps are small (order ≤ 8).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from matcher.coincidence import ReportBatch, parse_classes, score_reports
from matcher.sky import Blob, kappa_for_area, synthetic_skymap
from matcher.streams.messages import GWAlert

T0 = 1_000_000_000.0


def _classes(rate=1e-3, rate_bracketed=1e-5):
    common = dict(efficiency=0.5, needs_neutron_star=False, reach_mpc=400.0)
    return parse_classes({
        "sharp": dict(window_s=[-1, 5], rate_per_deg2_per_day=rate, pos_err_deg=0.0, sharp_time=True, **common),
        "bracketed": dict(window_s=[0, 86400], rate_per_deg2_per_day=rate_bracketed, pos_err_deg=0.0,
                          sharp_time=False, cadence_s=40000, **common),
        "wide": dict(window_s=[-1, 5], rate_per_deg2_per_day=rate, pos_err_deg=4.0, sharp_time=True, **common),
    })


def _alert(p_astro=1.0):
    return GWAlert("S-CAL", 1, "issued", T0, "2011-09-14T01:46:25Z", far_per_year=1.0, p_astro=p_astro)


@pytest.fixture(scope="module")
def broad_map():
    # Broad enough (90 % areas 1000 and 300 deg²) that no part of the sky has exactly zero
    # density: ties at zero would put an atom at FAP = max and break a KS test for a
    # continuous distribution (ties are counted conservatively, by design).
    return synthetic_skymap([Blob(120.0, 30.0, kappa_for_area(1000.0)),
                             Blob(200.0, -20.0, kappa_for_area(300.0), weight=0.5)],
                            distance=(150.0, 40.0), max_order=7, pixel_prob=2e-3)


def _isotropic(rng, n):
    return rng.uniform(0.0, 360.0, n), np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n)))


def _u(table, klass, span_s):
    mu = table.background_expected
    return mu / (klass.rate_per_sr_per_s * span_s * 4 * math.pi)


@pytest.mark.parametrize("name", ["sharp", "bracketed", "wide"])
def test_fap_uniform_on_pure_background(broad_map, name):
    rng = np.random.default_rng(7)
    classes = _classes()
    c = classes[name]
    n = 3000
    ra, dec = _isotropic(rng, n)
    L = 0.0 if c.sharp_time else c.cadence_s
    t = T0 + rng.uniform(c.window_lo_s, c.window_hi_s + L, n)
    table = score_reports(_alert(), broad_map, ReportBatch.from_arrays(np.arange(n), name, ra, dec, t), classes)
    assert table.in_window.all()
    u = _u(table, c, c.window_length_s + L)
    assert np.all((u >= 0) & (u <= 1 + 1e-9))
    assert stats.kstest(u, "uniform").pvalue > 0.01


@pytest.mark.parametrize("sigma_d", [16.0, 20.0])  # on a table node, and between nodes (interpolated)
def test_fap_uniform_on_pure_background_with_distance(broad_map, sigma_d):
    rng = np.random.default_rng(11)
    classes = _classes()
    c = classes["sharp"]
    n = 2500
    ra, dec = _isotropic(rng, n)
    t = T0 + rng.uniform(c.window_lo_s, c.window_hi_s, n)
    # Background distances: uniform in volume to the reach, measured with a Gaussian error.
    r = c.reach_mpc * rng.uniform(0.0, 1.0, n) ** (1.0 / 3.0)
    d = r + sigma_d * rng.normal(size=n)
    keep = d > 0  # the schema only has positive distances; P(d <= 0) ≈ 1e-4 here
    batch = ReportBatch.from_arrays(np.arange(keep.sum()), "sharp", ra[keep], dec[keep], t[keep],
                                    distance_mpc=d[keep], distance_err_mpc=sigma_d)
    table = score_reports(_alert(), broad_map, batch, classes)
    assert np.all(table.distance_source == "distance")
    u = _u(table, c, c.window_length_s)
    assert stats.kstest(u, "uniform").pvalue > 0.01


def test_top_candidate_fap_per_event_is_uniform(broad_map):
    # For each simulated event, Poisson background with μ_max = 3 over the sky and window;
    # P(FAP_top <= α | at least one report) = α / (1 - e^{-μ_max}).
    rng = np.random.default_rng(5)
    mu_max = 3.0
    c0 = _classes()["sharp"]
    rate = mu_max / (c0.window_length_s / 86400.0 * 4 * math.pi * (180 / math.pi) ** 2)
    classes = _classes(rate=rate)
    tops = []
    for _ in range(600):
        n = rng.poisson(mu_max)
        if n == 0:
            continue
        ra, dec = _isotropic(rng, n)
        t = T0 + rng.uniform(-1.0, 5.0, n)
        table = score_reports(_alert(), broad_map, ReportBatch.from_arrays(np.arange(n), "sharp", ra, dec, t), classes)
        tops.append(table.fap[table.ranking()[0]])
    scaled = np.asarray(tops) / -math.expm1(-mu_max)
    assert stats.kstest(scaled, "uniform").pvalue > 0.01


def test_p_assoc_reliable_on_injections():
    # Events on one 3D map; a counterpart is present with probability π = 0.5 and drawn from
    # the map's own 3D posterior (SkyMap.sample), with a uniform onset in the window and a
    # distance measured with a 20 Mpc error; unrelated reports are Poisson in a 25° cap around
    # the map (outside it the map density, hence every odds, is negligible) with distances
    # uniform in volume to the reach. Reliability: in each bin of P_assoc, the fraction of
    # true counterparts matches the mean P_assoc within 3.5 binomial standard deviations.
    rng = np.random.default_rng(3)
    gw = synthetic_skymap([Blob(60.0, 10.0, kappa_for_area(100.0))], distance=(150.0, 40.0),
                          max_order=8, pixel_prob=5e-4)
    sigma_d = 20.0
    window = 6.0
    cap_deg = 25.0
    cap_sr = 2 * math.pi * (1 - math.cos(math.radians(cap_deg)))
    # about one unrelated report per event inside the 100 deg² 90 % region
    rate = 1.0 / (100.0 * window / 86400.0)
    classes = parse_classes({"k": dict(window_s=[-1, 5], rate_per_deg2_per_day=rate, efficiency=0.5,
                                       needs_neutron_star=False, reach_mpc=400.0, pos_err_deg=0.0,
                                       sharp_time=True)})
    n_bg_mean = classes["k"].rate_per_sr_per_s * window * cap_sr
    n_events = 1200
    ra_c, dec_c, r_c = gw.sample(n_events, rng)
    centre = np.array([math.cos(math.radians(10.0)) * math.cos(math.radians(60.0)),
                       math.cos(math.radians(10.0)) * math.sin(math.radians(60.0)), math.sin(math.radians(10.0))])
    e1 = np.cross([0.0, 0.0, 1.0], centre)
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(centre, e1)
    p_all, truth = [], []
    for i in range(n_events):
        n_bg = rng.poisson(n_bg_mean)
        cosang = 1 - rng.uniform(0, 1, n_bg) * (1 - math.cos(math.radians(cap_deg)))
        psi = rng.uniform(0, 2 * math.pi, n_bg)
        sin_ = np.sqrt(1 - cosang**2)
        v = cosang[:, None] * centre + sin_[:, None] * (np.cos(psi)[:, None] * e1 + np.sin(psi)[:, None] * e2)
        ra = np.degrees(np.arctan2(v[:, 1], v[:, 0])) % 360.0
        dec = np.degrees(np.arcsin(np.clip(v[:, 2], -1, 1)))
        r = 400.0 * rng.uniform(0, 1, n_bg) ** (1 / 3)
        is_true = np.zeros(n_bg, bool)
        if rng.uniform() < 0.5:
            ra, dec, r = np.append(ra, ra_c[i]), np.append(dec, dec_c[i]), np.append(r, r_c[i])
            is_true = np.append(is_true, True)
        if ra.size == 0:
            continue
        d = r + sigma_d * rng.normal(size=ra.size)
        keep = d > 0
        t = T0 + rng.uniform(-1.0, 5.0, ra.size)
        batch = ReportBatch.from_arrays(np.arange(keep.sum()), "k", ra[keep], dec[keep], t[keep],
                                        distance_mpc=d[keep], distance_err_mpc=sigma_d)
        table = score_reports(_alert(), gw, batch, classes)
        p_all.append(table.p_assoc)
        truth.append(is_true[keep])
    p = np.concatenate(p_all)
    y = np.concatenate(truth)
    # Overall: expected number of true counterparts vs the number injected (Poisson-binomial sd).
    assert abs(y.sum() - p.sum()) < 3.5 * math.sqrt(np.sum(p * (1 - p)))
    edges = np.linspace(0, 1, 11)
    checked = 0
    for lo, hi in zip(edges[:-1], edges[1:]):
        sel = (p >= lo) & (p < hi) if hi < 1 else (p >= lo)
        if sel.sum() < 25:
            continue
        checked += 1
        mean_p = p[sel].mean()
        sd = math.sqrt(np.sum(p[sel] * (1 - p[sel]))) / sel.sum()
        assert abs(y[sel].mean() - mean_p) < 3.5 * sd + 1e-3, (lo, hi, y[sel].mean(), mean_p, sel.sum())
    assert checked >= 6  # the injections populate most bins, not only the two ends
