"""Multi-order maps against analytic von Mises-Fisher densities, an independent
HEALPix implementation (astropy-healpix vs healpy), and flat <-> multi-order
conversions.

Sources
-------
* Fisher (1953), Proc. R. Soc. A 217, 295: credible level at angle θ,
  P(θ) = (1 - e^{-κ(1-cos θ)}) / (1 - e^{-2κ}), and the p-region area
  A_p = -2π ln(1 - p(1 - e^{-2κ}))/κ sr. Check values from REFERENCES.md
  ("computed"): κ=100: θ50 = 6.749965°, θ90 = 12.319196°, P(10°) = 0.78111848;
  90% area 100 deg² <-> κ = 474.94227.
* Two-density overlap, closed form ∫f1 f2 dΩ = κ1κ2 sinh(κ12)/(4π κ12 sinh κ1 sinh κ2)
  (REFERENCES.md; 4π times it: κ=(10, 20), 30° apart -> 5.5516303; (50, 50), 10° -> 34.305489).
* astropy-healpix 2.x (an implementation independent of healpy's C++) for pixel geometry.
"""

from __future__ import annotations

import gzip
import io

import healpy as hp
import numpy as np
import pytest
from astropy_healpix import HEALPix
from astropy import units as u

from matcher.sky import (
    DEG2_PER_SR,
    Blob,
    SkyMap,
    flat_fits_bytes,
    kappa_for_area,
    moc_fits_bytes,
    read_skymap,
    synthetic_skymap,
    vmf_area_deg2,
)
from matcher.sky.coords import radec_to_vec, vec_to_radec


def _vmf_map(kappa, ra=40.0, dec=25.0, max_order=10, pixel_prob=5e-6, distance=None):
    return synthetic_skymap([Blob(ra, dec, kappa)], max_order=max_order, pixel_prob=pixel_prob, distance=distance)


def _point_at(ra, dec, angle_deg, pa_deg):
    c = radec_to_vec(ra, dec)
    z = np.array([0.0, 0.0, 1.0])
    e = np.cross(z, c)
    e /= np.linalg.norm(e)
    n = np.cross(c, e)
    a, p = np.radians(angle_deg), np.radians(pa_deg)
    v = np.cos(a) * c + np.sin(a) * (np.cos(p)[..., None] * e + np.sin(p)[..., None] * n)
    return vec_to_radec(v)


def test_vmf_check_values_of_the_generator():
    # REFERENCES.md (Fisher 1953): 90% area 100 deg² <-> κ = 474.94227.
    assert kappa_for_area(100.0, 0.9) == pytest.approx(474.94227, rel=1e-7)
    # κ = 100: θ50 and θ90 give areas 2π(1-cos θ) for a cap (no truncation at this κ).
    for level, theta in [(0.5, 6.749965), (0.9, 12.319196)]:
        cap = 2 * np.pi * (1 - np.cos(np.radians(theta))) * DEG2_PER_SR
        assert vmf_area_deg2(100.0, level) == pytest.approx(cap, rel=1e-6)


@pytest.fixture(scope="module")
def vmf100():
    return _vmf_map(100.0, max_order=9, pixel_prob=2e-5)


def test_credible_areas_match_fisher(vmf100):
    # Pixelization error: the finest pixels (order 9, 0.11°) sit where the density
    # gradient is steep; 2e-3 relative covers it (measured ~3e-4).
    areas = vmf100.credible_areas([0.5, 0.9])
    for a, level in zip(areas, (0.5, 0.9)):
        assert a == pytest.approx(vmf_area_deg2(100.0, level), rel=2e-3)


def test_credible_level_at_angle_matches_fisher(vmf100):
    # REFERENCES.md: κ=100, P(10°) = 0.78111848; also the θ50, θ90 check values.
    pa = np.linspace(0, 360, 64, endpoint=False)
    for angle, expected in [(10.0, 0.78111848), (6.749965, 0.5), (12.319196, 0.9)]:
        ra, dec = _point_at(40.0, 25.0, angle, pa)
        # A pixel-level quantity: the searched probability includes the whole pixel the
        # point is in (and its ties), so it exceeds P(θ) by up to one pixel's worth.
        lv = vmf100.credible_level(ra, dec)
        assert np.median(lv) == pytest.approx(expected, abs=6e-3)
        assert np.all(np.diff(np.sort(lv)) >= 0)


