"""Risk integral against closed forms and reference libraries."""
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate, stats
from scipy.special import ndtr

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


# --- the upper envelope for crossing curves, against quadrature -------------------------------------
#
# Reference: the rate of reaching or exceeding state j is the risk integral of the enveloped
# fragility, lambda_j = int max_{l >= j} Phi((ln x - ln theta_l)/beta_l) |d lambda(x)| (Cornell et al.
# 2002 with the envelope of damage_state_rates), on the same log-log interpolated hazard curve (power
# law between levels, linear in ln x on a segment ending at rate 0, end power laws continued into the
# tails under "extrapolate", the top-level mass lambda_n P(x_n) under "truncate").  Evaluated by
# scipy.integrate.quad (QUADPACK QAGS: adaptive 21-point Gauss-Kronrod with Wynn epsilon
# extrapolation; QAGI on the infinite tails), in u = ln x, with the interval cut at every crossing of
# two fragility curves so that each quad call integrates a smooth function.

def _density(u, i, lnx, lam):
    """-d lambda / d ln x on piece i of the curve (i = -1 below the range, n-1 above it)."""
    n = len(lnx)
    seg = min(max(i, 0), n - 2)
    la, lb = lam[seg], lam[seg + 1]
    if i >= n - 1 and lam[-1] == 0:
        return 0.0
    if lb > 0:
        k = np.log(la / lb) / (lnx[seg + 1] - lnx[seg])
        return k * la * np.exp(-k * (u - lnx[seg]))
    return la / (lnx[seg + 1] - lnx[seg]) if la > 0 else 0.0


def _envelope_by_quadrature(levels, lam, medians, betas, tail):
    lnx = np.log(levels)
    ln_m, b = np.log(medians), np.asarray(betas, dtype=float)
    n_ds = len(ln_m)
    cuts = []
    for i in range(n_ds):
        for j in range(i + 1, n_ds):
            if b[i] != b[j]:
                cuts.append((b[j] * ln_m[i] - b[i] * ln_m[j]) / (b[j] - b[i]))
    cuts = np.sort(cuts)

    def env(u, j):
        return ndtr(np.max((u - ln_m[j:]) / b[j:]))  # standard normal CDF

    def piece(j, i, lo, hi):
        inner = [c for c in cuts if lo < c < hi]
        edges = [lo, *inner, hi]
        return sum(integrate.quad(lambda u: env(u, j) * _density(u, i, lnx, lam), a, c, epsabs=0,
                                  epsrel=1e-12, limit=200)[0] for a, c in zip(edges[:-1], edges[1:]))

    out = []
    for j in range(n_ds):
        total = sum(piece(j, i, lnx[i], lnx[i + 1]) for i in range(len(lnx) - 1))
        if tail == "extrapolate":
            total += piece(j, -1, -np.inf, lnx[0]) + piece(j, len(lnx) - 1, lnx[-1], np.inf)
        else:
            total += lam[-1] * env(lnx[-1], j)
        out.append(total)
    return np.array(out)


# 4 states: states 1-2 parallel (equal betas, no crossing); crossings inside the levels
# (0.015, 0.12, 2.08 g) and above them (78 g, 1113 g) (invented)
CROSS_INSIDE_AND_ABOVE = (np.array([0.08, 0.25, 0.6, 1.4]), np.array([0.5, 0.5, 1.1, 0.35]))
# 4 states like the demo library (beta grows with severity): every crossing far below the levels
CROSS_BELOW = (np.array([0.09, 0.18, 0.34, 0.58]), np.array([0.7, 0.72, 0.75, 0.78]))
# 3 states: crossings inside the levels (0.016 g, 4.8 g) and one below them (7e-7 g) (invented)
CROSS_THREE = (np.array([0.05, 0.3, 1.2]), np.array([0.35, 0.9, 0.45]))


def test_envelope_cases_cross_where_they_claim():
    lo, hi = LEVELS[0], LEVELS[-1]

    def where(m, b):
        x = [lognormal_crossing_im(m[i], b[i], m[j], b[j]) for i in range(len(m)) for j in range(i + 1, len(m))]
        return {("none" if not np.isfinite(v) else "below" if v < lo else "above" if v > hi else "inside")
                for v in x}
    assert where(*CROSS_INSIDE_AND_ABOVE) == {"none", "inside", "above"}
    assert where(*CROSS_BELOW) == {"below"}
    assert where(*CROSS_THREE) == {"inside", "below"}


