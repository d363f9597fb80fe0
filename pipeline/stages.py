"""Stage functions of a run, free of Prefect: read inputs, damage and loss, tables.

Each stage takes the products before it and returns a new, frozen product
(:mod:`quakefolio.pipeline.products`); the sequence is :func:`quakefolio.pipeline.runner.execute`.
Numerics stay in :mod:`quakefolio.core` and :mod:`quakefolio.fragility`: this module
reads, groups work per unique (hazard site, building class) pair, calls the kernels, and
lays results out as tables.
"""
from __future__ import annotations

import hashlib
import json
from dataclasses import replace

import numpy as np
import pandas as pd

from quakefolio.core.curves import im_at_rate, prob_in_years, return_period
from quakefolio.core.errors import InputError, locate_toml_line
from quakefolio.core.hazard import weighted_fractiles
from quakefolio.core.loss import expected_annual_loss, loss_exceedance_rates
from quakefolio.fragility import CrossingError, load_library
from quakefolio.pipeline.cache import PairStore, StageCache, digest, fragility_class_digests, row_digests  # noqa: F401
from quakefolio.pipeline.config import load_config, sha256_file
from quakefolio.pipeline.hazard_stage import branch_weights, prepare_compute, site_hazard_frame, statistic_name
from quakefolio.pipeline.ingest import (
    UnavailableIM, curves_for_im, map_assets_to_sites, read_exposure, read_hazard_curves,
)
from quakefolio.pipeline.products import (
    BlockResult, CacheCounts, ClassDamage, DamagePlan, DamageProduct, RunInputs, WorkBlock, frozen_mapping,
)

__all__ = ["RunInputs", "WorkBlock", "BlockResult", "load_inputs", "inputs_digest", "stage_cache", "with_hazard",
           "unique_pairs", "plan_blocks", "compute_block", "combine_damage", "site_hazard_table", "hazard_at_return_periods_table",
           "fragility_class_digests"]

#: Former name of :class:`quakefolio.pipeline.products.RunInputs`.
Inputs = RunInputs


