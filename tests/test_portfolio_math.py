"""Loss and aggregation math of the event-based portfolio stage (quakefolio.core.events.portfolio)."""
import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from scipy import integrate, stats

from quakefolio.core.loss import beta_parameters
from quakefolio.core.events.portfolio import (
    aal_with_standard_error,
    apply_policy,
    ep_from_years,
    expected_loss_ratio,
    full_ep_curve,
    oep_closed_form,
    oep_closed_form_probabilistic,
    sample_loss_ratio,
    tvar,
    year_loss,
)

# An invented four-state building class (ordered curves over any realistic IM range).
MEDIANS = np.array([0.15, 0.35, 0.70, 1.20])  # [g]
BETAS = np.array([0.60, 0.55, 0.50, 0.50])
MDR = np.array([0.02, 0.10, 0.45, 1.00])
COV = np.array([0.80, 0.50, 0.30, 0.00])


def _occupancy(im):
    """P(DS = j) = P_j - P_j+1 from scipy.stats.lognorm (independent of the module)."""
    p = stats.lognorm.cdf(np.asarray(im, float)[..., None], s=BETAS, scale=MEDIANS)
    return p - np.concatenate([p[..., 1:], np.zeros_like(p[..., :1])], axis=-1)


# --------------------------------------------------------------------------- expected_loss_ratio


def test_expected_loss_ratio_is_total_expectation_over_states():
    # E[LR | x] = sum_j (P_j - P_j+1) MDR_j, P_j = scipy.stats.lognorm.cdf (law of total expectation).
    im = np.logspace(-2, 1, 40)
    assert_allclose(expected_loss_ratio(im, MEDIANS, BETAS, MDR), _occupancy(im) @ MDR, rtol=1e-12, atol=1e-15)


def test_expected_loss_ratio_equals_mean_of_sampled_damage_states():
    # Monte Carlo expectation: states drawn with rng.choice from P(DS = j), independent of the module.
    rng = np.random.default_rng(20240611)
    n = 200_000
    for im in (0.1, 0.4, 1.5):
        occ = _occupancy(im)
        probs = np.concatenate([[1.0 - occ.sum()], occ])
        ds = rng.choice(5, size=n, p=probs)
        lr = np.concatenate([[0.0], MDR])[ds]
        se = lr.std(ddof=1) / np.sqrt(n)
        assert abs(lr.mean() - expected_loss_ratio(im, MEDIANS, BETAS, MDR)) < 4 * se


def test_expected_loss_ratio_monotone_and_limits():
    # Monotone: sum of non-decreasing fragilities with non-negative MDR increments (summation by parts).
    im = np.logspace(-5, 3, 4001)
    lr = expected_loss_ratio(im, MEDIANS, BETAS, MDR)
    assert np.all(np.diff(lr) >= 0)
    assert expected_loss_ratio(0.0, MEDIANS, BETAS, MDR) == 0.0          # Phi(-inf) = 0
    assert expected_loss_ratio(np.inf, MEDIANS, BETAS, MDR) == MDR[-1]   # Phi(+inf) = 1, occupancy of the top state
    assert_allclose(expected_loss_ratio(1e3, MEDIANS, BETAS, MDR), MDR[-1], rtol=1e-12)
    assert expected_loss_ratio(1e-5, MEDIANS, BETAS, MDR) < 1e-15


def test_expected_loss_ratio_broadcasts_events_by_assets():
    # im (n_events, n_assets) with per-asset fragilities (n_assets, n_ds) equals the per-asset loop.
    rng = np.random.default_rng(7)
    medians = np.array([MEDIANS, 1.5 * MEDIANS, 0.7 * MEDIANS])
    betas = np.array([BETAS, BETAS, 0.8 * BETAS])
    im = rng.lognormal(np.log(0.3), 0.8, size=(6, 3))
    got = expected_loss_ratio(im, medians, betas, MDR)
    assert got.shape == (6, 3)
    for a in range(3):
        assert_allclose(got[:, a], expected_loss_ratio(im[:, a], medians[a], betas[a], MDR), rtol=1e-14)


