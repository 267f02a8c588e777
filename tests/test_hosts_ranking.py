"""3D host ranking: check values, the distance-error convolution, brute force, calibration, completeness."""

from __future__ import annotations

import math

import healpy as hp
import numpy as np
import pytest
from scipy import integrate, special, stats

from matcher.catalog import (
    SchechterCompleteness,
    TabulatedCompleteness,
    build_index,
    catalog_from_table,
    host_weight,
    rank_hosts,
    synthetic_catalog,
)
from matcher.catalog.index import GalaxyIndex
from matcher.errors import CatalogError
from matcher.sky import Blob, ansatz_norm, kappa_for_area, random_skymap, synthetic_skymap
from matcher.sky.distance import volume_density


@pytest.fixture(scope="module")
def broad_map():
    # A broad blob (~2000 deg²) so that thousands of galaxies of a small all-sky catalogue fall in it.
    return random_skymap(np.random.default_rng(11), area90_deg2=2000.0, distance=(180.0, 50.0), max_order=8,
                         pixel_prob=2e-4)


@pytest.fixture(scope="module")
def allsky_index():
    table = synthetic_catalog(30_000, 5, max_distance_mpc=400.0, mag_limit=21.0, redshift_fraction=0.2)
    cat, report = catalog_from_table(table)
    return build_index(cat, report=report)


# ------------------------------------------------------------------ check values
def test_dp_dv_check_value():
    # REFERENCES.md, distance ansatz (Singer et al. 2016, ApJS 226, 10), computed: NSIDE 64 pixel
    # (A = 2.5566346e-4 sr), pixel probability 1e-3, mu = 100, sigma = 20, r = 110 Mpc
    # -> dP/dV = 6.6205070e-6 Mpc^-3. With no galaxy distance error the host weight is dP/dV itself.
    area = hp.nside2pixarea(64)
    assert area == pytest.approx(2.5566346e-4, rel=2e-8)
    norm = ansatz_norm(100.0, 20.0)
    assert norm == pytest.approx(9.6153846e-5, rel=1e-8)  # REFERENCES.md table, N for (100, 20)
    got = host_weight(1e-3 / area, 100.0, 20.0, norm, 110.0, 0.0, 1.0)
    # The reference is quoted to 8 significant digits: tolerance one unit in the last.
    assert float(got) == pytest.approx(6.6205070e-6, rel=2e-8)


@pytest.mark.parametrize(
    "mu, sigma, d, d_err",
    [(100.0, 20.0, 110.0, 10.0), (150.0, 40.0, 90.0, 9.0), (-50.0, 100.0, 80.0, 10.0), (300.0, 30.0, 250.0, 25.0)],
)
def test_distance_error_convolution_matches_quadrature(mu, sigma, d, d_err):
    # REFERENCES.md, host weights: a galaxy distance error convolves exactly, sigma -> sqrt(sigma² + sigma_d²).
    # Independent check: numerically average the sky module's dP/dV over the galaxy's Gaussian distance
    # posterior with scipy.integrate.quad. Over r >= 0 only; d/d_err >= 8 puts < 1e-15 of the Gaussian
    # below r = 0, and quad is accurate to ~1e-12, so 1e-9 relative is a safe bound.
    rho, norm = 3.7, float(ansatz_norm(mu, sigma))

    def integrand(r):
        return float(volume_density(rho, r, mu, sigma, norm)) * stats.norm.pdf(r, loc=d, scale=d_err)

    want, _ = integrate.quad(integrand, 0.0, d + 12 * d_err, points=[d, max(mu, 0.0)], epsabs=0, epsrel=1e-13,
                             limit=200)
    got = float(host_weight(rho, mu, sigma, norm, d, d_err, 1.0))
    assert got == pytest.approx(want, rel=1e-9)


def test_host_weight_is_zero_where_the_ansatz_does_not_apply():
    # Files mark such pixels DISTMU=+inf, DISTSIGMA=1, DISTNORM=0 (REFERENCES.md, memory).
    assert float(host_weight(1.0, np.inf, 1.0, 0.0, 100.0, 5.0, 1.0)) == 0.0


# ------------------------------------------------------------------ brute force
def _brute_force(skymap, cat):
    """Every galaxy, the map flattened to its finest order, healpy.ang2pix and scipy.stats.norm.pdf."""
    nside = 1 << skymap.max_order
    start, end = skymap.ranges(skymap.max_order)
    flat_of = np.repeat(np.arange(skymap.npix), end - start)  # flat NESTED pixel -> map pixel
    theta = np.radians(90.0 - np.asarray(cat.dec_deg))
    phi = np.radians(np.asarray(cat.ra_deg))
    pix = flat_of[hp.ang2pix(nside, theta, phi, nest=True)]
    s = np.hypot(skymap.distsigma[pix], cat.distance_err_mpc)
    raw = (np.asarray(cat.weight) * skymap.probdensity[pix] * skymap.distnorm[pix]
           * stats.norm.pdf(cat.distance_mpc, loc=skymap.distmu[pix], scale=s))
    return raw, pix


