"""The distance ansatz against Singer et al. (2016) and numerical quadrature.

Check values: REFERENCES.md table "Distance ansatz — Singer et al. 2016, ApJL 829,
L15 and ApJS 226, 10", computed from the closed forms there and cross-checked by
quadrature. Tolerance 1e-7 relative: the table has 8 significant digits.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate

from matcher.sky import distance as d

# (mu, sigma) -> (N, mean, std); source: REFERENCES.md (Singer et al. 2016 closed forms).
TABLE = [
    (100.0, 20.0, 9.6153846e-5, 107.692308, 19.276868),
    (100.0, 50.0, 8.0092406e-5, 140.216213, 43.139713),
    (0.0, 100.0, 2.0e-4, 159.576912, 67.343961),  # mu = 0 is the Maxwell distribution
    (-50.0, 100.0, 4.7700989e-4, 138.701827, 61.860421),
]


@pytest.mark.parametrize("mu,sigma,norm,mean,std", TABLE)
def test_table_values(mu, sigma, norm, mean, std):
    assert d.ansatz_norm(mu, sigma) == pytest.approx(norm, rel=1e-7)
    m, s = d.conditional_moments(mu, sigma)
    assert m == pytest.approx(mean, rel=1e-7)
    assert s == pytest.approx(std, rel=1e-7)


def test_vectorized_table():
    mu = np.array([t[0] for t in TABLE])
    sigma = np.array([t[1] for t in TABLE])
    m, s = d.conditional_moments(mu, sigma)
    np.testing.assert_allclose(m, [t[3] for t in TABLE], rtol=1e-7)
    np.testing.assert_allclose(s, [t[4] for t in TABLE], rtol=1e-7)


def test_inverse_check_value():
    # REFERENCES.md: (mean 100, std 20) -> mu = 90.797511, sigma = 20.978154.
    mu, sigma, norm = d.parameters_from_moments(100.0, 20.0)
    assert mu == pytest.approx(90.797511, rel=1e-7)
    assert sigma == pytest.approx(20.978154, rel=1e-7)
    assert norm == pytest.approx(d.ansatz_norm(mu, sigma), rel=1e-12)


@pytest.mark.parametrize("mu,sigma", [(100.0, 20.0), (-50.0, 100.0), (10.0, 400.0), (-300.0, 40.0), (2000.0, 30.0)])
def test_against_quadrature(mu, sigma):
    # Independent check: integrate the ansatz numerically (scipy.integrate.quad).
    norm = d.ansatz_norm(mu, sigma)
    pdf = lambda r: d.conditional_pdf(r, mu, sigma, norm)  # noqa: E731
    hi = max(mu, 0) + 40 * sigma
    total, _ = integrate.quad(pdf, 0, hi, limit=400, points=[max(mu, 0)])
    m1, _ = integrate.quad(lambda r: r * pdf(r), 0, hi, limit=400, points=[max(mu, 0)])
    m2, _ = integrate.quad(lambda r: r * r * pdf(r), 0, hi, limit=400, points=[max(mu, 0)])
    mean, std = d.conditional_moments(mu, sigma)
    assert total == pytest.approx(1.0, rel=1e-8)
    assert mean == pytest.approx(m1, rel=1e-7)
    assert std == pytest.approx(np.sqrt(m2 - m1 * m1), rel=1e-6)


def test_round_trip_over_a_grid():
    mean = np.geomspace(5, 5000, 40)[:, None] * np.ones((1, 30))
    ratio = np.linspace(0.02, 0.55, 30)[None, :]
    std = mean * ratio
    mu, sigma, _ = d.parameters_from_moments(mean, std)
    m2, s2 = d.conditional_moments(mu, sigma)
    np.testing.assert_allclose(m2, mean, rtol=1e-9)
    np.testing.assert_allclose(s2, std, rtol=1e-8)


@pytest.mark.parametrize("mean,std", [(100.0, 60.0), (100.0, 100 / np.sqrt(3)), (-5.0, 1.0), (100.0, 0.0), (np.nan, 1.0)])
def test_inverse_rejects_unrepresentable(mean, std):
    # std/mean >= 1/sqrt(3) is the mu -> -inf (Gamma(3)) limit of the ansatz (REFERENCES.md).
    with pytest.raises(ValueError, match="cannot be represented"):
        d.parameters_from_moments(mean, std)
    mu, sigma, norm = d.parameters_from_moments(np.array([mean, 100.0]), np.array([std, 20.0]), strict=False)
    assert np.isnan(mu[0]) and np.isnan(sigma[0]) and np.isnan(norm[0])
    assert mu[1] == pytest.approx(90.797511, rel=1e-7)


def test_dp_dv_check_value():
    # REFERENCES.md: nside 64 pixel (A = 2.5566346e-4 sr), probability 1e-3, mu=100,
    # sigma=20, r=110 -> 6.6205070e-6 Mpc^-3.
    area = 2.5566346e-4
    rho = 1e-3 / area
    val = d.volume_density(rho, 110.0, 100.0, 20.0, d.ansatz_norm(100.0, 20.0))
    assert val == pytest.approx(6.6205070e-6, rel=1e-6)


def test_not_applicable_pixels_give_nan():
    # The trade's convention for pixels without distance information (from memory):
    # DISTMU=+inf, DISTSIGMA=1, DISTNORM=0.
    m, s = d.conditional_moments(np.array([np.inf, 100.0]), np.array([1.0, 20.0]))
    assert np.isnan(m[0]) and np.isnan(s[0]) and np.isfinite(m[1])
    assert d.conditional_pdf(100.0, np.inf, 1.0, 0.0) == 0.0


def test_marginal_moments_match_mixture_quadrature():
    rng = np.random.default_rng(3)
    mu = rng.uniform(50, 300, 25)
    sigma = rng.uniform(10, 80, 25)
    prob = rng.dirichlet(np.ones(25))
    norm = d.ansatz_norm(mu, sigma)
    mean, std = d.marginal_moments(prob, mu, sigma)
    r = np.linspace(0, 1500, 300001)
    pdf = d.marginal_pdf(r, prob, mu, sigma, norm)
    # Trapezoid quadrature of the mixture on a fine grid: independent of the moment formulas.
    m0 = integrate.trapezoid(pdf, r)
    m1 = integrate.trapezoid(r * pdf, r)
    m2 = integrate.trapezoid(r * r * pdf, r)
    assert m0 == pytest.approx(1.0, rel=1e-6)
    assert mean == pytest.approx(m1, rel=1e-6)
    assert std == pytest.approx(np.sqrt(m2 - m1 * m1), rel=1e-5)
