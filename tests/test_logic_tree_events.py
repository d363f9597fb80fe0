"""The whole logic tree in the event-based stage: year assignment, mixture EP, per-branch tables.

Checks against closed forms: the annual loss of a branch with one Poisson event type of
fixed loss is ``L * Poisson(nu)``, so its occurrence EP is ``1 - exp(-nu)`` below ``L``
(Grossi & Kunreuther 2005, Ch. 2, EP of an event loss table; form from memory) and the
logic-tree mixture's EP is the weight-averaged branch EP (law of total probability).
"""
from __future__ import annotations

import json
import re
import shutil

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from quakefolio.core.events.branches import branch_fractiles, empirical_exceedance, group_aal, group_ep
from quakefolio.core.events.eventset import (
    STREAM_BRANCH_EVENTS, STREAM_BRANCH_YEARS, STREAM_DAMAGE, STREAM_EVENT_SET, STREAM_GMM_CHOICE,
    STREAM_GROUND_MOTION, STREAM_LOSS_RATIO, allocate_years, branch_rng, branch_years,
    logic_tree_event_set, stochastic_event_set, stream_rng,
)
from quakefolio.core.events.portfolio import ep_from_years, year_loss
from quakefolio.pipeline.io.store import read_table
from quakefolio.pipeline.runner import run_pure

from conftest import DEMO, MINI

WEIGHTS = np.array([0.35, 0.35, 0.15, 0.15])  # 2 source x 2 GMM branches, as in the demo


# --- year assignment --------------------------------------------------------------------------

def test_stream_tags_are_new_and_distinct():
    tags = [STREAM_EVENT_SET, STREAM_GROUND_MOTION, STREAM_DAMAGE, STREAM_LOSS_RATIO, STREAM_GMM_CHOICE,
            STREAM_BRANCH_YEARS, STREAM_BRANCH_EVENTS]
    assert len(set(tags)) == len(tags) and (STREAM_BRANCH_YEARS, STREAM_BRANCH_EVENTS) == (12, 13)
    want = np.random.default_rng(np.random.SeedSequence([5, 13, 1])).random(4)
    assert_array_equal(branch_rng(5, 1).random(4), want)
    assert_array_equal(stream_rng(5, STREAM_BRANCH_YEARS).random(4),
                       np.random.default_rng(np.random.SeedSequence([5, 12])).random(4))


@pytest.mark.parametrize("n_years", [1, 7, 1000, 50000, 123457])
def test_years_reproduce_the_weights_to_one_year(n_years):
    counts = allocate_years(WEIGHTS, n_years)
    assert counts.sum() == n_years and np.all(np.abs(counts - WEIGHTS * n_years) < 1)
    labels = branch_years(WEIGHTS, n_years, seed=3)
    assert_array_equal(np.bincount(labels, minlength=4), counts)


def test_allocation_by_largest_remainder():
    assert allocate_years([1 / 3] * 3, 10).tolist() == [4, 3, 3]  # ties to the lower index
    assert allocate_years([0.5, 0.3, 0.2], 7).tolist() == [4, 2, 1]  # 3.5, 2.1, 1.4: remainders .5, .1, .4
    with pytest.raises(ValueError, match="sum"):
        allocate_years([0.5, 0.4], 10)


def test_branch_years_are_spread_uniformly_and_reproducible():
    # each decile of the simulated years holds every combination in proportion to its weight
    # (hypergeometric counts; 5 standard deviations)
    n = 50000
    labels = branch_years(WEIGHTS, n, seed=11)
    assert_array_equal(labels, branch_years(WEIGHTS, n, seed=11))
    assert not np.array_equal(labels, branch_years(WEIGHTS, n, seed=12))
    counts = np.stack([np.bincount(part, minlength=4) for part in labels.reshape(10, -1)])
    expected = WEIGHTS * n / 10
    sd = np.sqrt(n / 10 * WEIGHTS * (1 - WEIGHTS) * 0.9)
    assert np.all(np.abs(counts - expected) <= 5 * sd)


