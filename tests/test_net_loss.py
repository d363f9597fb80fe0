"""Expected net loss after a deductible and a limit, in closed form (quakefolio.core.loss,
quakefolio.core.events.portfolio), checked against scipy.integrate.quad of the beta density,
Monte Carlo of scipy.stats.beta, Monte Carlo of the sampled damage mode of the same model
and Monte Carlo of the classical model's annual losses.

Sources: the incomplete-moment identity of the beta distribution,
E[min(X, u)] = mu I_u(a+1, b) + u (1 - I_u(a, b)) (Klugman, Panjer & Willmot, Loss Models,
Appendix A, limited expected value of the beta distribution; from memory), and the layer
identity min(max(y - D, 0), L) = min(y, D + L) - min(y, D) (common practice)."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats

from quakefolio.core.events.portfolio import (
    apply_policy, expected_loss_ratio, expected_net_loss_ratio, sample_loss_ratio,
)
from quakefolio.core.loss import (
    beta_parameters, expected_annual_loss, expected_annual_net_loss, limited_mean_loss_ratio, net_loss_ratio,
)
from quakefolio.core.risk import damage_state_rates, lognormal_fragility

CASES = [(0.05, 0.9), (0.2, 0.5), (0.4, 0.4), (0.7, 0.2), (0.9, 0.05)]  # (mean, cov), beta on [0, 1]


def _quad_limited_mean(mu, c, u):
    """E[min(X, u)] = int_0^u x f(x) dx + u (1 - F(u)) by adaptive quadrature of the beta pdf."""
    a, b = beta_parameters(mu, c)
    dist = stats.beta(a, b)
    u1 = min(u, 1.0)
    body = integrate.quad(lambda x: x * dist.pdf(x), 0.0, u1, limit=200, epsabs=1e-13, epsrel=1e-11)[0]
    return body + u1 * dist.sf(u1)


@pytest.mark.parametrize("mu, c", CASES)
def test_limited_mean_equals_quadrature_of_the_beta_density(mu, c):
    for u in (1e-4, 0.01, 0.1, mu / 2, mu, 0.5, 0.95, 1.0, 3.0):
        got = float(limited_mean_loss_ratio(mu, c, u))
        assert got == pytest.approx(_quad_limited_mean(mu, c, u), rel=1e-7, abs=1e-12), (mu, c, u)
    assert float(limited_mean_loss_ratio(mu, c, np.inf)) == mu
    assert float(limited_mean_loss_ratio(mu, c, 0.0)) == 0.0


@pytest.mark.parametrize("mu, c", CASES)
def test_net_loss_equals_monte_carlo_of_the_beta_loss_ratio(mu, c):
    # 400,000 draws of scipy.stats.beta, fixed seed; the closed form must agree to 1 %
    a, b = beta_parameters(mu, c)
    x = stats.beta(a, b).rvs(size=400_000, random_state=np.random.default_rng(20261203))
    value = 2.0e6
    for ded, lim in ((0.0, np.inf), (0.02 * value, np.inf), (0.0, 0.3 * value), (0.05 * value, 0.5 * value),
                     (mu * value, mu * value)):
        mc = apply_policy(value * x, ded, lim).mean()
        got = value * float(net_loss_ratio(mu, c, value, ded, lim))
        if mc > 0:
            assert got == pytest.approx(mc, rel=0.01), (mu, c, ded, lim)
    for u in (0.1 * mu, mu, 2 * mu):
        assert float(limited_mean_loss_ratio(mu, c, u)) == pytest.approx(np.minimum(x, u).mean(), rel=0.01)


def test_no_terms_give_ground_up_exactly_and_zero_limit_gives_zero():
    rng = np.random.default_rng(3)
    mu = np.sort(rng.uniform(0.01, 0.99, (50, 4)), axis=-1)
    c = rng.uniform(0.0, 0.5, (50, 4)) * (rng.random((50, 4)) < 0.8)
    c = np.minimum(c, 0.9 * np.sqrt((1 - mu) / mu))
    value = rng.uniform(1e4, 1e7, 50)
    none = np.full(50, np.nan)
    r = net_loss_ratio(mu, c, value[:, None], none[:, None], none[:, None])
    assert r.tobytes() == mu.tobytes()
    r0 = net_loss_ratio(mu, c, value[:, None], 0.0, np.inf)
    assert r0.tobytes() == mu.tobytes()
    assert np.all(net_loss_ratio(mu, c, value[:, None], rng.uniform(0, 1e5, (50, 1)), 0.0) == 0.0)
    assert np.all(net_loss_ratio(mu, c, 0.0, 1e3, 1e3) == 0.0)  # no value, no loss
    # classical: without terms bit for bit the ground-up EAL
    lam = np.sort(rng.uniform(1e-5, 1e-2, (50, 4)), axis=-1)[:, ::-1]
    eal = expected_annual_loss(lam, mu, value)
    assert expected_annual_net_loss(lam, mu, c, value, none, none).tobytes() == eal.tobytes()
    assert np.all(expected_annual_net_loss(lam, mu, c, value, none, np.zeros(50)) == 0.0)
    # per event: without terms bit for bit the mean loss ratio
    im = np.exp(rng.normal(-1.0, 1.0, (30, 50)))
    med, beta = np.array([0.1, 0.3, 0.6, 1.2]), np.array([0.5, 0.5, 0.6, 0.6])
    got = expected_net_loss_ratio(im, med, beta, mu, c, value, none, none)
    assert got.tobytes() == expected_loss_ratio(im, med, beta, mu).tobytes()


def test_monotone_in_deductible_and_limit():
    value = 1.0e6
    grid = np.linspace(0.0, 1.2e6, 121)
    for mu, c in CASES + [(0.3, 0.0)]:
        by_ded = value * net_loss_ratio(mu, c, value, grid, np.inf)
        by_lim = value * net_loss_ratio(mu, c, value, 5e4, grid)
        assert np.all(np.diff(by_ded) <= 1e-9 * value) and np.all(np.diff(by_lim) >= -1e-9 * value)
        assert by_ded[0] == pytest.approx(mu * value, rel=1e-12) and by_lim[0] == 0.0
        assert np.all(by_lim <= grid + 1e-9)  # never above the limit


def test_deterministic_loss_ratio_is_the_degenerate_case():
    value, mu = 1.0e6, 0.3
    for ded, lim in ((0.0, np.inf), (1e5, np.inf), (1e5, 1e5), (4e5, 1e6), (np.nan, 2e5)):
        want = float(apply_policy(mu * value, ded, lim))
        for c in (0.0, np.nan):
            assert value * float(net_loss_ratio(mu, c, value, ded, lim)) == pytest.approx(want, rel=1e-14, abs=1e-9)
    # a small cov tends to the deterministic result
    near = value * float(net_loss_ratio(mu, 1e-4, value, 1e5, 1.5e5))
    assert near == pytest.approx(1.5e5, rel=1e-6)


def test_bad_terms_raise():
    with pytest.raises(ValueError, match="deductible"):
        net_loss_ratio(0.3, 0.2, 1e6, -1.0, np.nan)
    with pytest.raises(ValueError, match="limit"):
        net_loss_ratio(0.3, 0.2, 1e6, 0.0, -5.0)
    with pytest.raises(ValueError, match="cap"):
        limited_mean_loss_ratio(0.3, 0.2, np.nan)


# --- the same model, sampled ----------------------------------------------------------------------

MED, BETA = np.array([0.15, 0.4, 0.9]), np.array([0.6, 0.5, 0.55])
MDR, COV = np.array([0.04, 0.35, 1.0]), np.array([0.9, 0.45, 0.0])


def test_mean_mode_net_loss_equals_monte_carlo_of_the_sampled_mode():
    # Per asset and intensity: E[net | x] in closed form against the sampled mode (damage state,
    # then beta loss ratio, then the terms) of the same model, within 3 standard errors.
    im = np.array([0.05, 0.15, 0.3, 0.6, 1.5])
    value = np.array([1.0e6, 2.5e6, 8.0e5, 1.2e6, 5.0e6])
    ded = np.array([2.0e4, np.nan, 1.0e5, 1.0e5, 0.0])
    lim = np.array([9.0e5, 1.0e6, np.nan, 2.0e5, 4.0e6])
    n = 200_000
    x = np.broadcast_to(im[:, None], (5, 5))  # every intensity for every asset
    closed = value * expected_net_loss_ratio(x, MED, BETA, MDR, COV, value, ded, lim)
    naive = apply_policy(value * expected_loss_ratio(x, MED, BETA, MDR), ded, lim)
    _, lr = sample_loss_ratio(np.random.default_rng(20261203), np.broadcast_to(x, (n, 5, 5)), MED, BETA, MDR, COV)
    net = apply_policy(lr * value, ded, lim)
    mc, se = net.mean(axis=0), net.std(axis=0, ddof=1) / np.sqrt(n)
    assert np.all(np.abs(closed - mc) <= 3 * se + 1e-9)
    # the policy applied to the mean loss is biased (the case this replaces)
    assert np.any(np.abs(naive - mc) > 10 * se)


def test_classical_net_eal_equals_monte_carlo_of_the_same_model():
    # Power-law hazard lambda(x) = k0 x^-k tabulated far beyond the fragility's range; events with
    # x > x_min at rate lambda(x_min), x drawn from the curve, damage state from the fragility,
    # beta loss ratio, terms per event; the mean annual net loss within 3 standard errors.
    k0, k, x_min = 1e-4, 2.5, 0.02
    levels = np.geomspace(x_min, 20.0, 200)
    rates = k0 * levels ** -k
    lam = damage_state_rates(levels, rates, MED, BETA, tail="truncate")
    value, ded, lim = 1.0e6, 5.0e4, 6.0e5
    classical = float(expected_annual_net_loss(lam, MDR, COV, value, ded, lim))
    rng = np.random.default_rng(7)
    n_years = 20_000
    n_events = rng.poisson(k0 * x_min ** -k * n_years)
    x = x_min * rng.random(n_events) ** (-1.0 / k)  # Pareto: P(X > x) = (x / x_min)^-k
    x = x[x <= levels[-1]]
    _, lr = sample_loss_ratio(rng, x, MED, BETA, MDR, COV)
    net = apply_policy(lr * value, ded, lim)
    aal, se = net.sum() / n_years, np.sqrt((net ** 2).sum()) / n_years
    assert abs(aal - classical) <= 3 * se, (aal, classical, se)
    # and it is the occupancy-weighted sum of the per-state expected net losses
    occ = lam - np.append(lam[1:], 0.0)
    per_state = value * net_loss_ratio(MDR, COV, value, ded, lim)
    assert classical == pytest.approx(float(occ @ per_state), rel=1e-12)
    assert classical < float(expected_annual_loss(lam, MDR, value))


def test_expected_net_loss_ratio_uses_the_fragility_envelope():
    # crossing curves: the per-state probabilities are those of the sampled mode (upper envelope)
    med, beta = np.array([0.3, 0.35]), np.array([0.9, 0.3])
    x = np.array([[0.05, 2.0]])
    p = lognormal_fragility(x[..., None], med, beta)
    env = np.maximum.accumulate(p[..., ::-1], axis=-1)[..., ::-1]
    mdr, cov = np.array([0.2, 0.6]), np.array([0.5, 0.3])
    r = net_loss_ratio(mdr, cov, 1e6, 1e4, 3e5)
    want = (env[..., 0] - env[..., 1]) * r[0] + env[..., 1] * r[1]
    got = expected_net_loss_ratio(x, med, beta, mdr, cov, 1e6, 1e4, 3e5)
    np.testing.assert_allclose(got, want, rtol=1e-13)
