"""Collapse-risk screening and retrofit what-if (pipeline/stages/whatif.py), on copies of tests/data/mini."""
import shutil

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from scipy.special import ndtri

from quakefolio.core.curves import im_at_rate, prob_in_years, rate_from_prob
from quakefolio.core.errors import InputError
from quakefolio.core.loss import expected_annual_loss
from quakefolio.core.risk import damage_state_rates, risk_targeted_im
from quakefolio.fragility import load_library
from quakefolio.pipeline import stages
from quakefolio.pipeline.stages import whatif
from quakefolio.pipeline.cli import main
from quakefolio.pipeline.io.ingest import curves_for_im
from quakefolio.pipeline.stages.events import prepare_events
from quakefolio.pipeline.runner import run_pure
from quakefolio.pipeline.io.store import read_table
from quakefolio.pipeline.summary import summary_text

from conftest import DEMO, MINI

# An invented stronger version of the mini class TST-A (same IM and consequences, medians doubled).
RETROFIT_LIBRARY = """# Test library: invented parameters.
format = "quakefolio-fragility-1"

[classes.TST-A-RF]
im = "SA_0.3"

[[classes.TST-A-RF.states]]
name = "light"
median = 0.4
beta = 0.6
mean_damage_ratio = 0.05
cov = 0.5

[[classes.TST-A-RF.states]]
name = "heavy"
median = 1.2
beta = 0.6
mean_damage_ratio = 0.4
cov = 0.4

[[classes.TST-A-RF.states]]
name = "collapse"
median = 3.0
beta = 0.6
mean_damage_ratio = 1.0

[classes.TST-A-COPY]
im = "SA_0.3"

[[classes.TST-A-COPY.states]]
name = "light"
median = 0.2
beta = 0.6
mean_damage_ratio = 0.05
cov = 0.5

[[classes.TST-A-COPY.states]]
name = "heavy"
median = 0.6
beta = 0.6
mean_damage_ratio = 0.4
cov = 0.4

[[classes.TST-A-COPY.states]]
name = "collapse"
median = 1.5
beta = 0.6
mean_damage_ratio = 1.0

[classes.TST-LONG]
im = "SA_3.0"

[[classes.TST-LONG.states]]
name = "collapse"
median = 0.5
beta = 0.6
mean_damage_ratio = 1.0
"""


def _setup(cfg, scenario_extra="", sections=""):
    """Add keys to [scenario] (and tables after it) and further sections to a mini config copy."""
    (cfg.parent / "retrofit.toml").write_text(RETROFIT_LIBRARY)
    text = cfg.read_text()
    head, rest = text.split("[hazard]", 1)
    cfg.write_text(head.rstrip() + "\n" + scenario_extra + "\n" + sections + "\n[hazard]" + rest)
    return cfg


def _line_of(cfg, needle, occurrence=0):
    hits = [i for i, line in enumerate(cfg.read_text().splitlines(), start=1) if line.strip().startswith(needle)]
    return hits[occurrence]


@pytest.fixture
def event_config(tmp_path):
    """The mini compute-mode inputs with a short event set (as in test_portfolio_stage)."""
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    cfg = dst / "quakefolio_compute.toml"
    text = cfg.read_text().replace("[exposure]", "[portfolio]\nyears = 3000\nseed = 11\n\n[exposure]")
    cfg.write_text(text.replace("site_block_size = 2", "site_block_size = 2\nevent_block_size = 256"))
    return cfg


# --- screening --------------------------------------------------------------------------------

def test_screening_flags_match_hand_computation(mini_config):
    # Poisson occurrence (Cornell 1968): P = 1 - exp(-lambda_c t), core.curves.prob_in_years; a
    # target of 20% in 30 years splits the five mini assets (P(30 yr) about 0.33, 0.21, 0.15, 0.28, 0.15).
    _setup(mini_config, sections="[screening]\ncollapse_target_prob = 0.2\ncollapse_target_years = 30\n")
    run = run_pure(mini_config)
    loss = read_table(run, "asset_loss")
    scr = read_table(run, "collapse_screening")
    assert list(scr.asset_id) == list(loss.asset_id)
    assert_array_equal(scr.annual_collapse_rate, loss.annual_collapse_rate)  # the run's own rates
    p = 1.0 - np.exp(-loss.annual_collapse_rate.to_numpy() * 30.0)
    assert_allclose(scr.collapse_prob_in_target_years, p, rtol=1e-12)
    assert_array_equal(scr.exceeds_target, p > 0.2)
    assert_allclose(scr.ratio_to_target, p / 0.2, rtol=1e-12)
    assert (scr.target_prob == 0.2).all() and (scr.target_years == 30).all()
    assert set(scr.asset_id[scr.exceeds_target]) == {"B1", "B2", "B4"}
    text = summary_text(run)
    assert "collapse-risk screening: 3 of 5 assets exceed the target of 20.00% collapse probability in 30 years" \
        in text