def test_each_branch_draws_from_its_own_stream():
    yb = branch_years([0.5, 0.5], 2000, seed=4)
    a = logic_tree_event_set([np.full(5, 0.1), np.full(3, 0.2)], yb, seed=4)
    b = logic_tree_event_set([np.full(5, 0.1), np.full(4, 0.3)], yb, seed=4)  # branch 1 changed
    own = a.rupture < 5
    assert_array_equal(a.year[own], b.year[b.rupture < 5])
    assert_array_equal(a.rupture[own], b.rupture[b.rupture < 5])
    assert np.all(yb[a.year[own] - 1] == 0) and np.all(yb[a.year[~own] - 1] == 1)


def test_one_branch_owning_every_year_is_a_poisson_event_set():
    rates = np.array([0.02, 0.5, 0.1])
    n = 40000
    es = logic_tree_event_set([rates], np.zeros(n, dtype=np.int64), seed=9)
    ref = stochastic_event_set(rates, n, 9)
    assert es.n_years == ref.n_years == n
    counts = np.bincount(es.rupture, minlength=3)
    assert np.all(np.abs(counts - rates * n) <= 4 * np.sqrt(rates * n))
    assert np.all(np.diff(es.year) >= 0)


# --- mixture EP: closed form ------------------------------------------------------------------

def _two_branch_years(n_years, seed=21):
    """Branch 0: rate 0.2/yr, loss 1; branch 1: rate 0.05/yr, loss 3 (weights 0.7 / 0.3)."""
    w = np.array([0.7, 0.3])
    rates, losses = [np.array([0.2]), np.array([0.05])], np.array([1.0, 3.0])
    yb = branch_years(w, n_years, seed)
    es = logic_tree_event_set(rates, yb, seed)
    loss = losses[es.rupture]  # rupture 0 is branch 0's, rupture 1 branch 1's
    agg, occ = year_loss(es.year, loss, n_years)
    return w, rates, losses, yb, es, loss, agg, occ


def test_mixture_ep_is_the_weighted_mean_of_branch_eps():
    n = 200_000
    w, rates, losses, yb, es, loss, agg, occ = _two_branch_years(n)
    x = np.array([0.5, 1.5, 2.5, 3.5, 5.5])
    # identity: pooled empirical EP = sum of (N_c / N) x the branch's own empirical EP
    nc = np.bincount(yb, minlength=2)
    per_branch = np.stack([empirical_exceedance(agg[yb == c], x) for c in range(2)])
    assert_allclose(empirical_exceedance(agg, x), (nc / n) @ per_branch, rtol=1e-12)
    # closed form: OEP_c(x) = 1 - exp(-nu_c [L_c > x]); AEP_c(x) = P(L_c Poisson(nu_c) > x)
    from scipy.stats import poisson

    oep = np.stack([-np.expm1(-rates[c][0] * (losses[c] > x)) for c in range(2)])
    aep = np.stack([poisson.sf(np.floor(x / losses[c]), rates[c][0]) for c in range(2)])
    for years, branch_cf in ((occ, oep), (agg, aep)):
        want = w @ branch_cf  # the mixture's EP: weighted mean of the branch EPs
        se = np.sqrt(np.maximum(want * (1 - want), 1e-12) / n)
        assert np.all(np.abs(empirical_exceedance(years, x) - want) <= 4 * se + 1e-12)
        for c in range(2):  # each branch's years give its own EP curve
            got_c = empirical_exceedance(years[yb == c], x)
            se_c = np.sqrt(np.maximum(branch_cf[c] * (1 - branch_cf[c]), 1e-12) / nc[c])
            assert np.all(np.abs(got_c - branch_cf[c]) <= 4 * se_c + 1e-12)


