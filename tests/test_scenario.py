"""Scenario earthquakes: station conditioning, damage against a closed form, the scenario command.

Sources of the checks are named beside each: Gaussian conditioning of a joint normal vector
(common practice; any multivariate statistics text), the scalar normal-normal update (common
practice), the lognormal-fragility expectation identity (common practice), scipy.stats as the
reference for Phi.
"""
from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import scipy.linalg as sla
from numpy.testing import assert_allclose
from scipy import stats

from quakefolio.core.events.conditioning import condition_field, sample_conditioned
from quakefolio.core.events.gmf import FieldSampler, ln_im
from quakefolio.core.events.scenario import mean_exceedance, realisation_percentiles, standard_error_of_mean
from quakefolio.pipeline.cli import main

from conftest import REPO

MINI = REPO / "tests" / "data" / "mini"


def _exp_corr(x, y, b):
    d = np.hypot(x[:, None] - x[None, :], y[:, None] - y[None, :])
    return np.exp(-3.0 * d / b)


def _layout(seed=3, n_s=6, n_far=2):
    """Stations, targets on the stations, targets between them and targets 1000 km away."""
    rng = np.random.default_rng(seed)
    xs, ys = rng.uniform(0, 30, n_s), rng.uniform(0, 30, n_s)
    xt = np.concatenate([xs, rng.uniform(0, 30, 4), 1000 + rng.uniform(0, 5, n_far)])
    yt = np.concatenate([ys, rng.uniform(0, 30, 4), 1000 + rng.uniform(0, 5, n_far)])
    x, y = np.concatenate([xs, xt]), np.concatenate([ys, yt])
    r = _exp_corr(x, y, 20.0)
    return r[:n_s, :n_s], r[n_s:, :n_s], r[n_s:, n_s:], n_s


def test_two_step_conditioning_equals_the_joint_gaussian_conditional():
    # Common practice: for a joint normal (d_t, r_s) with covariance [[S_tt, S_ts], [S_st, S_ss]],
    # d_t | r_s ~ N(S_ts S_ss^-1 r_s, S_tt - S_ts S_ss^-1 S_st). Here d = tau eta + phi eps with
    # eta ~ N(0, 1), eps ~ N(0, R), and r_s = d_s + e_s, e_s ~ N(0, sigma_m^2).
    rss, rts, rtt, n_s = _layout()
    n_t = rtt.shape[0]
    rng = np.random.default_rng(1)
    tau_s, phi_s = rng.uniform(0.3, 0.45, n_s), rng.uniform(0.5, 0.65, n_s)
    tau_t, phi_t = rng.uniform(0.3, 0.45, n_t), rng.uniform(0.5, 0.65, n_t)
    sd = rng.uniform(0.0, 0.2, n_s)
    r = rng.normal(0.3, 0.5, n_s)
    f = condition_field(r, tau_s, phi_s, sd, rss, rts, rtt)
    # the two-step (Worden et al. 2018) moments of d_t
    a = tau_t - phi_t * (f.gain @ tau_s)
    mean_2 = tau_t * f.eta_mean + phi_t * f.eps_mean(f.eta_mean)[0]
    cov_2 = (phi_t[:, None] * (f.root @ f.root.T) * phi_t[None, :]) + f.eta_var * np.outer(a, a)
    # the joint route
    s_ss = np.outer(tau_s, tau_s) + phi_s[:, None] * rss * phi_s[None, :] + np.diag(sd ** 2)
    s_ts = np.outer(tau_t, tau_s) + phi_t[:, None] * rts * phi_s[None, :]
    s_tt = np.outer(tau_t, tau_t) + phi_t[:, None] * rtt * phi_t[None, :]
    mean_j = s_ts @ sla.solve(s_ss, r, assume_a="pos")
    cov_j = s_tt - s_ts @ sla.solve(s_ss, s_ts.T, assume_a="pos")
    assert_allclose(mean_2, mean_j, rtol=0, atol=1e-10)
    assert_allclose(cov_2, cov_j, rtol=0, atol=1e-10)
    # and the sampler draws from it (Monte Carlo of the same model): means within 5 standard errors
    eta, eps = sample_conditioned(f, np.random.default_rng(5), 40_000)
    d = tau_t * eta[:, None] + phi_t * eps
    se = np.sqrt(np.diag(cov_j) / d.shape[0])
    assert np.all(np.abs(d.mean(axis=0) - mean_j) <= 5 * se + 1e-12)
    assert_allclose(np.cov(d.T), cov_j, atol=0.01)


