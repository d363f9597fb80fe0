"""Cause attribution per asset and the assembled comparison of two runs (:func:`compare_runs`)."""
from __future__ import annotations

import numpy as np
import pandas as pd

from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.compare.diff import (
    CAUSES, HAZARD_RTOL, RESULT_RTOL, _asset_frame, _damage_frame, _differs, _event_settings, _hazard_changes,
    _ims_used, _input_changed, _portfolio_rows, _relative, _settings_changes, _strings, load_run,
)

__all__ = ["compare_runs"]


def _fragility_changed_classes(run_a, run_b):
    """Classes whose fragility changed, and the classes known to both runs."""
    da, db = run_a.manifest.get("fragility_classes"), run_b.manifest.get("fragility_classes")
    if isinstance(da, dict) and isinstance(db, dict):
        both = set(da) & set(db)
        return {c for c in both if da[c] != db[c]}, both, "class digests"
    # older manifests without digests: the library file as a whole
    classes = set(run_a.table("asset_loss").building_class) | set(run_b.table("asset_loss").building_class)
    return (classes if _input_changed(run_a, run_b, "fragility_library") else set()), classes, "library sha256"


def _attribute(m, dmg_changed, ims, hazard_changed, tab_a, tab_b, frag_changed, frag_known, exposure_file_changed,
               asset_settings):
    """Cause flags, ordered causes and primary cause per asset (rows of ``m``)."""
    kept = (m.status == "kept").to_numpy()
    n = len(m)
    site_moved = kept & (m.site_id_a.astype(object) != m.site_id_b.astype(object)).to_numpy()
    dist_moved = kept & _differs(m.site_distance_km_a, m.site_distance_km_b, RESULT_RTOL)
    value_changed = kept & _differs(m.replacement_value_a, m.replacement_value_b, HAZARD_RTOL)
    class_changed = kept & (m.building_class_a.astype(object) != m.building_class_b.astype(object)).to_numpy()

    # hazard at the asset's site for the class's IM, one look-up per unique (site, IM) combination
    im_a = m.asset_id.map(ims["a"])
    im_b = m.asset_id.map(ims["b"])
    combos = pd.DataFrame({"site_a": m.site_id_a, "im_a": im_a, "site_b": m.site_id_b, "im_b": im_b})[kept]

    def curve_changed(site, im, tabulated):
        return any((site, used) in hazard_changed for used in _ims_used(im, tabulated))

    curves = np.zeros(n, dtype=bool)
    for key, rows in combos.groupby(["site_a", "im_a", "site_b", "im_b"], sort=False, dropna=False).groups.items():
        site_a, ia, site_b, ib = key
        curves[m.index.get_indexer(rows)] = curve_changed(site_b, ib, tab_b) or (
            ia != ib and curve_changed(site_a, ia, tab_a))
    cause_hazard = curves | site_moved | (dist_moved & ~exposure_file_changed)

    cause_fragility = kept & m.building_class_b.isin(frag_changed & frag_known).to_numpy()

    cause_exposure = ~kept | value_changed | class_changed | (exposure_file_changed & (site_moved | dist_moved))
    cause_settings = kept & bool(asset_settings)

    def num(col):
        return m[col].to_numpy(float)

    va, vb, ra, rb = num("replacement_value_a"), num("replacement_value_b"), num("eal_ratio_a"), num("eal_ratio_b")
    from_value = np.where(kept, (vb - va) * ra, np.nan)
    from_ratio = np.where(kept, vb * (rb - ra), np.nan)

    results_changed = (~kept | m.asset_id.isin(dmg_changed).to_numpy()
                       | _differs(m.eal_a, m.eal_b, RESULT_RTOL)
                       | _differs(m.collapse_prob_in_horizon_a, m.collapse_prob_in_horizon_b, RESULT_RTOL)
                       | _differs(m.annual_collapse_rate_a, m.annual_collapse_rate_b, RESULT_RTOL))

    flags = {"hazard": cause_hazard, "fragility": cause_fragility, "exposure": cause_exposure,
             "settings": cause_settings}
    value_leads = value_changed & (np.abs(from_value) >= np.abs(from_ratio))
    # the ordered causes depend only on the flags, on which part leads and on whether results moved
    code = (sum(flags[c].astype(np.int64) << i for i, c in enumerate(CAUSES))
            + (value_leads.astype(np.int64) << len(CAUSES)) + (results_changed.astype(np.int64) << (len(CAUSES) + 1)))
    causes = np.empty(n, dtype=object)
    primary = np.empty(n, dtype=object)
    for c in np.unique(code):
        listed = [name for i, name in enumerate(CAUSES) if c >> i & 1]
        if c >> len(CAUSES) & 1:
            listed.remove("exposure")
            listed.insert(0, "exposure")
        rows = code == c
        causes[rows] = ",".join(listed)
        if listed:
            primary[rows] = listed[0]
        else:
            primary[rows] = "unexplained" if c >> (len(CAUSES) + 1) & 1 else "unchanged"
    return {
        "results_changed": results_changed,
        "cause_hazard": cause_hazard, "cause_fragility": cause_fragility, "cause_exposure": cause_exposure,
        "cause_settings": cause_settings,
        "causes": causes, "primary_cause": primary,
        "eal_change_from_value": from_value, "eal_change_from_ratio": from_ratio,
    }


