"""Conditional mean spectrum (Baker 2011, J. Struct. Eng. 137(3)) against closed forms and hand sums.

Given ln Sa(T*) at the target, ln Sa(T) is normal with mean mu(T) + rho(T, T*) eps* sigma(T) and
standard deviation sigma(T) sqrt(1 - rho^2) (Baker 2011; the conditional moments of a bivariate
normal pair, Benjamin & Cornell 1970), eps* = (ln Sa* - mu(T*)) / sigma(T*), rho from Baker &
Jayaram (2008).  Checks:

- one rupture, one model: the target read off the engine's hazard curve matches the closed-form
  uniform-hazard value (ln x* = mu + sigma Phi^-1(1 - 1/(T nu)), truncated normal with scipy) to the
  accuracy of the log-log interpolation on the level grid; the CMS equals exp(mu + rho eps sigma)
  computed here by hand, passes through the target at T* and has zero conditional sigma there;
- two ruptures and two weighted models: the scenario's ln median and sigma are the weighted means
  with the disaggregation weights (Bazzurro & Cornell 1999), summed here by hand, and the
  scenario epsilon differs from the disaggregation's mean epsilon by cov_w(eps, sigma) / mean sigma;
- site blocking and pair chunking do not change a bit; the pipeline stage on tests/data/mini.
"""
import json
import shutil

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from quakefolio.core import cms
from quakefolio.core.cms import (
    compute_spectrum_sums, conditional_mean_spectrum, spectrum_from_sums, spectrum_ims,
)
from quakefolio.core.curves import im_at_rate
from quakefolio.core.events.gmf import cross_im_correlation_matrix
from quakefolio.core.gmm import GmmResult, get_gmm
from quakefolio.core.hazard import compute_site_hazard
from quakefolio.core.ims import im_period
from quakefolio.core.sources.geometry import pair_distances
from quakefolio.core.sources.mfd import MagnitudeBins, single_magnitude
from quakefolio.core.sources.ruptures import point_source_ruptures
from quakefolio.pipeline.io.store import read_table
from quakefolio.pipeline.runner import run_pure

from conftest import MINI

IMS = ["PGA", "SA_0.1", "SA_0.3", "SA_1.0", "SA_3.0"]
REF = (10.05, 20.0)


class SpectralGmm:
    """Test model (invented): ln Y(T) = a(T) + c2 M - 1.3 ln(Rrup + 10 km), sigma(T) + s_m (6.5 - M)."""

    def __init__(self, c2=0.9, shift=0.0, s_m=0.0):
        self.c2, self.shift, self.s_m = c2, shift, s_m

    def terms(self, im, mag, rrup):
        t = im_period(im)
        a = -2.5 - 0.35 * np.log(t / 0.25) ** 2 + self.shift
        mu = a + self.c2 * mag - 1.3 * np.log(rrup + 10.0)
        sd = 0.55 + 0.03 * np.log(t / 0.01) + self.s_m * (6.5 - mag)
        return mu, sd

    def evaluate(self, inp, ims):
        mag, rrup = np.asarray(inp.mag), np.asarray(inp.rrup_km)
        mu, sd = zip(*(self.terms(im, mag, rrup) for im in ims))
        mu, sd = np.stack(mu), np.stack(sd)
        return GmmResult(tuple(ims), mu, sd * 0.0, sd, sd, "test")


def _one_rupture(mag=6.4, rate=0.004):
    return point_source_ruptures("p", 10.0, 20.0, mfd=single_magnitude(mag, rate), hypo_depths=[(8.0, 1.0)],
                                 mechanisms=[(0, 90, 0, 1.0)], upper_depth_km=0.0, lower_depth_km=20.0)


def _rrup(lon, lat, rs):
    n = len(rs.mag)
    return pair_distances(np.atleast_1d(lon), np.atleast_1d(lat), rs, np.zeros(n, dtype=int), np.arange(n),
                          ref_lon=REF[0], ref_lat=REF[1])["rrup_km"]