@pytest.mark.parametrize("tail", ["extrapolate", "truncate"])
@pytest.mark.parametrize("case", [CROSS_INSIDE_AND_ABOVE, CROSS_BELOW, CROSS_THREE],
                         ids=["inside_and_above", "below", "three_states"])
def test_envelope_matches_quadrature(case, tail):
    m, b = case
    lam = curved_hazard(LEVELS)
    got = damage_state_rates(LEVELS, lam, m, b, tail=tail, envelope=True)
    assert np.all(np.isfinite(got))
    assert np.all(np.diff(got) <= 0)  # the envelope keeps the states ordered
    assert_allclose(got, _envelope_by_quadrature(LEVELS, lam, m, b, tail), rtol=1e-8)
    # the envelope never lowers a state's rate, and the most severe state is never enveloped
    plain = damage_state_rates(LEVELS, lam, m, b, tail=tail)
    assert np.all(got >= plain * (1 - 1e-12))
    assert got[-1] == pytest.approx(plain[-1], rel=1e-12)


@pytest.mark.parametrize("tail", ["extrapolate", "truncate"])
def test_envelope_on_a_curve_ending_at_zero_rate(tail):
    # the last levels carry rate 0: one segment linear in ln x, then nothing (package convention)
    m, b = CROSS_INSIDE_AND_ABOVE
    lam = curved_hazard(LEVELS)
    lam[-4:] = 0.0
    got = damage_state_rates(LEVELS, lam, m, b, tail=tail, envelope=True)
    assert_allclose(got, _envelope_by_quadrature(LEVELS, lam, m, b, tail), rtol=1e-8)


@pytest.mark.parametrize("tail", ["extrapolate", "truncate"])
def test_envelope_without_crossings_equals_the_plain_integral(tail):
    # equal betas: the curves never cross, the envelope is each state's own curve
    m, b = np.array([0.1, 0.3, 0.7, 1.6]), np.full(4, 0.6)
    lam = curved_hazard(LEVELS)
    assert_allclose(damage_state_rates(LEVELS, lam, m, b, tail=tail, envelope=True),
                    damage_state_rates(LEVELS, lam, m, b, tail=tail), rtol=1e-12)
    # crossings only far outside the levels and tails truncated: also the plain integral
    m, b = CROSS_BELOW
    if tail == "truncate":
        assert_allclose(damage_state_rates(LEVELS, lam, m, b, tail=tail, envelope=True),
                        damage_state_rates(LEVELS, lam, m, b, tail=tail), rtol=1e-12)


def test_envelope_crossing_on_a_level_and_the_top_level_is_exact():
    # two curves crossing exactly at a tabulated level (a zero-width piece on either side)
    x_star, z_star = LEVELS[17], -0.4
    b = np.array([0.4, 0.9])
    m = x_star * np.exp(-z_star * b)
    lam = curved_hazard(LEVELS)
    for tail in ("extrapolate", "truncate"):
        got = damage_state_rates(LEVELS, lam, m, b, tail=tail, envelope=True)
        assert_allclose(got, _envelope_by_quadrature(LEVELS, lam, m, b, tail), rtol=1e-8)
    # a curve tabulated up to a level whose log does not round-trip through exp: the top rate is
    # counted once, not again as a sliver above the top level
    levels = np.array([0.01, 0.1, 0.7, 3.0])
    assert np.exp(np.log(levels[-1])) > levels[-1]  # rounds past the top level
    lam = curved_hazard(levels)
    m, b = CROSS_INSIDE_AND_ABOVE
    got = damage_state_rates(levels, lam, m, b, tail="truncate", envelope=True)
    assert_allclose(got, _envelope_by_quadrature(levels, lam, m, b, "truncate"), rtol=1e-8)


def test_envelope_broadcasts_over_curves_and_classes():
    lam = np.vstack([curved_hazard(LEVELS), 0.3 * curved_hazard(LEVELS)])[:, None, :]  # (2, 1, n)
    medians = np.stack([CROSS_INSIDE_AND_ABOVE[0], CROSS_BELOW[0]])  # (2, 4)
    betas = np.stack([CROSS_INSIDE_AND_ABOVE[1], CROSS_BELOW[1]])
    got = damage_state_rates(LEVELS, lam, medians, betas, envelope=True)
    assert got.shape == (2, 2, 4)
    for c in range(2):
        for f in range(2):
            assert_allclose(got[c, f], damage_state_rates(LEVELS, lam[c, 0], medians[f], betas[f], envelope=True),
                            rtol=1e-13)