def _assets_table(m, attribution):
    def num(col):
        return m[col].to_numpy(float)

    out = pd.DataFrame({"asset_id": _strings(m.asset_id), "status": _strings(m.status)})
    for col in ("building_class", "site_id"):
        out[f"{col}_a"], out[f"{col}_b"] = _strings(m[f"{col}_a"]), _strings(m[f"{col}_b"])
    for col in ("site_distance_km", "replacement_value"):
        out[f"{col}_a"], out[f"{col}_b"] = num(f"{col}_a"), num(f"{col}_b")
    ea, eb = num("eal_a"), num("eal_b")
    out["eal_a"], out["eal_b"] = ea, eb
    # an added asset goes from no loss to its EAL, a removed one from its EAL to none
    out["eal_change"] = np.nan_to_num(eb, nan=0.0) - np.nan_to_num(ea, nan=0.0)
    out["eal_relative_change"] = _relative(ea, eb)
    out["eal_change_from_value"] = attribution["eal_change_from_value"]
    out["eal_change_from_ratio"] = attribution["eal_change_from_ratio"]
    for col in ("annual_collapse_rate", "collapse_prob_in_horizon"):
        a, b = num(f"{col}_a"), num(f"{col}_b")
        out[f"{col}_a"], out[f"{col}_b"], out[f"{col}_change"] = a, b, b - a
    out["horizon_yr_a"], out["horizon_yr_b"] = num("horizon_yr_a"), num("horizon_yr_b")
    for key in ("results_changed", "cause_hazard", "cause_fragility", "cause_exposure", "cause_settings"):
        out[key] = np.asarray(attribution[key], dtype=bool)
    out["causes"] = attribution["causes"]
    out["primary_cause"] = attribution["primary_cause"]
    return out


def _run_notes(a, b):
    """Notes on runs of different scenarios or currencies."""
    notes = []
    if a.scenario != b.scenario:
        notes.append(f"runs are of different scenarios ({a.scenario!r} vs {b.scenario!r})")
    if a.currency != b.currency:
        notes.append(f"currencies differ ({a.currency} vs {b.currency}): money columns are not comparable")
    return notes


def _portfolio_notes(m):
    """Notes on portfolios that share no asset or differ by added and removed assets."""
    if not (m.status == "kept").any():
        return ["the runs share no asset: different portfolios, every asset is added or removed"]
    if (m.status != "kept").any():
        return [f"portfolios differ: {int((m.status == 'added').sum())} assets added, "
                f"{int((m.status == 'removed').sum())} removed"]
    return []


def _inputs_status(a, b):
    """Per input role: added, removed, same or changed (by sha256), with both paths and digests."""
    ia, ib = a.manifest.get("inputs") or {}, b.manifest.get("inputs") or {}
    inputs = {}
    for role in sorted(set(ia) | set(ib)):
        ra, rb = ia.get(role) or {}, ib.get(role) or {}
        status = ("added" if not ra else "removed" if not rb
                  else "same" if ra.get("sha256") == rb.get("sha256") else "changed")
        inputs[role] = {"status": status, "sha256_a": ra.get("sha256"), "sha256_b": rb.get("sha256"),
                        "path_a": ra.get("path"), "path_b": rb.get("path")}
    return inputs


def _packages_changed(a, b, notes):
    """Package versions that differ between the manifests; a note when quakefolio's does."""
    pa_, pb_ = a.manifest.get("packages") or {}, b.manifest.get("packages") or {}
    packages = {k: {"a": pa_.get(k), "b": pb_.get(k)} for k in sorted(set(pa_) | set(pb_)) if pa_.get(k) != pb_.get(k)}
    if "quakefolio" in packages:
        notes.append(f"quakefolio version differs ({packages['quakefolio']['a']} -> {packages['quakefolio']['b']}): "
                     "changes without an input cause may come from the code")
    return packages


def _event_based(a, b, notes):
    """Seeds and simulated years of both runs' event-based stages; a note when they share a seed."""
    ev_a, ev_b = _event_settings(a), _event_settings(b)
    if ev_a["present"] and ev_b["present"] and ev_a["seed"] is not None and ev_a["seed"] == ev_b["seed"]:
        notes.append("both simulations use seed "
                     f"{ev_a['seed']}: they share random draws, so the combined standard error overstates the "
                     "sampling noise of the AAL change")
    return {"in_a": ev_a["present"], "in_b": ev_b["present"],
            "seed_a": ev_a["seed"], "seed_b": ev_b["seed"], "seed_changed": ev_a["seed"] != ev_b["seed"],
            "years_a": ev_a["years"], "years_b": ev_b["years"], "years_changed": ev_a["years"] != ev_b["years"]}