def test_risk_targeted_im_equals_core_function(mini_config):
    # ASCE/SEI 7-16 Section 21.2.1.2 (Luco et al. 2007), here with rt_beta 0.5 and 20% at the IM so that
    # the configured parameters are seen to reach core.risk.risk_targeted_im.
    _setup(mini_config, sections="[screening]\nrt_beta = 0.5\nrt_prob_at_im = 0.2\n")
    run = run_pure(mini_config)
    rt = read_table(run, "site_risk_targeted_im")
    inputs = stages.load_inputs(mini_config)
    hz = inputs.hazard
    assert sorted(set(rt.im)) == sorted(set(hz.curves) - hz.interpolated)  # every tabulated IM, at every site
    for im, grp in rt.groupby("im"):
        x, lam = hz.curves[im]
        assert list(grp.site_id) == list(hz.site_id)
        expected = risk_targeted_im(x, lam, beta=0.5, prob_at_im=0.2, target_prob=0.01, years=50)
        assert_array_equal(grp.risk_targeted_im_g.to_numpy(), expected)
        uhs = im_at_rate(rate_from_prob(0.02, 50), x, lam)
        assert_array_equal(grp.im_at_2pct_50yr_g.to_numpy(), uhs)
        ok = grp.flag.to_numpy() == "ok"
        assert_allclose(grp.risk_coefficient.to_numpy()[ok], (expected / uhs)[ok], rtol=1e-15)
        # definition: the fragility with 20% collapse at x_RT gives 1% collapse in 50 years
        finite = np.isfinite(expected)
        median = expected[finite] * np.exp(-ndtri(0.2) * 0.5)
        rate = damage_state_rates(x[finite], lam[finite], median[:, None], np.full((finite.sum(), 1), 0.5))[:, 0]
        assert_allclose(prob_in_years(rate, 50), 0.01, rtol=1e-9)


# --- what-if, classical -----------------------------------------------------------------------

def test_alternative_to_the_same_class_changes_nothing(mini_config):
    # A class mapped to itself, and to a copy with identical parameters from another library:
    # every delta exactly 0, PV 0, benefit-cost ratio 0.
    _setup(mini_config, scenario_extra="""
[[scenario.alternatives]]
id = "same"
building_class = "TST-A"
new_class = "TST-A"
retrofit_cost = 100000

[[scenario.alternatives]]
id = "copy"
assets = ["B1", "B2"]
new_class = "TST-A-COPY"
fragility_library = "retrofit.toml"
retrofit_cost_ratio = 0.1
""")
    run = run_pure(mini_config)
    loss = read_table(run, "asset_loss").set_index("asset_id")
    assets = read_table(run, "whatif_assets")
    assert list(assets.alternative_id) == ["same", "same", "copy", "copy"]
    assert not assets.fragility_changed.any()
    for col in ("eal_reduction", "collapse_prob_reduction"):
        assert (assets[col] == 0).all()
    assert_array_equal(assets.eal_before, loss.loc[assets.asset_id, "eal"])
    port = read_table(run, "whatif_portfolio")
    assert (port.change == 0).all() and (port.value_before == port.value_after).all()
    bc = read_table(run, "whatif_benefit_cost")
    assert (bc.avoided_eal == 0).all() and (bc.pv_avoided_loss == 0).all() and (bc.benefit_cost_ratio == 0).all()
    dmg = read_table(run, "whatif_asset_damage")
    for (alt, asset), grp in dmg.groupby(["alternative_id", "asset_id"]):
        before, after = grp[grp.case == "before"], grp[grp.case == "after"]
        assert_array_equal(before.annual_rate_exceed.to_numpy(), after.annual_rate_exceed.to_numpy())