def test_indexed_ranking_equals_brute_force(broad_map, allsky_index):
    ranking = rank_hosts(broad_map, allsky_index, fraction=1.0)
    raw, _ = _brute_force(broad_map, allsky_index.catalog)
    brute = raw / raw.sum()
    got = np.zeros(len(allsky_index))
    got[ranking.rows] = ranking.prob
    assert len(ranking) == len(allsky_index)  # every pixel searched: every galaxy is considered
    assert np.count_nonzero(brute) > 1000
    # Two implementations of the same arithmetic (one through the index's slices, one per galaxy through
    # healpy on the flattened map): they agree to rounding; 1e-9 relative is the bound.
    np.testing.assert_allclose(got, brute, rtol=1e-9, atol=0)
    assert np.all(np.diff(ranking.prob) <= 0)
    assert ranking.cum_prob[-1] == pytest.approx(1.0, rel=1e-12)


def test_top_fraction_searches_exactly_the_top_pixels(broad_map, allsky_index):
    ranking = rank_hosts(broad_map, allsky_index, fraction=0.9)
    raw, pix = _brute_force(broad_map, allsky_index.catalog)
    top = np.zeros(broad_map.npix, dtype=bool)
    top[broad_map.top_pixels(0.9)] = True
    inside = top[pix] & (broad_map.prob[pix] > 0)
    assert set(ranking.rows.tolist()) == set(np.flatnonzero(inside).tolist())
    expect = raw[ranking.rows] / raw[inside].sum()
    np.testing.assert_allclose(ranking.prob, expect, rtol=1e-9, atol=0)
    assert ranking.sky_prob_searched >= 0.9


def test_rows_of_each_pixel_are_one_contiguous_slice(broad_map, allsky_index):
    # The galaxies in a multi-order pixel are those healpy puts in that pixel at its own order.
    cat = allsky_index.catalog
    theta = np.radians(90.0 - np.asarray(cat.dec_deg))
    phi = np.radians(np.asarray(cat.ra_deg))
    for i in np.random.default_rng(2).choice(broad_map.npix, 300, replace=False):
        order, ipix = int(broad_map.order[i]), int(broad_map.ipix[i])
        rows, counts = allsky_index.rows_in_uniq([broad_map.uniq[i]])
        want = np.flatnonzero(hp.ang2pix(1 << order, theta, phi, nest=True) == ipix)
        assert counts[0] == want.size
        assert np.array_equal(np.sort(rows), want)
        if rows.size:
            assert rows[-1] - rows[0] + 1 == rows.size


def test_map_without_distance_ranks_by_sky_density(allsky_index):
    flat = synthetic_skymap([Blob(30.0, 10.0, kappa_for_area(3000.0))], distance=None, max_order=6,
                            pixel_prob=1e-3)
    ranking = rank_hosts(flat, allsky_index, fraction=1.0)
    assert not ranking.three_d and math.isnan(ranking.p_outside_catalog)
    rho = flat.density(allsky_index.catalog.ra_deg, allsky_index.catalog.dec_deg)
    want = np.asarray(allsky_index.catalog.weight) * rho
    np.testing.assert_allclose(ranking.prob, (want / want.sum())[ranking.rows], rtol=1e-12)


def test_bad_fraction_is_rejected(broad_map, allsky_index):
    for bad in (0.0, -0.5, 1.5, float("nan")):
        with pytest.raises(CatalogError, match="fraction"):
            rank_hosts(broad_map, allsky_index, fraction=bad)


# ------------------------------------------------------------------ calibration
def _with_distance_errors(index: GalaxyIndex, err) -> GalaxyIndex:
    arrays = index.catalog.arrays()
    arrays["distance_err_mpc"] = np.asarray(err, dtype=np.float64)
    return GalaxyIndex(type(index.catalog)(**arrays), index.pix, index.header)


@pytest.fixture(scope="module")
def calibration_setup():
    skymap = synthetic_skymap([Blob(120.0, -35.0, kappa_for_area(250.0))], distance=(150.0, 30.0), max_order=8,
                              pixel_prob=3e-4)
    table = synthetic_catalog(12_000, 17, max_distance_mpc=330.0, cone=(120.0, -35.0, 22.0), distance_err_frac=0.15)
    cat, report = catalog_from_table(table)
    return skymap, build_index(cat, report=report)


