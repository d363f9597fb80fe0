"""Damage-to-loss: EAL, loss-exceedance curves, beta loss ratios."""
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate, stats

from quakefolio.core.loss import beta_parameters, expected_annual_loss, loss_exceedance_rates

RATES = np.array([2e-2, 5e-3, 8e-4, 1e-4])
MDR = np.array([0.02, 0.12, 0.5, 1.0])
COV = np.array([0.8, 0.6, 0.3, 0.0])


def test_eal_summation_by_parts():
    # EAL = V sum_j (lambda_j - lambda_j+1) mu_j = V sum_j (mu_j - mu_j-1) lambda_j (Abel summation).
    occ = RATES - np.append(RATES[1:], 0.0)
    assert_allclose(expected_annual_loss(RATES, MDR, 2e6), 2e6 * np.sum(occ * MDR), rtol=1e-14)


def test_beta_moments_match_scipy():
    # Method-of-moments beta parameters reproduce the mean and CoV (scipy.stats.beta as reference).
    a, b = beta_parameters(MDR[:3], COV[:3])
    dist = stats.beta(a, b)
    assert_allclose(dist.mean(), MDR[:3], rtol=1e-12)
    assert_allclose(dist.std() / dist.mean(), COV[:3], rtol=1e-12)


def test_loss_curve_integrates_to_eal():
    # The integral over l in [0, 1] of nu(LR > l) equals E[annual loss ratio] = EAL / V.
    grid = np.linspace(0.0, 1.0, 20001)
    curve = loss_exceedance_rates(RATES, MDR, grid, COV)
    assert_allclose(integrate.trapezoid(curve, grid), expected_annual_loss(RATES, MDR), rtol=1e-4)


def test_loss_curve_against_scipy_beta_sf():
    # nu(l) = sum_j (lambda_j - lambda_j+1) P(LR_j > l), P from scipy.stats.beta.sf.
    occ = RATES - np.append(RATES[1:], 0.0)
    a, b = beta_parameters(MDR, COV)
    l = np.array([0.01, 0.1, 0.45, 0.9])
    expected = sum(occ[j] * (stats.beta(a[j], b[j]).sf(l) if COV[j] > 0 else (MDR[j] > l)) for j in range(4))
    assert_allclose(loss_exceedance_rates(RATES, MDR, l, COV), expected, rtol=1e-12)


def test_deterministic_loss_ratios_give_a_step_curve():
    curve = loss_exceedance_rates(RATES, MDR, [0.0, 0.05, 0.3, 0.99])
    assert_allclose(curve, [RATES[0], RATES[1], RATES[2], RATES[3]], rtol=1e-14)


@pytest.mark.parametrize("mdr, cov, match", [
    ([0.1, 0.05], None, "non-decreasing"),
    ([0.1, 1.2], None, r"\[0, 1\]"),
    ([0.5, 0.9], [0.1, 0.5], "too large for a beta"),
    ([0.5, 1.0], [0.1, 0.2], "exactly 0 or 1"),
])
def test_invalid_damage_ratios(mdr, cov, match):
    with pytest.raises(ValueError, match=match):
        loss_exceedance_rates([1e-2, 1e-3], mdr, [0.1], cov)
