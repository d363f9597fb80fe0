"""The damage-and-loss stage: unique (site, class) pairs in blocks, the exact risk integral per
pair, and the asset tables (damage-state rates, EAL, loss curves, logic-tree fractiles).

Numerics stay in :mod:`quakefolio.core` and :mod:`quakefolio.fragility`: this module
groups work per unique (hazard site, building class) pair, calls the kernels, reads and
writes the pair cache, and lays results out as tables.
"""
from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pyarrow as pa

from quakefolio.core.combinations import combination_curves
from quakefolio.core.curves import prob_in_years, return_period
from quakefolio.core.hazard import weighted_fractiles
from quakefolio.core.loss import expected_annual_loss, expected_annual_net_loss, loss_exceedance_rates
from quakefolio.pipeline.io.arrow_columns import index_of, take_text, text_array
from quakefolio.pipeline.io.cache import PairStore, digest, row_digests
from quakefolio.pipeline.io.chunked import ChunkedTable
from quakefolio.pipeline.io.ingest import curves_for_im
from quakefolio.pipeline.stages.hazard import statistic_name
from quakefolio.pipeline.stages.inputs import stage_cache
from quakefolio.pipeline.stages.people import consequence_tables
from quakefolio.pipeline.stages.products import (
    BlockResult, CacheCounts, ClassDamage, DamagePlan, DamageProduct, WorkBlock, frozen_mapping,
)

__all__ = ["plan_blocks", "compute_block", "combine_damage", "build_tables", "loss_curve_columns", "DamageRows",
           "LossCurveRows"]


def _damage_group_key(inputs, code):
    """Everything a class's per-pair results depend on besides the pair's hazard curve."""
    cfg = inputs.config
    dss = inputs.library[code]
    if not dss.has_damage_states:
        return digest("damage-vulnerability", code, dss.im, dss.levels, dss.mean_loss_ratio, dss.cov,
                      cfg.fragility.tail, list(cfg.output.loss_curve_ratios))
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
    codes = sorted(set(inputs.exposure.building_class.unique()))
    cls = index_of(inputs.exposure.building_class, codes)
    for k, code in enumerate(codes):
        sites = np.unique(inputs.site_index[cls == k])
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
    branches, the same kernels per end branch of the hazard fractiles (every combination of
    one source branch and one model per region, or their seeded sample:
    ``model.combinations``, :func:`quakefolio.core.combinations.combination_curves`) and
    weighted fractiles over them.

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
    envelope = cfg.fragility.crossing == "envelope"
    ds, mdr, cov, below, above = dss.loss_states(x, lam, tail=cfg.fragility.tail, envelope=envelope,
                                                 diagnostics=True)
    eal_ratio = expected_annual_loss(ds, mdr)
    curve = loss_exceedance_rates(ds, mdr, np.asarray(cfg.output.loss_curve_ratios), cov)
    if not dss.has_damage_states:  # no damage-state rates: the bins of the integral are not kept
        ds = np.zeros((len(block.sites), 0))
    model = inputs.hazard_model
    if not (model is not None and cfg.hazard.propagate_branches):
        return BlockResult(block, ds, below, above, eal_ratio, curve)
    # every end branch of the hazard fractiles through the same kernels, then weighted fractiles over them
    i = model.ims.index(dss.im)
    branch = combination_curves(model.part_curves[:, :, i][:, :, block.sites], model.combinations)
    ds_b, mdr_b, _ = dss.loss_states(x, branch, tail=cfg.fragility.tail, envelope=envelope)
    w = model.combinations.weight
    eal_fractiles = weighted_fractiles(expected_annual_loss(ds_b, mdr_b), w, model.fractiles)
    if not dss.has_damage_states:
        ds_b = np.zeros(ds_b.shape[:-1] + (0,))
    return BlockResult(block, ds, below, above, eal_ratio, curve,
                       ds_fractiles=weighted_fractiles(ds_b, w, model.fractiles), eal_fractiles=eal_fractiles)


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