def test_pooled_aal_and_compound_poisson_standard_error():
    # AAL of the mixture = sum_c w_c nu_c L_c; Var of the stratified mean = sum_c N_c nu_c L_c^2 / N^2
    n = 100_000
    w, rates, losses, yb, es, loss, agg, occ = _two_branch_years(n)
    nc = np.bincount(yb, minlength=2)
    grp = yb[es.year - 1]
    aal_c, se_c = group_aal(loss, grp, nc)
    want_c = np.array([rates[c][0] * losses[c] for c in range(2)])
    assert np.all(np.abs(aal_c - want_c) <= 4 * se_c)
    pooled = loss.sum() / n
    se = np.sqrt(np.sum(loss ** 2)) / n
    assert abs(pooled - w @ want_c) <= 4 * se
    exact_se = np.sqrt(np.sum(nc * np.array([rates[c][0] * losses[c] ** 2 for c in range(2)]))) / n
    assert_allclose(se, exact_se, rtol=0.05)
    assert_allclose((nc / n) @ aal_c, pooled, rtol=1e-12)


def test_group_ep_matches_ep_of_each_groups_years():
    rng = np.random.default_rng(2)
    y = rng.exponential(size=3000)
    g = rng.integers(0, 3, 3000)
    pml, tv = group_ep(y, g, 4, [10, 100, 5000])
    for c in range(3):
        assert_allclose(pml[c], ep_from_years(y[g == c], [10, 100, 5000]), equal_nan=True)
    assert np.isnan(pml[3]).all() and np.isnan(pml[:3, 2]).all() and np.all(tv[:3, :2] >= pml[:3, :2])


def test_weighted_fractiles_across_branches():
    # cumulative weights of the sorted values 1, 2, 3, 4 (weights .15 .35 .35 .15): .15 .5 .85 1
    v = np.array([[3.0, 1.0], [1.0, np.nan], [2.0, 2.0], [4.0, 4.0]])
    w = np.array([0.35, 0.15, 0.35, 0.15])
    out = branch_fractiles(v, w, [0.16, 0.5, 0.84, 0.86])
    assert_array_equal(out[:, 0], [2.0, 2.0, 3.0, 4.0])
    assert np.isnan(out[:, 1]).all()


# --- the stage ------------------------------------------------------------------------------

@pytest.fixture
def mini(tmp_path):
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    cfg = dst / "quakefolio_compute.toml"
    text = cfg.read_text().replace("[exposure]", "[portfolio]\nyears = 20000\nseed = 7\n\n[exposure]")
    cfg.write_text(text.replace("site_block_size = 2", "site_block_size = 2\nevent_block_size = 256"))
    return cfg


def test_whole_tree_tables_are_consistent(mini):
    run = run_pure(mini)
    ev, yl = read_table(run, "event_loss"), read_table(run, "year_loss")
    summ = read_table(run, "portfolio_summary").set_index("basis")
    br = read_table(run, "portfolio_branch_summary")
    assert (summ.source_branch == "all").all()
    gu = br[br.basis == "ground_up"]
    assert_allclose(gu.weight.sum(), 1.0) and gu.n_years.sum() == 20000
    assert np.all(np.abs(gu.n_years - gu.weight * 20000) < 1)
    assert gu.n_events.sum() == len(ev)
    # pooled AAL = years-weighted mean of the branch AALs; the pooled years are the mixture
    assert_allclose((gu.n_years / 20000 * gu.aal).sum(), summ.loc["ground_up", "aal"], rtol=1e-12)
    # every event carries its year's branch combination
    merged = ev.merge(yl[["year", "source_branch", "gmm"]], on="year", suffixes=("", "_year"))
    assert (merged.source_branch == merged.source_branch_year).all() and (merged.gmm == merged.gmm_year).all()
    # each branch's classical EAL is reproduced by its own years
    assert (gu.z_score.abs() <= 3.5).all()
    frac = read_table(run, "portfolio_branch_fractiles")
    aal_f = frac[(frac.basis == "ground_up") & (frac.metric == "aal")].value
    assert aal_f.is_monotonic_increasing and aal_f.min() >= gu.aal.min() and aal_f.max() <= gu.aal.max()
    checks = json.loads((run / "manifest.json").read_text())["cross_checks"]
    p = checks["portfolio_aal_vs_classical_eal"]
    assert p["passed"] and abs(p["z"]) <= 3
    assert_allclose(p["standard_error"], np.sqrt(np.sum(ev.ground_up_loss ** 2)) / 20000, rtol=1e-12)
    assert len(checks["branch_aal_vs_classical_eal"]) == 4


