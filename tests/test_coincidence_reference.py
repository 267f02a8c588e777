"""The coincidence terms against published formulas and reference libraries.

Each check names its source (see /work/shared/REFERENCES.md for the list) and
why its tolerance is what it is.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy.cosmology import Planck18
from scipy import integrate, stats

from matcher.coincidence import (
    association_probabilities,
    joint_far,
    luminosity_distance_mpc,
    poisson_fap,
    posterior_odds,
    redshift_at_distance,
    time_term,
)
from matcher.coincidence.classes import SECONDS_PER_DAY, SECONDS_PER_YEAR
from matcher.coincidence.cosmology import luminosity_distance_derivative_mpc
from matcher.coincidence.distance_term import (
    ansatz_likelihood_overlap,
    background_likelihood_overlap,
    distance_factor,
)
from matcher.coincidence.fap import BackgroundTable
from matcher.coincidence.sky_term import sky_overlap
from matcher.sky import Blob, ansatz_norm, synthetic_skymap


def _log_vmf_overlap(k1, k2, cos_sep):
    """ln ∫ f1 f2 dΩ for two Fisher densities (Fisher 1953; closed form in REFERENCES.md).

    ``κ1 κ2 sinh(κ12) / (4π κ12 sinh κ1 sinh κ2)``, in log space so that large κ do not overflow.
    """
    k12 = math.sqrt(k1 * k1 + k2 * k2 + 2 * k1 * k2 * cos_sep)

    def log_sinh(x):
        return x + math.log1p(-math.exp(-2 * x)) - math.log(2)

    return math.log(k1 * k2 / (4 * math.pi * k12)) + log_sinh(k12) - log_sinh(k1) - log_sinh(k2)


def _offset(ra, dec, sep_deg):
    """A point ``sep_deg`` north of (ra, dec) along the meridian (dec stays inside ±90 here)."""
    return ra, dec + sep_deg


# ------------------------------------------------------------------ sky overlap
@pytest.mark.parametrize(
    "k1, k2, sep_deg, expected",
    [
        # 4π ∫ f1 f2 dΩ (Ashton et al. 2018 spatial Bayes factor), REFERENCES.md, computed.
        (10.0, 20.0, 30.0, 5.5516303),
        (50.0, 50.0, 10.0, 34.305489),
    ],
)
def test_gaussian_overlap_matches_vmf_closed_form(k1, k2, sep_deg, expected):
    # The published check value and our own closed form agree first (guards the helper).
    assert 4 * math.pi * math.exp(_log_vmf_overlap(k1, k2, math.cos(math.radians(sep_deg)))) == pytest.approx(
        expected, rel=1e-7)
    gw = synthetic_skymap([Blob(150.0, 10.0, k1)], max_order=7, min_order=4, pixel_prob=2e-4)
    sigma_deg = math.degrees(1.0 / math.sqrt(k2))  # the engine's Gaussian error is Fisher with κ = 1/σ²
    ra, dec = _offset(150.0, 10.0, sep_deg)
    got = 4 * math.pi * float(sky_overlap(gw, [ra], [dec], [sigma_deg])[0])
    # Tolerance 1 %: the map is piecewise constant on pixels of ≤ 0.46° (order 7) and the
    # engine's quadrature uses 128 equal-mass points; both errors are well below 1 % here.
    assert got == pytest.approx(expected, rel=1e-2)


def test_gaussian_overlap_high_kappa_log_space():
    # A 100 deg² (90 %) three-detector-like map, κ = 474.94227 (REFERENCES.md, computed),
    # against a 2° report error 3° away: the closed form needs log space here.
    k1 = 474.94227
    gw = synthetic_skymap([Blob(40.0, -20.0, k1)], max_order=9, min_order=4, pixel_prob=2e-5)
    sigma = 2.0
    k2 = 1.0 / math.radians(sigma) ** 2
    ra, dec = _offset(40.0, -20.0, 3.0)
    expected = math.exp(_log_vmf_overlap(k1, k2, math.cos(math.radians(3.0))))
    got = float(sky_overlap(gw, [ra], [dec], [sigma])[0])
    # 1 %: pixels of ≤ 0.11° against a 2.6° combined width; 128-point quadrature.
    assert got == pytest.approx(expected, rel=1e-2)


def test_point_overlap_is_the_density():
    gw = synthetic_skymap([Blob(10.0, 60.0, 30.0)], max_order=6, pixel_prob=1e-3)
    ra = np.array([10.0, 50.0, 200.0])
    dec = np.array([60.0, 40.0, -30.0])
    assert np.array_equal(sky_overlap(gw, ra, dec, np.zeros(3)), gw.density(ra, dec))


# ------------------------------------------------------------------ odds / joint FAR
def test_odds_worked_example_ashton_2018():
    # Ashton et al. 2018 (ApJ 860, 6), REFERENCES.md: O ≈ R_common I_Ω / (R_gw R_other w)
    # = 3.6025e4 for R_common = 1/yr, R_gw = 365/yr, R_other = 40/yr, w = 6 s, I_Ω = 100.
    # In our terms: π = R_common/R_gw, I = I_Ω/4π (sr⁻¹), T = 1/w, r = R_other/4π (sr⁻¹ s⁻¹).
    # The published form uses π where the exact Poisson model has the prior odds π/(1-π),
    # so O·(1-π) reproduces it.
    pi = 1.0 / 365.0
    r = 40.0 / SECONDS_PER_YEAR / (4 * math.pi)
    o = float(posterior_odds(pi, 100.0 / (4 * math.pi), 1.0 / 6.0, 1.0, r))
    # 1e-4: the check value has five significant digits.
    assert o * (1 - pi) == pytest.approx(3.6025e4, rel=1e-4)


def test_joint_far_worked_example():
    # FAR_joint = FAR_gw R_ext w / I_Ω (Urban 2016; Piotrzkowski et al. 2022 — memory),
    # REFERENCES.md check: FAR_gw = 1/month, R_ext = 240/yr, w = 6 s, I_Ω = 10 → 1.7604e-12 Hz.
    # That value is reproduced with a 30-day month; with the 365.25/12-day month the note
    # also names, the same formula gives 1.73515e-12 Hz (checked by hand: ratio 30.4375/30).
    r_ext = 240.0 / SECONDS_PER_YEAR
    i_per_sr = 10.0 / (4 * math.pi)
    assert float(joint_far(1.0 / (30 * SECONDS_PER_DAY), r_ext, 6.0, i_per_sr)) == pytest.approx(1.7604e-12, rel=1e-4)
    month = 365.25 / 12 * SECONDS_PER_DAY
    assert float(joint_far(1.0 / month, r_ext, 6.0, i_per_sr)) == pytest.approx(1.7604e-12 * 30 / 30.4375, rel=1e-9)
    assert float(joint_far(1.0, r_ext, 6.0, 0.0)) == math.inf


def test_association_probabilities_within_groups():
    # P_i = O_i / (1 + Σ_j O_j) within a class (DESIGN.md): two classes, three reports.
    p = association_probabilities([1.0, 3.0, 2.0], ["x", "x", "y"])
    assert p.tolist() == pytest.approx([0.2, 0.6, 2.0 / 3.0], rel=1e-15)
    with pytest.raises(ValueError, match="finite and non-negative"):
        association_probabilities([1.0, -1.0], ["x", "x"])


# ------------------------------------------------------------------ Poisson tail
@pytest.mark.parametrize("rate, area, days, expected", [
    # Singer et al. 2014 (ApJ 795, 105) searched area; REFERENCES.md, computed.
    (1e-3, 30.0, 2.0, 0.058235466),
    (0.01, 100.0, 3.0, 0.95021293),
])
def test_poisson_tail_examples(rate, area, days, expected):
    # 1e-8: the check values have eight significant digits.
    assert float(poisson_fap(rate, area, days)) == pytest.approx(expected, rel=1e-8)


def test_table_measure_sharp_is_rate_window_area():
    # For a sharp trigger the region scoring at least as high is (window) × (pixels at least
    # as dense): μ = r W A (DESIGN.md). Three pixels with densities 3, 2, 1 and areas 1, 2, 4.
    t = BackgroundTable.from_cells([2.0, 3.0, 1.0], [2.0, 1.0, 4.0])
    W = 10.0
    # a candidate at density 2 (score = I T = 2/W) ties with the density-2 cell: area 1 + 2
    assert float(t.measure(2.0 / W, 0.0, W)) == pytest.approx(W * 3.0, rel=1e-12)
    assert float(t.measure(3.5 / W, 0.0, W)) == 0.0


def test_table_measure_bracketed_trapezoid_by_quadrature():
    # The superlevel measure of the trapezoid T(u) (fap.py derivation) against direct
    # numerical integration of 1[y T(u) >= s] over u for one cell (scipy quad).
    lo, hi, L = 0.0, 10.0, 4.0
    y = 2.0
    t = BackgroundTable.from_cells([y], [1.0])
    for s in (0.01, 0.05, 0.1 * 2 / 10 * 0.99):
        def ind(u):
            return float(y * time_term(u, L, lo, hi) >= s)
        direct, _ = integrate.quad(ind, lo - 1, hi + L + 1, points=[lo, lo + L, hi, hi + L], limit=200)
        # 1e-6: quad integrates a step function with its break points given.
        assert float(t.measure(s, L, hi - lo)) == pytest.approx(direct, rel=1e-6, abs=1e-6)


# ------------------------------------------------------------------ time term
def test_time_term_sharp_and_bracketed():
    # DESIGN.md: sharp → 1/(hi-lo) inside, 0 outside; bracketed → overlap / (W × L).
    assert time_term([2.0, 6.0, -1.0], 0.0, -1.0, 5.0).tolist() == [1 / 6, 0.0, 1 / 6]
    # bracket [-1 d, +1 d] against a [0, 3 d] window: overlap 1 d
    day = 86400.0
    assert float(time_term(day, 2 * day, 0.0, 3 * day)) == pytest.approx(1 * day / (3 * day * 2 * day), rel=1e-15)
    # a bracket that only touches the window start has zero overlap
    assert float(time_term(0.0, day, 0.0, 3 * day)) == 0.0
    # T integrates to 1 over the first-detection time (the odds rely on it): scipy quad
    total, _ = integrate.quad(lambda u: float(time_term(u, 2 * day, 0.0, 3 * day)), -day, 6 * day,
                              points=[0, 2 * day, 3 * day, 5 * day])
    assert total == pytest.approx(1.0, rel=1e-9)


# ------------------------------------------------------------------ distance
@pytest.mark.parametrize("mu, sigma, d, s", [(100.0, 20.0, 110.0, 5.0), (-50.0, 100.0, 30.0, 10.0),
                                             (300.0, 60.0, 20.0, 2.0), (150.0, 40.0, 160.0, 80.0)])
def test_ansatz_likelihood_overlap_vs_quadrature(mu, sigma, d, s):
    # ∫ N r² φ((r-μ)/σ)/σ · φ((d-r)/s)/s dr (Singer et al. 2016 ansatz), closed form vs
    # scipy quad with the integrand's peak bracketed; 1e-9 is quad's reach here.
    n = float(ansatz_norm(mu, sigma))
    lo, hi = max(0.0, min(d, mu) - 12 * max(s, sigma)), max(d, mu) + 12 * max(s, sigma)
    direct, _ = integrate.quad(lambda r: n * r * r * stats.norm.pdf(r, mu, sigma) * stats.norm.pdf(d, r, s),
                               lo, hi, epsabs=0, epsrel=1e-12, limit=400, points=[d, max(mu, 0.0)])
    assert float(ansatz_likelihood_overlap(mu, sigma, n, d, s)) == pytest.approx(direct, rel=1e-9)


@pytest.mark.parametrize("d, s", [(100.0, 10.0), (390.0, 30.0), (10.0, 20.0), (600.0, 50.0)])
def test_background_likelihood_overlap_vs_quadrature(d, s):
    # ∫_0^R 3r²/R³ φ((d-r)/s)/s dr, uniform in volume to R = 400 Mpc; scipy quad, 1e-9.
    R = 400.0
    direct, _ = integrate.quad(lambda r: 3 * r * r / R**3 * stats.norm.pdf(d, r, s), 0, R, epsabs=0, epsrel=1e-12)
    assert float(background_likelihood_overlap(R, d, s)) == pytest.approx(direct, rel=1e-9)


def test_distance_factor_tight_measurement_limit():
    # With a tight measurement D → p_gw(d)/p_bg(d) = N d² φ((d-μ)/σ)/σ / (3 d²/R³) (closed forms).
    mu, sigma, R, d = 100.0, 20.0, 400.0, 110.0
    n = float(ansatz_norm(mu, sigma))
    expected = n * stats.norm.pdf(d, mu, sigma) * R**3 / 3
    # 1e-4: the measurement error 0.01 Mpc smooths over 1e-4 of the GW width.
    assert float(distance_factor(mu, sigma, n, d, 0.01, R)) == pytest.approx(expected, rel=1e-4)
    assert float(distance_factor(mu, sigma, n, np.nan, np.nan, R)) == 1.0
    assert float(distance_factor(np.inf, 1.0, 0.0, d, 10.0, R)) == 1.0  # no ansatz on this line of sight


# ------------------------------------------------------------------ cosmology
@pytest.mark.parametrize("z, dl", [(0.01, 44.6471), (0.05, 229.8806), (0.10, 475.8223)])
def test_luminosity_distance_planck18_table(z, dl):
    # REFERENCES.md (astropy 8.0.2 Planck18, computed); tolerance 1e-4 relative as stated there.
    assert float(luminosity_distance_mpc(z)) == pytest.approx(dl, rel=1e-4)


@pytest.mark.parametrize("d, z", [(40.0, 0.0089662), (100.0, 0.0221944)])
def test_redshift_at_distance_planck18_table(d, z):
    # REFERENCES.md inverse values, 1e-4 relative.
    assert float(redshift_at_distance(d)) == pytest.approx(z, rel=1e-4)


def test_cosmology_table_matches_astropy_everywhere():
    # The spline table against astropy's own Planck18 at arbitrary redshifts: 1e-7 relative
    # (cubic spline on 4096 nodes in ln(1+z); the observed error is ~1e-12).
    z = np.array([1e-4, 3e-3, 0.02, 0.07, 0.3, 1.0, 2.5, 7.0, 15.0])
    assert np.allclose(luminosity_distance_mpc(z), Planck18.luminosity_distance(z).to_value("Mpc"), rtol=1e-7)
    h = 1e-6
    num = (Planck18.luminosity_distance(z + h) - Planck18.luminosity_distance(z - h)).to_value("Mpc") / (2 * h)
    # central difference: 1e-6 relative
    assert np.allclose(luminosity_distance_derivative_mpc(z), num, rtol=1e-6)
    with pytest.raises(ValueError, match="outside"):
        luminosity_distance_mpc(-0.1)

