"""Magnitude-frequency distributions: truncated Gutenberg-Richter, characteristic, moment balance."""
import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from quakefolio.core.sources.mfd import (
    MagnitudeBins,
    characteristic_yc85,
    mfd_moment_rate,
    moment_balanced,
    moment_rate_from_slip,
    seismic_moment_nm,
    single_magnitude,
    truncated_gr,
)


def cosentino_cdf(m, b, mmin, mmax):
    # Cosentino, Ficarra & Luzio (1977), BSSA 67(6), eq. (a) integrated:
    # F(m) = (1 - 10^{-b(m - Mmin)}) / (1 - 10^{-b(Mmax - Mmin)}), Mmin <= m <= Mmax.
    return (1.0 - 10.0 ** (-b * (m - mmin))) / (1.0 - 10.0 ** (-b * (mmax - mmin)))


@pytest.mark.parametrize("b, mmin, mmax, dm", [(1.0, 5.0, 7.5, 0.1), (0.8, 4.5, 8.0, 0.25), (1.2, 5.0, 6.0, 0.05)])
def test_truncated_gr_bins_are_differences_of_the_cosentino_cdf(b, mmin, mmax, dm):
    total = 0.37
    bins = truncated_gr(b_value=b, mmin=mmin, mmax=mmax, bin_width=dm, rate_above_mmin=total)
    n = int(round((mmax - mmin) / dm))
    edges = mmin + dm * np.arange(n + 1)
    expected = total * np.diff(cosentino_cdf(edges, b, mmin, mmax))
    assert_allclose(bins.rate, expected, rtol=1e-12)  # closed form: round-off only
    assert_allclose(bins.mag, 0.5 * (edges[:-1] + edges[1:]), atol=1e-12)
    assert_allclose(bins.rate.sum(), total, rtol=1e-13)


def test_truncated_gr_from_a_value_follows_the_untruncated_line_inside_the_range():
    # With an a-value, the bins are the increments of log10 N(>=m) = a - b m
    # (Gutenberg & Richter 1944) between Mmin and Mmax (our documented convention).
    a, b = 4.2, 0.95
    bins = truncated_gr(b_value=b, mmin=5.0, mmax=7.0, bin_width=0.1, a_value=a)
    lo, hi = bins.mag - 0.05, bins.mag + 0.05
    assert_allclose(bins.rate, 10 ** (a - b * lo) - 10 ** (a - b * hi), rtol=1e-12)
    assert_allclose(bins.total_rate, 10 ** (a - b * 5.0) - 10 ** (a - b * 7.0), rtol=1e-12)


def test_truncated_gr_rejects_bad_arguments():
    with pytest.raises(ValueError, match="exactly one of rate_above_mmin and a_value"):
        truncated_gr(b_value=1.0, mmin=5.0, mmax=7.0)
    with pytest.raises(ValueError, match="exactly one"):
        truncated_gr(b_value=1.0, mmin=5.0, mmax=7.0, rate_above_mmin=1.0, a_value=3.0)
    with pytest.raises(ValueError, match="whole number of bins"):
        truncated_gr(b_value=1.0, mmin=5.0, mmax=7.05, bin_width=0.1, rate_above_mmin=1.0)
    with pytest.raises(ValueError, match="mmax must be > mmin"):
        truncated_gr(b_value=1.0, mmin=7.0, mmax=5.0, rate_above_mmin=1.0)
    with pytest.raises(ValueError, match="b_value must be > 0"):
        truncated_gr(b_value=-1.0, mmin=5.0, mmax=7.0, rate_above_mmin=1.0)


# --------------------------------------------------------------------------- #
# Youngs & Coppersmith (1985), BSSA 75(4): exponential density up to Mchar - 0.25, then a
# box of width 0.5 centred on Mchar whose height is the exponential density at
# Mchar - 1.25 (Delta m1 = 1.0 below the box); the whole normalised to one.
# --------------------------------------------------------------------------- #
B, MMIN, MCHAR, DM = 1.0, 5.0, 7.0, 0.05
BETA = B * math.log(10)


@pytest.fixture
def yc():
    return characteristic_yc85(b_value=B, mmin=MMIN, mchar=MCHAR, bin_width=DM, total_rate=0.02)


def test_yc85_total_rate_and_range(yc):
    assert_allclose(yc.total_rate, 0.02, rtol=1e-13)
    assert_allclose(yc.mag[0], MMIN + DM / 2, atol=1e-12)
    assert_allclose(yc.mag[-1], MCHAR + 0.25 - DM / 2, atol=1e-12)


def test_yc85_box_is_flat_half_a_unit_wide_and_centred_on_mchar(yc):
    in_box = yc.mag > MCHAR - 0.25
    assert in_box.sum() == round(0.5 / DM)
    assert_allclose(yc.mag[in_box].mean(), MCHAR, atol=1e-12)
    assert_allclose(yc.rate[in_box], yc.rate[in_box][0], rtol=1e-12)


def test_yc85_box_height_is_the_exponential_density_at_mchar_minus_1_25(yc):
    # Youngs & Coppersmith (1985): box height = exponential density 1.0 unit below the box.
    # A bin [lo, lo + dm] of an exponential density holds f(lo) (1 - exp(-beta dm)) / beta
    # (exact), so the density at the bin's lower edge is recovered exactly.
    i = int(np.argmin(np.abs((yc.mag - DM / 2) - (MCHAR - 1.25))))
    assert_allclose(yc.mag[i] - DM / 2, MCHAR - 1.25, atol=1e-12)
    density_exp = yc.rate[i] * BETA / -math.expm1(-BETA * DM)
    density_box = yc.rate[-1] / DM
    assert_allclose(density_box, density_exp, rtol=1e-12)