def test_searched_area_is_consistent_with_level(vmf100):
    ra, dec = _point_at(40.0, 25.0, 10.0, np.array([0.0]))
    lv = vmf100.credible_level(ra, dec)[0]
    area = vmf100.searched_area(ra, dec)[0]
    # The searched area at a point is (about) the credible area at its searched probability.
    assert area == pytest.approx(vmf100.credible_areas([lv])[0], rel=5e-3)


def test_total_area_is_whole_sky(vmf100):
    assert vmf100.area_sr.sum() == pytest.approx(4 * np.pi, rel=1e-12)
    # The least dense position's searched area is the whole sky.
    least = int(np.argmin(vmf100.probdensity))
    assert vmf100.pixel_credible_level()[least] == pytest.approx(1.0, abs=1e-12)
    assert vmf100._ranking[4][least] * DEG2_PER_SR == pytest.approx(4 * np.pi * DEG2_PER_SR, rel=1e-12)
    assert vmf100.prob.sum() == pytest.approx(1.0, rel=1e-12)


@pytest.mark.parametrize(
    "k1,k2,sep,expected",
    [(10.0, 20.0, 30.0, 5.5516303), (50.0, 50.0, 10.0, 34.305489)],
)
def test_gaussian_overlap_matches_closed_form(k1, k2, sep, expected):
    # The map is vMF(κ1); the position error is a Fisher density with κ2 = 1/σ².
    m = _vmf_map(k1, ra=100.0, dec=-10.0, max_order=8, pixel_prob=5e-5)
    sigma_deg = np.degrees(1 / np.sqrt(k2))
    ra, dec = _point_at(100.0, -10.0, sep, np.array([0.0, 120.0, 240.0]))
    got = m.overlap_gaussian(ra, dec, np.full(3, sigma_deg)) * 4 * np.pi
    # 128-point quadrature plus pixelization: 1% is ample (measured ~0.2%).
    np.testing.assert_allclose(got, expected, rtol=1e-2)


def test_gaussian_overlap_small_error_is_point_density():
    m = _vmf_map(kappa_for_area(100.0), max_order=9, pixel_prob=2e-5)
    ra, dec = np.array([40.0, 41.0, 45.0]), np.array([25.0, 26.0, 24.0])
    one_arcsec = 1 / 3600.0
    np.testing.assert_allclose(m.overlap_gaussian(ra, dec, one_arcsec), m.density(ra, dec), rtol=1e-3)
    np.testing.assert_array_equal(m.overlap_gaussian(ra, dec, 0.0), m.density(ra, dec))


def _log_overlap_closed_form(k1, k2, sep_deg):
    # log of κ1κ2 sinh(κ12)/(4π κ12 sinh κ1 sinh κ2) in an overflow-free form (REFERENCES.md).
    k12 = np.sqrt(k1**2 + k2**2 + 2 * k1 * k2 * np.cos(np.radians(sep_deg)))
    return (np.log(k1 * k2 / (4 * np.pi * k12)) + (k12 - k1 - k2) + np.log(2)
            + np.log(-np.expm1(-2 * k12) / (-np.expm1(-2 * k1) * -np.expm1(-2 * k2))))


@pytest.fixture(scope="module", params=[10.0, 1000.0], ids=["10deg2", "1000deg2"])
def vmf_fine(request):
    area = request.param
    return area, _vmf_map(kappa_for_area(area), max_order=11, pixel_prob=1e-5)


@pytest.mark.parametrize("sigma_deg", [1 / 3600, 0.05, 0.2, 1.0, 5.0, 20.0])
def test_gaussian_overlap_from_arcseconds_to_20_degrees(vmf_fine, sigma_deg):
    # The engine's Gaussian-error overlap against the Fisher closed form, over the
    # range of position errors the trade meets (arcsec optical to ~20° gamma-ray).
    area, m = vmf_fine
    k1 = kappa_for_area(area)
    k2 = 1 / np.radians(sigma_deg) ** 2
    r90 = np.degrees(np.arccos(1 - area / DEG2_PER_SR / (2 * np.pi)))
    # Below ~0.2° the overlap is the map's own pixel density, whose pixelization error
    # against the analytic density reaches ~3% at the 90% contour (order-11 pixels where
    # the density falls steeply); above it the measured error is < 0.5%.
    tol = 4e-2 if sigma_deg < 0.2 else 1e-2
    for frac in (0.0, 0.5, 1.0):
        ra, dec = _point_at(40.0, 25.0, frac * r90, np.array([10.0, 130.0, 250.0]))
        got = m.overlap_gaussian(ra, dec, sigma_deg)
        np.testing.assert_allclose(got, np.exp(_log_overlap_closed_form(k1, k2, frac * r90)), rtol=tol)


