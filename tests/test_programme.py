"""Programme terms above the building: group terms, occurrence and aggregate layers.

Hand-checkable event sets (numbers worked out in the comments), identities of layer
towers, reinstatement caps, aggregate layers, probabilities against counts, a closed form
for Poisson years (the layer payoff and reinstatement cap are common practice; Poisson
counts: scipy.stats.poisson), and the stage end to end (determinism, chunking, errors).
"""
import shutil

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from scipy import stats

from quakefolio.core.errors import InputError
from quakefolio.core.events.eventset import stochastic_event_set
from quakefolio.core.events.programme import (
    GroupSums, Layer, apply_group_terms, evaluate_layers, layer_payout, occurrence_layer_losses,
)
from quakefolio.pipeline.io.config import load_config
from quakefolio.pipeline.io.store import read_table
from quakefolio.pipeline.runner import run_pure
from quakefolio.pipeline.stages.inputs import load_inputs

from conftest import MINI

# Five events in four years (year 2 has no event); programme losses [currency]:
#   year 1: 30, 120      year 3: 80, 80, 80      year 4: 5
YEAR = np.array([1, 1, 3, 3, 3, 4])
LOSS = np.array([30.0, 120.0, 80.0, 80.0, 80.0, 5.0])
N_YEARS = 4


def test_occurrence_layer_by_hand_with_one_reinstatement():
    # layer 50 xs 40: per event min(max(L - 40, 0), 50) = 0, 50, 40, 40, 40, 0
    # one reinstatement: at most 100 a year -> year 3 pays 40, 40, then 20 (cap reached)
    paid, x, year_paid, year_uncapped = occurrence_layer_losses(YEAR, LOSS, N_YEARS, 40.0, 50.0, 1)
    assert_array_equal(x, [0, 50, 40, 40, 40, 0])
    assert_array_equal(paid, [0, 50, 40, 40, 20, 0])
    assert_array_equal(year_uncapped, [50, 0, 120, 0])
    assert_array_equal(year_paid, [50, 0, 100, 0])
    # no reinstatement: 50 a year -> year 3 pays 40 then 10
    paid0, _, year0, _ = occurrence_layer_losses(YEAR, LOSS, N_YEARS, 40.0, 50.0, 0)
    assert_array_equal(paid0, [0, 50, 40, 10, 0, 0])
    assert_array_equal(year0, [50, 0, 50, 0])
    # unlimited reinstatements: every event in full
    paid_u, _, year_u, _ = occurrence_layer_losses(YEAR, LOSS, N_YEARS, 40.0, 50.0, None)
    assert_array_equal(paid_u, [0, 50, 40, 40, 40, 0])
    assert_array_equal(year_u, [50, 0, 120, 0])


def test_layer_statistics_by_hand():
    layers = [Layer("occ", "occurrence", 40.0, 50.0, 1), Layer("agg", "aggregate", 100.0, 100.0)]
    occ, agg = evaluate_layers(YEAR, LOSS, N_YEARS, layers, [2.0, 4.0])
    # occurrence: years pay 50, 0, 100, 0 -> mean 37.5; attached in years 1 and 3 (2 of 4);
    # exhausted (an event >= 90) in year 1 only; cap of 100 used in year 3 only
    assert occ["expected_annual_loss"] == pytest.approx(37.5)
    assert (occ["prob_attachment"], occ["prob_exhaustion"], occ["prob_annual_cap_used"]) == (0.5, 0.25, 0.25)
    # AEP at T = 2: the 2nd largest of (100, 50, 0, 0) = 50; at T = 4: the largest, 100
    assert_array_equal(occ["aep"], [50.0, 100.0])
    # OEP: largest paid event per year (50, 0, 40, 0) -> 40 at T = 2, 50 at T = 4
    assert_array_equal(occ["oep"], [40.0, 50.0])
    # TVaR at T = 2: mean of the worst two years (100 + 50) / 2
    assert occ["tvar"][0] == pytest.approx(75.0)
    # aggregate 100 xs 100 on annual sums 150, 0, 240, 5: pays 50, 0, 100, 0
    assert_array_equal(agg["year_paid"], [50, 0, 100, 0])
    assert agg["expected_annual_loss"] == pytest.approx(37.5)
    assert (agg["prob_attachment"], agg["prob_exhaustion"]) == (0.5, 0.25)
    assert np.isnan(agg["oep"]).all()