def _spectrum(lon, lat, rs, gmms, weights, cond, ln_targets, trunc):
    m, s = compute_spectrum_sums(lon, lat, np.full(len(lon), 760.0), rs, gmms, weights, cond, IMS, ln_targets,
                                 truncation_sigma=trunc, ref=REF)
    return spectrum_from_sums(m, s, ln_targets, cond, IMS)


@pytest.mark.parametrize("trunc", [None, 3.0])
def test_one_rupture_matches_the_closed_form(trunc):
    gmm, rs, rp, cond = SpectralGmm(), _one_rupture(), 2475.0, "SA_0.3"
    lon, lat = np.array([10.08]), np.array([20.03])
    rrup = _rrup(lon, lat, rs)[0]
    mu, sd = (np.array(v) for v in zip(*(gmm.terms(im, 6.4, rrup) for im in IMS)))
    k = IMS.index(cond)
    # closed-form uniform-hazard value: nu P(eps > e) = 1/T, normal or truncated normal (scipy)
    p = 1.0 / (rp * rs.rate[0])
    e_exact = stats.norm.isf(p) if trunc is None else stats.truncnorm.isf(p, -trunc, trunc)
    # the engine's target: the hazard curve on a fine level grid, log-log interpolated at 1/T
    levels = np.geomspace(0.01, 5.0, 600)
    curve = compute_site_hazard(lon, lat, [760.0], rs, [gmm], [cond], levels, truncation_sigma=trunc, ref=REF)[0, 0, 0]
    target = float(im_at_rate(1.0 / rp, levels, curve))
    assert_allclose(np.log(target), mu[k] + e_exact * sd[k], atol=2e-4)  # interpolation accuracy [ln g]
    cs = _spectrum(lon, lat, rs, [gmm], [1.0], [cond], np.log([[[target]]]), trunc)
    rho = cross_im_correlation_matrix(IMS)[k]
    eps = (np.log(target) - mu[k]) / sd[k]
    assert_allclose(cs.mean_eps[0, 0, 0], eps, rtol=1e-12) and assert_allclose(cs.scenario_eps[0, 0, 0], eps, rtol=1e-12)
    assert_allclose(cs.mean_mag[0, 0, 0], 6.4, rtol=1e-14)
    assert_allclose(cs.mean_dist_km[0, 0, 0], rrup, rtol=1e-13)
    got = np.exp(cs.ln_cms[0, 0, 0])
    assert_allclose(got, np.exp(mu + rho * eps * sd), rtol=1e-12)  # Baker (2011), by hand
    assert_allclose(got, np.exp(mu + rho * e_exact * sd), rtol=5e-4)  # and with the closed-form epsilon
    assert_allclose(got[k], target, rtol=1e-13)  # through the target at T*
    assert cs.conditional_sigma[0, 0, 0, k] == 0.0
    assert_allclose(cs.conditional_sigma[0, 0, 0], sd * np.sqrt(1.0 - rho ** 2), rtol=1e-13)
    assert np.all(got[np.arange(len(IMS)) != k] < np.exp(mu + e_exact * sd)[np.arange(len(IMS)) != k])