def test_field_at_a_station_equals_the_record_in_every_realisation():
    # Required by the scenario issue: zero measurement sigma -> zero conditional variance at the
    # station; every realisation reproduces ln y_s = mu_s + r_s (round-off only).
    rss, rts, rtt, n_s = _layout(seed=11)
    rng = np.random.default_rng(2)
    tau, phi = rng.uniform(0.3, 0.45, n_s), rng.uniform(0.5, 0.65, n_s)
    mu_s = np.log(rng.uniform(0.1, 0.5, n_s))
    observed = rng.uniform(0.05, 0.8, n_s)
    f = condition_field(np.log(observed) - mu_s, tau, phi, 0.0, rss, rts, rtt)
    eta, eps = sample_conditioned(f, np.random.default_rng(9), 2000)
    at_station = mu_s + tau * eta[:, None] + phi * eps[:, :n_s]  # the first n_s targets sit on the stations
    assert_allclose(at_station, np.broadcast_to(np.log(observed), at_station.shape), rtol=0, atol=1e-7)


def test_measurement_sigma_gives_the_scalar_normal_update_at_a_lone_station():
    # Common practice (normal prior, normal measurement): d ~ N(0, s^2), r = d + e, e ~ N(0, m^2)
    # -> d | r ~ N(s^2 / (s^2 + m^2) r, s^2 m^2 / (s^2 + m^2)), s^2 = tau^2 + phi^2.
    tau, phi, m, r = 0.35, 0.55, 0.25, 0.8
    f = condition_field([r], [tau], [phi], [m], [[1.0]], [[1.0]], [[1.0]])
    s2 = tau ** 2 + phi ** 2
    a = tau - phi * f.gain[0, 0] * tau
    mean = tau * f.eta_mean + phi * f.eps_mean(f.eta_mean)[0, 0]
    var = phi ** 2 * f.root[0, 0] ** 2 + f.eta_var * a ** 2
    assert mean == pytest.approx(s2 / (s2 + m * m) * r, abs=1e-12)
    assert var == pytest.approx(s2 * m * m / (s2 + m * m), abs=1e-12)


def test_far_from_stations_the_within_event_field_is_unconditioned():
    # Far away (correlation exp(-3 x 1000 / 20) = 0) the within-event residual is N(0, 1) again
    # (zero gain, unit conditional variance); ln IM ~ N(mu + tau eta_hat, tau^2 v + phi^2) with the
    # stations' between-event estimate (module notes). Monte Carlo of the same model checks both.
    rss, rts, rtt, n_s = _layout(seed=4, n_far=2)
    tau, phi = 0.4, 0.6
    f = condition_field(np.full(n_s, 0.7), np.full(n_s, tau), np.full(n_s, phi), 0.0, rss, rts, rtt)
    far = slice(rtt.shape[0] - 2, None)
    assert_allclose(f.gain[far], 0.0, atol=1e-30)
    assert_allclose(np.diag(f.root @ f.root.T)[far], 1.0, atol=1e-12)
    eta, eps = sample_conditioned(f, np.random.default_rng(3), 50_000)
    e = eps[:, far]
    n = e.shape[0]
    assert np.all(np.abs(e.mean(axis=0)) < 5 / np.sqrt(n))
    assert np.all(np.abs(e.var(axis=0) - 1.0) < 5 * np.sqrt(2.0 / n))
    total = tau * eta + phi * e[:, 0]
    assert abs(total.mean() - tau * f.eta_mean) < 5 * np.sqrt((tau ** 2 * f.eta_var + phi ** 2) / n)
    assert total.var() == pytest.approx(tau ** 2 * f.eta_var + phi ** 2, rel=0.03)


def test_without_stations_the_field_is_the_unconditioned_one():
    rtt = _exp_corr(np.array([0.0, 3.0, 9.0]), np.zeros(3), 20.0)
    f = condition_field([], [], [], 0.0, np.zeros((0, 0)), np.zeros((3, 0)), rtt)
    assert (f.eta_mean, f.eta_var) == (0.0, 1.0)
    assert_allclose(f.root @ f.root.T, rtt, atol=1e-12)