def test_stronger_class_lowers_eal_and_collapse_for_the_selected_assets_only(mini_config):
    _setup(mini_config, scenario_extra="""discount_rate = 0.05
benefit_horizon_yr = 20

[[scenario.alternatives]]
id = "strengthen_b2"
description = "one building"
assets = ["B2"]
new_class = "TST-A-RF"
fragility_library = "retrofit.toml"
retrofit_cost = 250000

[[scenario.alternatives]]
id = "strengthen_tst_a"
building_class = "TST-A"
new_class = "TST-A-RF"
fragility_library = "retrofit.toml"
retrofit_cost_ratio = 0.15
""")
    run = run_pure(mini_config)
    loss = read_table(run, "asset_loss").set_index("asset_id")
    damage = read_table(run, "asset_damage")
    assets = read_table(run, "whatif_assets")
    assert list(assets[assets.alternative_id == "strengthen_b2"].asset_id) == ["B2"]
    assert list(assets[assets.alternative_id == "strengthen_tst_a"].asset_id) == ["B1", "B2"]
    assert assets.fragility_changed.all()
    assert (assets.eal_after < assets.eal_before).all()
    assert (assets.annual_collapse_rate_after < assets.annual_collapse_rate_before).all()
    assert (assets.collapse_prob_in_horizon_after < assets.collapse_prob_in_horizon_before).all()
    # after = the damage kernels on the same curves (as stages.compute_block), by hand
    inputs = stages.load_inputs(mini_config)
    rf = load_library(mini_config.parent / "retrofit.toml")["TST-A-RF"]
    levels, rates = curves_for_im(inputs.hazard, "SA_0.3")
    site_row = {s: i for i, s in enumerate(inputs.hazard.site_id)}
    dmg = read_table(run, "whatif_asset_damage")
    for r in assets.itertuples():
        i = site_row[r.site_id]
        ds = damage_state_rates(levels[i], rates[i], rf.medians, rf.betas)
        assert_allclose(r.eal_after, expected_annual_loss(ds, rf.mean_damage_ratio, r.replacement_value), rtol=1e-12)
        assert_allclose(r.annual_collapse_rate_after, ds[-1], rtol=1e-12)
        assert_allclose(r.collapse_prob_in_horizon_after, prob_in_years(ds[-1], 50), rtol=1e-12)
        assert r.eal_before == loss.loc[r.asset_id, "eal"]
        sel = dmg[(dmg.alternative_id == r.alternative_id) & (dmg.asset_id == r.asset_id)]
        assert_allclose(sel[sel.case == "after"].annual_rate_exceed, ds, rtol=1e-12)
        assert_array_equal(sel[sel.case == "before"].annual_rate_exceed,
                           damage[damage.asset_id == r.asset_id].annual_rate_exceed)
    # portfolio: only the selected assets move
    port = read_table(run, "whatif_portfolio").set_index(["alternative_id", "metric"])
    for alt, grp in assets.groupby("alternative_id"):
        eal = port.loc[(alt, "eal")]
        assert eal.value_before == loss.eal.sum()
        assert_allclose(eal.change, -grp.eal_reduction.sum(), rtol=1e-12)
    # benefit-cost: PV = avoided EAL x (1 - 1.05^-20) / 0.05 (ordinary annuity), cost per asset or ratio x value
    bc = read_table(run, "whatif_benefit_cost")
    per = bc[bc.scope == "asset"]
    factor = (1 - 1.05 ** -20) / 0.05
    assert_allclose(per.pv_avoided_loss, per.avoided_eal * factor, rtol=1e-12)
    assert_allclose(per.benefit_cost_ratio, per.pv_avoided_loss / per.retrofit_cost, rtol=1e-12)
    cost = per.set_index(["alternative_id", "asset_id"]).retrofit_cost
    assert cost[("strengthen_b2", "B2")] == 250000
    assert_allclose(cost[("strengthen_tst_a", "B1")], 0.15 * loss.loc["B1", "replacement_value"], rtol=1e-15)
    total = bc[bc.scope == "alternative"].set_index("alternative_id")
    assert total.loc["strengthen_tst_a", "n_assets"] == 2
    assert_allclose(total.loc["strengthen_tst_a", "benefit_cost_ratio"],
                    per[per.alternative_id == "strengthen_tst_a"].pv_avoided_loss.sum()
                    / per[per.alternative_id == "strengthen_tst_a"].retrofit_cost.sum(), rtol=1e-12)
    assert (per.avoided_annual_collapse_prob > 0).all()
    text = summary_text(run)
    assert "retrofit what-if" in text and "'strengthen_tst_a': 2 assets (TST-A -> TST-A-RF)" in text


