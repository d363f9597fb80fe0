"""People and time: closed forms, Monte Carlo of the same model, identities, located input errors.

Checks:
- classical expectation: total probability over damage states, casualties = occupants x
  sum_j (lambda_j - lambda_{j+1}) x rate_j (the damage-to-consequence sum of
  performance-based earthquake engineering, Porter 2003, ICASP9; summation by parts);
- event-based: the annual average of simulated Poisson events with sampled intensities
  estimates the same expectation (Monte Carlo of the same model: a scalar hazard with
  known exceedance rates, scipy.stats.lognorm for the fragility);
- time of day: the expected fraction present is the duration-weighted mean (linearity of
  expectation, uniform event times; common practice);
- interruption loss = downtime x value per day (linear, common practice).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from quakefolio.core.consequences import (
    check_occupancy_profile, event_consequence_sums, event_present_fraction, expected_annual_consequence,
    expected_consequence_given_im, interruption_loss, mean_present_fraction, state_occupancy_rates,
)
from quakefolio.core.errors import InputError
from quakefolio.fragility.library import parse_library

MEDIANS = np.array([0.2, 0.5, 1.1])
BETAS = np.array([0.6, 0.6, 0.6])
CASUALTY = np.array([0.0, 0.004, 0.1])
DOWNTIME = np.array([5.0, 60.0, 400.0])


def test_classical_casualties_closed_form():
    lam = np.array([0.02, 0.005, 0.0008])  # rates of reaching or exceeding each state [1/yr]
    occupants = 40.0
    expected = occupants * ((lam[0] - lam[1]) * CASUALTY[0] + (lam[1] - lam[2]) * CASUALTY[1] + lam[2] * CASUALTY[2])
    assert occupants * expected_annual_consequence(lam, CASUALTY) == pytest.approx(expected, rel=1e-14)
    # summation by parts: sum_j (c_j - c_{j-1}) lambda_j
    assert expected_annual_consequence(lam, DOWNTIME) == pytest.approx(np.dot(np.diff(DOWNTIME, prepend=0), lam))
    np.testing.assert_allclose(state_occupancy_rates(lam), [0.015, 0.0042, 0.0008])


def test_given_im_limits_and_nan():
    assert expected_consequence_given_im(0.0, MEDIANS, BETAS, CASUALTY) == 0.0
    assert expected_consequence_given_im(1e6, MEDIANS, BETAS, DOWNTIME) == pytest.approx(DOWNTIME[-1])
    assert np.isnan(expected_annual_consequence([0.01, 0.001, 0.0], [np.nan] * 3))
    with pytest.raises(ValueError, match="non-negative"):
        expected_annual_consequence([0.01, 0.001, 0.0], [-1.0, 0.0, 0.0])


def test_event_based_average_matches_classical_monte_carlo():
    """Poisson events on a scalar hazard with a closed-form exceedance curve (Monte Carlo of the same model)."""
    rng = np.random.default_rng(7)
    rate_min, x_min, k = 0.2, 0.05, 2.0  # events per year with IM > x_min; power-law tail lambda(x) = r (x/x_min)^-k
    levels = np.geomspace(x_min, 20.0, 400)
    hazard = rate_min * (levels / x_min) ** -k
    # damage-state rates by numerical integration of the fragility against the hazard (fine grid)
    frag = stats.lognorm.cdf(levels[:, None], s=BETAS, scale=MEDIANS)
    dens = -np.gradient(hazard, levels)
    lam = np.trapezoid(frag * dens[:, None], levels, axis=0) + frag[0] * hazard[0]
    classical = 25.0 * expected_annual_consequence(lam, CASUALTY)
    years = 400_000
    n = rng.poisson(rate_min * years)
    x = x_min * rng.uniform(size=n) ** (-1.0 / k)
    x = x[x <= levels[-1]]
    per_event = event_consequence_sums(x[:, None], MEDIANS, BETAS, CASUALTY[:, None], np.array([[25.0]]))[:, 0]
    average = per_event.sum() / years
    se = np.sqrt((per_event ** 2).sum()) / years
    assert abs(average - classical) < 3 * se + 0.01 * classical, (average, classical, se)


def test_time_of_day_average_identity():
    hours, present = [10, 4, 10], [0.8, 0.5, 0.3]
    assert mean_present_fraction(hours, present) == pytest.approx((10 * 0.8 + 4 * 0.5 + 10 * 0.3) / 24)
    draws = event_present_fraction(np.random.default_rng(3), 200_000, hours, present)
    assert draws.mean() == pytest.approx(mean_present_fraction(hours, present), abs=4 * draws.std() / 447)
    np.testing.assert_array_equal(event_present_fraction(None, 5, None, None), np.ones(5))
    for bad, match in ((([10, 4], [0.5, 0.5]), "sum to 24"), (([24], [1.5]), r"\[0, 1\]"),
                       (([-1, 25], [0.1, 0.1]), "positive")):
        with pytest.raises(ValueError, match=match):
            check_occupancy_profile(*bad)


def test_interruption_is_downtime_times_daily_value():
    lam = np.array([0.02, 0.005, 0.0008])
    down = expected_annual_consequence(lam, DOWNTIME)
    assert interruption_loss(down, 1500.0) == pytest.approx(1500.0 * np.dot(state_occupancy_rates(lam), DOWNTIME))


def test_event_sums_weights_are_linear():
    x = np.array([[0.3, 0.9], [0.05, 2.0]])
    table = np.stack([CASUALTY, DOWNTIME], axis=1)
    w = np.array([[10.0, 1.0], [3.0, 2.0]])
    got = event_consequence_sums(x, MEDIANS, BETAS, table, w)
    by_hand = np.stack([expected_consequence_given_im(x[:, p], MEDIANS, BETAS, table) * w[p] for p in range(2)]).sum(0)
    np.testing.assert_allclose(got, by_hand, rtol=1e-14)


_LIB = """format = "quakefolio-fragility-1"
[classes.X]
im = "PGA"
[[classes.X.states]]
name = "a"
median = 0.2
beta = 0.6
mean_damage_ratio = 0.1
contents_damage_ratio = {c0}
casualty_rate = 0.0
[[classes.X.states]]
name = "b"
median = 0.6
beta = 0.6
mean_damage_ratio = 0.5
{second}
"""


@pytest.mark.parametrize("c0, second, key, message", [
    ("0.3", "contents_damage_ratio = 0.2\ncasualty_rate = 0.1", "contents_damage_ratio", "must not decrease"),
    ("1.3", "", "contents_damage_ratio", r"\[0, 1\]"),
])
def test_library_errors_are_located(c0, second, key, message):
    import tomllib

    text = _LIB.format(c0=c0, second=second)
    with pytest.raises(InputError, match=message) as info:
        parse_library(tomllib.loads(text), text=text, path="lib.toml")
    assert key in str(info.value) and ":" in str(info.value)


def test_exposure_contents_needs_class_ratio(tmp_path):
    from quakefolio.fragility import load_library
    from quakefolio.pipeline.io.ingest import read_exposure

    mini = __import__("conftest").REPO / "tests" / "data" / "mini"
    lib = load_library(mini / "fragility.toml")
    text = (mini / "exposure.csv").read_text().splitlines()
    text[0] += ",contents_value"
    text[1:] = [line + ",1000" for line in text[1:]]
    path = tmp_path / "exposure.csv"
    path.write_text("\n".join(text) + "\n")
    with pytest.raises(InputError, match="has no contents_damage_ratio") as info:
        read_exposure(path, lib)
    assert info.value.row == 2 and info.value.column == "contents_value"


def test_config_occupancy_errors_are_located(tmp_path):
    from quakefolio.pipeline.io.config import load_config

    mini = __import__("conftest").REPO / "tests" / "data" / "mini"
    text = (mini / "quakefolio.toml").read_text()
    for body, message in (('[{ name = "day", hours = 10, present = 0.5 }]', "sum to 24"),
                          ('[{ name = "day", hours = 24, presence = 0.5 }]', "did you mean 'present'"),
                          ('[{ name = "day", hours = 24, present = 2 }]', r"in \[0, 1\]")):
        cfg = tmp_path / "quakefolio.toml"
        cfg.write_text(text.replace('file = "exposure.csv"',
                                    f'file = "{mini / "exposure.csv"}"\noccupancy_periods = {body}'))
        (tmp_path / "hazard_curves.csv").write_text("")
        with pytest.raises(InputError, match=message) as info:
            load_config(cfg)
        assert info.value.column == "exposure.occupancy_periods" and info.value.row is not None
    cfg.write_text(text.replace("horizon_yr = 50", "horizon_yr = 50\nvalue_per_avoided_casualty = -3"))
    with pytest.raises(InputError, match="positive number") as info:
        load_config(cfg)
    assert info.value.column == "scenario.value_per_avoided_casualty"


# --- the stage on the mini compute inputs -------------------------------------------------------

def _people_inputs(tmp_path, value_per_casualty=True):
    import re
    import shutil

    from conftest import MINI

    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    lib = (dst / "fragility.toml").read_text()

    def consequences(m):  # invented: monotone in the mean damage ratio
        mdr = float(m.group(1))
        return (f"{m.group(0)}\ncasualty_rate = {0.1 * mdr!r}\ndowntime_days = {300 * mdr!r}\n"
                f"contents_damage_ratio = {mdr!r}")
    lib = re.sub(r"mean_damage_ratio = ([0-9.]+)", consequences, lib)
    block = lib[lib.index("[classes.TST-A]"):lib.index("[classes.TST-B]")]
    stronger = re.sub(r"median = ([0-9.]+)", lambda m: f"median = {2 * float(m.group(1))!r}", block)
    lib += "\n" + stronger.replace("TST-A", "TST-A-RF")
    (dst / "fragility.toml").write_text(lib)
    rows = (dst / "exposure.csv").read_text().splitlines()
    rows[0] += ",contents_value,interruption_value_per_day"
    rows[1:] = [r + f",{0.3 * float(r.split(',')[4]):.0f},100" for r in rows[1:]]
    (dst / "exposure.csv").write_text("\n".join(rows) + "\n")
    cfg = dst / "quakefolio_compute.toml"
    text = cfg.read_text().replace("[exposure]\nfile = \"exposure.csv\"", """[portfolio]
