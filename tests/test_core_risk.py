"""Risk integral against closed forms and reference libraries."""
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate, stats

from quakefolio.core.curves import rate_at_im, rate_from_prob
from quakefolio.core.risk import (
    damage_state_rates, lognormal_crossing_im, lognormal_fragility, risk_disaggregation, risk_targeted_im,
)

LEVELS = np.geomspace(0.0005, 5.0, 41)


def curved_hazard(x):
    """A curved (non-power-law) hazard curve, concave in log-log space (invented)."""
    lnx = np.log(x)
    return np.exp(-5.0 - 1.6 * lnx - 0.1 * lnx ** 2)


def test_fragility_equals_scipy_lognorm_cdf():
    # The lognormal fragility Phi(ln(x/theta)/beta) is scipy.stats.lognorm(s=beta, scale=theta).
    x = np.geomspace(1e-3, 10, 200)
    for theta, beta in [(0.3, 0.4), (1.2, 0.75), (0.05, 1.1)]:
        assert_allclose(lognormal_fragility(x, theta, beta), stats.lognorm.cdf(x, s=beta, scale=theta),
                        rtol=1e-13, atol=1e-300)


@pytest.mark.parametrize("k", [1.0, 2.0, 3.0, 4.5])
@pytest.mark.parametrize("beta", [0.2, 0.5, 0.8])
def test_power_law_hazard_matches_closed_form(k, beta):
    # Cornell, Jalayer, Hamburger & Foutch (2002), J. Struct. Eng. 128(4), Eq. 11:
    # lambda_f = k0 * theta**-k * exp(k**2 beta**2 / 2) for lambda(x) = k0 x**-k.
    k0 = 1e-4
    theta = np.array([0.05, 0.3, 1.0, 2.0])
    got = damage_state_rates(LEVELS, k0 * LEVELS ** -k, theta, np.full(4, beta))
    expected = k0 * theta ** -k * np.exp(k ** 2 * beta ** 2 / 2)
    assert_allclose(got, expected, rtol=1e-9)  # exact method: only round-off remains


@pytest.mark.parametrize("tail", ["extrapolate", "truncate"])
def test_curved_hazard_matches_quadrature(tail):
    # Reference: scipy.integrate.quad of P(DS >= ds | x) |d lambda / dx| over the same
    # log-log interpolated curve (and its tails), to 1e-6 relative.
    lam = curved_hazard(LEVELS)
    lnx = np.log(LEVELS)
    k = np.log(lam[:-1] / lam[1:]) / np.diff(lnx)
    for theta, beta in [(0.15, 0.5), (0.6, 0.7), (2.5, 0.4)]:
        def density(u, i):  # -d lambda / d ln x on segment i (and its extension)
            return k[i] * lam[i] * np.exp(-k[i] * (u - lnx[i]))
        frag = lambda u: stats.norm.cdf((u - np.log(theta)) / beta)
        total = sum(integrate.quad(lambda u: frag(u) * density(u, i), lnx[i], lnx[i + 1], epsabs=0,
                                   epsrel=1e-12)[0] for i in range(len(k)))
        if tail == "extrapolate":
            total += integrate.quad(lambda u: frag(u) * density(u, 0), -np.inf, lnx[0], epsabs=0, epsrel=1e-12)[0]
            total += integrate.quad(lambda u: frag(u) * density(u, -1), lnx[-1], np.inf, epsabs=0,
                                    epsrel=1e-12)[0]
        else:
            total += lam[-1] * frag(lnx[-1])
        got = damage_state_rates(LEVELS, lam, [theta], [beta], tail=tail)[0]
        assert_allclose(got, total, rtol=1e-6)


def test_rates_are_ordered_and_shapes_broadcast():
    lam = np.vstack([curved_hazard(LEVELS), 0.5 * curved_hazard(LEVELS)])
    medians = np.array([[0.1, 0.3, 0.9], [0.2, 0.5, 1.5]])
    betas = np.full((2, 3), 0.6)
    out = damage_state_rates(LEVELS, lam, medians, betas)
    assert out.shape == (2, 3)
    assert np.all(np.diff(out, axis=-1) < 0)
    assert damage_state_rates(LEVELS, lam, medians[0], betas[0]).shape == (2, 3)


def test_tail_diagnostics_and_truncation_bound():
    lam = curved_hazard(LEVELS)
    ext, below, above = damage_state_rates(LEVELS, lam, [0.001, 4.0], [0.6, 0.6], diagnostics=True)
    trunc = damage_state_rates(LEVELS, lam, [0.001, 4.0], [0.6, 0.6], tail="truncate")
    assert np.all(trunc <= ext)
    assert below[0] > below[1] and above[1] > above[0]
    assert np.all((below >= 0) & (below <= 1) & (above >= 0) & (above <= 1))


