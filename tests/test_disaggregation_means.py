"""Exact disaggregation means (magnitude, distance, epsilon) against hand-computed weighted means.

The disaggregation of the rate of exceeding a target level x* (Bazzurro & Cornell 1999, BSSA
89(2)) gives each (site, rupture) pair the weight w = nu_r P(IM > x* | r); the mean magnitude is
sum w M / sum w, likewise distance, and the mean epsilon is the weighted mean of the epsilon
needed to reach the target, eps* = (ln x* - mu_lnY) / sigma_lnY (Bazzurro & Cornell 1999;
McGuire 1995, BSSA 85(5)).  Checks: a single rupture (the means are its own M, R, eps*), two
ruptures against the weighted mean computed here with scipy.stats (normal and truncated-normal
survival functions), and the bin-centre means converging to the exact ones as the bins get finer
(midpoint error at most half a bin width).
"""
import shutil

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from quakefolio.core.gmm import GmmResult
from quakefolio.core.hazard import (
    DisaggBins, compute_disaggregation, disaggregation_from_pairs, disaggregation_means, disaggregation_summary,
    pair_index,
)
from quakefolio.core.sources.geometry import pair_distances
from quakefolio.core.sources.mfd import MagnitudeBins, single_magnitude
from quakefolio.core.sources.ruptures import point_source_ruptures
from quakefolio.pipeline import stages
from quakefolio.pipeline.io.cache import StageCache
from quakefolio.pipeline.io.store import read_table
from quakefolio.pipeline.runner import run_pure
from quakefolio.pipeline.stages import hazard as hazard_stage

from conftest import MINI

BINS = DisaggBins.default()


class DistanceGmm:
    """Test model ln Y = c1 + c2 M - c3 ln(Rrup + 10 km), constant sigma (invented)."""

    def __init__(self, c1=-3.0, c2=0.9, c3=1.3, sigma=0.65):
        self.c1, self.c2, self.c3, self.sigma = c1, c2, c3, sigma

    def evaluate(self, inp, ims):
        mu = self.c1 + self.c2 * np.asarray(inp.mag) - self.c3 * np.log(np.asarray(inp.rrup_km) + 10.0)
        mu = np.broadcast_to(mu, (len(ims),) + np.shape(mu))
        sd = np.full(mu.shape, self.sigma)
        return GmmResult(tuple(ims), mu, sd * 0.0, sd, sd, "test")


def _pairs(n):
    site, rup, _, _ = pair_index(np.ones((1, n), dtype=bool))
    return site, rup


def test_single_rupture_means_are_its_own_values():
    mag, dist, mu, sd, rate = np.array([6.3]), np.array([17.4]), np.array([np.log(0.2)]), np.array([0.6]), [1e-3]
    site, _ = _pairs(1)
    ln_x = np.log(np.array([[0.1, 0.35, 0.9]]))
    for trunc in (None, 3.0):
        contrib, mom = disaggregation_from_pairs(ln_x, mu, sd, np.array(rate), site, mag, dist, BINS, 1, trunc,
                                                 moments=True)
        m, r, e = disaggregation_means(mom)
        assert_allclose(m[0], 6.3, rtol=1e-15)
        assert_allclose(r[0], 17.4, rtol=1e-15)
        assert_allclose(e[0], (ln_x[0] - mu[0]) / sd[0], rtol=1e-14)  # the epsilon needed to reach x*
        # the bin-centre means are the centres of the rupture's bins, not its values
        _, bm, br, _, *_ = disaggregation_summary(contrib, BINS)
        assert_allclose(bm[0], 6.25) and assert_allclose(br[0], 15.0)
        _, em, er, ee, *_ = disaggregation_summary(contrib, BINS, mom)
        assert_allclose(np.stack([em, er, ee]), np.stack([m, r, e]), rtol=0)


