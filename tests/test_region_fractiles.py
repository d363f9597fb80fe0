"""Hazard fractiles over every logic-tree combination of a source-model branch and one
ground-motion model per tectonic region (:mod:`quakefolio.core.combinations`).

The checks enumerate the combinations by brute force: each combination's curve is the sum
of its regions' curves, each computed on its own by the engine's single-branch path
(rates of independent sources add; Cornell 1968), its weight the product of its branch
weights (common practice), and its fractiles the weighted fractiles written out here
element by element (the smallest value whose cumulative weight reaches the fractile;
common practice).  Only one intraslab model is registered, so the second one is a test
double: the registered model with its median raised by a constant (invented).
"""
from __future__ import annotations

import json
import shutil

import numpy as np
import pytest
from numpy.testing import assert_allclose

from quakefolio.core.combinations import (
    combination_curves, combination_fractiles, end_branch_curves, part_columns, part_layout, tree_combinations,
)
from quakefolio.core.gmm import GMM_REGISTRY, Ag16, get_gmm
from quakefolio.core.hazard import compute_site_hazard, weighted_fractiles
from quakefolio.core.loss import expected_annual_loss
from quakefolio.core.sources.mfd import single_magnitude
from quakefolio.core.sources.ruptures import RuptureSet, point_source_ruptures
from quakefolio.core.sources.geometry import aeqd_inverse
from quakefolio.pipeline import stages
from quakefolio.pipeline.io.store import read_table
from quakefolio.pipeline.runner import run_pure
from quakefolio.pipeline.stages import hazard as hazard_stage

from conftest import MINI

QUANTILES = [0.1, 0.16, 0.5, 0.84, 0.9]
SLAB = "subduction_intraslab"


class RaisedAg16(Ag16):
    """Test double: the registered intraslab model with its median times exp(0.4) (invented)."""

    name = "AG16_TEST_RAISED"

    def evaluate(self, inp, ims):
        res = super().evaluate(inp, ims)
        return type(res)(res.ims, res.ln_median + 0.4, res.tau, res.phi, res.sigma, self.name)


def brute_fractiles(values, weights, quantiles):
    """Weighted fractiles written out element by element: sort, add weights until q is reached."""
    flat = values.reshape(len(values), -1)
    out = np.empty((len(quantiles), flat.shape[1]))
    for e in range(flat.shape[1]):
        order = sorted(range(len(flat)), key=lambda k: flat[k, e])
        for i, q in enumerate(quantiles):
            cum = 0.0
            for k in order:
                cum += weights[k]
                if cum >= q - 1e-12:
                    out[i, e] = flat[k, e]
                    break
    return out.reshape((len(quantiles),) + values.shape[1:])


def _crustal(mag, rate):
    return point_source_ruptures("crust", 140.2, -10.0, mfd=single_magnitude(mag, rate), hypo_depths=[(10.0, 1.0)],
                                 mechanisms=[(0.0, 90.0, 0.0, 1.0)], upper_depth_km=0.0, lower_depth_km=20.0)


def _slab(mag, rate):
    rs = point_source_ruptures("slab", 140.0, -10.0, mfd=single_magnitude(mag, rate), hypo_depths=[(55.0, 1.0)],
                               mechanisms=[(0.0, 90.0, -90.0, 1.0)], upper_depth_km=40.0, lower_depth_km=70.0)
    return rs.with_region(SLAB)