def test_weighted_scenario_of_two_ruptures_and_two_models():
    rs = point_source_ruptures("p", 10.0, 20.0, mfd=MagnitudeBins(np.array([5.5, 6.8]), np.array([0.02, 0.002])),
                               hypo_depths=[(4.0, 0.5), (14.0, 0.5)], mechanisms=[(0, 90, 0, 1.0)],
                               upper_depth_km=0.0, lower_depth_km=20.0)
    gmms, weights = [SpectralGmm(s_m=0.05), SpectralGmm(c2=1.0, shift=-0.6, s_m=-0.03)], [0.3, 0.7]
    lon, lat, trunc, cond = np.array([10.08]), np.array([20.03]), 3.0, "SA_1.0"
    k = IMS.index(cond)
    ln_t = np.log(np.array([[[0.05, 0.3]]]))  # (cond, site, target)
    cs = _spectrum(lon, lat, rs, gmms, weights, [cond], ln_t, trunc)
    rrup = _rrup(lon, lat, rs)
    w_all = 0.0
    s_mu, s_sd, s_m, s_eps, s_eps_sd = (np.zeros((2, len(IMS))), np.zeros((2, len(IMS))), 0.0, 0.0, 0.0)
    for g, wg in zip(gmms, weights):
        mu, sd = (np.stack(v) for v in zip(*(g.terms(im, rs.mag, rrup) for im in IMS)))  # (ims, ruptures)
        eps = (ln_t[0, 0][:, None] - mu[k]) / sd[k]  # (targets, ruptures)
        w = wg * rs.rate * stats.truncnorm.sf(eps, -trunc, trunc)  # Bazzurro & Cornell (1999) weights
        w_all = w_all + w.sum(1)
        s_mu, s_sd = s_mu + w @ mu.T, s_sd + w @ sd.T
        s_m, s_eps, s_eps_sd = s_m + w @ rs.mag, s_eps + (w * eps).sum(1), s_eps_sd + (w * eps * sd[k]).sum(1)
    mu_bar, sd_bar = s_mu / w_all[:, None], s_sd / w_all[:, None]
    assert_allclose(cs.ln_median[0, 0], mu_bar, rtol=1e-12)
    assert_allclose(cs.sigma[0, 0], sd_bar, rtol=1e-12)
    assert_allclose(cs.mean_mag[0, 0], s_m / w_all, rtol=1e-12)
    assert_allclose(cs.mean_eps[0, 0], s_eps / w_all, rtol=1e-11)
    # ln x* = E_w[mu + eps sigma]: scenario eps - mean eps = cov_w(eps, sigma(T*)) / mean sigma(T*)
    cov = s_eps_sd / w_all - (s_eps / w_all) * sd_bar[:, k]
    assert_allclose(cs.scenario_eps[0, 0] - cs.mean_eps[0, 0], cov / sd_bar[:, k], rtol=1e-9, atol=1e-13)
    assert np.all(np.abs(cov) > 1e-4)  # the models' sigmas differ: the two epsilons are not the same
    assert_allclose(cs.ln_cms[0, 0, :, k], ln_t[0, 0], rtol=1e-13)  # through the target all the same
    assert np.all(cs.conditional_sigma[0, 0, :, k] == 0.0)


def test_blocks_and_chunks_do_not_change_a_bit(monkeypatch):
    rs = point_source_ruptures("p", 10.0, 20.0, mfd=MagnitudeBins(np.array([5.2, 6.0, 6.9]), np.array([0.05, 0.01, 0.001])),
                               hypo_depths=[(4.0, 0.5), (12.0, 0.5)], mechanisms=[(0, 90, 0, 0.5), (60, 45, 90, 0.5)],
                               upper_depth_km=0.0, lower_depth_km=20.0)
    lon, lat = np.linspace(9.9, 10.3, 5), np.linspace(19.9, 20.2, 5)
    gmms, w = [get_gmm("BSSA14"), get_gmm("CB14")], [0.5, 0.5]
    ln_t = np.log(np.tile([[0.05, 0.2]], (2, 5, 1)))
    cond = ["PGA", "SA_1.0"]
    args = (lon, lat, np.full(5, 400.0), rs, gmms, w, cond, IMS, ln_t)
    whole = compute_spectrum_sums(*args, truncation_sigma=3.0, site_block=5, ref=REF)
    monkeypatch.setattr(cms, "_CHUNK_VALUES", 3 * len(IMS))  # chunks of 3 pairs: only the summation order moves
    one = compute_spectrum_sums(*args, truncation_sigma=3.0, site_block=5, ref=REF)
    assert all(np.allclose(a, b, rtol=1e-13, atol=0) for a, b in zip(one, whole))
    for block in (1, 2):  # the chunks follow each site's own pairs: the site blocks change no bit
        other = compute_spectrum_sums(*args, truncation_sigma=3.0, site_block=block, ref=REF)
        assert all(np.array_equal(a, b) for a, b in zip(one, other)), block
    assert np.all(one[0][..., 0] > 0)