def test_present_value_is_an_ordinary_annuity():
    # Closed form (common practice): sum_{t=1..T} (1 + r)^-t = (1 - (1 + r)^-T) / r; T at r = 0.
    for r, t in ((0.03, 50), (0.07, 10), (0.001, 100)):
        explicit = sum((1 + r) ** -k for k in range(1, t + 1))
        assert_allclose(whatif.annuity_factor(r, t), explicit, rtol=1e-12)
        assert_allclose(whatif.present_value(1234.5, r, t), 1234.5 * explicit, rtol=1e-12)
    assert whatif.annuity_factor(0.0, 50) == 50.0
    assert whatif.present_value(2000.0, 0.0, 25) == 50000.0
    assert_allclose(whatif.annuity_factor(1e-12, 50), 50.0, rtol=1e-9)  # continuous at r = 0
    with pytest.raises(ValueError, match="discount_rate must be non-negative"):
        whatif.annuity_factor(-0.01, 10)


def test_zero_discount_rate_in_a_run(mini_config):
    _setup(mini_config, scenario_extra="""discount_rate = 0
benefit_horizon_yr = 30

[[scenario.alternatives]]
id = "rf"
assets = ["B1"]
new_class = "TST-A-RF"
fragility_library = "retrofit.toml"
retrofit_cost = 1000
""")
    bc = read_table(run_pure(mini_config), "whatif_benefit_cost")
    assert_allclose(bc.pv_avoided_loss, 30 * bc.avoided_eal, rtol=1e-15)
    assert (bc.annuity_factor_yr == 30).all()


# --- what-if, event-based ---------------------------------------------------------------------

@pytest.mark.parametrize("loss_model", ["mean_damage_ratio", "sampled_damage"])
def test_event_based_whatif_uses_the_same_events(event_config, loss_model):
    _setup(event_config, scenario_extra="""
[[scenario.alternatives]]
id = "rf"
assets = ["B1"]
new_class = "TST-A-RF"
fragility_library = "retrofit.toml"
retrofit_cost = 50000

[[scenario.alternatives]]
id = "same"
assets = ["B3"]
new_class = "TST-B"
retrofit_cost = 50000
""")
    event_config.write_text(event_config.read_text().replace("seed = 11", f"seed = 11\nloss_model = \"{loss_model}\""))
    inputs = stages.load_inputs(event_config)
    run = run_pure(inputs)
    events = read_table(run, "event_loss")
    per_asset = read_table(run, "asset_event_loss")
    rerun = whatif.rerun_events(prepare_events(inputs), whatif.validate(inputs)[0])
    assert_array_equal(rerun.event_id, events.event_id)  # the same events
    unaffected = per_asset.asset_id.to_numpy() != "B1"
    # the same ground-motion fields (and damage-state draws): other assets' losses are bit-identical
    assert_array_equal(rerun.asset_aal_ground_up[unaffected], per_asset.aal_ground_up.to_numpy()[unaffected])
    assert rerun.asset_aal_ground_up[~unaffected][0] < per_asset.aal_ground_up.to_numpy()[~unaffected][0]
    if loss_model == "mean_damage_ratio":  # higher medians, same damage ratios: no event loss grows
        before = events.ground_up_loss.to_numpy()
        assert np.all(rerun.ground_up <= before + 1e-9 * (1 + before))
    port = read_table(run, "whatif_portfolio")
    summ = read_table(run, "portfolio_summary").set_index("basis")
    aal = port[(port.alternative_id == "rf") & (port.metric == "aal") & (port.basis == "ground_up")].iloc[0]
    assert aal.value_before == summ.loc["ground_up", "aal"]
    assert_allclose(aal.value_after, rerun.year_ground_up.mean(), rtol=1e-12)
    assert aal.change < 0 and aal.standard_error_of_change > 0
    ep = read_table(run, "portfolio_ep")
    rf = port
    rf_ep = rf[(rf.alternative_id == "rf") & (rf.metric == "aep_loss")].sort_values(["basis", "return_period_yr"])
    assert_array_equal(rf_ep.value_before.to_numpy(), ep.sort_values(["basis", "return_period_yr"]).aep_loss)
    assert len(rf[(rf.alternative_id == "rf") & rf.metric.isin(["oep_loss", "tvar_loss"])]) == 2 * len(ep)
    same = rf[rf.alternative_id == "same"]
    assert (same.change == 0).all()  # a class mapped to itself: nothing moves, events included
    rt = read_table(run, "site_risk_targeted_im")
    assert set(rt.im) == set(inputs.hazard_model.ims) and (rt.statistic == "mean").all()


# --- errors -----------------------------------------------------------------------------------

ALT = """
[[scenario.alternatives]]
id = "bad"
{body}
"""


