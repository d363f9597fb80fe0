"""Event-based portfolio stage: determinism, chunking, cross-checks, correlation limits."""
import json
import shutil

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from quakefolio.core.events.gmf import FieldSampler
from quakefolio.core.events.portfolio import expected_loss_ratio
from quakefolio.pipeline.runner import run_pure
from quakefolio.pipeline.io.store import read_table

from conftest import MINI

EVENT_TABLES = ["event_loss", "year_loss", "portfolio_ep", "portfolio_ep_curve", "portfolio_summary",
                "asset_event_loss", "portfolio_breakdown"]


@pytest.fixture
def event_config(tmp_path):
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    cfg = dst / "quakefolio_compute.toml"
    text = cfg.read_text().replace("[exposure]", "[portfolio]\nyears = 20000\nseed = 7\n\n[exposure]")
    text = text.replace("site_block_size = 2", "site_block_size = 2\nevent_block_size = 256")
    cfg.write_text(text)
    return cfg


def _with(cfg, old, new):
    cfg.write_text(cfg.read_text().replace(old, new))


def test_event_tables_and_basic_identities(event_config):
    run = run_pure(event_config)
    names = {p.stem for p in run.glob("*.parquet")}
    assert set(EVENT_TABLES) <= names
    ev = read_table(run, "event_loss")
    yl = read_table(run, "year_loss")
    assert list(ev.event_id) == list(range(1, len(ev) + 1)) and ev.year.between(1, 20000).all()
    assert len(yl) == 20000
    assert_allclose(yl.ground_up_loss.sum(), ev.ground_up_loss.sum(), rtol=1e-12)
    assert (ev.net_loss <= ev.ground_up_loss + 1e-9).all()
    ep = read_table(run, "portfolio_ep")
    assert (ep.aep_loss >= ep.oep_loss).all() and (ep.tvar_loss >= ep.aep_loss).all()
    summary = read_table(run, "portfolio_summary").set_index("basis")
    assert_allclose(summary.loc["ground_up", "aal"], yl.ground_up_loss.mean(), rtol=1e-12)
    brk = read_table(run, "portfolio_breakdown")
    for dim, grp in brk.groupby("dimension"):
        assert_allclose(grp.aal_ground_up.sum(), summary.loc["ground_up", "aal"], rtol=1e-9)


def test_cross_checks_pass_on_the_small_model(event_config):
    # Built-in cross-checks: event-based per-asset AAL vs the classical EAL of the same model
    # (mean-damage-ratio mode: an unbiased estimate), and event-based hazard vs classical curves.
    run = run_pure(event_config)
    checks = json.loads((run / "manifest.json").read_text())["cross_checks"]
    assert checks["portfolio_aal_vs_classical_eal"]["passed"]
    assert checks["asset_aal_vs_classical_eal"]["within_3_standard_errors"] == 5
    h = checks["event_hazard_vs_classical"]
    assert h["compared_points"] > 50 and h["share_within_3_standard_errors"] >= 0.97


def test_identical_whatever_the_chunking_and_threads(event_config):
    # one random-number block per task on one thread, against 16 per task on 3 threads
    # (blocks of a task and groups of ruptures on threads: quakefolio.core.events.threads)
    _with(event_config, "event_block_size = 256", "event_block_size = 256\nmax_workers = 1")
    a = run_pure(event_config)
    _with(event_config, "event_block_size = 256\nmax_workers = 1", "event_block_size = 4096\nmax_workers = 3")
    b = run_pure(event_config)
    for name in EVENT_TABLES:
        pd.testing.assert_frame_equal(read_table(a, name), read_table(b, name), check_exact=True)


def test_seed_changes_events_and_same_seed_repeats(event_config):
    a, b = run_pure(event_config), run_pure(event_config)
    pd.testing.assert_frame_equal(read_table(a, "event_loss"), read_table(b, "event_loss"), check_exact=True)
    _with(event_config, "seed = 7", "seed = 8")
    c = run_pure(event_config)
    assert not read_table(a, "event_loss").equals(read_table(c, "event_loss"))


def test_sampled_damage_mode_runs_and_agrees_on_average(event_config):
    _with(event_config, "seed = 7", "seed = 7\nloss_model = \"sampled_damage\"")
    run = run_pure(event_config)
    s = read_table(run, "portfolio_summary").set_index("basis").loc["ground_up"]
    # sampled damage states have the same expectation as the mean damage ratio (law of total
    # expectation); allow 4 standard errors
    assert abs(s.aal - s.classical_eal_same_branch) <= 4 * s.aal_standard_error


