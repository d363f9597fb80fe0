"""Hazard engine end to end: sources -> ruptures -> pairs -> ground motion -> curves."""
import json
import shutil

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from quakefolio.core.gmm import GmmResult
from quakefolio.core.hazard import compute_site_hazard, weighted_mean
from quakefolio.core.sources.mfd import single_magnitude, truncated_gr
from quakefolio.core.sources.ruptures import RuptureSet, planar_fault_ruptures, point_source_ruptures
from quakefolio.pipeline import stages
from quakefolio.pipeline.stages import hazard as hazard_stage
from quakefolio.pipeline.runner import run_pure
from quakefolio.pipeline.io.store import read_table

from conftest import MINI
from test_hazard_engine import closed_form_rate


class ConstantDistanceGmm:
    """Test model ln Y = c1 + c2 M - c3 ln R0 with a fixed distance R0 [km] and constant sigma."""

    def __init__(self, c1, c2, c3, r0_km, sigma):
        self.c1, self.c2, self.c3, self.r0, self.sigma = c1, c2, c3, r0_km, sigma

    def evaluate(self, inp, ims):
        mu = self.c1 + self.c2 * np.asarray(inp.mag) - self.c3 * np.log(self.r0)
        mu = np.broadcast_to(mu, (len(ims),) + np.shape(mu))
        sd = np.full(mu.shape, self.sigma)
        return GmmResult(tuple(ims), mu, sd * 0.0, sd, sd, "test")


def test_engine_reproduces_the_exponential_magnitude_closed_form():
    # Cornell (1968); Esteva (1970): exact finite-Mmin expression (see test_hazard_engine), here
    # through the whole engine: truncated GR bins (Cosentino et al. 1977) with a very high Mmax,
    # a point source's finite ruptures, the distance cut-off and the pair bookkeeping.
    nu, b, m_min = 0.2, 1.0, 5.0
    gmm = ConstantDistanceGmm(-3.5, 1.0, 1.2, 25.0, 0.6)
    mfd = truncated_gr(b_value=b, mmin=m_min, mmax=m_min + 8.0, bin_width=0.01, rate_above_mmin=nu)
    rs = point_source_ruptures("p", 10.0, 20.0, mfd=mfd, hypo_depths=[(10.0, 1.0)], mechanisms=[(0, 90, 0, 1.0)],
                               upper_depth_km=0.0, lower_depth_km=20.0)
    y = np.geomspace(0.005, 1.0, 20)
    got = compute_site_hazard([10.0], [20.0], [760.0], rs, [gmm], ["PGA"], y, max_distance_km=5000.0)[0, 0, 0]
    # the Mmax truncation removes a rate of nu * 10**-8: the closed form for the truncated
    # exponential is the unbounded one minus the share above Mmax, negligible at these y
    expected = closed_form_rate(y, nu, b, m_min, -3.5, 1.0, 1.2, 25.0, 0.6)
    assert_allclose(got, expected, rtol=5e-3)  # the engine tolerance: 0.5 %


def test_single_rupture_without_sigma_is_a_step():
    gmm = ConstantDistanceGmm(-1.0, 0.0, 0.0, 10.0, 0.0)  # median exp(-1) g, sigma 0
    rs = point_source_ruptures("p", 10.0, 20.0, mfd=single_magnitude(6.0, 0.01), hypo_depths=[(10.0, 1.0)],
                               mechanisms=[(0, 90, 0, 1.0)], upper_depth_km=0.0, lower_depth_km=20.0)
    y = np.array([0.2, 0.36, 0.37, 0.5])
    got = compute_site_hazard([10.0], [20.0], [760.0], rs, [gmm], ["PGA"], y)[0, 0, 0]
    assert_allclose(got, [0.01, 0.01, 0.0, 0.0])  # exp(-1) = 0.3679