def test_expected_loss_ratio_of_power_law_hazard_matches_closed_form_eal():
    # Integrating E[LR | x] over |d lambda| of lambda(x) = k0 x^-k must give
    # sum_j (MDR_j - MDR_j-1) k0 theta_j^-k exp(k^2 beta_j^2 / 2)
    # (Cornell, Jalayer, Hamburger & Foutch 2002, J. Struct. Eng. 128(4), Eq. 11, per state).
    k0, k = 1e-4, 2.5
    expected = np.sum(np.diff(MDR, prepend=0.0) * k0 * MEDIANS ** -k * np.exp(0.5 * (k * BETAS) ** 2))

    def integrand(ln_x):
        x = np.exp(ln_x)
        return expected_loss_ratio(x, MEDIANS, BETAS, MDR) * k * k0 * x ** -k  # |d lambda / d ln x|

    got, _ = integrate.quad(integrand, np.log(1e-4), np.log(1e3), limit=200, epsabs=0, epsrel=1e-10)
    assert_allclose(got, expected, rtol=1e-7)


def test_crossing_curves_use_the_upper_envelope_in_both_loss_models():
    # Curves (0.2 g, 0.3) and (0.5 g, 0.9) cross at 0.126 g (ln x* = (b2 ln t1 - b1 ln t2)/(b2 - b1)).
    # Below it P(DS >= 1) is taken as max(P_1, P_2) (envelope, as core.risk envelope=True), so the
    # occupancy of state 1 is 0 there and both loss models agree.
    medians, betas, mdr = np.array([0.2, 0.5]), np.array([0.3, 0.9]), np.array([0.1, 0.6])
    im = 0.05
    p2 = stats.lognorm.cdf(im, s=0.9, scale=0.5)
    assert p2 > stats.lognorm.cdf(im, s=0.3, scale=0.2)
    assert_allclose(expected_loss_ratio(im, medians, betas, mdr), 0.6 * p2, rtol=1e-14)
    state, lr = sample_loss_ratio(np.random.default_rng(11), np.full(400_000, im), medians, betas, mdr)
    assert not np.any(state == 1)
    assert abs(np.mean(state == 2) - p2) < 4 * np.sqrt(p2 * (1 - p2) / state.size)


def test_expected_loss_ratio_rejects_bad_inputs():
    with pytest.raises(ValueError, match="im must be non-negative"):
        expected_loss_ratio([0.1, -0.2], MEDIANS, BETAS, MDR)
    with pytest.raises(ValueError, match="non-decreasing"):
        expected_loss_ratio(0.1, MEDIANS, BETAS, MDR[::-1])
    with pytest.raises(ValueError, match="3 damage states"):
        expected_loss_ratio(0.1, MEDIANS, BETAS, MDR[:3])
    with pytest.raises(ValueError, match="medians must be positive"):
        expected_loss_ratio(0.1, -MEDIANS, BETAS, MDR)


# --------------------------------------------------------------------------- sample_loss_ratio

IM_POINTS = np.array([0.1, 0.3, 0.8, 2.0])  # [g]
N_SAMPLES = 100_000


@pytest.fixture(scope="module")
def samples():
    rng = np.random.default_rng(31415)
    im = np.broadcast_to(IM_POINTS, (N_SAMPLES, IM_POINTS.size))
    return sample_loss_ratio(rng, im, MEDIANS, BETAS, MDR, COV)


def test_sampled_state_frequencies_equal_state_probabilities(samples):
    # Inverse-CDF sampling: P(DS = j) = P_j(x) - P_j+1(x); binomial standard error sqrt(p(1-p)/n).
    state, _ = samples
    occ = _occupancy(IM_POINTS)  # (4 im, 4 states)
    for j in range(1, 5):
        freq = np.mean(state == j, axis=0)
        p = occ[:, j - 1]
        assert np.all(np.abs(freq - p) <= 4 * np.sqrt(p * (1 - p) / N_SAMPLES) + 1e-12)
    assert_allclose(np.mean(state == 0, axis=0), 1 - occ.sum(axis=1), atol=4 * 0.5 / np.sqrt(N_SAMPLES))


def test_sampled_mean_equals_expected_loss_ratio(samples):
    # E[LR | x] = sum_j P(DS = j) E[LR | DS = j] = expected_loss_ratio (beta means equal MDR_j).
    _, lr = samples
    se = lr.std(axis=0, ddof=1) / np.sqrt(N_SAMPLES)
    assert np.all(np.abs(lr.mean(axis=0) - expected_loss_ratio(IM_POINTS, MEDIANS, BETAS, MDR)) < 4 * se)


