"""Classical hazard kernels against closed forms."""
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from quakefolio.core.hazard import (
    DisaggBins, disaggregation_from_pairs, disaggregation_summary, exceedance_probability, hazard_from_pairs,
    pair_index, weighted_fractiles, weighted_mean,
)


def closed_form_rate(y, nu, b, m_min, c1, c2, c3, r_km, sigma):
    r"""Exceedance rate for one point source with unbounded exponential magnitudes.

    Cornell (1968), BSSA 58(5); Esteva (1970): with f_M(m) = beta exp(-beta (m - Mmin)),
    beta = b ln 10, m >= Mmin, and ln Y = c1 + c2 M - c3 ln R + sigma eps, integration by
    parts gives, with L = ln y - c1 + c3 ln R and u0 = (c2 Mmin - L)/sigma,

        P(Y > y) = Phi(u0) + exp(beta Mmin - beta L / c2 + beta^2 sigma^2 / (2 c2^2))
                             * Phi(-u0 - beta sigma / c2),

    the exact finite-Mmin form; for y large the second term dominates and gives the
    power law nu C y^(-beta/c2) of Cornell (1968).
    """
    beta = b * np.log(10)
    lam_l = np.log(y) - c1 + c3 * np.log(r_km)
    u0 = (c2 * m_min - lam_l) / sigma
    k = beta * sigma / c2
    return nu * (stats.norm.cdf(u0) + np.exp(beta * m_min - beta * lam_l / c2 + 0.5 * k * k) * stats.norm.cdf(-u0 - k))


def test_point_source_exponential_magnitudes_matches_closed_form():
    nu, b, m_min = 0.2, 1.0, 5.0
    c1, c2, c3, sigma, r_km = -3.5, 1.0, 1.2, 0.6, 25.0
    beta = b * np.log(10)
    width = 0.005
    edges = m_min + np.arange(0.0, 9.0 + width / 2, width)  # up to Mmin + 9: remaining rate ~ 1e-9 nu
    rates = nu * (np.exp(-beta * (edges[:-1] - m_min)) - np.exp(-beta * (edges[1:] - m_min)))
    mags = 0.5 * (edges[:-1] + edges[1:])
    mu = c1 + c2 * mags - c3 * np.log(r_km)
    y = np.geomspace(0.005, 2.0, 25)
    site, rup, starts, owners = pair_index(np.ones((1, len(mags)), dtype=bool))
    got = hazard_from_pairs(np.log(y), mu[rup], np.full(len(rup), sigma), rates[rup], starts, owners, 1)[0]
    expected = closed_form_rate(y, nu, b, m_min, c1, c2, c3, r_km, sigma)
    assert_allclose(got, expected, rtol=5e-3)  # the tolerance: 0.5 %
    assert np.max(np.abs(got / expected - 1)) < 1e-3  # measured discretisation error is far smaller


def test_zero_sigma_single_rupture_is_a_step_at_the_median():
    # With sigma = 0 the motion is the median itself: P(Y > y) = 1[y < median] (exact).
    mu = np.log(0.3)
    y = np.array([0.1, 0.29, 0.3, 0.31, 1.0])
    p = exceedance_probability(np.log(y), np.array([mu]), np.array([0.0]))[0]
    assert_allclose(p, [1, 1, 0, 0, 0])
    site, rup, starts, owners = pair_index(np.ones((1, 1), dtype=bool))
    curve = hazard_from_pairs(np.log(y), np.array([mu]), np.array([0.0]), np.array([0.01]), starts, owners, 1)
    assert_allclose(curve[0], [0.01, 0.01, 0, 0, 0])


@pytest.mark.parametrize("n", [1.0, 2.0, 3.0])
def test_truncation_matches_scipy_truncnorm(n):
    # P(eps > e) for a standard normal truncated at +-n: scipy.stats.truncnorm(-n, n).sf(e).
    e = np.linspace(-4, 4, 33)
    got = exceedance_probability(e, np.zeros(1), np.ones(1), truncation_sigma=n)[0]
    assert_allclose(got, stats.truncnorm(-n, n).sf(e), atol=1e-14)


def test_segments_give_per_site_sums():
    rng = np.random.default_rng(7)
    mask = rng.random((6, 40)) < 0.5
    mask[3] = False  # a site with no rupture within the cut-off
    mu, sd, rate = rng.normal(-2, 0.5, 40), rng.uniform(0.4, 0.8, 40), rng.uniform(1e-4, 1e-2, 40)
    site, rup, starts, owners = pair_index(mask)
    lnx = np.log(np.geomspace(0.01, 2, 12))
    got = hazard_from_pairs(lnx, mu[rup], sd[rup], rate[rup], starts, owners, 6, chunk=7)
    ref = np.array([(exceedance_probability(lnx, mu[m], sd[m]) * rate[m, None]).sum(0) for m in mask])
    assert_allclose(got, ref, rtol=1e-12)
    assert np.all(got[3] == 0)


def test_weighted_statistics():
    curves = np.array([[1.0, 0.5], [2.0, 0.1], [4.0, 0.3]])
    w = np.array([0.2, 0.5, 0.3])
    assert_allclose(weighted_mean(curves, w), [0.2 + 1.0 + 1.2, 0.1 + 0.05 + 0.09])
    # inverse weighted CDF: sorted values with cumulative weights
    assert_allclose(weighted_fractiles(curves, w, [0.1, 0.5, 0.9]), [[1.0, 0.1], [2.0, 0.1], [4.0, 0.5]])
    with pytest.raises(ValueError, match="sum to 1"):
        weighted_mean(curves, [0.2, 0.2, 0.2])


def test_disaggregation_sums_to_one_and_recovers_the_rate():
    rng = np.random.default_rng(3)
    n = 300
    mag, dist = rng.uniform(5, 7.5, n), rng.uniform(1, 150, n)
    mu = -4 + 0.9 * mag - 1.1 * np.log(dist + 5)
    sd, rate = np.full(n, 0.6), rng.uniform(1e-5, 1e-3, n)
    site, rup, starts, owners = pair_index(np.ones((1, n), dtype=bool))
    lnx = np.log(np.array([[0.1, 0.4]]))
    contrib = disaggregation_from_pairs(lnx, mu[rup], sd[rup], rate[rup], site, mag[rup], dist[rup],
                                        DisaggBins.default(), 1)
    total = hazard_from_pairs(lnx[0], mu, sd, rate, starts, owners, 1)[0]
    assert_allclose(contrib.sum(axis=(-3, -2, -1))[0], total, rtol=1e-12)
    shares, mm, mr, me, *_ = disaggregation_summary(contrib, DisaggBins.default())
    assert_allclose(shares.sum(axis=(-3, -2, -1)), 1.0, rtol=1e-12)
    assert mm[0, 1] > mm[0, 0]  # rarer motions come from larger magnitudes
    assert me[0, 1] > me[0, 0]