def inputs_digest(input_hashes, config):
    """sha256 over the input files' digests and the resolved config.

    Parameters
    ----------
    input_hashes : Mapping
        Path and sha256 of every input file.
    config : quakefolio.pipeline.config.Config

    Returns
    -------
    str
        Hex digest.
    """
    blob = json.dumps({"inputs": dict(input_hashes), "config": config.resolved()}, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()


def stage_cache(inputs):
    """The run's content cache (``<output>/cache``), enabled per ``[execution] cache``.

    Parameters
    ----------
    inputs : RunInputs

    Returns
    -------
    quakefolio.pipeline.cache.StageCache
    """
    return StageCache(inputs.config["output"]["folder"], enabled=inputs.config["execution"]["cache"])


def load_inputs(config_or_path):
    """Read and validate every input of a run; raise InputError at the first problem.

    Ingest mode reads the tabulated curves and maps assets to the nearest site; compute
    mode reads the source models and builds hazard sites from the exposure (the curves
    are computed later by :mod:`quakefolio.pipeline.hazard_stage`).  Cross-file checks
    (class IMs available, curves do not cross, retrofit alternatives) run here, once.

    Parameters
    ----------
    config_or_path : str, Path or quakefolio.pipeline.config.Config

    Returns
    -------
    RunInputs
    """
    config = config_or_path if hasattr(config_or_path, "sections") else load_config(config_or_path)
    hz, ex, fr = config["hazard"], config["exposure"], config["fragility"]
    library = load_library(fr["library"])
    exposure = read_exposure(ex["file"], library)
    hashes = {
        "config": {"path": str(config.path), "sha256": config.sha256},
        "fragility_library": {"path": str(fr["library"]), "sha256": library.sha256},
        "exposure": {"path": str(ex["file"]), "sha256": sha256_file(ex["file"])},
    }
    model = None
    if hz["mode"] == "ingest":
        hazard = read_hazard_curves(hz["curves_file"], im_unit=hz["im_unit"], statistic=hz["statistic"])
        hashes["hazard_curves"] = {"path": str(hz["curves_file"]), "sha256": sha256_file(hz["curves_file"])}
        site_index, dist = map_assets_to_sites(exposure, hazard, max_distance_km=hz["max_site_distance_km"],
                                               exposure_path=ex["file"])
    else:
        model, hazard, site_index, dist = prepare_compute(config, exposure, library)
        for bid, _, src in model.source_branches:
            hashes[f"source_model:{bid}"] = {"path": src.path, "sha256": src.sha256}
    text = None
    for code in sorted(set(exposure.building_class)):
        dss = library[code]
        if model is None:
            try:
                levels, _ = curves_for_im(hazard, dss.im, allow_interpolation=hz["period_interpolation"])
            except UnavailableIM as exc:
                text = text or open(fr["library"], encoding="utf-8").read()
                raise InputError(fr["library"], f"class {code!r}: {exc}",
                                 row=locate_toml_line(text, ("classes", code), "im"), column=f"classes.{code}.im") \
                    from None
        else:
            levels = model.levels_g
        if fr["crossing"] == "reject":
            try:
                dss.check_crossing(float(levels.min()), float(levels.max()))
            except CrossingError as exc:
                text = text or open(fr["library"], encoding="utf-8").read()
                j = dss.names.index(exc.upper)
                raise InputError(fr["library"], str(exc),
                                 row=locate_toml_line(text, ("classes", code, "states"), "beta", j),
                                 column=f"classes.{code}.states[{j}].beta") from None
    warnings = []
    if hazard.interpolated:
        warnings.append(f"hazard interpolated across periods for {', '.join(sorted(hazard.interpolated))} "
                        "(log-log between neighbouring tabulated periods)")
    draft = RunInputs(config, library, hazard, exposure, site_index, dist, hashes, "", tuple(warnings), model)
    from quakefolio.pipeline.whatif import validate as validate_alternatives

    validate_alternatives(draft, hashes)  # retrofit alternatives: asset ids, classes, IMs; adds their library files
    return replace(draft, input_hashes=frozen_mapping(hashes), inputs_sha256=inputs_digest(hashes, config))


def with_hazard(inputs, model, hazard):
    """The run inputs with the computed hazard (a new object; compute mode).

    Parameters
    ----------
    inputs : RunInputs
    model : quakefolio.pipeline.hazard_stage.HazardModel
        With branch curves and statistics (and disaggregation, if any).
    hazard : quakefolio.pipeline.ingest.HazardCurves
        With the mean curves per IM.

    Returns
    -------
    RunInputs
    """
    return replace(inputs, hazard_model=model, hazard=hazard)


def _damage_group_key(inputs, code):
    """Everything a class's per-pair results depend on besides the pair's hazard curve."""
    cfg = inputs.config
    dss = inputs.library[code]
    return digest("damage", code, dss.im, list(dss.names), dss.medians, dss.betas, dss.mean_damage_ratio, dss.cov,
                  dss.collapse_index, cfg["fragility"]["tail"], cfg["fragility"]["crossing"],
                  list(cfg["output"]["loss_curve_ratios"]))


def unique_pairs(inputs):
    """Number of unique (hazard site, building class) pairs of the exposure (the unit of damage work).

    Parameters
    ----------
    inputs : RunInputs

    Returns
    -------
    int
    """
    classes = inputs.exposure.building_class.to_numpy()
    return sum(len(np.unique(inputs.site_index[classes == code])) for code in set(classes))


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
    size = inputs.config["execution"]["block_size"]
    model = inputs.hazard_model
    cache = stage_cache(inputs)
    use_cache = cache.enabled and not (
        model is not None and (inputs.config["hazard"]["propagate_branches"] or not model.statistics))
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
    ds, below, above = dss.annual_rates(x, lam, tail=cfg["fragility"]["tail"],
                                        envelope=cfg["fragility"]["crossing"] == "envelope", diagnostics=True)
    eal_ratio = expected_annual_loss(ds, dss.mean_damage_ratio)
    curve = loss_exceedance_rates(ds, dss.mean_damage_ratio, np.asarray(cfg["output"]["loss_curve_ratios"]),
                                  dss.cov)
    model = inputs.hazard_model
    if not (model is not None and cfg["hazard"]["propagate_branches"]):
        return BlockResult(block, ds, below, above, eal_ratio, curve)
    # every logic-tree branch through the same kernels, then weighted fractiles over branches
    i = model.ims.index(dss.im)
    branch = model.branch_curves[:, :, i][:, :, block.sites].reshape((-1, len(block.sites), x.shape[-1]))
    ds_b = dss.annual_rates(x, branch, tail=cfg["fragility"]["tail"], envelope=cfg["fragility"]["crossing"] == "envelope")
    w = branch_weights(model)
    return BlockResult(block, ds, below, above, eal_ratio, curve,
                       ds_fractiles=weighted_fractiles(ds_b, w, model.fractiles),
                       eal_fractiles=weighted_fractiles(expected_annual_loss(ds_b, dss.mean_damage_ratio), w,
                                                        model.fractiles))


# --- tables -----------------------------------------------------------------------------------

def site_hazard_table(inputs):
    """Long-form curves (site_id, im, im_level [g], annual_rate [1/yr], statistic)."""
    if inputs.hazard_model is not None:
        return site_hazard_frame(inputs.hazard_model, inputs.hazard)
    frames = []
    hz = inputs.hazard
    stat = inputs.config["hazard"]["statistic"]
    for im in sorted(set(hz.curves) - hz.interpolated):
        x, lam = hz.curves[im]
        m, n = x.shape
        frames.append(pd.DataFrame({"site_id": np.repeat(hz.site_id, n), "im": im, "im_level": x.ravel(),
                                    "annual_rate": lam.ravel(), "statistic": stat}))
    return pd.concat(frames, ignore_index=True)


def hazard_at_return_periods_table(inputs):
    """Uniform-hazard values per site, IM, statistic and return period, with a flag column.

    ``flag`` is ``ok``, ``below_rate_floor`` (the rate 1/T is below the configured floor:
    not reported as a design value) or ``outside_range`` (not within the tabulated rates).
    """
    cfg = inputs.config["hazard"]
    rps = np.asarray(cfg["return_periods_yr"])
    target = 1.0 / rps
    frames = []
    for stat, im, x, lam in _curve_sets(inputs):
        vals = im_at_rate(target, x, lam)  # (m, n_rp)
        flag = np.where(np.isnan(vals), "outside_range", "ok")
        floor = np.broadcast_to(target < cfg["rate_floor"], vals.shape)
        flag = np.where(floor, "below_rate_floor", flag)
        vals = np.where(floor, np.nan, vals)
        frames.append(pd.DataFrame({"site_id": np.repeat(inputs.hazard.site_id, len(rps)), "im": im,
                                    "statistic": stat, "return_period_yr": np.tile(rps, len(inputs.hazard.site_id)),
                                    "im_level": vals.ravel(), "flag": flag.ravel()}))
    return pd.concat(frames, ignore_index=True)


def _curve_sets(inputs):
    """(statistic, im, levels, rates) for every stored curve set."""
    model = inputs.hazard_model
    if model is None:
        hz = inputs.hazard
        stat = inputs.config["hazard"]["statistic"]
        for im in sorted(set(hz.curves) - hz.interpolated):
            yield (stat, im) + tuple(hz.curves[im])
        return
    n_sites = len(inputs.hazard.site_id)
    levels = np.broadcast_to(model.levels_g, (n_sites, len(model.levels_g)))
    for stat, arr in model.statistics.items():
        for i, im in enumerate(model.ims):
            yield stat, im, levels, arr[i]


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
    horizon = cfg["scenario"]["horizon_yr"]
    ratios = np.asarray(cfg["output"]["loss_curve_ratios"])
    classes_of_assets = ex.building_class.to_numpy()
    n_assets = len(ex)
    damage_frames, curve_parts = [], []
    eal_ratio = np.empty(n_assets)
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
    threshold = cfg["fragility"]["tail_share_warning"]
    n_tail = int((max_tail > threshold).sum())
    warnings = []
    if n_tail:
        warnings.append(
            f"{n_tail} assets draw more than {threshold:.0%} of a damage-state rate from beyond the tabulated "
            f"hazard range (tail policy '{cfg['fragility']['tail']}'; see tail_share_* in asset_damage)")
    return {"asset_damage": asset_damage, "asset_loss": asset_loss, "asset_loss_curve": asset_loss_curve}, warnings


def _fractile_tables(inputs, results):
    """Logic-tree fractiles of per-asset damage-state rates and EAL (propagated branches)."""
    ex = inputs.exposure
    model = inputs.hazard_model
    horizon = inputs.config["scenario"]["horizon_yr"]
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
