"""Hazard-curve arithmetic: interpolation, inversion, Poisson conversions, validation."""
import numpy as np
import pytest
from numpy.testing import assert_allclose

from quakefolio.core.curves import (
    im_at_rate, interpolate_period, prob_in_years, rate_at_im, rate_from_prob, return_period, validate_curve,
)

LEVELS = np.geomspace(0.001, 4.0, 31)


def power_law(x, k0=1e-4, k=2.5):
    return k0 * np.asarray(x) ** -k


def test_rate_at_im_is_exact_on_a_power_law():
    # A power law is a straight line in log-log space: log-log interpolation is exact
    # (common practice; only round-off remains).
    x = np.array([0.0013, 0.05, 0.77, 3.9])
    assert_allclose(rate_at_im(x, LEVELS, power_law(LEVELS)), power_law(x), rtol=1e-12)


def test_im_at_rate_inverts_rate_at_im():
    lam = np.exp(-5.0 - 1.5 * np.log(LEVELS) - 0.1 * np.log(LEVELS) ** 2)
    x = np.array([0.002, 0.03, 0.4, 2.5])
    assert_allclose(im_at_rate(rate_at_im(x, LEVELS, lam), LEVELS, lam), x, rtol=1e-12)


def test_outside_range_is_nan_never_extrapolated():
    lam = power_law(LEVELS)
    assert np.isnan(rate_at_im(0.0005, LEVELS, lam))
    assert np.isnan(rate_at_im(5.0, LEVELS, lam))
    assert np.isnan(im_at_rate(lam[0] * 1.01, LEVELS, lam))
    assert np.isnan(im_at_rate(lam[-1] * 0.99, LEVELS, lam))
    assert rate_at_im(LEVELS[-1], LEVELS, lam) == lam[-1]


def test_batches_of_curves_broadcast():
    lam = np.vstack([power_law(LEVELS), power_law(LEVELS, k0=2e-4)])
    out = rate_at_im([0.1, 0.2, 0.3], LEVELS, lam)
    assert out.shape == (2, 3)
    assert_allclose(out[1] / out[0], 2.0, rtol=1e-12)
    assert im_at_rate(1e-3, LEVELS, lam).shape == (2,)


def test_segment_to_zero_rate_is_linear_in_log_im():
    x = np.array([0.1, 0.2, 0.4])
    lam = np.array([1e-2, 1e-3, 0.0])
    mid = np.sqrt(0.2 * 0.4)
    assert_allclose(rate_at_im(mid, x, lam), 0.5e-3, rtol=1e-12)
    assert_allclose(im_at_rate(0.5e-3, x, lam), mid, rtol=1e-12)


def test_poisson_common_practice_return_periods():
    # common practice: 10% in 50 years is the 475-year motion, 2% in 50 years the 2475-year
    # motion (T = -t / ln(1 - P): 474.56 and 2474.9 years).
    assert round(float(return_period(rate_from_prob(0.10, 50)))) == 475
    assert round(float(return_period(rate_from_prob(0.02, 50)))) == 2475
    assert_allclose(prob_in_years(rate_from_prob(0.02, 50), 50), 0.02, rtol=1e-14)
    # P = 1 - exp(-lambda t) for a Poisson process (Cornell 1968)
    assert_allclose(prob_in_years(1e-3, 50), 1 - np.exp(-0.05), rtol=1e-14)
    assert return_period(0.0) == np.inf


@pytest.mark.parametrize("levels, rates, match", [
    ([0.1, 0.1, 0.2], [3, 2, 1], "strictly increasing"),
    ([0.1, 0.2, 0.3], [1, 2, 0.5], "non-increasing"),
    ([-0.1, 0.2, 0.3], [3, 2, 1], "positive"),
    ([0.1, 0.2, 0.3], [3, np.nan, 1], "non-negative and finite"),
    ([0.1, 0.2, 0.3], [3, 2, -1], "non-negative"),
    ([0.1], [1], "at least 2"),
])
def test_invalid_curves_are_loud(levels, rates, match):
    with pytest.raises(ValueError, match=match):
        validate_curve(levels, rates)


def test_period_interpolation_is_exact_for_power_laws_with_log_linear_scaling():
    # If ln x_T(r) is linear in ln T at every rate, uniform-hazard interpolation
    # reproduces it exactly (construction of interpolate_period; common practice).
    # Curves lambda_T(x) = k0 (x / a_T)^-k with ln a_T linear in ln T.
    k0, k = 1e-3, 2.0
    a = lambda t: np.exp(0.3 - 0.5 * np.log(t))
    lam1 = k0 * (LEVELS / a(0.3)) ** -k
    lam2 = k0 * (LEVELS / a(1.0)) ** -k
    x, r = interpolate_period(0.6, 0.3, LEVELS, lam1, 1.0, LEVELS, lam2)
    assert_allclose(r, k0 * (x / a(0.6)) ** -k, rtol=1e-10)