def _asset_pairs(inputs, classes, codes, cls):
    """Per asset: its pair's row within its class, and the per-asset results of the damage stage.

    Returns
    -------
    dict of ndarray (n_assets,)
        ``pair``, ``eal_ratio``, ``eal_net`` [currency/yr], ``collapse_rate`` [1/yr] and
        ``max_tail``.
    """
    ex = inputs.exposure
    n = len(ex)
    value = ex.replacement_value.to_numpy()
    deductible, limit = ex.deductible.to_numpy(dtype=float), ex.limit.to_numpy(dtype=float)
    out = {"pair": np.empty(n, dtype=np.int64), "eal_ratio": np.empty(n), "eal_net": np.empty(n),
           "collapse_rate": np.empty(n), "max_tail": np.empty(n)}
    for k, code in enumerate(codes):
        cd, dss = classes[code], inputs.library[code]
        assets = np.flatnonzero(cls == k)
        pair = np.searchsorted(cd.sites, inputs.site_index[assets])
        rate, mdr, cov = _pair_loss_states(inputs, cd, dss)
        out["pair"][assets] = pair
        out["eal_ratio"][assets] = cd.eal_ratio[pair]
        # per asset (its value and terms), from the pair's damage-state rates; closed form per state
        out["eal_net"][assets] = _net_loss(rate[pair], mdr if mdr.ndim == 1 else mdr[pair],
                                           cov if cov.ndim == 1 else cov[pair], value[assets], deductible[assets],
                                           limit[assets], inputs.config.execution.max_workers)
        # a vulnerability class has no damage states, hence no collapse figure (NaN)
        out["collapse_rate"][assets] = rate[pair, dss.collapse_index] if dss.has_damage_states else np.nan
        out["max_tail"][assets] = np.maximum(cd.share_below, cd.share_above).max(axis=-1)[pair]
    return out


def _pair_loss_states(inputs, cd, dss):
    """Per pair of a class: rates [1/yr], mean loss ratios and CoVs [-] for the loss kernels.

    The damage-state rates of the stage with the class's consequence model, or for a
    vulnerability class the bins of its integral, recomputed from the pairs' curves (cheap;
    they are not kept in the stage's product or cache).
    """
    if dss.has_damage_states:
        return cd.ds_rates, dss.mean_damage_ratio, dss.cov
    levels, rates = curves_for_im(inputs.hazard, dss.im)
    return dss.loss_states(levels[cd.sites], rates[cd.sites], tail=inputs.config.fragility.tail)