def test_map_overlap_matches_closed_form():
    a = _vmf_map(50.0, ra=10.0, dec=0.0, max_order=8, pixel_prob=5e-5)
    rb, db = _point_at(10.0, 0.0, 10.0, np.array([0.0]))
    b = _vmf_map(50.0, ra=float(rb[0]), dec=float(db[0]), max_order=7, pixel_prob=2e-4)
    assert 4 * np.pi * a.overlap_map(b) == pytest.approx(34.305489, rel=5e-3)
    assert a.overlap_map(b) == pytest.approx(b.overlap_map(a), rel=1e-12)


# ---------------------------------------------------------------- healpix geometry
@pytest.mark.parametrize("order", [0, 4, 9, 13])
def test_pixel_index_agrees_with_astropy_healpix(order, rng):
    nside = 1 << order
    prob = rng.uniform(0.1, 1.0, 12 * nside * nside) if order <= 9 else None
    if prob is None:
        m = _vmf_map(kappa_for_area(20.0), max_order=order, pixel_prob=1e-4)
    else:
        m = SkyMap.from_flat(prob / prob.sum(), nest=True)
    ra = rng.uniform(0, 360, 20000)
    dec = np.degrees(np.arcsin(rng.uniform(-1, 1, 20000)))
    idx = m.pixel_index(ra, dec)
    ref = HEALPix(nside=1 << m.max_order, order="nested").lonlat_to_healpix(ra * u.deg, dec * u.deg)
    # The containing multi-order pixel is the ancestor of the fine pixel astropy-healpix finds.
    np.testing.assert_array_equal(m.ipix[idx], ref >> (2 * (m.max_order - m.order[idx])))


def test_pixel_areas_agree_with_astropy_healpix():
    m = _vmf_map(kappa_for_area(50.0), max_order=9, pixel_prob=1e-4)
    for o in np.unique(m.order):
        ref = HEALPix(nside=1 << int(o), order="nested").pixel_area.to_value(u.sr)
        np.testing.assert_allclose(m.area_sr[m.order == o], ref, rtol=1e-14)


def test_ring_order_agrees_with_astropy_healpix(rng):
    nside = 16
    prob = rng.uniform(0, 1, 12 * nside * nside)
    prob /= prob.sum()
    m = SkyMap.from_flat(prob, nest=False)
    ra = rng.uniform(0, 360, 5000)
    dec = np.degrees(np.arcsin(rng.uniform(-1, 1, 5000)))
    ring = HEALPix(nside=nside, order="ring").lonlat_to_healpix(ra * u.deg, dec * u.deg)
    np.testing.assert_allclose(m.density(ra, dec), prob[ring] / hp.nside2pixarea(nside), rtol=1e-12)


# ------------------------------------------------------------ flat <-> multi-order
@pytest.fixture(scope="module")
def blob3d():
    return _vmf_map(kappa_for_area(60.0), max_order=8, pixel_prob=5e-5, distance=(150.0, 40.0))


def test_flat_and_multiorder_agree_to_1e6(blob3d):
    prob, mu, sig, norm = blob3d.to_flat()
    assert prob.sum() == pytest.approx(1.0, abs=1e-12)
    flat = SkyMap.from_flat(prob, nest=True, distmu=mu, distsigma=sig, distnorm=norm)
    levels = [0.1, 0.5, 0.9, 0.99]
    np.testing.assert_allclose(flat.credible_areas(levels), blob3d.credible_areas(levels), rtol=1e-6)
    np.testing.assert_allclose(flat.distance_marginal(), blob3d.distance_marginal(), rtol=1e-6)
    ring = SkyMap.from_flat(*blob3d.to_flat(nest=False)[:1], nest=False)
    np.testing.assert_allclose(ring.credible_areas(levels), blob3d.credible_areas(levels), rtol=1e-6)


def test_coarsening_preserves_probability(blob3d):
    prob, *_ = blob3d.to_flat(4)
    assert prob.sum() == pytest.approx(1.0, abs=1e-12)
    # Summing children is the inverse of healpy.ud_grade(power=-2) on the flat map.
    fine, *_ = blob3d.to_flat()
    ref = hp.ud_grade(fine, 16, order_in="NESTED", order_out="NESTED", power=-2)
    np.testing.assert_allclose(prob, ref, rtol=1e-10, atol=1e-15)