def _coverage(skymap, index, ranking, rng, trials, levels):
    """Fraction of injected hosts inside the smallest set holding each level.

    Truth: each galaxy's true distance is drawn from its catalogue posterior N(d, σ_d), and the host is
    drawn with probability ∝ weight × dP/dV at its true position, with the sky module's own
    ``volume_density`` (an implementation independent of the ranking's kernel).
    """
    cat = index.catalog
    rows = ranking.rows
    ra, dec = np.asarray(cat.ra_deg)[rows], np.asarray(cat.dec_deg)[rows]
    d, de, w = (np.asarray(a)[rows] for a in (cat.distance_mpc, cat.distance_err_mpc, cat.weight))
    pix = skymap.pixel_index(ra, dec)
    rho, mu, sig, nrm = skymap.probdensity[pix], skymap.distmu[pix], skymap.distsigma[pix], skymap.distnorm[pix]
    before = ranking.cum_prob - ranking.prob  # probability of all better-ranked galaxies
    hits = np.zeros(len(levels))
    for _ in range(trials):
        r_true = d + de * rng.standard_normal(d.size)
        p = w * volume_density(rho, r_true, mu, sig, nrm)
        k = rng.choice(d.size, p=p / p.sum())
        hits += before[k] < np.asarray(levels) * ranking.p_in_catalog
    return hits / trials


def test_injected_hosts_are_calibrated(calibration_setup):
    skymap, index = calibration_setup
    ranking = rank_hosts(skymap, index)
    assert ranking.credible_count(0.9) > 30  # a real ranking problem, not one dominant galaxy
    levels = [0.1, 0.3, 0.5, 0.7, 0.9]
    trials = 1500
    cover = _coverage(skymap, index, ranking, np.random.default_rng(99), trials, levels)
    # Binomial scatter: sqrt(p(1-p)/trials) <= 0.013; allow 4 sigma.
    for p, c in zip(levels, cover):
        assert abs(c - p) < 4 * math.sqrt(p * (1 - p) / trials) + 1e-3, (p, c)


def test_calibration_check_detects_an_ignored_distance_error(calibration_setup):
    # Negative control: ranking as if the catalogue distances were exact, against the same truth. The
    # ranking is then too confident in distance, and the coverage test above must notice.
    skymap, index = calibration_setup
    wrong = rank_hosts(skymap, _with_distance_errors(index, np.zeros(len(index))))
    levels = [0.3, 0.5, 0.7]
    trials = 1500
    cover = _coverage(skymap, index, wrong, np.random.default_rng(99), trials, levels)
    worst = max(abs(c - p) / math.sqrt(p * (1 - p) / trials) for p, c in zip(levels, cover))
    assert worst > 6, cover


# ------------------------------------------------------------------ completeness
@pytest.mark.parametrize("distance", [20.0, 80.0, 200.0, 600.0])
def test_schechter_completeness_matches_quadrature(distance):
    # C(D) = ∫_{x_lim}^∞ x^{α+1} e^{-x} dx / Γ(α+2): the luminosity-weighted fraction of a Schechter (1976)
    # population brighter than the limit, integrated with scipy.integrate.quad against scipy's
    # regularized incomplete gamma in the model. quad's error ~1e-10 here.
    model = SchechterCompleteness(mag_limit=18.5)
    x_lim = 10 ** (-0.4 * (18.5 - 5 * math.log10(distance) - 25 - model.m_star))
    num, _ = integrate.quad(lambda x: x ** (model.alpha + 1) * math.exp(-x), x_lim, np.inf, epsrel=1e-12)
    assert float(model(distance)) == pytest.approx(num / special.gamma(model.alpha + 2), rel=1e-8)


def test_p_outside_catalog_matches_quadrature_of_the_marginal(calibration_setup):
    # p_out = 1 - ∫ p(r) C(r) dr with p(r) the sky-marginal distance density of the same top-99.9% pixels,
    # from the sky module (its own closed-form pdf), integrated by Simpson's rule on a 4001-point grid
    # (error ~1e-7 for these smooth functions); the ranking uses per-pixel Gauss-Legendre quadrature.
    skymap, index = calibration_setup
    model = SchechterCompleteness(mag_limit=17.0)
    ranking = rank_hosts(skymap, index, completeness=model)
    r = np.linspace(0.0, 600.0, 4001)
    pm = skymap.distance_marginal_pdf(r)
    p_in = integrate.simpson(pm * model(r), x=r) / integrate.simpson(pm, x=r)
    assert 0.05 < ranking.p_outside_catalog < 0.95
    assert ranking.p_outside_catalog == pytest.approx(1.0 - p_in, rel=1e-5)
    assert ranking.prob.sum() == pytest.approx(1.0 - ranking.p_outside_catalog, rel=1e-12)