def test_spectrum_periods_and_formula_checks():
    bssa, cb = get_gmm("BSSA14"), get_gmm("CB14")
    ims = spectrum_ims([bssa, cb], ["PGA"])
    assert ims[0] == "PGA" and ims[1:] == [f"SA_{p:g}" if p % 1 else f"SA_{p:.1f}" for p in cb.tabulated_periods_s]
    assert len(spectrum_ims([bssa])) == 105  # one model: every period of its table
    with pytest.raises(ValueError, match="equal 1 at the conditioning period"):
        conditional_mean_spectrum(0.0, np.zeros(2), np.ones(2), [0.5, 0.9], 1)
    eps, ln_cms, sd = conditional_mean_spectrum(np.log(0.4), np.log([0.2, 0.3]), [0.6, 0.5], [0.7, 1.0], 1)
    assert_allclose(eps, np.log(0.4 / 0.3) / 0.5)
    assert_allclose(ln_cms, [np.log(0.2) + 0.7 * eps * 0.6, np.log(0.4)])
    assert_allclose(sd, [0.6 * np.sqrt(1 - 0.49), 0.0])


@pytest.fixture
def cms_config(tmp_path):
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    cfg = dst / "quakefolio_compute.toml"
    text = cfg.read_text().replace("return_periods_yr = [100, 475, 2475]", "return_periods_yr = [100, 475, 2475]\n"
                                   'cms_conditioning_ims = ["SA_1.0", "PGA"]\ncms_return_periods_yr = [475, 2475, 2e6]')
    cfg.write_text(text)
    return cfg


def test_stage_on_the_mini_portfolio(cms_config):
    run = run_pure(cms_config, stages_to_run="hazard")
    everything = read_table(run, "conditional_mean_spectrum")
    assert len(everything) == 5 * 2 * 3 * 22  # sites x IMs x return periods x periods
    floor = everything[everything.return_period_yr == 2e6]  # rate 5e-7/yr: below the default floor 1e-6/yr
    assert (floor.flag == "below_rate_floor").all() and floor.cms_g.isna().all() and floor.target_g.isna().all()
    t = everything[everything.return_period_yr < 2e6].reset_index(drop=True)
    assert (t.flag == "ok").all()
    at = t[t.im == t.conditioning_im]
    assert_allclose(at.cms_g, at.target_g, rtol=1e-12)  # through the uniform-hazard value at T*
    assert (at.conditional_sigma == 0).all() and (at.correlation == 1).all()
    other = t[t.im != t.conditioning_im]
    assert ((other.conditional_sigma > 0) == (other.correlation < 1)).all()  # PGA and SA_0.01: rho = 1
    # the target is the uniform-hazard value of the mean curve; the means are the disaggregation's
    uhs = read_table(run, "hazard_at_return_periods")
    uhs = uhs[uhs.statistic == "mean"].rename(columns={"im": "conditioning_im"})
    m = at.merge(uhs, on=["site_id", "conditioning_im", "return_period_yr"])
    assert len(m) == len(at)
    assert_allclose(m.target_g, m.im_level, rtol=1e-14)
    dis = read_table(run, "disaggregation_summary").rename(columns={"im": "conditioning_im"})
    m = at.merge(dis, on=["site_id", "conditioning_im", "return_period_yr"])
    assert len(m) == len(at)
    for col in ("mean_mag", "mean_dist_km", "mean_eps"):
        assert_allclose(m[f"{col}_x"], m[f"{col}_y"], rtol=1e-11)
    assert (np.abs(at.scenario_eps - at.mean_eps) < 0.1).all()
    # a rerun reads every site from the cache and writes the same table
    again = run_pure(cms_config, stages_to_run="hazard")
    manifest = json.loads((again / "manifest.json").read_text())
    assert manifest["cache"]["spectrum_sites"] == {"from_cache": 5, "computed": 0}
    pd.testing.assert_frame_equal(read_table(again, "conditional_mean_spectrum"), everything)