def _net_loss(rate, mdr, cov, value, deductible, limit, workers, min_rows=65536):
    """:func:`quakefolio.core.loss.expected_annual_net_loss` of many assets, in ``workers`` threads.

    ``mdr`` and ``cov`` are the class's (one row) or one row per asset.  Each asset's value
    depends on its own row only, so cutting the rows into parts gives the same numbers; the
    incomplete-beta evaluations run outside the GIL.
    """
    parts = min(max(1, int(workers)), max(1, len(rate) // min_rows))
    if parts == 1:
        return expected_annual_net_loss(rate, mdr, cov, value, deductible, limit)

    def rows(a, lo, hi):
        return a if a.ndim == 1 else a[lo:hi]
    bounds = np.linspace(0, len(rate), parts + 1).astype(np.int64)
    with ThreadPoolExecutor(max_workers=parts, thread_name_prefix="quakefolio-net-loss") as pool:
        pieces = pool.map(lambda lo, hi: expected_annual_net_loss(rate[lo:hi], rows(mdr, lo, hi), rows(cov, lo, hi),
                                                                  value[lo:hi], deductible[lo:hi], limit[lo:hi]),
                          bounds[:-1], bounds[1:])
        return np.concatenate(list(pieces))


@dataclass(frozen=True)
class DamageRows:
    """Builds rows of ``asset_damage`` (one per asset and damage state, exposure order) for any assets.

    Every value is gathered by index from per-pair arrays: rates, their return periods and
    probabilities in the horizon are computed once per (pair, state), by the same
    elementwise functions on the same numbers as per row.
    """

    asset_id: pa.Array
    site_id: pa.Array
    class_code: pa.Array
    class_im: pa.Array
    state_names: pa.Array
    interpolated: np.ndarray  # per class
    n_states: np.ndarray  # per class
    name_base: np.ndarray  # per class: first state name in state_names
    pair_base: np.ndarray  # per class: first (pair, state) value in the flat arrays
    cls: np.ndarray  # per asset: class position
    pair: np.ndarray  # per asset: pair row within its class
    site_index: np.ndarray  # per asset
    values: dict  # flat per (pair, state): rate, return period, probability, tail shares
    horizon: float

    def __call__(self, assets):
        """The rows of ``assets`` (increasing asset indices) as an Arrow table."""
        n_ds = self.n_states[self.cls[assets]]
        row_start = np.concatenate(([0], np.cumsum(n_ds)))
        asset = np.repeat(assets, n_ds)
        state = np.arange(row_start[-1]) - np.repeat(row_start[:-1], n_ds)
        row_class = self.cls[asset]
        flat = self.pair_base[row_class] + self.pair[asset] * self.n_states[row_class] + state
        v = self.values
        return pa.table({
            "asset_id": take_text(self.asset_id, asset),
            "building_class": take_text(self.class_code, row_class),
            "site_id": take_text(self.site_id, self.site_index[asset]),
            "im": take_text(self.class_im, row_class),
            "hazard_im_interpolated": self.interpolated[row_class],
            "damage_state": take_text(self.state_names, self.name_base[row_class] + state),
            "damage_state_index": (state + 1).astype(np.int32),
            "annual_rate_exceed": v["rate"][flat],
            "return_period_yr": v["return_period"][flat],
            "prob_exceed_in_horizon": v["prob"][flat],
            "horizon_yr": np.full(len(flat), self.horizon),
            "tail_share_below": v["below"][flat],
            "tail_share_above": v["above"][flat],
        })


@dataclass(frozen=True)
class LossCurveRows:
    """Builds rows of the wide ``asset_loss_curve`` (one per asset, one column per loss ratio) for any assets."""

    asset_id: pa.Array
    value: np.ndarray  # per asset [currency]
    row: np.ndarray  # per asset: row of its pair in ``curves``
    curves: np.ndarray  # (pairs of every class, n_ratios) [1/yr]
    columns: tuple

    def __call__(self, assets):
        """The rows of ``assets`` (increasing asset indices) as an Arrow table."""
        curve = self.curves[self.row[assets]]
        out = {"asset_id": take_text(self.asset_id, assets), "replacement_value": self.value[assets]}
        out.update({name: np.ascontiguousarray(curve[:, j]) for j, name in enumerate(self.columns)})
        return pa.table(out)


def _damage_rows(inputs, classes, codes, cls, pair, ids):
    """The :class:`DamageRows` of the run."""
    sets = [inputs.library[c] for c in codes]
    n_states = np.array([d.n_states for d in sets], dtype=np.int64)
    rates = np.concatenate([classes[c].ds_rates.ravel() for c in codes])
    # a vulnerability class has no damage states: no rows (its per-pair tail shares are left out)
    shares = {k: np.concatenate([getattr(classes[c], f"share_{k}").ravel() for c, d in zip(codes, sets)
                                 if d.has_damage_states] + [np.zeros(0)]) for k in ("below", "above")}
    values = {"rate": rates, "return_period": return_period(rates),
              "prob": prob_in_years(rates, inputs.config.scenario.horizon_yr), **shares}
    return DamageRows(
        asset_id=ids, site_id=text_array(inputs.hazard.site_id), class_code=text_array(codes),
        class_im=text_array([d.im for d in sets]), state_names=text_array([n for d in sets for n in d.names]),
        interpolated=np.array([d.im in inputs.hazard.interpolated for d in sets], dtype=bool), n_states=n_states,
        name_base=np.concatenate(([0], np.cumsum(n_states)))[:-1],
        pair_base=np.concatenate(([0], np.cumsum([classes[c].ds_rates.size for c in codes])))[:-1],
        cls=cls, pair=pair, site_index=np.asarray(inputs.site_index, dtype=np.int64), values=values,
        horizon=inputs.config.scenario.horizon_yr)


def _prob_or_nan(rate, years):
    """:func:`quakefolio.core.curves.prob_in_years`, NaN kept (no figure: a vulnerability class's collapse)."""
    return np.where(np.isnan(rate), np.nan, prob_in_years(np.nan_to_num(rate, nan=0.0), years))


def loss_curve_columns(ratios):
    """Column names of the wide ``asset_loss_curve`` table, one per loss ratio.

    ``annual_rate_exceed_lr_<ratio>``, the ratio written as the shortest decimal that
    reads back as the same number (``0.001``, ``0.5``, ``1``): distinct ratios give distinct
    names.

    Parameters
    ----------
    ratios : sequence of float
        ``[output] loss_curve_ratios`` [-].

    Returns
    -------
    list of str
    """
    return [f"annual_rate_exceed_lr_{np.format_float_positional(float(r), trim='-')}" for r in ratios]


def build_tables(inputs, classes):
    """Broadcast per-pair results to assets and build the asset tables (Arrow, by index).

    Parameters
    ----------
    inputs : RunInputs
    classes : dict code -> ClassDamage

    Returns
    -------
    (dict, list)
        ``asset_loss`` (an Arrow table), ``asset_damage`` and ``asset_loss_curve`` (wide:
        one row per asset, one column per loss ratio) as
        :class:`~quakefolio.pipeline.io.chunked.ChunkedTable` (built per chunk of assets
        when written); warning lines.
    """
    ex = inputs.exposure
    cfg = inputs.config
    horizon = cfg.scenario.horizon_yr
    codes = sorted(classes)
    cls = index_of(ex.building_class, codes)
    per = _asset_pairs(inputs, classes, codes, cls)
    ids = text_array(ex.asset_id)
    value = ex.replacement_value.to_numpy()
    n = len(ex)
    asset_loss = pa.table({
        "asset_id": ids,
        "building_class": take_text(text_array(codes), cls),
        "site_id": take_text(text_array(inputs.hazard.site_id), inputs.site_index),
        "site_distance_km": np.asarray(inputs.site_distance_km, dtype=float),
        "replacement_value": value,
        "eal": per["eal_ratio"] * value,
        "eal_net": per["eal_net"],
        "eal_ratio": per["eal_ratio"],
        "annual_collapse_rate": per["collapse_rate"],
        "collapse_prob_in_horizon": _prob_or_nan(per["collapse_rate"], horizon),
        "horizon_yr": np.full(n, horizon),
        "max_tail_share": per["max_tail"],
    })
    damage = _damage_rows(inputs, classes, codes, cls, per["pair"], ids)
    row_base = np.concatenate(([0], np.cumsum([len(classes[c].sites) for c in codes])))[:-1]
    curve = LossCurveRows(ids, value, row_base[cls] + per["pair"],
                          np.concatenate([classes[c].loss_curve for c in codes]),
                          tuple(loss_curve_columns(cfg.output.loss_curve_ratios)))
    threshold = cfg.fragility.tail_share_warning
    n_tail = int((per["max_tail"] > threshold).sum())
    warnings = []
    if n_tail:
        warnings.append(
            f"{n_tail} assets draw more than {threshold:.0%} of a damage-state rate from beyond the tabulated "
            f"hazard range (tail policy '{cfg.fragility.tail}'; see tail_share_* in asset_damage"
            + ("; for a class given by a vulnerability table: of its EAL, max_tail_share in asset_loss)"
               if any(not inputs.library[c].has_damage_states for c in codes) else ")"))
    return {"asset_damage": ChunkedTable(n, damage, int(damage.n_states[cls].sum()), ids),
            "asset_loss": asset_loss, "asset_loss_curve": ChunkedTable(n, curve, n, ids)}, warnings


#: The damage states of a vulnerability class in the fractile rows: none.
_NO_STATES = SimpleNamespace(names=(), n_states=0)


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
        if not dss.has_damage_states:
            dss = _NO_STATES
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