years = 3000
seed = 11

[exposure]
file = "exposure.csv"
occupancy_periods = [{ name = "day", hours = 16, present = 0.75 }, { name = "night", hours = 8, present = 0.25 }]""")
    extra = "value_per_avoided_casualty = 1000000\n" if value_per_casualty else ""
    text = text.replace("horizon_yr = 50\n", f"""horizon_yr = 50
{extra}
[[scenario.alternatives]]
id = "rf"
assets = ["B1", "B2"]
new_class = "TST-A-RF"
retrofit_cost = 50000
""")
    cfg.write_text(text)
    return cfg


@pytest.fixture(scope="module")
def people_run(tmp_path_factory):
    from quakefolio.pipeline import stages
    from quakefolio.pipeline.runner import run_pure

    cfg = _people_inputs(tmp_path_factory.mktemp("people"))
    return cfg, run_pure(stages.load_inputs(cfg))


def test_classical_tables_match_closed_form(people_run):
    from quakefolio.pipeline.io.store import read_table

    _, run = people_run
    damage, assets = read_table(run, "asset_damage"), read_table(run, "asset_consequences")
    f_bar = (16 * 0.75 + 8 * 0.25) / 24
    for _, a in assets.iterrows():
        rows = damage[damage.asset_id == a.asset_id].sort_values("damage_state_index")
        lam = rows.annual_rate_exceed.to_numpy()
        lib_mdr = {"TST-A": [0.05, 0.4, 1.0], "TST-B": [0.1, 1.0], "TST-C": [0.03, 1.0]}[a.building_class]
        occ = state_occupancy_rates(lam)
        assert a.expected_annual_casualties == pytest.approx(a.occupants * f_bar * np.dot(occ, 0.1 * np.array(lib_mdr)),
                                                             rel=1e-12, abs=1e-300)
        assert a.expected_annual_downtime_days == pytest.approx(np.dot(occ, 300 * np.array(lib_mdr)), rel=1e-12)
        assert a.contents_eal == pytest.approx(a.contents_value * np.dot(occ, lib_mdr), rel=1e-12)
        assert a.interruption_eal == pytest.approx(100 * a.expected_annual_downtime_days, rel=1e-14)
    totals = read_table(run, "portfolio_consequences").set_index("metric")
    assert totals.loc["casualties", "classical_annual_mean"] == pytest.approx(assets.expected_annual_casualties.sum())
    assert totals.loc["building_loss", "classical_annual_mean"] == pytest.approx(read_table(run, "asset_loss").eal.sum())


def test_event_based_averages_check_against_classical(people_run):
    from quakefolio.pipeline.io.store import read_table

    _, run = people_run
    summary = read_table(run, "consequence_event_summary")
    assert len(summary) == 4 and summary.counted.all()
    assert (summary.z.abs() < 4).all(), summary  # Monte Carlo of the same model (same source branch)
    events = read_table(run, "event_consequences")
    assert set(events.present_fraction.unique()) <= {0.75, 0.25}
    assert events.interruption_loss.to_numpy() == pytest.approx(100 * events.downtime_days.to_numpy(), rel=1e-12)
    ep = read_table(run, "consequence_ep")
    assert (ep.groupby("metric").aep_value.apply(lambda v: np.all(np.diff(v.dropna()) >= 0))).all()


def test_whatif_identities_and_benefit_cost(people_run):
    from quakefolio.core.economics import annuity_factor
    from quakefolio.pipeline.io.store import read_table

    _, run = people_run
    people = read_table(run, "whatif_people")
    total, assets = people[people.scope == "alternative"].iloc[0], people[people.scope == "asset"]
    for q in ("casualties", "downtime_days", "contents_eal", "interruption_eal"):
        assert total[f"avoided_{q}"] == pytest.approx(assets[f"avoided_{q}"].sum(), rel=1e-12)
        assert (assets[f"avoided_{q}"] > 0).all()  # stronger class, same consequences per state
    factor = annuity_factor(0.03, 50.0)
    assert total.pv_life_safety_benefit == pytest.approx(factor * 1e6 * total.avoided_casualties, rel=1e-12)
    assert total.benefit_cost_ratio_all == pytest.approx(
        (total.pv_avoided_losses + total.pv_life_safety_benefit) / total.retrofit_cost, rel=1e-12)
    bc = read_table(run, "whatif_benefit_cost")
    assert (bc.benefits_counted == "building repair cost only").all()
    port = read_table(run, "whatif_people_portfolio").set_index(["metric", "basis"])
    row = port.loc[("casualties", "classical")]
    assert row.value_before - row.value_after == pytest.approx(total.avoided_casualties, rel=1e-9)
    ev = port.loc[("casualties", "event_based")]
    assert ev.change < 0 and ev.standard_error_of_change > 0


def test_without_a_value_per_casualty_the_ratio_says_so(tmp_path):
    from quakefolio.pipeline import stages
    from quakefolio.pipeline.io.store import read_table
    from quakefolio.pipeline.runner import run_pure

    cfg = _people_inputs(tmp_path, value_per_casualty=False)
    cfg.write_text(cfg.read_text().replace("[portfolio]\nyears = 3000", "[portfolio]\nevent_based = false\nyears = 3000"))
    run = run_pure(stages.load_inputs(cfg))
    people = read_table(run, "whatif_people")
    assert people.pv_life_safety_benefit.isna().all()
    assert people.benefit_cost_ratio_all.iloc[0] == pytest.approx(people.pv_avoided_losses.iloc[0] / 50000 / 2)
    assert people.benefits_counted.str.contains("no life-safety value given").all()
