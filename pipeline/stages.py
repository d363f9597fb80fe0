"""Stage functions of the classical damage-and-loss path, free of Prefect.

The flow (:mod:`quakefolio.pipeline.flow`) wraps these in thin tasks; tests call them
directly.  Numerics stay in :mod:`quakefolio.core` and :mod:`quakefolio.fragility`:
this module reads, groups work per unique (hazard site, building class) pair, calls the
kernels, and lays results out as tables.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from quakefolio.core.curves import im_at_rate, prob_in_years, return_period
from quakefolio.core.errors import InputError, locate_toml_line
from quakefolio.core.loss import expected_annual_loss, loss_exceedance_rates
from quakefolio.fragility import CrossingError, load_library
from quakefolio.pipeline.cache import PairStore, StageCache, digest, row_digests
from quakefolio.pipeline.config import load_config, sha256_file
from quakefolio.pipeline.ingest import (
    UnavailableIM, curves_for_im, map_assets_to_sites, read_exposure, read_hazard_curves,
)

__all__ = ["Inputs", "WorkBlock", "load_inputs", "plan_blocks", "compute_block", "build_tables"]


@dataclass
class Inputs:
    """Validated inputs of a run, with the asset-to-site mapping."""

    config: object
    library: object
    hazard: object
    exposure: pd.DataFrame
    site_index: np.ndarray
    site_distance_km: np.ndarray
    input_hashes: dict
    warnings: list = field(default_factory=list)
    hazard_model: object = None  # compute mode: quakefolio.pipeline.hazard_stage.HazardModel
    cache: object = None  # quakefolio.pipeline.cache.StageCache
    cached_pairs: dict = field(default_factory=dict)  # class -> (sites, rows) read from the cache
    pair_keys: dict = field(default_factory=dict)  # class -> (sites, (n, 32) digests)


@dataclass(frozen=True)
class WorkBlock:
    """A chunk of work: one building class on a set of unique hazard sites."""

    block_id: int
    class_code: str
    sites: np.ndarray  # unique site indices


@dataclass
class BlockResult:
    block: WorkBlock
    ds_rates: np.ndarray  # (m, n_ds) [1/yr]
    share_below: np.ndarray
    share_above: np.ndarray
    eal_ratio: np.ndarray  # (m,) [1/yr]
    loss_curve: np.ndarray  # (m, n_l) [1/yr]
    ds_fractiles: np.ndarray | None = None  # (n_q, m, n_ds) [1/yr], propagated logic-tree branches
    eal_fractiles: np.ndarray | None = None  # (n_q, m) [1/yr]


def load_inputs(config_or_path):
    """Read and validate every input of a run; raise InputError at the first problem.

    Ingest mode reads the tabulated curves and maps assets to the nearest site; compute
    mode reads the source models and builds hazard sites from the exposure (the curves
    are computed later by :mod:`quakefolio.pipeline.hazard_stage`).
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
        from quakefolio.pipeline.hazard_stage import prepare_compute

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
    inputs = Inputs(config, library, hazard, exposure, site_index, dist, hashes, warnings)
    inputs.hazard_model = model
    inputs.cache = StageCache(config["output"]["folder"], enabled=config["execution"]["cache"])
    if model is not None:
        model.cache = inputs.cache
    from quakefolio.pipeline.whatif import validate as validate_alternatives

    validate_alternatives(inputs)  # retrofit alternatives: asset ids, classes, IMs
    return inputs


def _damage_group_key(inputs, code):
    """Everything a class's per-pair results depend on besides the pair's hazard curve."""
    cfg = inputs.config
    dss = inputs.library[code]
    return digest("damage", code, dss.im, list(dss.names), dss.medians, dss.betas, dss.mean_damage_ratio, dss.cov,
                  dss.collapse_index, cfg["fragility"]["tail"], cfg["fragility"]["crossing"],
                  list(cfg["output"]["loss_curve_ratios"]))


def plan_blocks(inputs):
    """Unique (site, class) pairs grouped per class and cut into blocks of ``block_size``.

    Pairs whose results are in the cache (same curve values, same class parameters and
    settings, same code) are read from it and left out of the blocks.
    """
    size = inputs.config["execution"]["block_size"]
    model = inputs.hazard_model
    use_cache = inputs.cache is not None and inputs.cache.enabled and not (
        model is not None and (inputs.config["hazard"]["propagate_branches"] or not model.statistics))
    blocks = []
    classes = inputs.exposure.building_class.to_numpy()
    inputs.cached_pairs, inputs.pair_keys = {}, {}
    for code in sorted(set(classes)):
        sites = np.unique(inputs.site_index[classes == code])
        if use_cache:
            levels, rates = curves_for_im(inputs.hazard, inputs.library[code].im)
            keys = row_digests(levels[sites], rates[sites])
            found, rows = PairStore(inputs.cache, "damage", _damage_group_key(inputs, code)).lookup(keys)
            inputs.pair_keys[code] = (sites, keys)
            inputs.cached_pairs[code] = (sites[found], rows)
            inputs.cache.count("damage_pairs", hits=int(found.sum()), misses=int((~found).sum()))
            sites = sites[~found]
        for start in range(0, len(sites), size):
            blocks.append(WorkBlock(len(blocks), code, sites[start:start + size]))
    return blocks