def test_integration_distance_cuts_far_ruptures():
    gmm = ConstantDistanceGmm(-1.0, 0.5, 0.0, 10.0, 0.5)
    rs = point_source_ruptures("p", 12.0, 20.0, mfd=single_magnitude(6.0, 0.01), hypo_depths=[(10.0, 1.0)],
                               mechanisms=[(0, 90, 0, 1.0)], upper_depth_km=0.0, lower_depth_km=20.0)
    near = compute_site_hazard([10.0], [20.0], [760.0], rs, [gmm], ["PGA"], [0.1, 0.2], max_distance_km=300.0)
    far = compute_site_hazard([10.0], [20.0], [760.0], rs, [gmm], ["PGA"], [0.1, 0.2], max_distance_km=150.0)
    assert np.all(near > 0) and np.all(far == 0)  # about 209 km apart


def test_results_do_not_depend_on_site_blocking():
    mfd = truncated_gr(b_value=1.0, mmin=5.0, mmax=7.0, bin_width=0.2, rate_above_mmin=0.02)
    rs = planar_fault_ruptures("f", [(9.9, 19.95), (10.1, 19.97)], dip_deg=60, rake_deg=90, upper_depth_km=0,
                               lower_depth_km=12, mfd=mfd)
    from quakefolio.core.gmm import get_gmm

    lon, lat = np.linspace(9.8, 10.2, 7), np.linspace(19.9, 20.1, 7)
    args = (lon, lat, np.full(7, 400.0), rs, [get_gmm("BSSA14")], ["PGA", "SA_1.0"], np.geomspace(0.01, 2, 12))
    a = compute_site_hazard(*args, site_block=7, ref=(10.0, 20.0))
    b = compute_site_hazard(*args, site_block=2, ref=(10.0, 20.0))
    assert_allclose(a, b, rtol=1e-13)
    assert np.all(np.diff(a, axis=-1) <= 0)  # hazard curves non-increasing


@pytest.fixture
def compute_config(tmp_path):
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    return dst / "quakefolio_compute.toml"


def test_compute_mode_run_tables(compute_config):
    run = run_pure(compute_config)
    haz = read_table(run, "site_hazard")
    assert set(haz.statistic) == {"mean", "p16", "p50", "p84"}
    wide = haz.pivot_table(index=["site_id", "im", "im_level"], columns="statistic", values="annual_rate")
    assert (wide.p16 <= wide.p50 + 1e-18).all() and (wide.p50 <= wide.p84 + 1e-18).all()
    for (_, _, stat), grp in haz.groupby(["site_id", "im", "statistic"]):
        assert np.all(np.diff(grp.sort_values("im_level").annual_rate.to_numpy()) <= 0)
    dis = read_table(run, "disaggregation")
    sums = dis.groupby(["site_id", "im", "return_period_yr"]).share.sum()
    assert_allclose(sums.to_numpy(), 1.0, atol=1e-4)  # shares below 1e-6 are not listed
    summary = read_table(run, "disaggregation_summary")
    assert summary.mean_mag.between(4.5, 7.2).all()
    manifest = json.loads((run / "manifest.json").read_text())
    assert [b["id"] for b in manifest["hazard_logic_tree"]["source_branches"]] == ["sources", "sources_alt"]
    loss = read_table(run, "asset_loss")
    assert (loss.eal > 0).all() and (loss.site_distance_km == 0).all()


def test_mean_curve_is_the_weighted_branch_mean(compute_config):
    inputs = stages.load_inputs(compute_config)
    model = inputs.hazard_model
    blocks = hazard_stage.site_blocks(len(inputs.hazard.site_id), 2)
    parts = [hazard_stage.hazard_block(model, inputs.hazard, b) for b in blocks]
    model, _ = hazard_stage.combine_hazard(model, inputs.hazard, parts)
    w = np.array([0.6 * 0.5, 0.6 * 0.5, 0.4 * 0.5, 0.4 * 0.5])
    flat = model.branch_curves.reshape((-1,) + model.branch_curves.shape[2:])
    assert_allclose(model.statistics["mean"], np.tensordot(w, flat, axes=(0, 0)), rtol=1e-13)
    assert_allclose(weighted_mean(flat, w), model.statistics["mean"], rtol=1e-13)