@pytest.mark.parametrize("body, needle, column, message", [
    ('assets = ["B1", "B9"]\nnew_class = "TST-A"\nretrofit_cost = 1', "assets", "scenario.alternatives[0].assets",
     "alternative 'bad': unknown asset id 'B9'"),
    ('building_class = "TST-Z"\nnew_class = "TST-A"\nretrofit_cost = 1', "building_class",
     "scenario.alternatives[0].building_class", "alternative 'bad': unknown building class 'TST-Z'"),
    ('assets = ["B1"]\nnew_class = "TST-Q"\nretrofit_cost = 1', "new_class", "scenario.alternatives[0].new_class",
     "alternative 'bad': unknown building class 'TST-Q'"),
    ('assets = ["B1"]\nnew_clas = "TST-A"\nretrofit_cost = 1', "new_clas", "scenario.alternatives[0].new_clas",
     "unknown key; did you mean 'new_class'?"),
    ('assets = ["B1"]\nnew_class = "TST-A"\nretrofit_cost = 1\nretrofit_cost_ratio = 0.1', "retrofit_cost_ratio",
     "scenario.alternatives[0].retrofit_cost_ratio", "give exactly one of 'retrofit_cost'"),
    ('assets = ["B1"]\nnew_class = "TST-A"\nretrofit_cost = -5', "retrofit_cost",
     "scenario.alternatives[0].retrofit_cost", "expected a positive number, got -5"),
])
def test_config_errors_exit_2_naming_file_line_and_key(mini_config, capsys, body, needle, column, message):
    _setup(mini_config, scenario_extra=ALT.format(body=body))
    assert main(["run", "--no-flow", str(mini_config)]) == 2
    err = capsys.readouterr().err
    line = _line_of(mini_config, needle + " =")
    assert f"{mini_config.resolve()}:{line}: column '{column}':" in err and message in err
    assert not (mini_config.parent / "output" / "LATEST").exists()  # nothing written


def test_new_class_im_not_in_the_hazard_names_the_library_line(mini_config, capsys):
    # SA_3.0 lies beyond the tabulated periods of the mini hazard (PGA, SA_0.3, SA_1.0): not interpolated.
    _setup(mini_config, scenario_extra=ALT.format(
        body='assets = ["B1"]\nnew_class = "TST-LONG"\nfragility_library = "retrofit.toml"\nretrofit_cost = 1'))
    assert main(["run", "--no-flow", str(mini_config)]) == 2
    err = capsys.readouterr().err
    lib = mini_config.parent / "retrofit.toml"
    line = _line_of(lib, 'im = "SA_3.0"')
    assert f"{lib.resolve()}:{line}: column 'classes.TST-LONG.im': class 'TST-LONG' (new_class of alternative " \
           "'bad'): SA_3.0 is outside the tabulated periods" in err


def test_demo_alternative_validates():
    # demo_portfolio/quakefolio.toml: all MAS-UR buildings to the invented MAS-UR-RF class.
    inputs = stages.load_inputs(DEMO / "quakefolio.toml")
    (alt,) = whatif.validate(inputs)
    codes = inputs.exposure.building_class.to_numpy()
    assert alt.new_class == "MAS-UR-RF" and alt.changed.all()
    assert_array_equal(alt.assets, np.flatnonzero(codes == "MAS-UR"))
    assert_allclose(alt.retrofit_cost, 0.20 * inputs.exposure.replacement_value.to_numpy()[alt.assets])
    rf, ur = inputs.library["MAS-UR-RF"], inputs.library["MAS-UR"]
    assert rf.im == ur.im and np.all(rf.medians > ur.medians)


def test_new_class_im_not_computed_names_the_library_line(event_config):
    # compute mode: the hazard is computed for the library's classes in use plus [hazard] ims only.
    _setup(event_config, scenario_extra=ALT.format(
        body='assets = ["B1"]\nnew_class = "TST-LONG"\nfragility_library = "retrofit.toml"\nretrofit_cost = 1'))
    line = _line_of(event_config.parent / "retrofit.toml", 'im = "SA_3.0"')
    with pytest.raises(InputError, match=rf"retrofit\.toml:{line}: column 'classes\.TST-LONG\.im': class 'TST-LONG' "
                                         r"\(new_class of alternative 'bad'\): SA_3\.0 is not among the computed IMs "
                                         r"\(PGA, SA_0\.3, SA_0\.6\); add it to \[hazard\] ims"):
        stages.load_inputs(event_config)  # alternatives are validated with every other input