def test_sampled_loss_ratio_given_state_has_beta_moments(samples):
    # Given DS = j the loss ratio is Beta(a_j, b_j) with mean MDR_j, CoV COV_j (scipy.stats.beta as reference).
    state, lr = samples
    assert np.all(lr[state == 0] == 0.0)
    assert np.all(lr[state == 4] == MDR[3])  # COV = 0: deterministic
    a, b = beta_parameters(MDR[:3], COV[:3])
    for j in range(1, 4):
        x = lr[state == j]
        ref = stats.beta(a[j - 1], b[j - 1])
        assert x.size > 5000
        assert abs(x.mean() - ref.mean()) < 4 * ref.std() / np.sqrt(x.size)
        # variance: standard error of the sample variance from the fourth central moment
        mu4 = ref.expect(lambda t, m=ref.mean(): (t - m) ** 4)
        assert abs(x.var(ddof=1) - ref.var()) < 4 * np.sqrt((mu4 - ref.var() ** 2) / x.size)
        assert stats.kstest(x, ref.cdf).pvalue > 1e-3


def test_sample_loss_ratio_is_reproducible_and_checks_rng():
    im = np.array([[0.2, 0.5], [0.9, 1.4]])
    s1 = sample_loss_ratio(np.random.default_rng(5), im, MEDIANS, BETAS, MDR, COV)
    s2 = sample_loss_ratio(np.random.default_rng(5), im, MEDIANS, BETAS, MDR, COV)
    assert_array_equal(s1[0], s2[0])
    assert_array_equal(s1[1], s2[1])
    assert s1[0].shape == s1[1].shape == (2, 2)
    state, lr = sample_loss_ratio(np.random.default_rng(5), np.zeros(10), MEDIANS, BETAS, MDR, COV)
    assert np.all(state == 0) and np.all(lr == 0)  # im = 0: no damage
    state, lr = sample_loss_ratio(np.random.default_rng(5), np.full(10, np.inf), MEDIANS, BETAS, MDR)
    assert np.all(state == 4) and np.all(lr == 1.0)  # im -> inf: top state
    with pytest.raises(ValueError, match="numpy.random.Generator"):
        sample_loss_ratio(5, im, MEDIANS, BETAS, MDR)


# --------------------------------------------------------------------------- apply_policy


def test_apply_policy_edge_cases():
    # net = min(max(L - D, 0), limit); NaN deductible -> 0, NaN limit -> unlimited (convention, common practice).
    loss = np.array([0.0, 50.0, 100.0, 150.0, 400.0, 1000.0])
    assert_array_equal(apply_policy(loss, 100.0, 250.0), [0, 0, 0, 50, 250, 250])
    assert_array_equal(apply_policy(loss, np.nan, 250.0), [0, 50, 100, 150, 250, 250])
    assert_array_equal(apply_policy(loss, 100.0, np.nan), [0, 0, 0, 50, 300, 900])
    assert_array_equal(apply_policy(loss, np.nan, np.nan), loss)
    assert_array_equal(apply_policy(loss, 0.0, 0.0), np.zeros(6))
    # per-asset terms broadcast over events: (n_events, n_assets) with (n_assets,)
    gu = np.array([[10.0, 10.0], [30.0, 30.0]])
    assert_array_equal(apply_policy(gu, [5.0, np.nan], [np.nan, 20.0]), [[5, 10], [25, 20]])
    with pytest.raises(ValueError, match="deductible must be non-negative"):
        apply_policy(loss, -1.0, 10.0)
    with pytest.raises(ValueError, match="limit must be non-negative"):
        apply_policy(loss, 1.0, -10.0)
    with pytest.raises(ValueError, match="ground_up must be non-negative"):
        apply_policy([-1.0], 0.0, 10.0)


# --------------------------------------------------------------------------- year_loss


def test_year_loss_hand_example_and_chunking():
    # Hand example: year 2 has two events, years 3 and 5 none (sum and max by hand).
    years = np.array([1, 2, 2, 4, 1])
    loss = np.array([3.0, 5.0, 2.0, 7.0, 1.0])
    agg, mx = year_loss(years, loss, 5)
    assert_array_equal(agg, [4.0, 7.0, 0.0, 7.0, 0.0])
    assert_array_equal(mx, [3.0, 5.0, 0.0, 7.0, 0.0])
    # streamed chunks combine: sums add, maxima take the maximum
    a1, m1 = year_loss(years[:2], loss[:2], 5)
    a2, m2 = year_loss(years[2:], loss[2:], 5)
    assert_array_equal(a1 + a2, agg)
    assert_array_equal(np.maximum(m1, m2), mx)
    agg0, mx0 = year_loss(np.array([], dtype=int), np.array([]), 3)
    assert_array_equal(agg0, np.zeros(3))
    assert_array_equal(mx0, np.zeros(3))
    with pytest.raises(ValueError, match=r"event_year must lie in 1\.\.5"):
        year_loss([0, 1], [1.0, 1.0], 5)
    with pytest.raises(ValueError, match="event_loss must be non-negative"):
        year_loss([1, 2], [1.0, -1.0], 5)


