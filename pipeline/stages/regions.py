"""Tectonic regions of the compute-mode hazard: branches per region, their checks and the site inputs.

Each source of a source-model file carries a tectonic region (``region``, default
``active_crustal``; :mod:`quakefolio.pipeline.io.source_model`).  The active-crustal
ruptures are evaluated with ``[hazard] gmm_branches``, the others with their region's
``[hazard] region_gmm_branches`` (:mod:`quakefolio.pipeline.io.gmm_regions`); the
combination rule is :func:`quakefolio.core.hazard.compute_site_hazard`.

Site inputs of the models (per hazard site, from the exposure's optional columns):
``z1p0_km`` and ``z2p5_km`` (basin depths [km], passed to the models with a basin term;
where not given each model uses its own Vs30 relation) and ``backarc`` (1 for a site in
the backarc of a subduction zone; where not given, ``[hazard] site_backarc``).  A site's
value is the mean of its assets' given values (NaN where none gives one; for
``backarc``, 1 when any of its assets says so).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from quakefolio.core.errors import InputError, locate_toml_line
from quakefolio.core.gmm import get_gmm
from quakefolio.pipeline.io.gmm_regions import missing_regions

__all__ = ["region_model_branches", "check_source_regions", "site_inputs", "event_region_models", "site_input_record",
           "combination_record", "SITE_INPUT_COLUMNS"]

#: Optional exposure columns that become per-site ground-motion inputs.
SITE_INPUT_COLUMNS = ("z1p0_km", "z2p5_km", "backarc")


def region_model_branches(hazard_settings):
    """The ground-motion branches of the regions other than active crustal.

    Parameters
    ----------
    hazard_settings : quakefolio.pipeline.io.config.HazardSettings

    Returns
    -------
    dict of str to tuple of (id, weight, model)
    """
    return {region: tuple((b["id"], b["weight"], get_gmm(b["model"])) for b in rows)
            for region, rows in (hazard_settings.region_gmm_branches or {}).items()}


def _error(config, message, section, key):
    text = Path(config.path).read_text(encoding="utf-8-sig")
    return InputError(config.path, message, row=locate_toml_line(text, (section,), key), column=f"{section}.{key}")


def check_source_regions(config, sources):
    """Every source region has branches, and with the event-based portfolio models with tau and phi.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config
    sources : sequence of (id, weight, SourceModel)

    Returns
    -------
    tuple of str
        Regions of the sources, in :data:`quakefolio.core.gmm.TECTONIC_REGIONS` order.

    Raises
    ------
    InputError
        Naming the config key: a region without ``region_gmm_branches``; with the
        event-based portfolio, a region model that gives only a total sigma.
    """
    from quakefolio.core.gmm import TECTONIC_REGIONS

    present = set()
    for bid, _, src in sources:
        regions = src.ruptures.regions
        present.update(regions)
        missing = missing_regions(regions, config.hazard.region_gmm_branches)
        if missing:
            raise _error(config, f"source model {bid!r} has {missing[0]} sources but region_gmm_branches gives "
                                 f"no ground-motion branches for {missing[0]}", "hazard", "source_models")
    if config.portfolio.event_based:
        for region in sorted(present - {"active_crustal"}):
            for b in config.hazard.region_gmm_branches[region]:
                if not get_gmm(b["model"]).has_tau_phi:
                    raise _error(config, f"{region} model {b['model']} gives only a total sigma; the event-based "
                                         "portfolio needs its between- and within-event parts (tau, phi)",
                                 "hazard", "region_gmm_branches")
    return tuple(r for r in TECTONIC_REGIONS if r in present)


def site_inputs(exposure, site_index, n_sites, default_backarc):
    """Per-site ground-motion inputs from the exposure's optional columns.

    Parameters
    ----------
    exposure : pandas.DataFrame
        Validated exposure (columns of :data:`SITE_INPUT_COLUMNS`, NaN where not given).
    site_index : ndarray of int, shape (n_assets,)
        Site of every asset.
    n_sites : int
    default_backarc : bool
        ``[hazard] site_backarc``.

    Returns
    -------
    dict of str to ndarray, shape (n_sites,)
        ``backarc`` (0 or 1) always; ``z1p0_km`` and ``z2p5_km`` [km] only where some
        asset gives one (NaN at sites without a value: the model's own Vs30 relation).
    """
    idx = np.asarray(site_index)
    out = {}
    for col in ("z1p0_km", "z2p5_km"):
        values = exposure[col].to_numpy(dtype=float) if col in exposure.columns else np.full(len(idx), np.nan)
        given = np.isfinite(values)
        if given.any():
            total = np.bincount(idx[given], weights=values[given], minlength=n_sites)
            count = np.bincount(idx[given], minlength=n_sites)
            with np.errstate(invalid="ignore", divide="ignore"):
                out[col] = np.where(count > 0, total / np.maximum(count, 1), np.nan)
    flag = exposure["backarc"].to_numpy(dtype=float) if "backarc" in exposure.columns else np.full(len(idx), np.nan)
    flag = np.where(np.isfinite(flag), flag, 1.0 if default_backarc else 0.0)
    out["backarc"] = (np.bincount(idx, weights=flag, minlength=n_sites) > 0).astype(float)
    return out


def event_region_models(model, ruptures, gmm_of_event, event_rupture, seed):
    """Ground-motion model of every event, the other regions' events drawing from their region's branches.

    Events of active-crustal ruptures keep their model (``gmm_of_event``, an index into
    ``model.gmm_branches``); an event of another region's rupture takes one of its
    region's models, drawn by branch weight from the uniform number of the event in the
    stream :data:`~quakefolio.core.events.eventset.STREAM_REGION_GMM_CHOICE` (one draw per
    event of the whole set, so independent of chunking).  Over many events each region's
    models enter with their weights: the event set's mean hazard is the classical mean
    (:func:`quakefolio.core.hazard.compute_site_hazard`, regions are independent parts of
    the sum).

    Parameters
    ----------
    model : quakefolio.pipeline.stages.hazard.HazardModel
    ruptures : quakefolio.core.sources.ruptures.RuptureSet
        The event set's ruptures.
    gmm_of_event : ndarray of int, shape (n_events,)
    event_rupture : ndarray of int, shape (n_events,)
        Rupture of each event (index into ``ruptures``).
    seed : int

    Returns
    -------
    gmm_of_event : ndarray of int64, shape (n_events,)
        Index into ``models``.
    models : list of ground-motion models
        The active-crustal branches' models, then each other region's distinct models.
    ids : list of str
        Their ids (branch ids; a region model by its name).
    """
    from quakefolio.core.events.eventset import STREAM_REGION_GMM_CHOICE, stream_rng
    from quakefolio.core.gmm import TECTONIC_REGIONS

    models = [g for _, _, g in model.gmm_branches]
    ids = [i for i, _, _ in model.gmm_branches]
    code = ruptures.region_code[np.asarray(event_rupture, dtype=np.int64)]
    if not code.any():
        return np.asarray(gmm_of_event, dtype=np.int64), models, ids
    out = np.array(gmm_of_event, dtype=np.int64)
    u = stream_rng(seed, STREAM_REGION_GMM_CHOICE).random(len(out))
    for c in np.unique(code[code > 0]):
        rows = model.region_branches[TECTONIC_REGIONS[c]]
        index = []
        for _, _, g in rows:
            if g.name not in ids[len(model.gmm_branches):]:
                models.append(g)
                ids.append(g.name)
            index.append(len(model.gmm_branches) + ids[len(model.gmm_branches):].index(g.name))
        cum = np.cumsum([w for _, w, _ in rows])
        ev = np.flatnonzero(code == c)
        pick = np.minimum(np.searchsorted(cum / cum[-1], u[ev], side="right"), len(rows) - 1)
        out[ev] = np.asarray(index, dtype=np.int64)[pick]
    return out, models, ids


def site_input_record(model):
    """What the run's models took as site inputs, for the run's manifest.

    Parameters
    ----------
    model : quakefolio.pipeline.stages.hazard.HazardModel

    Returns
    -------
    dict
        ``vs30_rule`` (the stated rule, :func:`quakefolio.core.pairs.model_input`),
        ``vs30_clamped_sites`` (per model, the hazard sites whose Vs30 it takes clamped),
        ``basin_depth_sites`` (per column, the sites with a given depth, of ``hazard_sites``),
        ``basin_depth_rules`` (per model with a basin term: the depth it takes and its rule
        where a site gives none; the others have no basin term) and ``backarc_sites``.
    """
    every = list(model.gmm_branches) + [b for rows in model.region_branches.values() for b in rows]
    vs30 = np.asarray(model.site_vs30, dtype=float)
    clamped, rules = {}, {}
    for gid, _, gmm in every:
        span = gmm.applicability.get("vs30_mps")
        clamped[gid] = 0 if span is None else int(((vs30 < span[0]) | (vs30 > span[1])).sum())
        rules[gid] = "no basin term" if gmm.basin_input is None else f"{gmm.basin_input[0]}; {gmm.basin_input[1]}"
    given = {col: int(np.isfinite(model.site_fields[col]).sum()) if col in model.site_fields else 0
             for col in ("z1p0_km", "z2p5_km")}
    backarc = model.site_fields.get("backarc")
    return {"vs30_rule": "each ground-motion model takes Vs30 clamped to its range of applicability",
            "vs30_clamped_sites": clamped, "basin_depth_sites": given, "basin_depth_rules": rules,
            "hazard_sites": int(vs30.size), "backarc_sites": 0 if backarc is None else int(np.sum(backarc))}


def combination_record(model, config):
    """Which end branches the hazard fractiles (and ``propagate_branches``) were taken over, for the manifest.

    Parameters
    ----------
    model : quakefolio.pipeline.stages.hazard.HazardModel
        With ``combinations`` (:func:`quakefolio.core.combinations.tree_combinations`).
    config : quakefolio.pipeline.io.config.Config

    Returns
    -------
    dict
        ``rule`` (in words), ``combinations`` (of the whole tree), ``used`` (those the
        fractiles were taken over), ``sampled``, ``max`` (``[hazard]
        fractile_combinations_max``), ``seed`` (of the sample, or None),
        ``propagate_branches`` (whether the damage and loss fractiles were taken over the
        same set) and ``event_stage`` (what the event stage's branch combinations are).
    """
    combos = model.combinations
    return {"rule": "every combination of one source-model branch and one ground-motion model per tectonic region "
                    "with ruptures in that branch, weight the product of the branch weights; above max, a seeded "
                    "sample drawn by weight, weighted equally",
            "combinations": int(combos.total), "used": len(combos), "sampled": bool(combos.sampled),
            "max": int(config.hazard.fractile_combinations_max),
            "seed": int(config.portfolio.seed) if combos.sampled else None,
            "propagate_branches": bool(config.hazard.propagate_branches),
            "event_stage": "source-model branch x active-crustal model per simulated year; other regions' models "
                           "drawn per event by weight"}