def test_scenario_damage_probability_matches_the_lognormal_closed_form():
    # Common practice: for ln x ~ N(mu, sigma^2) and a lognormal fragility (theta, beta),
    # E[Phi(ln(x / theta) / beta)] = Phi((mu - ln theta) / sqrt(beta^2 + sigma^2)).
    # The field is sampled as the scenario samples it (FieldSampler + ln_im, untruncated).
    mu, tau, phi = np.log(0.3), 0.35, 0.55
    sampler = FieldSampler([10.0], [20.0], ["PGA"])
    res = sampler.sample(np.random.default_rng(21), 200_000)
    x = np.exp(ln_im(mu, tau, phi, res.eta, res.eps))[:, 0, :]  # (n, 1 site)
    medians, betas = np.array([0.15, 0.4, 0.9]), np.array([0.6, 0.5, 0.45])
    got = mean_exceedance(x, medians, betas)[0]
    sigma = np.hypot(tau, phi)
    expected = stats.norm.cdf((mu - np.log(medians)) / np.sqrt(betas ** 2 + sigma ** 2))
    se = np.sqrt(expected * (1 - expected) / x.shape[0])  # a bound: the conditional probabilities vary less
    assert np.all(np.abs(got - expected) <= 4 * se)


def test_percentiles_and_standard_error_follow_numpy_and_the_sample_formula():
    v = np.random.default_rng(0).lognormal(0, 1, (501, 3))
    assert_allclose(realisation_percentiles(v, [50, 90]), np.percentile(v, [50, 90], axis=0), rtol=1e-15)
    assert_allclose(standard_error_of_mean(v), v.std(axis=0, ddof=1) / np.sqrt(501), rtol=1e-13)
    with pytest.raises(ValueError, match="percentiles"):
        realisation_percentiles(v, [0, 120])


# --- the command on the mini portfolio ----------------------------------------------------------

_SCENARIO = """format = "quakefolio-scenario-1"
name = "mini scenario"
realisations = 150
seed = 5
percentiles = [50, 90]
{stations}
[[ruptures]]
id = "fault_max"
source_id = "test_fault"

[[ruptures]]
id = "own"
magnitude = 6.2
hypocentre = [10.05, 20.04, 8.0]
strike_deg = 80.0
dip_deg = 60.0
rake_deg = 90.0
lower_depth_km = 15.0
"""


@pytest.fixture(scope="module")
def mini(tmp_path_factory):
    folder = tmp_path_factory.mktemp("scenario") / "mini"
    shutil.copytree(MINI, folder, ignore=shutil.ignore_patterns("output"))
    return folder


def _run(folder, capsys, stations=""):
    path = folder / ("scenario_st.toml" if stations else "scenario.toml")
    path.write_text(_SCENARIO.format(stations=stations))
    assert main(["scenario", str(folder / "quakefolio_compute.toml"), str(path), "--quiet"]) == 0
    out = capsys.readouterr().out.strip().splitlines()[-1]
    run = Path(out)
    return run, {p.stem: pd.read_parquet(p) for p in run.glob("*.parquet")}