# --------------------------------------------------------------------------- EP, AAL, TVaR: hand examples

HAND = np.array([0.0, 5.0, 1.0, 9.0, 3.0, 0.0, 7.0, 2.0, 0.0, 4.0])  # N = 10; sorted: 9 7 5 4 3 2 1 0 0 0


def test_ep_from_years_hand_example():
    # PML(T) = L_(ceil(N/T)) from the top (module definition); worked by hand on the sorted list.
    t = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 10.0, 20.0])
    # ranks:        10    5    4    3    2    1   (T > N)
    assert_array_equal(ep_from_years(HAND, t), [0.0, 3.0, 4.0, 5.0, 7.0, 9.0, np.nan])
    assert ep_from_years(HAND, 5.0) == 7.0  # scalar return period -> scalar
    # reading the tabulated curve: PML(T_i) = L_(i) at T_i = N/i
    loss, aep, rp = full_ep_curve(HAND)
    assert_array_equal(loss, [9, 7, 5, 4, 3, 2, 1, 0, 0, 0])
    assert_allclose(aep, np.arange(1, 11) / 10)
    assert_allclose(rp, 10 / np.arange(1, 11))
    assert_array_equal(ep_from_years(HAND, rp), loss)


def test_tvar_hand_example():
    # TVaR(T) = [sum_{i<=k} L_(i) + (m-k) L_(k+1)] / m, m = N/T (Acerbi & Tasche 2002, empirical ES), by hand:
    t = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 10.0, 20.0])
    expected = [
        31 / 10,                  # T=1: the mean
        (9 + 7 + 5 + 4 + 3) / 5,  # m = 5
        (9 + 7 + 5 + 4 / 3) / (10 / 3),  # m = 3.33: boundary year 4 weighted 1/3
        (9 + 7 + 0.5 * 5) / 2.5,  # m = 2.5 -> 7.4
        (9 + 7) / 2,              # m = 2
        9.0,                      # m = 1
        np.nan,                   # T > N
    ]
    assert_allclose(tvar(HAND, t), expected, rtol=1e-14)


def test_aal_with_standard_error_definition():
    aal, se = aal_with_standard_error(HAND)
    assert aal == pytest.approx(3.1, rel=1e-15)
    assert se == pytest.approx(np.std(HAND, ddof=1) / np.sqrt(10), rel=1e-15)
    with pytest.raises(ValueError, match="at least 2 simulated years"):
        aal_with_standard_error([1.0])


def test_return_period_validation():
    with pytest.raises(ValueError, match="return_periods_yr must be finite and >= 1"):
        ep_from_years(HAND, [0.5])
    with pytest.raises(ValueError, match="return_periods_yr must be finite and >= 1"):
        tvar(HAND, [np.nan])
    with pytest.raises(ValueError, match="year_losses must be finite"):
        ep_from_years([1.0, np.nan], [1.0])


# --------------------------------------------------------------------------- TVaR: brute force and coherence


def _tvar_brute_force(losses, t):
    """Mean of the worst ceil(N/T) years, the last one with the fractional weight (loop)."""
    ordered = sorted(losses, reverse=True)
    m = len(ordered) / t
    total, weight = 0.0, 0.0
    for value in ordered:
        w = min(1.0, m - weight)
        if w <= 0:
            break
        total += w * value
        weight += w
    return total / m


def _tvar_indicator_form(losses, t):
    """ES_a = (E[L 1{L > q}] + q (a - P[L > q])) / a with q = PML (Acerbi & Tasche 2002)."""
    a = 1.0 / t
    q = ep_from_years(losses, t)
    return (np.mean(losses * (losses > q)) + q * (a - np.mean(losses > q))) / a


@pytest.fixture(scope="module")
def year_sample():
    # 1000 invented years with 60 % loss-free years (ties at zero) and a heavy tail
    rng = np.random.default_rng(99)
    y = rng.lognormal(np.log(1e5), 1.2, size=1000)
    y[rng.random(1000) < 0.6] = 0.0
    return y


