"""Engineering economics (quakefolio.core.economics) against closed forms.

Source: standard engineering-economics identities (common practice): the ordinary-annuity
factor is the sum of the discounted unit payments, sum_{t=1..T} (1 + r)^-t.
"""
from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from quakefolio.core.economics import annuity_factor, benefit_cost_ratio, present_value
from quakefolio.pipeline.stages import whatif


@pytest.mark.parametrize("r, t", [(0.03, 50), (0.07, 10), (0.001, 100), (0.25, 3), (1e-6, 40)])
def test_annuity_factor_is_the_sum_of_discounted_unit_payments(r, t):
    explicit = sum((1.0 + r) ** -k for k in range(1, t + 1))
    assert_allclose(annuity_factor(r, t), explicit, rtol=1e-12)


def test_annuity_factor_limits_and_identities():
    assert annuity_factor(0.0, 50) == 50.0  # r = 0: T payments of 1
    assert_allclose(annuity_factor(1e-12, 50), 50.0, rtol=1e-9)  # continuous at r = 0
    # perpetuity: a(r, T) -> 1/r as T grows
    assert_allclose(annuity_factor(0.05, 2000), 1 / 0.05, rtol=1e-12)
    # a(r, T1 + T2) = a(r, T1) + (1 + r)^-T1 a(r, T2) (payments of the later years, deferred)
    r = np.array([0.01, 0.04, 0.1])
    assert_allclose(annuity_factor(r, 30), annuity_factor(r, 10) + (1 + r) ** -10 * annuity_factor(r, 20), rtol=1e-12)
    # one payment: 1 / (1 + r)
    assert_allclose(annuity_factor(r, 1), 1 / (1 + r), rtol=1e-14)
    # broadcasting over rates and horizons
    assert annuity_factor(r[:, None], np.array([5.0, 10.0])).shape == (3, 2)


def test_annuity_factor_rejects_bad_arguments():
    with pytest.raises(ValueError, match="discount_rate must be non-negative"):
        annuity_factor(-0.01, 10)
    with pytest.raises(ValueError, match="discount_rate must be non-negative"):
        annuity_factor(np.nan, 10)
    with pytest.raises(ValueError, match="years must be positive"):
        annuity_factor(0.03, 0)


def test_present_value_and_benefit_cost_ratio():
    amounts = np.array([0.0, 1234.5, 2000.0])
    for r, t in ((0.03, 50), (0.0, 25)):
        explicit = sum((1.0 + r) ** -k for k in range(1, t + 1))
        assert_allclose(present_value(amounts, r, t), amounts * explicit, rtol=1e-12)
    assert present_value(2000.0, 0.0, 25) == 50000.0
    pv = present_value(amounts, 0.03, 50)
    assert_allclose(benefit_cost_ratio(pv, 1000.0), pv / 1000.0, rtol=0)
    assert benefit_cost_ratio(5.0, 0.0) == np.inf  # a free alternative stays visible
    assert np.isnan(benefit_cost_ratio(0.0, 0.0))


def test_whatif_reexports_the_core_functions():
    assert whatif.annuity_factor is annuity_factor
    assert whatif.present_value is present_value