def test_scenario_run_writes_tables_whose_totals_agree(mini, capsys):
    from quakefolio.fragility import load_library

    library = load_library(mini / "fragility.toml")
    run, t = _run(mini, capsys)
    assert not (run / "report.html").exists()  # [output] report = false in the mini config
    assert run.parent.parent.name == "scenarios"  # the portfolio runs of the output folder are untouched
    assert set(t) >= {"scenario_ruptures", "scenario_asset_damage", "scenario_asset_loss", "scenario_portfolio_loss",
                      "scenario_realisation_loss", "scenario_site_motion"}
    for rid in ("fault_max", "own"):
        assets = t["scenario_asset_loss"].query("rupture_id == @rid")
        pf = t["scenario_portfolio_loss"].query("rupture_id == @rid")
        real = t["scenario_realisation_loss"].query("rupture_id == @rid")
        assert len(real) == 150 and len(assets) == 5
        # portfolio mean loss = sum of the buildings' mean losses (linearity of the mean; exact up to round-off)
        total = pf.query("scope == 'portfolio' and metric == 'ground_up_loss'").iloc[0]
        assert total["mean"] == pytest.approx(assets.mean_ground_up_loss.sum(), rel=1e-12)
        assert total["mean"] == pytest.approx(real.ground_up_loss.mean(), rel=1e-12)
        assert total["p90"] == pytest.approx(np.percentile(real.ground_up_loss, 90), rel=1e-12)
        by_class = pf.query("scope == 'building_class' and metric == 'ground_up_loss'")
        assert by_class["mean"].sum() == pytest.approx(total["mean"], rel=1e-12)
        net = pf.query("scope == 'portfolio' and metric == 'net_loss'").iloc[0]
        assert net["mean"] <= total["mean"] + 1e-6
        dmg = t["scenario_asset_damage"].query("rupture_id == @rid")
        assert ((dmg.prob_exceed >= 0) & (dmg.prob_exceed <= 1)).all() and dmg.asset_id.nunique() == 5
        # mean loss (mean-damage-ratio mode) through the damage table: linearity of the expectation,
        # E[sum_j (P_j - P_j+1) MDR_j] V = sum_j (mean P_j - mean P_j+1) MDR_j V (common practice)
        for a in assets.itertuples():
            dss = library[a.building_class]
            p = dmg[dmg.asset_id == a.asset_id].set_index("damage_state").prob_exceed[list(dss.names)].to_numpy()
            p_in = p - np.append(p[1:], 0.0)
            assert a.mean_ground_up_loss == pytest.approx(a.replacement_value * p_in @ dss.mean_damage_ratio, rel=1e-9)
    # the same inputs and seed give identical tables
    run2, t2 = _run(mini, capsys)
    assert run2 != run
    for name in t:
        pd.testing.assert_frame_equal(t[name], t2[name])


def test_station_on_a_hazard_site_fixes_the_field_there(mini, capsys):
    # Done-when of the scenario issue: with conditioning, the field at a station matches the record
    # within its stated uncertainty. A station with sigma_ln = 0 on hazard site of asset B5 (lon
    # 10.000, lat 20.000, Vs30 760 m/s: its own hazard site) fixes PGA there in every realisation.
    sites = pd.read_csv(mini / "exposure.csv")
    b5 = sites.query("asset_id == 'B5'").iloc[0]
    (mini / "stations.csv").write_text("station_id,lon,lat,im,observed_g,vs30_mps,sigma_ln\n"
                                       f"ST1,{b5.lon},{b5.lat},PGA,0.21,{b5.vs30_mps},0\n"
                                       "ST2,10.08,20.06,PGA,0.15,500,0.2\n")
    run, t = _run(mini, capsys, stations='stations_file = "stations.csv"\n')
    motion = t["scenario_site_motion"].query("im == 'PGA'")
    at = motion[np.isclose(motion.lon, b5.lon) & np.isclose(motion.lat, b5.lat)]
    assert len(at) == 2  # one per rupture
    for col in ("median_g", "p16_g", "p84_g"):
        assert_allclose(at[col], 0.21, rtol=1e-9)
    st = t["scenario_stations"]
    assert set(st.station_id) == {"ST1", "ST2"} and st.used.all()
    elsewhere = motion[~(np.isclose(motion.lon, b5.lon) & np.isclose(motion.lat, b5.lat))]
    assert (elsewhere.p84_g > elsewhere.p16_g).all()  # other sites keep their scatter