def test_p_outside_catalog_limits(calibration_setup):
    skymap, index = calibration_setup
    full = TabulatedCompleteness([0.0, 1e4], [1.0, 1.0])
    empty = TabulatedCompleteness([0.0, 1e4], [0.0, 0.0])
    assert rank_hosts(skymap, index, completeness=full).p_outside_catalog == pytest.approx(0.0, abs=1e-12)
    assert rank_hosts(skymap, index, completeness=empty).p_outside_catalog == pytest.approx(1.0, abs=1e-12)


def test_completeness_model_errors():
    with pytest.raises(CatalogError, match="alpha"):
        SchechterCompleteness(mag_limit=18.0, alpha=-2.5)
    with pytest.raises(CatalogError, match="increasing"):
        TabulatedCompleteness([10.0, 5.0], [1.0, 0.5])
    with pytest.raises(CatalogError, match=r"\[0, 1\]"):
        TabulatedCompleteness([10.0, 50.0], [1.0, 1.5])


def test_generated_catalogue_follows_its_completeness():
    # The generator draws Schechter luminosities and cuts at the magnitude limit; the luminosity density
    # it keeps per comoving shell, relative to a nearby complete shell, must follow C(D) of the analytic
    # model (an independent formula). Luminosity sums are dominated by a few bright galaxies: with 60k
    # galaxies the shell sums scatter by a few per cent; allow 15%.
    from matcher.catalog import planck18_table

    m_lim = 16.5
    table = synthetic_catalog(60_000, 3, max_distance_mpc=300.0, mag_limit=m_lim)
    dl = np.asarray(table["true_distance_mpc"])
    w = np.asarray(table["weight"])
    dc = planck18_table().comoving_distance(planck18_table().redshift_at_luminosity_distance(dl))
    edges = np.array([10.0, 60.0, 120.0, 180.0, 240.0, 290.0])
    vol = np.diff(edges**3)
    dens = np.histogram(dc, bins=edges, weights=w)[0] / vol
    model = SchechterCompleteness(mag_limit=m_lim)
    mid_dl = (1 + planck18_table().redshift_at_comoving_distance(0.5 * (edges[1:] + edges[:-1]))) * 0.5 * (edges[1:] + edges[:-1])
    expect = model(mid_dl) / model(mid_dl[0])
    np.testing.assert_allclose(dens / dens[0], expect, rtol=0.15)


@pytest.mark.parametrize("mu, sigma", [(300.0, 30.0), (0.0, 80.0), (-150.0, 50.0), (-350.0, 50.0), (-2000.0, 100.0)])
def test_p_outside_one_pixel_matches_quadrature(mu, sigma):
    # One pixel: p_out = 1 - ∫_0^∞ p(r) C(r) dr with the ansatz pdf of the sky module, by scipy quad
    # (error ~1e-10), including posteriors whose mu/sigma is far below zero (mass in a thin layer near
    # r = 0). C has an r^1.58 cusp at r = 0 (1 - C ∝ L_lim^(α+2)), so the 24-point rule converges only
    # algebraically where r = 0 is inside the mass: ~4e-6 observed at worst; allow 1e-5.
    from matcher.catalog import p_outside_catalog
    from matcher.sky.distance import conditional_pdf

    model = SchechterCompleteness(mag_limit=15.0)
    norm = float(ansatz_norm(mu, sigma))
    mean = float(integrate.quad(lambda r: r * conditional_pdf(r, mu, sigma, norm), 0, np.inf)[0])
    top = max(mu, 0.0) + 12 * sigma
    num = integrate.quad(lambda r: conditional_pdf(r, mu, sigma, norm) * model(r), 0, top, points=[mean],
                         epsrel=1e-12, limit=400)[0]
    den = integrate.quad(lambda r: conditional_pdf(r, mu, sigma, norm), 0, top, points=[mean], epsrel=1e-12,
                         limit=400)[0]
    got = p_outside_catalog(model, [1.0], [mu], [sigma], [norm])
    assert got == pytest.approx(1.0 - num / den, rel=1e-5, abs=1e-9)


def test_credible_count_is_the_smallest_set(calibration_setup):
    skymap, index = calibration_setup
    ranking = rank_hosts(skymap, index)
    assert ranking.credible_count(0.0) == 0
    for p in (0.2, 0.5, 0.9):
        k = ranking.credible_count(p)
        assert ranking.cum_prob[k - 1] >= p * ranking.p_in_catalog * (1 - 1e-12)
        assert k == 1 or ranking.cum_prob[k - 2] < p * ranking.p_in_catalog
    assert ranking.credible_count(1.0) <= len(ranking)
    with pytest.raises(CatalogError, match="credible level"):
        ranking.credible_count(1.5)