@pytest.mark.parametrize("t", [1.0, 2.0, 3.0, 7.0, 10.0, 33.3, 100.0, 475.0, 1000.0])
def test_tvar_against_brute_force_definitions(year_sample, t):
    got = tvar(year_sample, t)
    assert_allclose(got, _tvar_brute_force(year_sample, t), rtol=1e-12)
    assert_allclose(got, _tvar_indicator_form(year_sample, t), rtol=1e-12)
    # (1/a) * integral of the quantile function over [1 - a, 1] (midpoint rule, numpy inverted_cdf)
    u = 1 - (np.arange(200_000) + 0.5) / 200_000 / t
    assert_allclose(got, np.quantile(year_sample, u, method="inverted_cdf").mean(), rtol=2e-3)
    assert got >= ep_from_years(year_sample, t)


def test_pml_brackets_the_exceedance_frequency(year_sample):
    # PML = L_(ceil(N/T)): #(L > PML)/N < 1/T <= #(L >= PML)/N (upper empirical quantile).
    t = np.array([1.0, 1.7, 2.0, 6.0, 10.0, 33.3, 100.0, 999.0, 1000.0])
    pml = ep_from_years(year_sample, t)
    assert np.all(np.mean(year_sample[:, None] > pml, axis=0) < 1 / t)
    assert np.all(np.mean(year_sample[:, None] >= pml, axis=0) >= 1 / t)
    assert np.all(np.isnan(ep_from_years(year_sample, [1001.0, 1e4])))
    assert np.all(np.isnan(tvar(year_sample, [1001.0, 1e4])))


def test_tvar_is_coherent_on_a_hand_example():
    # Acerbi & Tasche (2002): with the fractional boundary weight ES is sub-additive for any sample;
    # the tail conditional expectation E[L | L >= PML] is not. Four equally likely years, T = 2 (m = 2):
    x = np.array([0.0, 0.0, 0.0, 2.0])
    y = np.array([0.0, 0.0, 2.0, 0.0])
    assert tvar(x, 2.0) == 1.0 and tvar(y, 2.0) == 1.0   # (2 + 0) / 2 by hand
    assert tvar(x + y, 2.0) == 2.0                       # (2 + 2) / 2 <= 1 + 1
    tce = lambda l: l[l >= ep_from_years(l, 2.0)].mean()  # noqa: E731
    assert tce(x + y) > tce(x) + tce(y)                   # 2 > 0.5 + 0.5: not sub-additive
    # fractional m = 1.5 (T = 8/3): (2 + 0.5 * 0) / 1.5 = 4/3 each, (2 + 0.5 * 2) / 1.5 = 2 <= 8/3
    assert_allclose(tvar([x, y, x + y], 8 / 3), [4 / 3, 4 / 3, 2.0], rtol=1e-14)
    # positive homogeneity, translation invariance, monotonicity
    assert_allclose(tvar(3.0 * (x + y), 8 / 3), 3.0 * tvar(x + y, 8 / 3), rtol=1e-14)
    assert_allclose(tvar(x + 5.0, 8 / 3), tvar(x, 8 / 3) + 5.0, rtol=1e-14)
    assert tvar(x + y, 8 / 3) >= tvar(x, 8 / 3)


def test_tvar_subadditive_on_random_portfolios():
    # Sub-additivity over portfolios simulated on the same years, non-integer N/T (Acerbi & Tasche 2002).
    rng = np.random.default_rng(3)
    t = np.array([2.3, 7.0, 13.7, 50.0])
    for _ in range(200):
        a = rng.pareto(1.5, 50) * (rng.random(50) < 0.3)
        b = rng.pareto(1.5, 50) * (rng.random(50) < 0.3)
        assert np.all(tvar(a + b, t) <= tvar(a, t) + tvar(b, t) + 1e-12)


# --------------------------------------------------------------------------- Poisson event loss table

RATES = np.array([0.20, 0.05, 0.01, 0.004])   # [1/yr], invented event types
LOSSES = np.array([1.0, 8.0, 40.0, 150.0])    # [currency]
N_YEARS = 200_000


def _simulate_event_table(rng, loss_of_event):
    counts = rng.poisson(RATES, size=(N_YEARS, RATES.size))
    year_idx, type_idx = np.nonzero(counts)
    reps = counts[year_idx, type_idx]
    years = np.repeat(year_idx + 1, reps)
    types = np.repeat(type_idx, reps)
    return years, loss_of_event(types)


