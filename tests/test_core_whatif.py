"""Before/after arithmetic of what-if alternatives (quakefolio.core.whatif).

Two kinds of reference: the arithmetic the what-if stage used before it moved into the
core (written out below as plain numpy, bit for bit), and closed forms: the expected
number of collapses of n identical assets is n (1 - exp(-lambda t)) (Poisson, Cornell
1968; the mean of a sum of Bernoulli variables), and a constant saving per simulated
year changes the AAL by that constant with a zero paired standard error.
"""
from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from quakefolio.core.curves import prob_in_years
from quakefolio.core.events.portfolio import aal_with_standard_error
from quakefolio.core.whatif import alternative_change, change, paired_aal_change, rerun_asset_aal


def _previous_change(before, after):
    change_ = after - before
    with np.errstate(divide="ignore", invalid="ignore"):
        relative = change_ / before if before != 0 else (0.0 if change_ == 0 else np.nan)
    return change_, relative


def _same_bits(a, b):
    return np.array(a, dtype=float).tobytes() == np.array(b, dtype=float).tobytes()


@pytest.mark.parametrize("seed", range(5))
def test_change_is_bit_identical_to_the_previous_scalar_arithmetic(seed):
    rng = np.random.default_rng(seed)
    before = np.concatenate([rng.lognormal(3, 2, 200), [0.0, 0.0, 0.0, -1.5, np.inf]])
    after = np.concatenate([before[:100] * rng.uniform(0, 2, 100), rng.normal(0, 50, 100),
                            [0.0, 2.0, np.nan, 0.0, np.inf]])
    delta, rel = change(before, after)
    for i in range(len(before)):
        d, r = _previous_change(float(before[i]), float(after[i]))
        assert _same_bits(delta[i], d) and _same_bits(rel[i], r), (before[i], after[i])
    d0, r0 = change(4.0, 3.0)  # scalars give 0-d arrays
    assert d0.shape == () and float(d0) == -1.0 and float(r0) == -0.25


def test_change_edge_cases_and_closed_form():
    delta, rel = change([0.0, 0.0, 10.0], [0.0, 1.0, 12.5])
    assert_array_equal(delta, [0.0, 1.0, 2.5])
    assert rel[0] == 0.0 and np.isnan(rel[1]) and rel[2] == 0.25
    r = np.linspace(-0.9, 3.0, 40)
    assert_allclose(change(7.0, 7.0 * (1 + r))[1], r, rtol=1e-13, atol=1e-15)


def _previous_alternative(value_all, eal_ratio_all, collapse_all, a, eal_ratio_after, collapse_after, horizon,
                          target_p, target_t):
    eal_all = eal_ratio_all * value_all
    exceed_all = prob_in_years(collapse_all, target_t) > target_p
    value = value_all[a]
    eal_before, eal_after = eal_all[a], eal_ratio_after * value
    p_before = prob_in_years(collapse_all[a], horizon)
    p_after = prob_in_years(collapse_after, horizon)
    exceed_after = prob_in_years(collapse_after, target_t) > target_p
    eal_total_after = eal_all.sum() - (eal_before - eal_after).sum()
    collapses = prob_in_years(collapse_all, horizon)
    exceed_count_after = exceed_all.sum() - exceed_all[a].sum() + exceed_after.sum()
    return (eal_before, eal_after, p_before, p_after, exceed_all[a], exceed_after,
            (float(eal_all.sum()), float(eal_total_after)),
            (float(collapses.sum()), float(collapses.sum() - (p_before - p_after).sum())),
            (float(exceed_all.sum()), float(exceed_count_after)))