def test_stacked_tower_sums_to_the_capped_ground_up_loss():
    rng = np.random.default_rng(1)
    year = np.sort(rng.integers(1, 201, size=600))
    loss = rng.lognormal(3.0, 1.5, size=600)
    bounds = [5.0, 12.0, 30.0, 70.0, 200.0]  # tower from 5 to 200 in four layers
    layers = [Layer(f"L{i}", "occurrence", lo, hi - lo, None) for i, (lo, hi) in enumerate(zip(bounds, bounds[1:]))]
    res = evaluate_layers(year, loss, 200, layers, [10.0])
    per_event = sum(r["event_paid"] for r in res)
    assert_allclose(per_event, np.clip(loss, 5.0, 200.0) - 5.0, rtol=1e-12, atol=1e-12)
    per_year = sum(r["year_paid"] for r in res)
    expected = np.bincount(year - 1, weights=np.clip(loss, 5.0, 200.0) - 5.0, minlength=200)
    assert_allclose(per_year, expected, rtol=1e-12, atol=1e-9)
    # the same identity for aggregate layers on the annual sums
    annual = np.bincount(year - 1, weights=loss, minlength=200)
    agg = [Layer(f"A{i}", "aggregate", lo, hi - lo) for i, (lo, hi) in enumerate(zip(bounds, bounds[1:]))]
    total = sum(r["year_paid"] for r in evaluate_layers(year, loss, 200, agg, [10.0]))
    assert_allclose(total, np.clip(annual, 5.0, 200.0) - 5.0, rtol=1e-12, atol=1e-9)


def test_open_layer_from_zero_is_the_input_loss():
    rng = np.random.default_rng(2)
    year = np.sort(rng.integers(1, 51, size=100))
    loss = rng.exponential(10.0, size=100)
    occ, agg = evaluate_layers(year, loss, 50, [Layer("all", "occurrence", 0.0, np.inf, 0),
                                                Layer("all_agg", "aggregate", 0.0, np.inf)], [5.0])
    assert_array_equal(occ["event_paid"], loss)
    annual = np.bincount(year - 1, weights=loss, minlength=50)
    assert_array_equal(occ["year_paid"], annual)
    assert_array_equal(agg["year_paid"], annual)
    assert occ["prob_exhaustion"] == 0.0 and np.isnan(occ["prob_annual_cap_used"])


def test_probabilities_are_counts_of_years():
    rng = np.random.default_rng(3)
    year = np.sort(rng.integers(1, 1001, size=1500))
    loss = rng.exponential(100.0, size=1500)
    (occ,) = evaluate_layers(year, loss, 1000, [Layer("x", "occurrence", 150.0, 100.0, 2)], [10.0])
    top = np.zeros(1000)
    np.maximum.at(top, year - 1, loss)
    assert occ["prob_attachment"] == np.count_nonzero(top > 150.0) / 1000
    assert occ["prob_exhaustion"] == np.count_nonzero(top >= 250.0) / 1000
    sums = np.bincount(year - 1, weights=np.clip(loss - 150.0, 0, 100.0), minlength=1000)
    assert occ["prob_annual_cap_used"] == np.count_nonzero(sums >= 300.0) / 1000
    assert_allclose(occ["year_paid"], np.minimum(sums, 300.0), rtol=1e-12)


def test_reinstatement_cap_against_poisson_closed_form():
    # One event type of rate nu, each event paying the full limit l: a year with K events pays
    # min(K, 1 + r) l, so E = l * sum_k P(K = k) min(k, 1 + r) with K ~ Poisson(nu) (scipy.stats),
    # P(attach) = 1 - exp(-nu), P(cap used) = P(K >= 1 + r).
    nu, n_years, lim, r = 0.8, 200_000, 10.0, 1
    ev = stochastic_event_set(np.array([nu]), n_years, seed=11)
    loss = np.full(ev.n_events, 50.0)
    (occ,) = evaluate_layers(ev.year, loss, n_years, [Layer("x", "occurrence", 40.0, lim, r)], [10.0])
    k = np.arange(0, 60)
    expected = lim * np.sum(stats.poisson.pmf(k, nu) * np.minimum(k, 1 + r))
    assert abs(occ["expected_annual_loss"] - expected) <= 3 * occ["standard_error"]
    p_attach = 1 - np.exp(-nu)
    assert abs(occ["prob_attachment"] - p_attach) <= 3 * np.sqrt(p_attach * (1 - p_attach) / n_years)
    p_cap = stats.poisson.sf(r, nu)
    assert abs(occ["prob_annual_cap_used"] - p_cap) <= 3 * np.sqrt(p_cap * (1 - p_cap) / n_years)