@pytest.mark.parametrize("trunc", [None, 2.5])
def test_two_ruptures_against_the_hand_computed_weighted_mean(trunc):
    mag, dist = np.array([5.6, 7.1]), np.array([8.0, 62.0])
    mu, sd = np.array([np.log(0.15), np.log(0.08)]), np.array([0.55, 0.7])
    rate = np.array([4e-3, 6e-4])
    ln_x = np.log(np.array([[0.05, 0.2, 0.4]]))  # both ruptures contribute at every target, truncated or not
    site, _ = _pairs(2)
    _, mom = disaggregation_from_pairs(ln_x, mu, sd, rate, site, mag, dist, BINS, 1, trunc, moments=True)
    m, r, e = disaggregation_means(mom)
    eps = (ln_x[0][:, None] - mu) / sd  # (targets, ruptures): the epsilon needed to reach x*
    p = stats.norm.sf(eps) if trunc is None else stats.truncnorm.sf(eps, -trunc, trunc)
    w = rate * p
    assert_allclose(m[0], (w * mag).sum(1) / w.sum(1), rtol=1e-13)
    assert_allclose(r[0], (w * dist).sum(1) / w.sum(1), rtol=1e-13)
    assert_allclose(e[0], (w * eps).sum(1) / w.sum(1), rtol=1e-12)
    assert_allclose(mom[0, :, 0], w.sum(1), rtol=1e-13)  # the total is the hazard at x*


def test_bin_centre_means_converge_to_the_exact_ones():
    rng = np.random.default_rng(11)
    n = 4000
    mag, dist = rng.uniform(5.0, 7.5, n), rng.uniform(1.0, 150.0, n)
    mu = -4.0 + 0.9 * mag - 1.1 * np.log(dist + 5.0)
    sd, rate = np.full(n, 0.6), rng.uniform(1e-5, 1e-3, n)
    site, _ = _pairs(n)
    ln_x = np.log(np.array([[0.05, 0.4]]))
    eps_all = (ln_x[0][:, None] - mu) / sd
    lo_e, hi_e = np.floor(eps_all.min()), np.ceil(eps_all.max())
    _, exact = disaggregation_from_pairs(ln_x, mu, sd, rate, site, mag, dist, BINS, 1, moments=True)
    exact = np.stack(disaggregation_means(exact))[:, 0]  # (variable, target)
    # refine one variable's bins at a time (the others keep 1-2 bins): widths h x (0.5, 30 km, 1)
    for v, unit in enumerate((0.5, 30.0, 1.0)):
        errors = []
        for h in (1.0, 0.2, 0.04, 0.008):
            width = h * unit
            edges = [np.array([5.0, 7.5]), np.array([0.0, 150.0]), np.array([lo_e, hi_e])]
            lo, hi = edges[v]
            edges[v] = lo + width * np.arange(int(np.ceil((hi - lo) / width - 1e-9)) + 1)
            bins = DisaggBins(*edges)
            contrib = disaggregation_from_pairs(ln_x, mu, sd, rate, site, mag, dist, bins, 1)
            binned = disaggregation_summary(contrib, bins)[1 + v][0]
            err = np.abs(binned - exact[v])
            assert np.all(err <= width / 2 + 1e-12)  # midpoint rule: at most half a bin
            errors.append(err.max() / unit)
        assert errors[-1] < 1e-3 and all(b < a for a, b in zip(errors, errors[1:])), (v, errors)