@pytest.mark.parametrize("second_has_slab", [True, False])
def test_fractiles_over_every_combination_match_brute_force(second_has_slab):
    # Two source branches (0.7, 0.3), two crustal models (0.4, 0.6), two intraslab models (0.3, 0.7):
    # 8 combinations, or 6 when the second branch has no intraslab source (its choice of slab model
    # then changes nothing: the brute force still enumerates it, the engine does not).
    lon, lat = aeqd_inverse(np.array([10.0, 80.0]), np.zeros(2), 140.0, -10.0)
    vs30 = np.array([400.0, 760.0])
    ims, levels = ["PGA", "SA_1.0"], np.geomspace(1e-3, 2.0, 15)
    crust_models, wc = [get_gmm("BSSA14"), get_gmm("ASK14")], [0.4, 0.6]
    slab_models, wsl = [get_gmm("AG16"), RaisedAg16()], [0.3, 0.7]
    ws = [0.7, 0.3]
    branches = [(_crustal(6.0, 0.01), _slab(7.2, 2e-3)),
                (_crustal(6.4, 0.006), _slab(6.8, 3e-3) if second_has_slab else None)]
    kw = dict(truncation_sigma=3.0, max_distance_km=300.0, ref=(140.0, -10.0))
    slab_branches = {SLAB: list(zip(wsl, slab_models))}
    # the engine: part curves once per (source branch, region, model), combinations by index arrays
    layout = part_layout(wc, {SLAB: wsl})
    parts = np.stack([part_columns(compute_site_hazard(
        lon, lat, vs30, crust if slab is None else RuptureSet.concat([crust, slab]), crust_models, ims, levels,
        region_branches=slab_branches, by_region=True, **kw), layout, (len(ims), 2, len(levels)))
        for crust, slab in branches])
    combos = tree_combinations(ws, [("active_crustal", SLAB) if slab is not None else ("active_crustal",)
                                    for _, slab in branches], layout, 1000, seed=1)
    assert len(combos) == combos.total == (8 if second_has_slab else 6) and not combos.sampled
    got = combination_fractiles(parts, combos, QUANTILES)
    # brute force: every (source, crustal model, slab model), each region's curve on its own
    curves, weights = [], []
    for s, (crust, slab) in enumerate(branches):
        for g, model in enumerate(crust_models):
            c = compute_site_hazard(lon, lat, vs30, crust, [model], ims, levels, **kw)[0]
            for m, slab_model in enumerate(slab_models):
                d = 0.0 if slab is None else compute_site_hazard(
                    lon, lat, vs30, slab, crust_models[:1], ims, levels, region_branches={SLAB: [(1.0, slab_model)]},
                    **kw)[0]
                curves.append(c + d)
                weights.append(ws[s] * wc[g] * wsl[m])
    curves, weights = np.array(curves), np.array(weights)
    assert abs(weights.sum() - 1.0) < 1e-12
    expected = brute_fractiles(curves, weights, QUANTILES)
    assert_allclose(got, expected, rtol=1e-12, atol=0)
    # the mean is unchanged: that of the end branches (other regions at their mean) is the combinations' mean
    end = end_branch_curves(parts, layout)
    mean = np.tensordot(np.outer(ws, wc).ravel(), end.reshape((-1,) + end.shape[2:]), axes=(0, 0))
    assert_allclose(mean, np.tensordot(weights, curves, axes=(0, 0)), rtol=1e-12)
    # the test has teeth: fractiles over the end branches alone (the slab at its mean) are other numbers
    old = weighted_fractiles(end.reshape((-1,) + end.shape[2:]), np.outer(ws, wc).ravel(), QUANTILES)
    assert np.max(np.abs(old - expected) / np.maximum(expected, 1e-300)) > 0.05


def test_combinations_enumerate_and_sample_by_weight():
    layout = part_layout([0.2, 0.8], {"subduction_interface": [0.5, 0.25, 0.25]})
    regions = [("active_crustal", "subduction_interface"), ("active_crustal",)]
    every = tree_combinations([0.5, 0.5], regions, layout, 8, seed=3)
    assert every.total == 8 and len(every) == 8 and not every.sampled
    assert_allclose(every.weight.sum(), 1.0, rtol=1e-14)
    assert every.columns.tolist()[:3] == [[0, 2], [0, 3], [0, 4]] and every.columns.tolist()[6:] == [[0, -1], [1, -1]]
    assert_allclose(every.weight[:3], [0.5 * 0.2 * 0.5, 0.5 * 0.2 * 0.25, 0.5 * 0.2 * 0.25], rtol=1e-15)
    sample = tree_combinations([0.5, 0.5], regions, layout, 7, seed=3)
    assert sample.sampled and sample.total == 8 and len(sample) == 7 and (sample.weight == 1 / 7).all()
    again = tree_combinations([0.5, 0.5], regions, layout, 7, seed=3)
    assert np.array_equal(again.columns, sample.columns) and np.array_equal(again.source, sample.source)
    assert (sample.columns[sample.source == 1, 1] == -1).all() and (sample.columns[sample.source == 0, 1] >= 2).all()
    # drawn by weight: with 40 x 40 models the sample of 1,000 holds source 0 and crustal model 0 at
    # their weights, within 5 binomial standard deviations (common practice)
    rng = np.random.default_rng(0)
    wa, wb = rng.dirichlet(np.ones(40)), rng.dirichlet(np.ones(40))
    big = tree_combinations([0.3, 0.7], [("active_crustal", "subduction_interface")] * 2,
                            part_layout(wa, {"subduction_interface": wb}), 1000, seed=11)
    assert big.sampled and big.total == 3200
    for share, p in (((big.source == 0).mean(), 0.3), ((big.columns[:, 0] == 0).mean(), wa[0])):
        assert abs(share - p) < 5 * np.sqrt(p * (1 - p) / 1000)
    other = tree_combinations([0.3, 0.7], [("active_crustal", "subduction_interface")] * 2,
                              part_layout(wa, {"subduction_interface": wb}), 1000, seed=12)
    assert not np.array_equal(other.columns, big.columns)


