"""The damage-and-loss stage: unique (site, class) pairs in blocks, the exact risk integral per
pair, and the asset tables (damage-state rates, EAL, loss curves, logic-tree fractiles).

Numerics stay in :mod:`quakefolio.core` and :mod:`quakefolio.fragility`: this module
groups work per unique (hazard site, building class) pair, calls the kernels, reads and
writes the pair cache, and lays results out as tables.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from quakefolio.core.curves import prob_in_years, return_period
from quakefolio.core.hazard import weighted_fractiles
from quakefolio.core.loss import expected_annual_loss, expected_annual_net_loss, loss_exceedance_rates
from quakefolio.pipeline.io.cache import PairStore, digest, row_digests
from quakefolio.pipeline.io.ingest import curves_for_im
from quakefolio.pipeline.stages.hazard import branch_weights, statistic_name
from quakefolio.pipeline.stages.inputs import stage_cache
from quakefolio.pipeline.stages.people import consequence_tables
from quakefolio.pipeline.stages.products import (
    BlockResult, CacheCounts, ClassDamage, DamagePlan, DamageProduct, WorkBlock, frozen_mapping,
)

__all__ = ["plan_blocks", "compute_block", "combine_damage", "build_tables"]


def _damage_group_key(inputs, code):
    """Everything a class's per-pair results depend on besides the pair's hazard curve."""
    cfg = inputs.config
    dss = inputs.library[code]
    return digest("damage", code, dss.im, list(dss.names), dss.medians, dss.betas, dss.mean_damage_ratio, dss.cov,
                  dss.collapse_index, cfg.fragility.tail, cfg.fragility.crossing,
                  list(cfg.output.loss_curve_ratios))


def plan_blocks(inputs):
    """Unique (site, class) pairs grouped per class and cut into blocks of ``block_size``.

    Pairs whose results are in the cache (same curve values, same class parameters and
    settings, same code) are read from it and left out of the blocks.

    Parameters
    ----------
    inputs : RunInputs
        With hazard curves.

    Returns
    -------
    DamagePlan
    """
    size = inputs.config.execution.block_size
    model = inputs.hazard_model
    cache = stage_cache(inputs)
    use_cache = cache.enabled and not (
        model is not None and (inputs.config.hazard.propagate_branches or not model.statistics))
    blocks, cached, pair_keys = [], {}, {}
    counts = CacheCounts()
    classes = inputs.exposure.building_class.to_numpy()
    for code in sorted(set(classes)):
        sites = np.unique(inputs.site_index[classes == code])
        if use_cache:
            levels, rates = curves_for_im(inputs.hazard, inputs.library[code].im)
            keys = row_digests(levels[sites], rates[sites])
            found, rows = PairStore(cache, "damage", _damage_group_key(inputs, code)).lookup(keys)
            pair_keys[code] = (sites, keys)
            cached[code] = (sites[found], rows)
            counts = counts + CacheCounts.of("damage_pairs", found.sum(), (~found).sum())
            sites = sites[~found]
        for start in range(0, len(sites), size):
            blocks.append(WorkBlock(len(blocks), code, sites[start:start + size]))
    return DamagePlan(tuple(blocks), frozen_mapping(cached), frozen_mapping(pair_keys), counts)


def compute_block(inputs, block):
    """Damage-state rates, EAL ratio and loss curve for one block (core kernels only).

    Rates by the exact per-segment integral of the fragility over the hazard curve
    (:meth:`quakefolio.fragility.DamageStateSet.annual_rates`), EAL by
    :func:`quakefolio.core.loss.expected_annual_loss`, loss curve by
    :func:`quakefolio.core.loss.loss_exceedance_rates`; with propagated logic-tree
    branches, the same kernels per branch and weighted fractiles over branches.

    Parameters
    ----------
    inputs : RunInputs
        With hazard curves.
    block : WorkBlock

    Returns
    -------
    BlockResult
    """
    cfg = inputs.config
    dss = inputs.library[block.class_code]
    levels, rates = curves_for_im(inputs.hazard, dss.im)
    x, lam = levels[block.sites], rates[block.sites]
    ds, below, above = dss.annual_rates(x, lam, tail=cfg.fragility.tail,
                                        envelope=cfg.fragility.crossing == "envelope", diagnostics=True)
    eal_ratio = expected_annual_loss(ds, dss.mean_damage_ratio)
    curve = loss_exceedance_rates(ds, dss.mean_damage_ratio, np.asarray(cfg.output.loss_curve_ratios),
                                  dss.cov)
    model = inputs.hazard_model
    if not (model is not None and cfg.hazard.propagate_branches):
        return BlockResult(block, ds, below, above, eal_ratio, curve)
    # every logic-tree branch through the same kernels, then weighted fractiles over branches
    i = model.ims.index(dss.im)
    branch = model.branch_curves[:, :, i][:, :, block.sites].reshape((-1, len(block.sites), x.shape[-1]))
    ds_b = dss.annual_rates(x, branch, tail=cfg.fragility.tail, envelope=cfg.fragility.crossing == "envelope")
    w = branch_weights(model)
    return BlockResult(block, ds, below, above, eal_ratio, curve,
                       ds_fractiles=weighted_fractiles(ds_b, w, model.fractiles),
                       eal_fractiles=weighted_fractiles(expected_annual_loss(ds_b, dss.mean_damage_ratio), w,
                                                        model.fractiles))


def _class_damage(inputs, plan, results):
    """Computed and cached pairs of every class, sorted by site; the pair cache is rewritten.

    Returns
    -------
    dict code -> ClassDamage
    """
    by_class = {}
    for res in results:
        by_class.setdefault(res.block.class_code, []).append(res)
    for code, (sites, rows) in plan.cached.items():
        if len(sites):
            by_class.setdefault(code, []).append(BlockResult(
                WorkBlock(-1, code, sites), rows["ds"], rows["below"], rows["above"], rows["eal"], rows["curve"]))
    out = {}
    for code in sorted(by_class):
        parts = sorted(by_class[code], key=lambda r: r.block.block_id)
        sites = np.concatenate([p.block.sites for p in parts])
        ds = np.concatenate([p.ds_rates for p in parts])
        below = np.concatenate([p.share_below for p in parts])
        above = np.concatenate([p.share_above for p in parts])
        eal_r = np.concatenate([p.eal_ratio for p in parts])
        curve = np.concatenate([p.loss_curve for p in parts])
        order = np.argsort(sites, kind="stable")  # cached and computed pairs, by site
        sites, ds, below, above, eal_r, curve = (a[order] for a in (sites, ds, below, above, eal_r, curve))
        if code in plan.pair_keys:
            all_sites, keys = plan.pair_keys[code]
            assert np.array_equal(all_sites, sites)
            PairStore.save_group(stage_cache(inputs), "damage", _damage_group_key(inputs, code), keys,
                                 {"ds": ds, "below": below, "above": above, "eal": eal_r, "curve": curve})
        out[code] = ClassDamage(code, sites, ds, below, above, eal_r, curve)
    return out


def combine_damage(inputs, plan, results):
    """The damage stage's product: per-class pair results and the asset tables.

    Parameters
    ----------
    inputs : RunInputs
        With hazard curves.
    plan : DamagePlan
        From :func:`plan_blocks` (its cached pairs join the computed ones; the pair cache
        is rewritten with every pair of a class).
    results : list of BlockResult
        From :func:`compute_block`, any order.

    Returns
    -------
    DamageProduct
    """
    classes = _class_damage(inputs, plan, results)
    tables, warnings = build_tables(inputs, classes)
    tables.update(consequence_tables(inputs, classes, tables["asset_loss"]))
    if any(r.ds_fractiles is not None for r in results):
        tables.update(_fractile_tables(inputs, results))
    return DamageProduct(frozen_mapping(classes), tuple(sorted(results, key=lambda r: r.block.block_id)),
                         frozen_mapping(tables), tuple(warnings))


def build_tables(inputs, classes):
    """Broadcast per-pair results to assets and build the asset tables.

    Parameters
    ----------
    inputs : RunInputs
    classes : dict code -> ClassDamage

    Returns
    -------
    (dict, list)
        DataFrames ``asset_damage``, ``asset_loss``, ``asset_loss_curve``; warning lines.
    """
    ex = inputs.exposure
    cfg = inputs.config
    horizon = cfg.scenario.horizon_yr
    ratios = np.asarray(cfg.output.loss_curve_ratios)
    classes_of_assets = ex.building_class.to_numpy()
    n_assets = len(ex)
    damage_frames, curve_parts = [], []
    eal_ratio = np.empty(n_assets)
    eal_net = np.empty(n_assets)
    collapse_rate = np.empty(n_assets)
    max_tail = np.empty(n_assets)
    for code in sorted(classes):
        cd = classes[code]
        sites, ds, below, above, eal_r, curve = (cd.sites, cd.ds_rates, cd.share_below, cd.share_above, cd.eal_ratio,
                                                 cd.loss_curve)
        dss = inputs.library[code]
        assets = np.flatnonzero(classes_of_assets == code)
        pair = np.searchsorted(sites, inputs.site_index[assets])
        n_ds = dss.n_states
        rate = ds[pair]  # (a, n_ds)
        damage_frames.append(pd.DataFrame({
            "asset_id": np.repeat(ex.asset_id.to_numpy()[assets], n_ds),
            "building_class": code,
            "site_id": np.repeat(inputs.hazard.site_id[inputs.site_index[assets]], n_ds),
            "im": dss.im,
            "hazard_im_interpolated": dss.im in inputs.hazard.interpolated,
            "damage_state": np.tile(np.array(dss.names, dtype=object), len(assets)),
            "damage_state_index": np.tile(np.arange(1, n_ds + 1, dtype=np.int32), len(assets)),
            "annual_rate_exceed": rate.ravel(),
            "return_period_yr": return_period(rate).ravel(),
            "prob_exceed_in_horizon": prob_in_years(rate, horizon).ravel(),
            "horizon_yr": horizon,
            "tail_share_below": below[pair].ravel(),
            "tail_share_above": above[pair].ravel(),
        }))
        eal_ratio[assets] = eal_r[pair]
        # per asset (its value and terms), from the pair's damage-state rates; closed form per state
        eal_net[assets] = expected_annual_net_loss(rate, dss.mean_damage_ratio, dss.cov,
                                                   ex.replacement_value.to_numpy()[assets],
                                                   ex.deductible.to_numpy(dtype=float)[assets],
                                                   ex.limit.to_numpy(dtype=float)[assets])
        collapse_rate[assets] = rate[:, dss.collapse_index]
        max_tail[assets] = np.maximum(below[pair], above[pair]).max(axis=-1)
        curve_parts.append((assets, curve[pair]))
    asset_damage = pd.concat(damage_frames, ignore_index=True)
    # stable, user-facing order: exposure order
    pos = pd.Series(np.arange(n_assets), index=ex.asset_id.to_numpy())
    asset_damage = asset_damage.iloc[np.lexsort((asset_damage.damage_state_index.to_numpy(),
                                                 pos.loc[asset_damage.asset_id].to_numpy()))].reset_index(drop=True)
    value = ex.replacement_value.to_numpy()
    asset_loss = pd.DataFrame({
        "asset_id": ex.asset_id.to_numpy(),
        "building_class": classes_of_assets,
        "site_id": inputs.hazard.site_id[inputs.site_index],
        "site_distance_km": inputs.site_distance_km,
        "replacement_value": value,
        "eal": eal_ratio * value,
        "eal_net": eal_net,
        "eal_ratio": eal_ratio,
        "annual_collapse_rate": collapse_rate,
        "collapse_prob_in_horizon": prob_in_years(collapse_rate, horizon),
        "horizon_yr": horizon,
        "max_tail_share": max_tail,
    })
    curve_all = np.empty((n_assets, len(ratios)))
    for assets, c in curve_parts:
        curve_all[assets] = c
    asset_loss_curve = pd.DataFrame({
        "asset_id": np.repeat(ex.asset_id.to_numpy(), len(ratios)),
        "loss_ratio": np.tile(ratios, n_assets),
        "loss": (value[:, None] * ratios[None, :]).ravel(),
        "annual_rate_exceed": curve_all.ravel(),
    })
    threshold = cfg.fragility.tail_share_warning
    n_tail = int((max_tail > threshold).sum())
    warnings = []
    if n_tail:
        warnings.append(
            f"{n_tail} assets draw more than {threshold:.0%} of a damage-state rate from beyond the tabulated "
            f"hazard range (tail policy '{cfg.fragility.tail}'; see tail_share_* in asset_damage)")
    return {"asset_damage": asset_damage, "asset_loss": asset_loss, "asset_loss_curve": asset_loss_curve}, warnings


def _fractile_tables(inputs, results):
    """Logic-tree fractiles of per-asset damage-state rates and EAL (propagated branches)."""
    ex = inputs.exposure
    model = inputs.hazard_model
    horizon = inputs.config.scenario.horizon_yr
    names = [statistic_name(q) for q in model.fractiles]
    classes = ex.building_class.to_numpy()
    dmg, loss = [], []
    for res in sorted(results, key=lambda r: r.block.block_id):
        code = res.block.class_code
        dss = inputs.library[code]
        assets = np.flatnonzero((classes == code) & np.isin(inputs.site_index, res.block.sites))
        pair = np.searchsorted(res.block.sites, inputs.site_index[assets])
        for q, name in enumerate(names):
            rate = res.ds_fractiles[q][pair]
            dmg.append(pd.DataFrame({
                "asset_id": np.repeat(ex.asset_id.to_numpy()[assets], dss.n_states), "statistic": name,
                "damage_state": np.tile(np.array(dss.names, dtype=object), len(assets)),
                "damage_state_index": np.tile(np.arange(1, dss.n_states + 1, dtype=np.int32), len(assets)),
                "annual_rate_exceed": rate.ravel(), "prob_exceed_in_horizon": prob_in_years(rate, horizon).ravel(),
            }))
            value = ex.replacement_value.to_numpy()[assets]
            loss.append(pd.DataFrame({"asset_id": ex.asset_id.to_numpy()[assets], "statistic": name,
                                      "eal": res.eal_fractiles[q][pair] * value,
                                      "eal_ratio": res.eal_fractiles[q][pair]}))
    pos = pd.Series(np.arange(len(ex)), index=ex.asset_id.to_numpy())
    dmg = pd.concat(dmg, ignore_index=True)
    dmg = dmg.iloc[np.lexsort((dmg.damage_state_index.to_numpy(), dmg.statistic.map(names.index).to_numpy(),
                               pos.loc[dmg.asset_id].to_numpy()))].reset_index(drop=True)
    loss = pd.concat(loss, ignore_index=True)
    loss = loss.iloc[np.lexsort((loss.statistic.map(names.index).to_numpy(),
                                 pos.loc[loss.asset_id].to_numpy()))].reset_index(drop=True)
    return {"asset_damage_fractiles": dmg, "asset_loss_fractiles": loss}