def _asset_counts(assets):
    """Asset counts by status, by primary cause and by flagged cause, and the EAL change per primary cause."""
    by_cause = assets.groupby("primary_cause", sort=True)
    return {
        "in_a": int((assets.status != "added").sum()), "in_b": int((assets.status != "removed").sum()),
        "added": int((assets.status == "added").sum()), "removed": int((assets.status == "removed").sum()),
        "kept": int((assets.status == "kept").sum()), "results_changed": int(assets.results_changed.sum()),
        "by_primary_cause": {k: int(v) for k, v in by_cause.size().items()},
        "eal_change_by_primary_cause": {k: float(v) for k, v in by_cause.eal_change.sum().items()},
        "flagged": {c: int(assets[f"cause_{c}"].sum()) for c in CAUSES},
    }


def compare_runs(run_a, run_b):
    """Compare two finished runs; read only.

    Parameters
    ----------
    run_a, run_b : path-like or RunFolder
        Run folders, or output folders standing for their ``LATEST`` run; a
        :class:`~quakefolio.pipeline.io.store.RunFolder` is read as it is.

    Returns
    -------
    dict
        ``change_assets``, ``change_asset_damage``, ``change_portfolio`` (DataFrames, long
        form, described in the module docstring and in :mod:`quakefolio.pipeline.io.tables`)
        and ``change_causes`` (a JSON-ready dict: the run-level cause summary).

    Raises
    ------
    InputError
        When an argument is not a finished run with asset results, or a table is missing.
    """
    a, b = load_run(run_a), load_run(run_b)
    notes = _run_notes(a, b)
    m = _asset_frame(a, b)
    damage, ims, dmg_changed = _damage_frame(a, b, m.asset_id.to_numpy())
    notes += _portfolio_notes(m)

    hazard_changed, tab_a, tab_b, hazard_summary = _hazard_changes(a, b)
    frag_changed, frag_known, frag_basis = _fragility_changed_classes(a, b)
    exposure_file_changed = _input_changed(a, b, "exposure")
    settings = _settings_changes(a, b)
    asset_settings = [s for s in settings if s["scope"] == "assets"]
    attribution = _attribute(m, dmg_changed, ims, hazard_changed, tab_a, tab_b, frag_changed, frag_known,
                             exposure_file_changed, asset_settings)
    assets = _assets_table(m, attribution)
    portfolio = _portfolio_rows(a, b, assets, notes)

    inputs = _inputs_status(a, b)
    packages = _packages_changed(a, b, notes)
    event_based = _event_based(a, b, notes)
    used_sites = set(assets.site_id_b.dropna()) | set(assets.site_id_a.dropna())
    da, dbg = a.manifest.get("fragility_classes") or {}, b.manifest.get("fragility_classes") or {}
    eal_total = portfolio[portfolio.metric == "eal"].iloc[0]
    causes = {
        "caution": CAUTION,
        "run_a": _run_info(a), "run_b": _run_info(b),
        "same_scenario": a.scenario == b.scenario,
        "notes": notes,
        "inputs": inputs,
        "inputs_changed": [r for r, v in inputs.items() if v["status"] != "same"],
        "fragility": {"basis": frag_basis, "classes_changed": sorted(frag_changed),
                      "classes_added": sorted(set(dbg) - set(da)), "classes_removed": sorted(set(da) - set(dbg))},
        "hazard": dict(hazard_summary, sites_changed_used_by_assets=len(set(hazard_summary["sites_changed"])
                                                                          & used_sites)),
        "settings_changed": settings,
        "event_based": event_based,
        "packages_changed": packages,
        "assets": _asset_counts(assets),
        "portfolio_eal": {"a": float(eal_total.value_a), "b": float(eal_total.value_b),
                          "change": float(eal_total.change), "relative_change": float(eal_total.relative_change)},
        "tolerances": {"hazard_rtol": HAZARD_RTOL, "result_rtol": RESULT_RTOL},
    }
    return {"change_assets": assets, "change_asset_damage": damage, "change_portfolio": portfolio,
            "change_causes": _jsonable(causes)}


def _run_info(run):
    return {"run_id": run.run_id, "path": str(run.path), "given": str(run.given), "scenario": run.scenario,
            "created_utc": run.manifest.get("created_utc"), "inputs_sha256": run.manifest.get("inputs_sha256"),
            "currency": run.currency}


def _jsonable(obj):
    """Plain JSON types (NaN as null)."""
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return None if not np.isfinite(obj) else float(obj)
    return obj