def test_group_sums_and_terms_by_hand():
    # assets 0..3 in groups b, a, b, a (indices 1, 0, 1, 0); two events
    acc = GroupSums(np.array([1, 0, 1, 0]), 2, 2)
    acc.add(np.array([0, 1]), np.array([[10.0, 20.0], [0.0, 5.0]]))
    acc.add(np.array([2, 3]), np.array([[30.0, 40.0], [1.0, 0.0]]))
    # group a: 20 + 40 = 60, 5 + 0 = 5; group b: 10 + 30 = 40, 0 + 1 = 1
    assert_array_equal(acc.total, [[60.0, 40.0], [5.0, 1.0]])
    # group a: deductible 10, limit 45 -> 45, 0; group b: no terms
    after = apply_group_terms(acc.total, np.array([10.0, np.nan]), np.array([45.0, np.nan]))
    assert_array_equal(after, [[45.0, 40.0], [0.0, 1.0]])


def test_layer_payout_rejects_bad_terms():
    with pytest.raises(ValueError, match="attachment"):
        layer_payout([1.0], -1.0, 10.0)
    with pytest.raises(ValueError, match="limit"):
        layer_payout([1.0], 0.0, 0.0)
    with pytest.raises(ValueError, match="reinstatements"):
        occurrence_layer_losses([1], [1.0], 1, 0.0, 1.0, -1)


# --------------------------------------------------------------------------- the stage

PROGRAMME = """[portfolio]
years = 4000
seed = 7

[programme]
group_terms_file = "group_terms.csv"
occurrence_layers = [
  { id = "L1", attachment = 0, limit = 500000, reinstatements = 1 },
  { id = "L2", attachment = 500000, limit = 1000000 },
]
aggregate_layers = [{ id = "AGG", attachment = 100000, limit = "none" }]

[exposure]"""
GROUPS = ["P1", "P1", "P2", "P2", "P3"]


@pytest.fixture
def programme_config(tmp_path):
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    lines = (dst / "exposure.csv").read_text().splitlines()
    (dst / "exposure.csv").write_text("\n".join(f"{a},{b}" for a, b in zip(lines, ["terms_group"] + GROUPS)) + "\n")
    (dst / "group_terms.csv").write_text("terms_group,deductible,limit\nP1,50000,2000000\nP2,,1500000\nP3,200000,\n")
    cfg = dst / "quakefolio_compute.toml"
    text = cfg.read_text().replace("[exposure]", PROGRAMME)
    cfg.write_text(text.replace("site_block_size = 2", "site_block_size = 2\nevent_block_size = 256\nmax_workers = 1"))
    return cfg


TABLES = ["programme_summary", "group_loss", "layer_event_loss", "layer_year_loss", "layer_summary", "layer_ep"]