@pytest.fixture(scope="module")
def simulated_years():
    rng = np.random.default_rng(2024)
    years, loss = _simulate_event_table(rng, lambda types: LOSSES[types])
    return year_loss(years, loss, N_YEARS)


def test_simulated_oep_matches_poisson_closed_form(simulated_years):
    # OEP(x) = 1 - exp(-sum_i lambda_i 1[L_i > x]) (Grossi & Kunreuther 2005, Ch. 2, Poisson occurrences);
    # tolerance: 4 binomial standard errors of the exceedance frequency.
    _, annual_max = simulated_years
    x = np.array([0.0, 0.5, 1.0, 5.0, 20.0, 100.0, 150.0, 500.0])
    closed = oep_closed_form(RATES, LOSSES, x)
    freq = np.mean(annual_max[:, None] > x, axis=0)
    se = np.sqrt(closed * (1 - closed) / N_YEARS)
    assert np.all(np.abs(freq - closed) <= 4 * se)
    assert closed[-1] == 0.0 and closed[-2] == 0.0   # strict exceedance of the largest loss
    assert_allclose(closed[0], 1 - np.exp(-RATES.sum()), rtol=1e-14)


def test_simulated_pml_reads_the_closed_form_steps(simulated_years):
    # OEP steps (closed form): 0.232 below 1, 0.062 on [1, 8), 0.0139 on [8, 40), 0.0040 on [40, 150).
    # PML(T) is the loss where the step crosses 1/T; the margins exceed 10 binomial standard errors.
    _, annual_max = simulated_years
    assert_array_equal(ep_from_years(annual_max, [10.0, 50.0, 100.0, 500.0]), [1.0, 8.0, 40.0, 150.0])


def test_aep_dominates_oep_and_aal_matches_rates(simulated_years):
    aggregate, annual_max = simulated_years
    t = np.array([2.0, 10.0, 50.0, 100.0, 250.0, 1000.0, 10_000.0])
    assert np.all(ep_from_years(aggregate, t) >= ep_from_years(annual_max, t))
    assert np.all(tvar(aggregate, t) >= tvar(annual_max, t))
    x = np.array([0.5, 5.0, 30.0, 120.0, 200.0])
    assert np.all(np.mean(aggregate[:, None] > x, axis=0) >= np.mean(annual_max[:, None] > x, axis=0))
    # AAL = sum_i lambda_i L_i (Grossi & Kunreuther 2005, Ch. 2); within 3 standard errors
    aal, se = aal_with_standard_error(aggregate)
    assert abs(aal - np.sum(RATES * LOSSES)) < 3 * se


def test_oep_with_random_event_losses_matches_thinning_closed_form():
    # Lognormal loss per occurrence (median LOSSES_i, sigma 0.5): Poisson thinning gives
    # OEP(x) = 1 - exp(-sum_i lambda_i P(L_i > x)) (Grossi & Kunreuther 2005, Ch. 2, with random losses).
    rng = np.random.default_rng(77)
    years, loss = _simulate_event_table(rng, lambda types: LOSSES[types] * rng.lognormal(0.0, 0.5, types.size))
    _, annual_max = year_loss(years, loss, N_YEARS)
    x = np.array([0.5, 2.0, 10.0, 50.0, 200.0])
    closed = oep_closed_form_probabilistic(RATES, stats.lognorm.sf(x[None, :], s=0.5, scale=LOSSES[:, None]))
    freq = np.mean(annual_max[:, None] > x, axis=0)
    assert np.all(np.abs(freq - closed) <= 4 * np.sqrt(closed * (1 - closed) / N_YEARS))


def test_closed_forms_agree_for_deterministic_losses():
    # P(L_i > x) = 1[L_i > x] reduces the thinning form to the deterministic one (exact).
    x = np.array([-1.0, 0.0, 1.0, 7.99, 8.0, 39.0, 149.0, 150.0, 1e6])
    indicator = (LOSSES[:, None] > x[None, :]).astype(float)
    assert_allclose(oep_closed_form(RATES, LOSSES, x), oep_closed_form_probabilistic(RATES, indicator), rtol=1e-15)
    with pytest.raises(ValueError, match="rates must be non-negative"):
        oep_closed_form([-0.1], [1.0], x)
    with pytest.raises(ValueError, match="leading axis of length 4"):
        oep_closed_form_probabilistic(RATES, indicator[:3])