def test_crossing_curves_envelope():
    # Two curves crossing at x*: ln x* = (b2 ln m1 - b1 ln m2)/(b2 - b1) (equal z-values).
    m, b = np.array([0.20, 0.25]), np.array([0.3, 0.9])
    x_star = lognormal_crossing_im(m[0], b[0], m[1], b[1])
    assert_allclose(lognormal_fragility(x_star, m[0], b[0]), lognormal_fragility(x_star, m[1], b[1]), rtol=1e-12)
    lam = curved_hazard(LEVELS)
    plain = damage_state_rates(LEVELS, lam, m, b)
    env = damage_state_rates(LEVELS, lam, m, b, envelope=True)
    assert env[0] >= plain[0] and env[0] >= plain[1] and env[1] == pytest.approx(plain[1], rel=1e-12)
    # reference: quadrature of the envelope max(P1, P2) over the tabulated range (+ top mass)
    lnx = np.log(LEVELS)
    k = np.log(lam[:-1] / lam[1:]) / np.diff(lnx)
    env_frag = lambda u: max(stats.norm.cdf((u - np.log(m[0])) / b[0]), stats.norm.cdf((u - np.log(m[1])) / b[1]))
    total = sum(integrate.quad(lambda u: env_frag(u) * k[i] * lam[i] * np.exp(-k[i] * (u - lnx[i])), lnx[i],
                               lnx[i + 1], epsabs=0, epsrel=1e-11, points=[np.log(x_star)]
                               if lnx[i] < np.log(x_star) < lnx[i + 1] else None)[0] for i in range(len(k)))
    total += lam[-1] * env_frag(lnx[-1])
    assert_allclose(damage_state_rates(LEVELS, lam, m, b, envelope=True, tail="truncate")[0], total, rtol=1e-6)


def test_risk_disaggregation_sums_to_one_and_matches_segments():
    lam = curved_hazard(LEVELS)
    shares = risk_disaggregation(LEVELS, lam, [0.2, 0.8], [0.5, 0.5])
    assert shares.shape == (2, len(LEVELS) + 1)
    assert_allclose(shares.sum(axis=-1), 1.0, rtol=1e-12)
    # the modal bin of the weaker state lies at lower intensity than that of the stronger one
    assert np.argmax(shares[0]) < np.argmax(shares[1])


def test_risk_targeted_im_power_law_closed_form():
    r"""Risk-targeted IM on a power-law hazard lambda(x) = k0 x^-k.

    ASCE/SEI 7-16 Section 21.2.1.2 (after Luco et al. 2007): x_RT is the IM at which a
    lognormal collapse fragility with dispersion beta has 10% collapse probability and
    whose collapse rate gives 1% in 50 years, lambda_1% = -ln(0.99)/50.
    The median is theta = x_RT exp(-Phi^-1(0.10) beta) = x_RT exp(1.2816 beta).
    By Cornell et al. (2002), lambda_c = k0 theta^-k exp(k^2 beta^2 / 2); setting it to
    lambda_1% gives theta = (k0 exp(k^2 beta^2/2) / lambda_1%)^(1/k).  The 2%-in-50-year
    IM is x_2% = (k0 / lambda_2%)^(1/k).  Hence the risk coefficient
        C_R = x_RT / x_2% = (lambda_2% / lambda_1%)^(1/k) exp(-1.2816 beta + k beta^2 / 2),
    with 1.2816 = -Phi^-1(0.10).
    """
    k0 = 1e-4
    lam_1 = rate_from_prob(0.01, 50)
    lam_2 = rate_from_prob(0.02, 50)
    for k in (1.5, 2.5, 3.5):
        for beta in (0.5, 0.6, 0.8):
            x_rt = risk_targeted_im(LEVELS, k0 * LEVELS ** -k, beta=beta)
            x_2 = (k0 / lam_2) ** (1 / k)
            z10 = -stats.norm.ppf(0.10)  # 1.2816
            c_r = (lam_2 / lam_1) ** (1 / k) * np.exp(-z10 * beta + k * beta ** 2 / 2)
            assert_allclose(x_rt / x_2, c_r, rtol=1e-9)


def test_invalid_fragility_inputs_are_loud():
    lam = curved_hazard(LEVELS)
    with pytest.raises(ValueError, match="betas must be positive"):
        damage_state_rates(LEVELS, lam, [0.2], [0.0])
    with pytest.raises(ValueError, match="medians must be positive"):
        damage_state_rates(LEVELS, lam, [-0.2], [0.5])
    with pytest.raises(ValueError, match="tail must be one of"):
        damage_state_rates(LEVELS, lam, [0.2], [0.5], tail="clip")