def test_yc85_exponential_part_has_the_gutenberg_richter_slope(yc):
    below = yc.mag < MCHAR - 0.25
    ratios = yc.rate[below][1:] / yc.rate[below][:-1]
    assert_allclose(ratios, 10 ** (-B * DM), rtol=1e-12)


def test_yc85_characteristic_share_matches_the_closed_form(yc):
    # Share of events in the box = C / (1 + C), with
    # C = beta exp(-beta (mu - m0 - dm1 - dm2)) / (1 - exp(-beta (mu - m0 - dm2))) * dm2.
    mu = MCHAR + 0.25
    c = BETA * math.exp(-BETA * (mu - MMIN - 1.0 - 0.5)) / (1 - math.exp(-BETA * (mu - MMIN - 0.5))) * 0.5
    share = yc.rate[yc.mag > MCHAR - 0.25].sum() / yc.total_rate
    assert_allclose(share, c / (1 + c), rtol=1e-12)


def test_yc85_from_moment_rate_releases_that_moment():
    rate = moment_rate_from_slip(2.0, 30.0 * 12.0, 3.0e10)
    bins = characteristic_yc85(b_value=0.9, mmin=5.0, mchar=6.8, moment_rate_nm_per_yr=rate)
    m0 = 10 ** (1.5 * bins.mag + 9.05)  # Hanks & Kanamori (1979) in N m
    assert_allclose(np.sum(bins.rate * m0), rate, rtol=1e-12)
    shape = characteristic_yc85(b_value=0.9, mmin=5.0, mchar=6.8, total_rate=1.0)
    assert_allclose(bins.rate / bins.total_rate, shape.rate, rtol=1e-12)


def test_yc85_rejects_an_empty_exponential_part_and_misaligned_bins():
    with pytest.raises(ValueError, match="exponential part must not be empty"):
        characteristic_yc85(b_value=1.0, mmin=6.0, mchar=6.2, total_rate=1.0)
    with pytest.raises(ValueError, match="whole number of bins"):
        characteristic_yc85(b_value=1.0, mmin=5.0, mchar=7.0, bin_width=0.1, total_rate=1.0)


# --------------------------------------------------------------------------- #
# Moment
# --------------------------------------------------------------------------- #
def test_hanks_kanamori_moment():
    # Hanks & Kanamori (1979): Mw = 2/3 log10 M0[dyne cm] - 10.7; 1 N m = 1e7 dyne cm.
    mw = np.array([5.0, 6.0, 7.3])
    m0_dyne_cm = 10 ** (1.5 * (mw + 10.7))
    assert_allclose(seismic_moment_nm(mw), m0_dyne_cm * 1e-7, rtol=1e-12)
    # the rounded IASPEI form: log10 M0 = 1.5 Mw + 9.1 (common practice)
    assert_allclose(seismic_moment_nm(6.0, moment_constant=9.1), 10 ** 18.1, rtol=1e-12)
    with pytest.raises(ValueError, match="9.05 .* or 9.1"):
        seismic_moment_nm(6.0, moment_constant=16.05)


def test_moment_rate_from_slip_by_hand():
    # M0_dot = mu A s (Aki 1966 per unit time): 3e10 Pa * 40 km x 15 km * 5 mm/yr
    # = 3e10 * 6e8 m^2 * 5e-3 m/yr = 9e16 N m/yr.
    assert_allclose(moment_rate_from_slip(5.0, 40.0 * 15.0, 3.0e10), 9.0e16, rtol=1e-14)
    with pytest.raises(ValueError, match="shear_modulus_pa must be > 0"):
        moment_rate_from_slip(5.0, 600.0, 0.0)


@pytest.mark.parametrize("constant", [9.05, 9.1])
def test_moment_balance_sum_rate_m0_equals_mu_a_s(constant):
    # Sum of rate x M0(m) = mu A s, M0 from Hanks & Kanamori (1979) with the stated constant.
    mu, area, slip = 3.2e10, 55.0 * 18.0, 3.5
    target = mu * area * 1e6 * slip * 1e-3
    gr = truncated_gr(b_value=1.0, mmin=5.0, mmax=7.4, bin_width=0.1, rate_above_mmin=1.0)
    balanced = moment_balanced(gr, moment_rate_from_slip(slip, area, mu), moment_constant=constant)
    assert_allclose(np.sum(balanced.rate * 10 ** (1.5 * balanced.mag + constant)), target, rtol=1e-12)
    assert_allclose(mfd_moment_rate(balanced, moment_constant=constant), target, rtol=1e-12)
    assert_allclose(balanced.rate / gr.rate, balanced.rate[0] / gr.rate[0], rtol=1e-12)  # shape kept


def test_moment_balance_needs_a_shape():
    with pytest.raises(ValueError, match="no positive rate"):
        moment_balanced(MagnitudeBins(np.array([6.0]), np.array([0.0])), 1e16)


def test_single_magnitude():
    bins = single_magnitude(6.5, 0.004)
    assert bins.mag.tolist() == [6.5] and bins.rate.tolist() == [0.004]
    mag, rate = bins  # unpacks as (mag, rate)
    assert mag.shape == rate.shape == (1,)
    # moment balancing a single magnitude: rate = M0_dot / M0(m) (Hanks & Kanamori 1979)
    assert_allclose(moment_balanced(bins, 1e17).rate, 1e17 / 10 ** (1.5 * 6.5 + 9.05), rtol=1e-12)
    with pytest.raises(ValueError, match="rate must be >= 0"):
        single_magnitude(6.5, -1.0)