@pytest.mark.parametrize("seed", range(6))
def test_alternative_change_is_bit_identical_to_the_previous_code(seed):
    rng = np.random.default_rng(100 + seed)
    n = int(rng.integers(1, 3000))
    value = rng.lognormal(13, 1, n)
    eal_ratio = rng.lognormal(-7, 1.5, n)
    collapse = rng.lognormal(-9, 1.5, n)
    collapse[rng.random(n) < 0.05] = 0.0
    a = np.sort(rng.choice(n, size=int(rng.integers(1, n + 1)), replace=False))
    eal_after = eal_ratio[a] * rng.uniform(0.1, 1.2, len(a))
    collapse_after = collapse[a] * rng.uniform(0.0, 1.1, len(a))
    got = alternative_change(value, eal_ratio, collapse, a, eal_after, collapse_after, horizon_yr=50.0,
                             target_prob=0.01, target_years=50.0)
    expected = _previous_alternative(value, eal_ratio, collapse, a, eal_after, collapse_after, 50.0, 0.01, 50.0)
    for g, e in zip(got, expected):
        assert np.asarray(g).dtype == np.asarray(e).dtype
        assert np.asarray(g).tobytes() == np.asarray(e).tobytes()


def test_alternative_change_closed_forms():
    # n identical assets, all changed: totals equal the sums of the per-asset closed forms
    n, lam, lam_after, t = 40, 2e-4, 5e-5, 50.0
    value, ratio, ratio_after = np.full(n, 2e6), np.full(n, 1e-3), np.full(n, 4e-4)
    m = alternative_change(value, ratio, np.full(n, lam), np.arange(n), ratio_after, np.full(n, lam_after),
                           horizon_yr=t, target_prob=0.01, target_years=50.0)
    assert_allclose(m.total_eal, (n * 2e6 * 1e-3, n * 2e6 * 4e-4), rtol=1e-12)
    assert_allclose(m.expected_collapses, (n * -np.expm1(-lam * t), n * -np.expm1(-lam_after * t)), rtol=1e-12)
    # 1 - exp(-2e-4 * 50) = 0.00995 < 0.01: nobody over the 1%-in-50-years target
    assert m.assets_exceeding_target == (0.0, 0.0)
    m = alternative_change(value, ratio, np.full(n, 3e-4), [3, 7], ratio_after[:2], [1e-5, 1e-5],
                           horizon_yr=t, target_prob=0.01, target_years=50.0)
    assert m.assets_exceeding_target == (float(n), float(n - 2))  # 1 - exp(-0.015) = 0.0149 > 0.01
    assert_array_equal(m.exceeds_target_before, [True, True])
    assert_array_equal(m.exceeds_target_after, [False, False])
    # nothing changes: after equals before
    m = alternative_change(value, ratio, np.full(n, lam), [0, 5], ratio[:2], [lam, lam], horizon_yr=t,
                           target_prob=0.01, target_years=50.0)
    assert m.total_eal[0] == m.total_eal[1] and m.expected_collapses[0] == m.expected_collapses[1]


@pytest.mark.parametrize("seed", range(4))
def test_paired_aal_change_matches_previous_code_and_closed_form(seed):
    rng = np.random.default_rng(7 + seed)
    before = rng.pareto(1.5, 2000) * 1e5 * (rng.random(2000) < 0.1)
    after = before * rng.uniform(0.3, 1.0, 2000)
    aal, se = paired_aal_change(before, after)
    assert _same_bits(aal, float(aal_with_standard_error(after)[0]))
    assert _same_bits(se, float(aal_with_standard_error(after - before)[1]))
    # a saving of c in every year: AAL falls by c, the paired difference has no spread
    aal_c, se_c = paired_aal_change(before, before - 250.0)
    assert_allclose(aal_c, before.mean() - 250.0, rtol=1e-12)
    assert se_c <= 1e-9 * before.mean()


def test_rerun_asset_aal_matches_previous_code_and_divides_by_years():
    rng = np.random.default_rng(3)
    n, changed = 50, np.array([4, 17, 33])
    loss_sum = rng.uniform(0, 1e6, n + len(changed))
    previous = loss_sum[:n].copy()
    previous[changed] = loss_sum[n + np.arange(len(changed))]
    got = rerun_asset_aal(loss_sum, n, changed, 5000)
    assert got.tobytes() == (previous / 5000).tobytes()
    assert_allclose(got[17], loss_sum[n + 1] / 5000, rtol=0)
    assert_array_equal(rerun_asset_aal(np.full(3, 10.0), 3, [], 2), [5.0, 5.0, 5.0])
    with pytest.raises(ValueError, match="loss_sum must have shape"):
        rerun_asset_aal(np.zeros(5), 3, [1], 10)