def _single_event_losses(range_km, n_events=4000):
    """Losses of one scenario at 30 sites with tau = 0 (within-event residuals only)."""
    rng = np.random.default_rng(11)
    lon = 10.0 + rng.uniform(-0.1, 0.1, 30)
    lat = 20.0 + rng.uniform(-0.1, 0.1, 30)
    sampler = FieldSampler(lon, lat, ["PGA"], spatial_correlation=range_km is not None,
                           range_km=range_km if range_km is not None else None)
    res = sampler.sample(rng, n_events)
    im = np.exp(np.log(0.3) + 0.6 * res.eps[:, 0, :])  # (events, sites)
    return expected_loss_ratio(im, [0.2, 0.5, 1.0], [0.6, 0.6, 0.6], [0.05, 0.3, 1.0])


def test_independent_and_comonotonic_limits():
    # Correlation off: the variance of the portfolio loss per event equals the sum of the
    # assets' variances (independence). Range -> infinity: every site has the same residual,
    # the losses are comonotonic and the portfolio standard deviation is the sum of the
    # assets' standard deviations (common practice; Frechet upper bound).
    ind = _single_event_losses(None)
    var_sum = ind.var(axis=0, ddof=1).sum()
    assert_allclose(ind.sum(axis=1).var(ddof=1), var_sum, rtol=0.15)  # sampling error of 4000 draws
    com = _single_event_losses(np.inf)
    assert_allclose(com.sum(axis=1).std(ddof=1), com.std(axis=0, ddof=1).sum(), rtol=1e-9)


def test_net_loss_mean_mode_agrees_with_sampled_mode_and_classical(event_config):
    # Mean mode: the expected net loss given the ground motion (terms over the loss distribution,
    # closed form), so its net AAL estimates that of the sampled mode of the same model; with the
    # same seed the events and ground motion are shared and the difference of the year losses has
    # the paired standard error. Both agree with the classical net EAL of the same branch.
    mean_run = run_pure(event_config)
    _with(event_config, "seed = 7", "seed = 7\nloss_model = \"sampled_damage\"")
    sampled_run = run_pure(event_config)
    ym, ys = read_table(mean_run, "year_loss"), read_table(sampled_run, "year_loss")
    assert_allclose(ym.ground_up_loss.sum(), read_table(mean_run, "event_loss").ground_up_loss.sum(), rtol=1e-12)
    diff = ys.net_loss.to_numpy() - ym.net_loss.to_numpy()
    paired_se = diff.std(ddof=1) / np.sqrt(len(diff))
    assert abs(diff.mean()) <= 3 * paired_se
    for run in (mean_run, sampled_run):
        checks = json.loads((run / "manifest.json").read_text())["cross_checks"]
        net = checks["portfolio_net_aal_vs_classical_net_eal"]
        assert net["passed"], net
        summary = read_table(run, "portfolio_summary").set_index("basis")
        loss = read_table(run, "asset_loss")
        assert summary.loc["net", "classical_eal_same_branch"] == pytest.approx(net["classical_eal"], rel=1e-12)
        assert summary.loc["net", "classical_eal_same_branch"] < summary.loc["ground_up", "classical_eal_same_branch"]
    # classical net EAL per asset: below the EAL, equal (bit for bit) where the asset has no terms
    assets = pd.read_csv(event_config.parent / "exposure.csv")
    no_terms = (assets.deductible.isna() & assets.limit.isna()).to_numpy()
    assert no_terms.any() and (~no_terms).any()
    assert (loss.eal_net[no_terms] == loss.eal[no_terms]).all()
    assert (loss.eal_net[~no_terms] < loss.eal[~no_terms]).all()


@pytest.mark.parametrize("choice, clustered", [(None, False), ("mixed_site_conditions", False),
                                               ("clustered_site_conditions", True)])
def test_correlation_range_choice_reaches_the_field_sampler(event_config, choice, clustered):
    # Jayaram & Baker (2009): range b = 8.5 + 17.2 T km for mixed Vs30, 40.7 - 15.0 T km (T < 1 s)
    # where Vs30 clusters in space.
    from quakefolio.core.events.gmf import jb09_range_km
    from quakefolio.pipeline.stages import load_inputs
    from quakefolio.pipeline.stages.events import prepare_events

    if choice:
        _with(event_config, "seed = 7", f'seed = 7\ncorrelation_range = "{choice}"')
    inputs = load_inputs(event_config)
    em = prepare_events(inputs)
    periods = [0.0 if im == "PGA" else float(im.split("_")[1]) for im in em.ims]
    np.testing.assert_allclose(em.sampler.range_km, jb09_range_km(periods, clustered), rtol=1e-12)