def test_engine_single_rupture_and_two_depths():
    # a point source with one magnitude and one depth: one finite rupture
    gmm = DistanceGmm()
    site_lon, site_lat, ref = np.array([10.08]), np.array([20.03]), (10.05, 20.0)
    rs = point_source_ruptures("p", 10.0, 20.0, mfd=single_magnitude(6.4, 0.01), hypo_depths=[(8.0, 1.0)],
                               mechanisms=[(0, 90, 0, 1.0)], upper_depth_km=0.0, lower_depth_km=20.0)
    assert len(rs.mag) == 1
    ln_x = np.log(np.array([[[0.05, 0.2, 0.5]]]))  # (im, site, target)
    contrib, mom = compute_disaggregation(site_lon, site_lat, [760.0], rs, [gmm], [1.0], ["PGA"], ln_x, BINS,
                                          truncation_sigma=3.0, ref=ref, moments=True)
    rrup = pair_distances(site_lon, site_lat, rs, [0], [0], ref_lon=ref[0], ref_lat=ref[1])["rrup_km"][0]
    m, r, e = disaggregation_means(mom[0, 0])
    assert_allclose(m, 6.4, rtol=1e-15)
    assert_allclose(r, rrup, rtol=1e-14)
    mu = gmm.c1 + gmm.c2 * 6.4 - gmm.c3 * np.log(rrup + 10.0)
    assert_allclose(e, (ln_x[0, 0] - mu) / gmm.sigma, rtol=1e-12)
    # two magnitudes at two depths (four ruptures, two model weights): the weighted mean by hand
    rs = point_source_ruptures("p", 10.0, 20.0, mfd=MagnitudeBins(np.array([5.5, 6.8]), np.array([0.02, 0.002])),
                               hypo_depths=[(4.0, 0.5), (14.0, 0.5)], mechanisms=[(0, 90, 0, 1.0)],
                               upper_depth_km=0.0, lower_depth_km=20.0)
    gmms, weights = [DistanceGmm(), DistanceGmm(c1=-2.6, sigma=0.5)], [0.3, 0.7]
    _, mom = compute_disaggregation(site_lon, site_lat, [760.0], rs, gmms, weights, ["PGA"], ln_x, BINS,
                                    truncation_sigma=3.0, ref=ref, moments=True)
    idx = np.arange(len(rs.mag))
    rrup = pair_distances(site_lon, site_lat, rs, np.zeros_like(idx), idx, ref_lon=ref[0], ref_lat=ref[1])["rrup_km"]
    w_all, wm, wr, we = 0.0, 0.0, 0.0, 0.0
    for g, wg in zip(gmms, weights):
        mu = g.c1 + g.c2 * rs.mag - g.c3 * np.log(rrup + 10.0)
        eps = (ln_x[0, 0][:, None] - mu) / g.sigma
        w = wg * rs.rate * stats.truncnorm.sf(eps, -3.0, 3.0)
        w_all, wm, wr, we = w_all + w.sum(1), wm + (w * rs.mag).sum(1), wr + (w * rrup).sum(1), we + (w * eps).sum(1)
    m, r, e = disaggregation_means(mom[0, 0])
    assert_allclose(m, wm / w_all, rtol=1e-12)
    assert_allclose(r, wr / w_all, rtol=1e-12)
    assert_allclose(e, we / w_all, rtol=1e-11)


@pytest.fixture
def compute_config(tmp_path):
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    return dst / "quakefolio_compute.toml"


def test_stage_writes_the_exact_means_whatever_the_blocks_and_the_cache(compute_config, tmp_path):
    inputs = stages.load_inputs(compute_config)
    model, hazard = inputs.hazard_model, inputs.hazard
    n = len(hazard.site_id)
    parts = [hazard_stage.hazard_block(model, hazard, b) for b in hazard_stage.site_blocks(n, n)]
    model, hazard = hazard_stage.combine_hazard(model, hazard, parts)
    rps = inputs.config.hazard.return_periods_yr
    cache = StageCache(tmp_path / "cache")

    def disaggregate(size):
        blocks = hazard_stage.site_blocks(n, size)
        return hazard_stage.combine_disaggregation(
            model, hazard, [hazard_stage.disagg_block(model, hazard, rps, b, cache) for b in blocks])

    one, two, cached = disaggregate(n), disaggregate(1), disaggregate(2)
    assert_allclose(two.disagg_moments, one.disagg_moments, rtol=1e-13)
    assert np.array_equal(cached.disagg_moments, two.disagg_moments)  # read back from the cache
    _, summary = hazard_stage.disaggregation_frames(one, hazard, rps)
    m, r, e = disaggregation_means(one.disagg_moments)
    assert_allclose(summary.mean_mag.to_numpy(), m.ravel(), rtol=0, equal_nan=True)
    assert_allclose(summary.mean_dist_km.to_numpy(), r.ravel(), rtol=0, equal_nan=True)
    assert_allclose(summary.mean_eps.to_numpy(), e.ravel(), rtol=0, equal_nan=True)
    # the total moment is the mean hazard at the target (the disaggregated rate)
    assert_allclose(one.disagg_moments[..., 0], one.disagg.sum(axis=(-3, -2, -1)), rtol=1e-12)


def test_run_summary_has_the_exact_means(compute_config):
    run = run_pure(compute_config, stages_to_run="hazard")
    s = read_table(run, "disaggregation_summary").dropna(subset=["mean_mag"])
    assert len(s) and s.mean_mag.between(4.5, 7.2).all() and (s.mean_dist_km > 0).all()
    # exact means are not bin centres
    centres = 0.5 * (BINS.mag_edges[:-1] + BINS.mag_edges[1:])
    assert not np.isin(s.mean_mag.to_numpy(), centres).all()