def test_disaggregation_mean_magnitude_grows_with_the_fault_rate(compute_config):
    def mean_mag(rate):
        text = (MINI / "sources.toml").read_text().replace("rate_above_min = 0.02", f"rate_above_min = {rate}")
        (compute_config.parent / "sources.toml").write_text(text)
        cfg = compute_config.read_text()
        cfg = cfg.replace('    { file = "sources.toml", weight = 0.6 },\n    { file = "sources_alt.toml", weight = 0.4 },',
                          '    { file = "sources.toml", weight = 1.0 },')
        compute_config.write_text(cfg)
        run = run_pure(compute_config, stages_to_run="hazard")
        s = read_table(run, "disaggregation_summary")
        return s[(s.im == "PGA") & (s.return_period_yr == 475)].set_index("site_id").mean_mag

    low, high = mean_mag(0.002), mean_mag(0.05)
    assert (high > low).all()  # the fault's larger magnitudes take a larger share


def test_hazard_only_run_writes_hazard_tables(compute_config):
    run = run_pure(compute_config, stages_to_run="hazard")
    names = sorted(p.stem for p in run.glob("*.parquet"))
    # the hazard tables and sites, and the assets and fragility classes the run used (a run describes itself)
    assert names == ["disaggregation", "disaggregation_summary", "hazard_at_return_periods", "hazard_sites",
                     "run_assets", "run_fragility", "site_hazard", "source_faults"]


def test_sites_snap_to_a_grid(compute_config):
    inputs = stages.load_inputs(compute_config)
    assert len(inputs.hazard.site_id) == 5  # every asset location is a site (spacing 0)
    cfg = compute_config.read_text().replace('truncation_sigma = 3.0', 'truncation_sigma = 3.0\nsite_spacing_km = 10.0')
    compute_config.write_text(cfg)
    snapped = stages.load_inputs(compute_config)
    assert len(snapped.hazard.site_id) < 5
    assert (snapped.site_distance_km <= 10.0 / np.sqrt(2) + 1e-9).all()


def test_propagated_branches_give_damage_and_eal_fractiles(compute_config):
    text = compute_config.read_text().replace('truncation_sigma = 3.0', 'truncation_sigma = 3.0\npropagate_branches = true')
    compute_config.write_text(text)
    run = run_pure(compute_config)
    frac = read_table(run, "asset_loss_fractiles")
    mean = read_table(run, "asset_loss").set_index("asset_id").eal
    wide = frac.pivot(index="asset_id", columns="statistic", values="eal")
    assert (wide.p16 <= wide.p50).all() and (wide.p50 <= wide.p84).all()
    # with branch weights 0.3, 0.3, 0.2, 0.2 the 16th and 84th fractiles are the extreme
    # branches, which bracket the EAL on the mean curve (see the next test)
    assert ((wide.p16 <= mean * (1 + 1e-9)) & (mean <= wide.p84 * (1 + 1e-9))).all()
    dmg = read_table(run, "asset_damage_fractiles")
    assert set(dmg.statistic) == {"p16", "p50", "p84"}
    assert len(dmg) == 3 * len(read_table(run, "asset_damage"))


def test_mean_curve_damage_rate_lies_between_the_branches(compute_config):
    # The continuous risk integral is linear in the hazard curve, so on the mean curve it lies
    # within the range of the branch results; with log-log interpolation this holds here to round-off.
    inputs = stages.load_inputs(compute_config)
    model = inputs.hazard_model
    blocks = hazard_stage.site_blocks(len(inputs.hazard.site_id), 5)
    model, _ = hazard_stage.combine_hazard(model, inputs.hazard, [hazard_stage.hazard_block(model, inputs.hazard, b)
                                                                  for b in blocks])
    dss = inputs.library["TST-A"]
    i = model.ims.index(dss.im)
    branches = model.branch_curves[:, :, i].reshape((-1,) + model.branch_curves.shape[3:])
    per_branch = dss.annual_rates(model.levels_g, branches)
    on_mean = dss.annual_rates(model.levels_g, model.statistics["mean"][i])
    assert np.all(on_mean >= per_branch.min(axis=0) * (1 - 1e-12))
    assert np.all(on_mean <= per_branch.max(axis=0) * (1 + 1e-12))