def test_per_branch_mode_is_the_single_branch_event_set(mini):
    # source_branch = an id: the event set of that branch alone over every year, the model
    # drawn per event by weight (the construction of the stage before the whole tree)
    mini.write_text(mini.read_text().replace("seed = 7", "seed = 7\nsource_branch = \"sources\""))
    run = run_pure(mini)
    names = {p.stem for p in run.glob("*.parquet")}
    assert not names & {"portfolio_branch_summary", "portfolio_branch_ep", "portfolio_branch_fractiles"}
    ev = read_table(run, "event_loss")
    assert "source_branch" not in ev.columns
    assert list(read_table(run, "year_loss").columns) == [
        "year", "n_events", "ground_up_loss", "net_loss", "max_event_ground_up_loss", "max_event_net_loss"]
    from quakefolio.pipeline import stages

    model = stages.load_inputs(mini).hazard_model
    rs = model.source_branches[0][2].ruptures
    ref = stochastic_event_set(rs.rate, 20000, 7)
    assert_array_equal(ev.rupture_id, ref.rupture)
    assert_array_equal(ev.year, ref.year)
    g = stream_rng(7, STREAM_GMM_CHOICE).choice(2, size=ref.n_events, p=[0.5, 0.5])
    assert_array_equal(ev.gmm, np.array(["BSSA14", "CB14"], dtype=object)[g])
    assert (read_table(run, "portfolio_summary").source_branch == "sources").all()


@pytest.mark.slow
def test_demo_like_aal_agrees_with_the_all_branch_classical_eal(tmp_path):
    # the demo's inputs (both source models, both GMMs), a quarter of the buildings, a quarter
    # of the hazard sites (4 km grid) and a shorter event set: the pooled AAL estimates the
    # classical EAL of every branch by weight
    dst = tmp_path / "demo"
    shutil.copytree(DEMO, dst, ignore=shutil.ignore_patterns("output", "__pycache__"))
    ex = pd.read_csv(dst / "exposure.csv")
    ex.iloc[::4].to_csv(dst / "exposure.csv", index=False)
    cfg = dst / "quakefolio.toml"
    text = cfg.read_text().replace("years = 50000", "years = 10000").replace("disaggregation = true",
                                                                             "disaggregation = false")
    assert "site_spacing_km = 2.0" in text
    text = text.replace("site_spacing_km = 2.0", "site_spacing_km = 4.0")
    text = re.sub(r"(?m)^cms_\w+ = .*\n", "", text)  # no conditional mean spectrum: not what is checked here
    text = text.replace("[output]\n", "[output]\nreport = false\n").replace("[execution]\n",
                                                                           "[execution]\ncache = false\n")
    cfg.write_text(text.split("[[scenario.alternatives]]")[0] + "[screening]" + text.split("[screening]")[1])
    run = run_pure(cfg)
    p = json.loads((run / "manifest.json").read_text())["cross_checks"]["portfolio_aal_vs_classical_eal"]
    assert abs(p["z"]) <= 3, p
    eal = read_table(run, "asset_loss").eal.sum()
    assert_allclose(p["classical_eal"], eal, rtol=1e-6)  # the all-branch (mean-curve) EAL of asset_loss