def test_single_region_gives_the_fractiles_over_the_end_branches_bit_for_bit(tmp_path):
    # Regression: with active-crustal sources only, the combinations are the (source, model) end
    # branches in the same order with the same weights: the fractiles of the code before.
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    inputs = stages.load_inputs(dst / "quakefolio_compute.toml")
    model, haz = inputs.hazard_model, inputs.hazard
    blocks = [hazard_stage.hazard_block(model, haz, b) for b in hazard_stage.site_blocks(len(haz.site_id), 2)]
    model, _ = hazard_stage.combine_hazard(model, haz, blocks)
    flat = model.branch_curves.reshape((-1,) + model.branch_curves.shape[2:])
    old = weighted_fractiles(flat, hazard_stage.branch_weights(model), model.fractiles)
    for q, arr in zip(model.fractiles, old):
        assert np.array_equal(model.statistics[hazard_stage.statistic_name(q)], arr)
    assert np.array_equal(combination_curves(model.part_curves, model.combinations), flat)
    assert np.array_equal(model.part_curves, model.branch_curves)


@pytest.fixture()
def two_slab_models_config(tmp_path, monkeypatch):
    """The mini inputs with an intraslab source in the first source branch and two intraslab models."""
    monkeypatch.setitem(GMM_REGISTRY, RaisedAg16.name, RaisedAg16())
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    shutil.copy(MINI.parent / "broken" / "config_region_without_branches" / "sources.toml", dst / "sources_slab.toml")
    cfg = dst / "quakefolio_compute.toml"
    text = cfg.read_text().replace('{ file = "sources.toml", weight = 0.6 }', '{ file = "sources_slab.toml", weight = 0.6 }')
    text = text.replace("truncation_sigma = 3.0", "truncation_sigma = 3.0\nregion_gmm_branches = { subduction_intraslab = "
                        f'[{{ model = "AG16", weight = 0.3 }}, {{ model = "{RaisedAg16.name}", weight = 0.7 }}] }}\n'
                        "propagate_branches = true")
    cfg.write_text(text + "\n[portfolio]\nevent_based = false\n")
    return cfg


def _brute_combinations(inputs):
    """Every (source, crustal model, slab model) curve (n_c, n_im, n_sites, n_lev) and weight, by brute force."""
    model, haz = inputs.hazard_model, inputs.hazard
    kw = dict(truncation_sigma=3.0, max_distance_km=150.0, ref=model.ref, site_fields=dict(model.site_fields))
    curves, weights = [], []
    for _, ws, src in model.source_branches:
        codes = src.ruptures.region_code
        for _, wg, gmm in model.gmm_branches:
            c = compute_site_hazard(haz.lon, haz.lat, model.site_vs30, src.ruptures.subset(codes == 0), [gmm],
                                    model.ims, model.levels_g, **kw)[0]
            for _, wm, slab_model in model.region_branches[SLAB]:
                d = 0.0 if not codes.any() else compute_site_hazard(
                    haz.lon, haz.lat, model.site_vs30, src.ruptures.subset(codes > 0), [gmm], model.ims,
                    model.levels_g, region_branches={SLAB: [(1.0, slab_model)]}, **kw)[0]
                curves.append(c + d)
                weights.append(ws * wg * wm)
    return np.array(curves), np.array(weights)


def test_pipeline_fractiles_and_propagated_branches_take_every_combination(two_slab_models_config):
    inputs = stages.load_inputs(two_slab_models_config)
    model, haz = inputs.hazard_model, inputs.hazard
    assert [g for _, _, g in model.region_branches[SLAB]][1].name == RaisedAg16.name
    assert model.combinations.total == 2 * 2 + 2  # the second source branch has no intraslab source
    blocks = [hazard_stage.hazard_block(model, haz, b) for b in hazard_stage.site_blocks(len(haz.site_id), 2)]
    model, _ = hazard_stage.combine_hazard(model, haz, blocks)
    curves, weights = _brute_combinations(inputs)
    expected = brute_fractiles(curves, weights, model.fractiles)
    for q, arr in zip(model.fractiles, expected):
        assert_allclose(model.statistics[hazard_stage.statistic_name(q)], arr, rtol=1e-12, atol=0)
    assert_allclose(model.statistics["mean"], np.tensordot(weights, curves, axes=(0, 0)), rtol=1e-12)
    # propagate_branches carries the same combinations through the damage and loss kernels
    run = run_pure(two_slab_models_config)
    record = json.loads((run / "manifest.json").read_text())["hazard_logic_tree"]["fractile_combinations"]
    assert record["combinations"] == record["used"] == 6 and not record["sampled"] and record["propagate_branches"]
    frac = read_table(run, "asset_loss_fractiles").pivot(index="asset_id", columns="statistic", values="eal_ratio")
    cfg = inputs.config.fragility
    for j, asset in inputs.exposure.reset_index(drop=True).iterrows():
        dss = inputs.library[asset.building_class]
        site_curves = curves[:, model.ims.index(dss.im), inputs.site_index[j]][:, None]
        ds, mdr, _ = dss.loss_states(model.levels_g[None], site_curves, tail=cfg.tail,
                                     envelope=cfg.crossing == "envelope")
        eal = expected_annual_loss(ds, mdr)[:, 0]
        want = brute_fractiles(eal, weights, model.fractiles)
        got = frac.loc[asset.asset_id, [hazard_stage.statistic_name(q) for q in model.fractiles]].to_numpy(float)
        assert_allclose(got, want, rtol=1e-9)