def test_fits_round_trips(blob3d, tmp_path):
    data = moc_fits_bytes(blob3d)
    for src in (data, gzip.compress(data), io.BytesIO(data)):
        m = read_skymap(src)
        np.testing.assert_array_equal(m.uniq, blob3d.uniq)
        np.testing.assert_allclose(m.probdensity, blob3d.probdensity, rtol=1e-15)
        np.testing.assert_array_equal(m.distmu, blob3d.distmu)
    path = tmp_path / "map.fits.gz"
    path.write_bytes(moc_fits_bytes(blob3d, compress=True))
    assert read_skymap(path).npix == blob3d.npix
    assert read_skymap(str(path)).npix == blob3d.npix


def test_reads_flat_map_written_by_healpy(blob3d, tmp_path):
    # An outside writer: healpy.write_map, RING order, multi-pixel rows, with distance columns.
    prob, mu, sig, norm = blob3d.to_flat(nest=False)
    path = tmp_path / "healpy_flat.fits"
    hp.write_map(str(path), [prob, mu, sig, norm], nest=False, coord="C",
                 column_names=["PROB", "DISTMU", "DISTSIGMA", "DISTNORM"],
                 column_units=["pix-1", "Mpc", "Mpc", "Mpc-2"], dtype=np.float64)
    m = read_skymap(path)
    assert m.max_order == blob3d.max_order
    np.testing.assert_allclose(m.credible_areas([0.5, 0.9]), blob3d.credible_areas([0.5, 0.9]), rtol=1e-6)
    np.testing.assert_allclose(m.distance_marginal(), blob3d.distance_marginal(), rtol=1e-6)
    # Also NESTED, compressed.
    nest_path = tmp_path / "healpy_nest.fits.gz"
    hp.write_map(str(nest_path), blob3d.to_flat()[0], nest=True, column_names=["PROB"], dtype=np.float64)
    assert read_skymap(nest_path).credible_areas([0.9])[0] == pytest.approx(blob3d.credible_areas([0.9])[0], rel=1e-6)


def test_flat_fits_writer_round_trip(blob3d):
    prob, mu, sig, norm = blob3d.to_flat(nest=False)
    m = read_skymap(flat_fits_bytes(prob, nest=False, distmu=mu, distsigma=sig, distnorm=norm))
    np.testing.assert_allclose(m.to_flat()[0], blob3d.to_flat()[0], rtol=1e-14)


# --------------------------------------------------------------------- sampling
def test_samples_follow_the_3d_posterior(blob3d, rng):
    from scipy import stats

    ra, dec, r = blob3d.sample(20000, rng)
    # Sky: the credible level of samples drawn from the map is uniform (up to pixel ties).
    lv = blob3d.credible_level(ra, dec)
    assert stats.kstest(lv, "uniform").statistic < 0.02
    # Distance: each draw's conditional CDF value is uniform (probability integral transform).
    mu, sig, norm = blob3d.distance_parameters(ra, dec)
    from scipy.integrate import quad
    from matcher.sky.distance import conditional_pdf

    # The CDF comes from scipy quadrature of the ansatz, independent of the sampler's
    # closed-form CDF; 400 draws, fixed seed, a 0.1% significance threshold.
    sel = slice(0, 400)
    pit = [quad(conditional_pdf, 0, ri, args=(m_, s_, n_))[0] for ri, m_, s_, n_ in zip(r[sel], mu[sel], sig[sel], norm[sel])]
    assert stats.kstest(pit, "uniform").pvalue > 1e-3


def test_direct_lookup_table_equals_binary_searches_per_cell():
    # The order-8 lookup table is built by filling each coarse pixel's run of cells; the
    # reference is the definition (a cell holds one pixel iff exactly one pixel starts in
    # [the pixel containing the cell's start, the cell's end)), by numpy.searchsorted.
    import numpy as np

    from matcher.sky import random_skymap
    from matcher.sky.skymap import _LOOKUP_ORDER

    rng = np.random.default_rng(7)
    for max_order, area in ((6, 3000.0), (8, 400.0), (10, 50.0), (11, 20.0)):
        sm = random_skymap(rng, area90_deg2=area, max_order=max_order, pixel_prob=1e-4)
        table, shift = sm._table
        m = sm.max_order
        c = min(m, _LOOKUP_ORDER)
        cell_start = np.arange(12 * 4**c, dtype=np.int64) << (2 * (m - c))
        lo = np.searchsorted(sm._starts, cell_start, side="right") - 1
        hi = np.searchsorted(sm._starts, cell_start + (np.int64(1) << (2 * (m - c))), side="left")
        assert shift == 2 * (m - c)
        assert np.array_equal(table, np.where(hi - lo == 1, lo, -1)), max_order