def compute_block(inputs, block):
    """Damage-state rates, EAL ratio and loss curve for one block (core kernels only)."""
    cfg = inputs.config
    dss = inputs.library[block.class_code]
    levels, rates = curves_for_im(inputs.hazard, dss.im)
    x, lam = levels[block.sites], rates[block.sites]
    ds, below, above = dss.annual_rates(x, lam, tail=cfg["fragility"]["tail"],
                                        envelope=cfg["fragility"]["crossing"] == "envelope", diagnostics=True)
    eal_ratio = expected_annual_loss(ds, dss.mean_damage_ratio)
    curve = loss_exceedance_rates(ds, dss.mean_damage_ratio, np.asarray(cfg["output"]["loss_curve_ratios"]),
                                  dss.cov)
    result = BlockResult(block, ds, below, above, eal_ratio, curve)
    model = inputs.hazard_model
    if model is not None and cfg["hazard"]["propagate_branches"]:
        # every logic-tree branch through the same kernels, then weighted fractiles over branches
        from quakefolio.core.hazard import weighted_fractiles
        from quakefolio.pipeline.hazard_stage import branch_weights

        i = model.ims.index(dss.im)
        branch = model.branch_curves[:, :, i][:, :, block.sites].reshape((-1, len(block.sites), x.shape[-1]))
        ds_b = dss.annual_rates(x, branch, tail=cfg["fragility"]["tail"],
                                envelope=cfg["fragility"]["crossing"] == "envelope")
        w = branch_weights(model)
        result.ds_fractiles = weighted_fractiles(ds_b, w, model.fractiles)
        result.eal_fractiles = weighted_fractiles(expected_annual_loss(ds_b, dss.mean_damage_ratio), w,
                                                  model.fractiles)
    return result


# --- tables -----------------------------------------------------------------------------------

def site_hazard_table(inputs):
    """Long-form curves (site_id, im, im_level [g], annual_rate [1/yr], statistic)."""
    if inputs.hazard_model is not None:
        from quakefolio.pipeline.hazard_stage import site_hazard_frame

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


def build_tables(inputs, results):
    """Broadcast per-pair results to assets and build the asset tables.

    Returns a dict of DataFrames: ``asset_damage``, ``asset_loss``, ``asset_loss_curve``.
    """
    ex = inputs.exposure
    cfg = inputs.config
    horizon = cfg["scenario"]["horizon_yr"]
    ratios = np.asarray(cfg["output"]["loss_curve_ratios"])
    classes = ex.building_class.to_numpy()
    n_assets = len(ex)
    by_class = {}
    for res in results:
        by_class.setdefault(res.block.class_code, []).append(res)
    for code, (sites, rows) in inputs.cached_pairs.items():
        if len(sites):
            by_class.setdefault(code, []).append(BlockResult(
                WorkBlock(-1, code, sites), rows["ds"], rows["below"], rows["above"], rows["eal"], rows["curve"]))
    damage_frames, curve_parts = [], []
    eal_ratio = np.empty(n_assets)
    collapse_rate = np.empty(n_assets)
    max_tail = np.empty(n_assets)
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
        if code in inputs.pair_keys:
            all_sites, keys = inputs.pair_keys[code]
            assert np.array_equal(all_sites, sites)
            PairStore.save_group(inputs.cache, "damage", _damage_group_key(inputs, code), keys,
                                 {"ds": ds, "below": below, "above": above, "eal": eal_r, "curve": curve})
        dss = inputs.library[code]
        assets = np.flatnonzero(classes == code)
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
        "building_class": classes,
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
    if n_tail:
        inputs.warnings.append(
            f"{n_tail} assets draw more than {threshold:.0%} of a damage-state rate from beyond the tabulated "
            f"hazard range (tail policy '{cfg['fragility']['tail']}'; see tail_share_* in asset_damage)")
    tables = {"asset_damage": asset_damage, "asset_loss": asset_loss, "asset_loss_curve": asset_loss_curve}
    if any(r.ds_fractiles is not None for r in results):
        tables.update(_fractile_tables(inputs, results))
    return tables


def _fractile_tables(inputs, results):
    """Logic-tree fractiles of per-asset damage-state rates and EAL (propagated branches)."""
    from quakefolio.pipeline.hazard_stage import statistic_name

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