def test_stage_tables_consistent_and_independent_of_chunking_and_threads(programme_config):
    a = run_pure(programme_config)
    ev = read_table(a, "event_loss")
    le = read_table(a, "layer_event_loss")
    summ = read_table(a, "programme_summary").set_index("basis")
    groups = read_table(a, "group_loss")
    # the group AALs add up to the programme AAL; group terms only lower the loss
    assert_allclose(groups.aal_after_group_terms.sum(), summ.loc["programme", "aal"], rtol=1e-9)
    assert_allclose(groups.aal_before_group_terms.sum(), summ.loc["net", "aal"], rtol=1e-9)
    assert summ.loc["programme", "aal"] <= summ.loc["net", "aal"]
    # layer events: programme loss <= net loss of the same event
    joined = le.merge(ev[["event_id", "net_loss"]], on="event_id")
    assert (joined.programme_loss <= joined.net_loss + 1e-6).all()
    # L1 (0 xs 500k, unlimited layer) plus L2 (500k xs 500k) per event = min(P, 1.5M) before the cap
    wide = le.pivot_table(index="event_id", columns="layer_id", values="layer_loss_before_cap", fill_value=0.0)
    p = le.drop_duplicates("event_id").set_index("event_id").programme_loss.loc[wide.index]
    assert_allclose(wide.sum(axis=1), np.minimum(p, 1.5e6), rtol=1e-12)
    ls = read_table(a, "layer_summary").set_index("layer_id")
    yl = read_table(a, "layer_year_loss")
    for lid, grp in yl.groupby("layer_id"):
        assert_allclose(ls.loc[lid, "expected_annual_loss"], grp.layer_loss.sum() / 4000, rtol=1e-12)
        assert ls.loc[lid, "prob_attachment"] == len(grp) / 4000
    # the aggregate layer from 100k, unlimited, on the annual programme loss
    assert (yl[yl.layer_id == "AGG"].entering_loss > 1e5).all()
    text = programme_config.read_text().replace("event_block_size = 256\nmax_workers = 1",
                                                "event_block_size = 4096\nmax_workers = 3")  # blocks on threads
    programme_config.write_text(text)
    b = run_pure(programme_config)
    for name in TABLES:
        pd.testing.assert_frame_equal(read_table(a, name), read_table(b, name), check_exact=True)


def test_no_programme_writes_no_programme_table(tmp_path):
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    cfg = dst / "quakefolio_compute.toml"
    cfg.write_text(cfg.read_text().replace("[exposure]", "[portfolio]\nyears = 500\n\n[exposure]"))
    names = {p.stem for p in run_pure(cfg).glob("*.parquet")}
    assert "event_loss" in names and not names & set(TABLES)


@pytest.mark.parametrize("edit, where", [
    (("{ id = \"L2\", attachment = 500000, limit = 1000000 }", "{ id = \"L2\", attachment = -1, limit = 1 }"),
     "attachment"),
    (("reinstatements = 1", "reinstatements = 1.5"), "reinstatements"),
    (("reinstatements = 1", "reinstatment = 1"), "did you mean"),
    (("id = \"AGG\"", "id = \"L1\""), "occurrence and an aggregate"),
    (("limit = \"none\"", "limit = 0"), "'limit'"),
])
def test_bad_layers_are_located_config_errors(programme_config, edit, where):
    programme_config.write_text(programme_config.read_text().replace(*edit))
    with pytest.raises(InputError) as exc:
        load_config(programme_config)
    assert where in str(exc.value) and exc.value.row is not None and "programme" in str(exc.value)


@pytest.mark.parametrize("terms, where, row", [
    ("terms_group,deductible,limit\nP1,50000,2000000\nP2,,1500000\nP3,200000,\nP9,1,2\n", "no asset", 5),
    ("terms_group,deductible,limit\nP1,50000,2000000\nP2,,1500000\n", "has no row", 6),
    ("terms_group,deductible,limit\nP1,50000,20000\nP2,,1500000\nP3,200000,\n", "not below the limit", 2),
    ("terms_group,deductible,limit\nP1,50000,2000000\nP1,,1500000\nP3,200000,\n", "duplicate", 3),
    ("terms_group,deductible,limit\nP1,-5,2000000\nP2,,1500000\nP3,200000,\n", "expected", 2),
])
def test_bad_group_terms_are_located(programme_config, terms, where, row):
    (programme_config.parent / "group_terms.csv").write_text(terms)
    with pytest.raises(InputError) as exc:
        load_inputs(programme_config)
    assert where in str(exc.value) and exc.value.row == row


def test_group_column_without_file_warns_and_file_needs_the_column(programme_config):
    text = programme_config.read_text()
    programme_config.write_text(text.replace('group_terms_file = "group_terms.csv"\n', ""))
    inputs = load_inputs(programme_config)
    assert inputs.group_terms is None and any("terms_group not used" in w for w in inputs.warnings)
    programme_config.write_text(text)
    shutil.copy(MINI / "exposure.csv", programme_config.parent / "exposure.csv")
    with pytest.raises(InputError, match="needs a terms_group column") as exc:
        load_inputs(programme_config)
    assert exc.value.row is not None