def test_demo_scenario_of_the_largest_fault_writes_its_tables_and_report(tmp_path, capsys):
    # Done-when of the scenario issue: the demo's scenario of its largest fault (Quarnel, M 6.95)
    # writes its tables and report section, with and without the invented station records.
    from quakefolio.fragility import load_library

    library = load_library(REPO / "demo_portfolio" / "fragility_library.toml")
    demo = tmp_path / "demo"
    shutil.copytree(REPO / "demo_portfolio", demo, ignore=shutil.ignore_patterns("output", "*.parquet", "__pycache__"))
    for station_args in ([], ["--stations", str(demo / "stations_quarnel.csv")]):
        assert main(["scenario", str(demo / "quakefolio.toml"), str(demo / "scenario_quarnel.toml"),
                     "--realisations", "100", "--quiet", *station_args]) == 0
        run = Path(capsys.readouterr().out.strip().splitlines()[-1])
        rup = pd.read_parquet(run / "scenario_ruptures.parquet")
        assert (rup.source_id.tolist(), rup.magnitude.tolist()) == (["quarnel_fault"], [pytest.approx(6.95)])
        pf = pd.read_parquet(run / "scenario_portfolio_loss.parquet")
        total = pf.query("scope == 'portfolio' and metric == 'ground_up_loss'").iloc[0]
        assert 0 < total["p50"] <= total["p90"] <= total["p99"]
        assert len(pd.read_parquet(run / "scenario_asset_loss.parquet")) == 480
        # expected casualties through the damage table (linearity of the expectation): occupants x mean
        # share present (demo periods: (0.8 x 10 + 0.5 x 4 + 0.3 x 10) / 24 = 13/24) x sum_j (P_j - P_j+1) c_j
        assets = pd.read_parquet(run / "scenario_asset_loss.parquet")
        dmg = pd.read_parquet(run / "scenario_asset_damage.parquet")
        exposure = pd.read_csv(demo / "exposure.csv").set_index("asset_id")
        for a in assets.iloc[::37].itertuples():
            dss = library[a.building_class]
            p = dmg[dmg.asset_id == a.asset_id].set_index("damage_state").prob_exceed[list(dss.names)].to_numpy()
            expected = exposure.occupants[a.asset_id] * 13 / 24 * ((p - np.append(p[1:], 0.0)) @ dss.casualty_rate)
            assert a.expected_casualties == pytest.approx(expected, rel=1e-9)
        cas = pf.query("scope == 'portfolio' and metric == 'casualties'").iloc[0]
        assert cas["mean"] == pytest.approx(assets.expected_casualties.sum(), rel=1e-9)
        html = (run / "report.html").read_text()
        assert 'id="scenario"' in html and "data:image/png;base64," in html and "CAUTION" in html
        assert ("scenario_stations.parquet" in {p.name for p in run.iterdir()}) == bool(station_args)


def test_rupture_of_given_size_is_centred_on_its_hypocentre():
    # Closed form (plane geometry): top and bottom depths d -+ (w / 2) sin(dip); the top edge is
    # the length long, the horizontal projection of the width w cos(dip); the centre is the epicentre.
    from quakefolio.core.sources.geometry import aeqd_forward
    from quakefolio.pipeline.io.scenario_file import ScenarioRupture
    from quakefolio.pipeline.stages.scenario import _given_plane

    r = ScenarioRupture("own", None, 6.5, (10.0, 20.0, 8.0), 80.0, 60.0, 90.0, 0.0, 20.0, 30.0, 12.0)
    rs = _given_plane(r)
    half = 6.0 * np.sin(np.radians(60.0))
    assert_allclose([rs.ztor_km[0], rs.zbot_km[0]], [8.0 - half, 8.0 + half], rtol=1e-12)
    x, y = (np.asarray(a) for a in aeqd_forward(rs.corners[0, :, 0], rs.corners[0, :, 1], 10.0, 20.0))
    assert np.hypot(x[1] - x[0], y[1] - y[0]) == pytest.approx(30.0, rel=1e-9)
    assert np.hypot(x[3] - x[0], y[3] - y[0]) == pytest.approx(12.0 * np.cos(np.radians(60.0)), rel=1e-9)
    assert_allclose([x.mean(), y.mean()], [0.0, 0.0], atol=1e-9)


def test_source_model_ruptures_by_source_id_and_by_index(mini, tmp_path):
    from quakefolio.pipeline.io.scenario_file import read_scenario
    from quakefolio.pipeline.stages import load_inputs
    from quakefolio.pipeline.stages.scenario import scenario_ruptures

    inputs = load_inputs(mini / "quakefolio_compute.toml")
    rs = inputs.hazard_model.source_branches[0][2].ruptures
    fault = np.flatnonzero(rs.source_index == rs.source_ids.index("test_fault"))
    k = int(fault[len(fault) // 3])
    path = tmp_path / "s.toml"
    path.write_text('format = "quakefolio-scenario-1"\n[[ruptures]]\nid = "a"\nsource_id = "test_fault"\n'
                    f'[[ruptures]]\nid = "b"\nrupture_index = {k}\n'
                    '[[ruptures]]\nid = "c"\nsource_id = "test_fault"\nmagnitude = 5.5\n')
    got = scenario_ruptures(inputs, read_scenario(path))
    assert got.mag[0] == rs.mag[fault].max()  # the default: the source's largest magnitude
    for field in ("mag", "strike_deg", "ztor_km", "length_km"):
        assert getattr(got, field)[1] == getattr(rs, field)[k]
    assert abs(got.mag[2] - 5.5) <= 0.051
    assert list(np.asarray(got.source_ids)[got.source_index]) == ["test_fault"] * 3
