"""Change report between two finished runs: what moved, and which input moved it.

After a hazard, fragility or exposure update the engineer reruns the portfolio and has to
explain every difference.  :func:`compare_runs` reads two run folders (never writing to
them) and returns

``change_assets``
    one row per asset of the union of both runs: status (``added``, ``removed``,
    ``kept``), class, site and value in each run, EAL and collapse probability in the
    horizon in A and B with their changes, the exact split of the EAL change into a
    value part and a loss-ratio part, the cause flags and the primary cause;
``change_asset_damage``
    one row per asset and damage state (long form): annual exceedance rate and
    probability in the horizon in A and B with absolute and relative changes;
``change_portfolio``
    portfolio totals (asset count, value, classical EAL) and, when both runs carry the
    event-based tables, AAL with its standard errors and PML (AEP and OEP) and TVaR per
    return period and basis;
``change_causes``
    a JSON-ready dict: which input files changed (by role, from the manifests' sha256),
    which building classes' fragility changed, at how many hazard sites the curves
    changed, which settings changed, seed and years, counts per primary cause.

:func:`write_change_report` writes them to
``<output folder of RUN_B>/comparisons/<run_a_id>__<run_b_id>/`` (or under another
folder), atomically.

Run arguments
-------------
``run_a`` and ``run_b`` are a run folder (``<output>/runs/<run_id>``, the one holding
``manifest.json``) or an output folder, which stands for the run its ``LATEST`` pointer
names.  Runs of different scenarios or portfolios can be compared; the report says so.

Cause attribution (per asset)
-----------------------------
``cause_hazard``
    the hazard curves at the asset's site for its class's IM differ (same site id; the
    curve's ``(im_level, annual_rate)`` points equal within a relative
    :data:`HAZARD_RTOL`; for an IM interpolated across periods, the two neighbouring
    tabulated periods are compared), or the asset is assigned to another site, or its
    distance to the site changed while the exposure file did not (the site moved).
``cause_fragility``
    the parameter digest of the asset's building class differs between the manifests
    (``fragility_classes``); without digests in a manifest, the library file's sha256.
``cause_exposure``
    the asset was added or removed, or its replacement value, building class, site
    assignment or site distance differ (the last two only when the exposure file itself
    changed).
``cause_settings``
    a resolved config setting that acts on per-asset results differs (file paths,
    execution, labels and settings of other tables excluded; see :data:`SETTING_SCOPES`).

``causes`` lists the flagged causes in order and ``primary_cause`` is its first entry.
The order: when the exposure flag comes from a changed replacement value and the value
part of the EAL change is at least as large as the loss-ratio part (the split is exact,
``eal_change = eal_change_from_value + eal_change_from_ratio``), ``exposure`` leads; the
rest follow the fixed order hazard, fragility, exposure, settings.  An asset whose
results did not change (relative :data:`RESULT_RTOL`) and that has no cause is
``unchanged``; one whose results changed with no cause found is ``unexplained`` (for
example a different code version; the report lists package versions that differ).  A
flagged cause is named even where the results did not move (``results_changed`` tells).
"""
from __future__ import annotations

import datetime as _dt
import json
import os
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq

from quakefolio.core.errors import InputError
from quakefolio.core.ims import im_period
from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.store import PARTIAL_PREFIX, fsync_path, latest_run, read_manifest, read_table, to_arrow
from quakefolio.pipeline.tables import TABLES, units_for

__all__ = ["compare_runs", "write_change_report", "resolve_run", "change_summary_text", "CAUSES",
           "HAZARD_RTOL", "RESULT_RTOL", "SETTING_SCOPES"]

#: Cause names, in the fixed order used to rank them.
CAUSES = ("hazard", "fragility", "exposure", "settings")

#: Two hazard-curve points are the same when level and rate agree within this relative tolerance.
HAZARD_RTOL = 1e-12

#: A per-asset result counts as changed beyond this relative difference (well above round-off
#: of the same computation done in a different block, far below anything of engineering meaning).
RESULT_RTOL = 1e-10

#: Scope of each config setting for attribution. ``assets``: acts on per-asset damage and loss
#: (a cause); ``event_based``: acts on the event-based portfolio tables only; ``other_tables``:
#: acts on tables not compared per asset (hazard at return periods, disaggregation, loss
#: curves, fractiles); ``none``: file paths (their content is compared through sha256),
#: labels, display and execution (results are identical by design).  A setting not listed
#: counts as ``assets`` (the cautious choice); a whole section is keyed by ``(section, "*")``.
SETTING_SCOPES = {
    ("scenario", "name"): "none",
    ("scenario", "description"): "none",
    ("scenario", "currency"): "none",
    ("hazard", "curves_file"): "none",
    ("hazard", "return_periods_yr"): "other_tables",
    ("hazard", "rate_floor"): "other_tables",
    ("hazard", "max_site_distance_km"): "none",
    ("hazard", "ims"): "other_tables",
    ("hazard", "fractiles"): "other_tables",
    ("hazard", "disaggregation"): "other_tables",
    ("hazard", "propagate_branches"): "other_tables",
    ("exposure", "file"): "none",
    ("fragility", "library"): "none",
    ("fragility", "tail_share_warning"): "none",
    ("output", "*"): "none",
    ("output", "loss_curve_ratios"): "other_tables",
    ("execution", "*"): "none",
    ("portfolio", "*"): "event_based",
    ("screening", "*"): "other_tables",
    ("scenario", "alternatives"): "other_tables",
    ("scenario", "discount_rate"): "other_tables",
    ("scenario", "benefit_horizon_yr"): "other_tables",
}

_EP_METRICS = (("aep_loss", "pml_aep"), ("oep_loss", "pml_oep"), ("tvar_loss", "tvar"))


# --- reading runs --------------------------------------------------------------------------------

class _Run:
    """A finished run folder and its manifest (read only)."""

    def __init__(self, path, given):
        self.path = path
        self.given = given
        self.manifest = read_manifest(path)
        self.run_id = self.manifest.get("run_id", path.name)
        self.config = self.manifest.get("config") or {}
        self.output_folder = path.parent.parent

    def table(self, name):
        file = self.path / f"{name}.parquet"
        if not file.exists():
            raise InputError(file, f"missing table: run {self.run_id} has no {name}.parquet")
        try:
            return read_table(self.path, name)
        except (OSError, ValueError) as exc:  # pyarrow's errors derive from these
            raise InputError(file, f"unreadable table ({exc})") from None

    def has(self, name):
        return (self.path / f"{name}.parquet").exists()

    @property
    def currency(self):
        return (self.config.get("scenario") or {}).get("currency", "")

    @property
    def scenario(self):
        return self.manifest.get("scenario", "")

    def hazard_statistic(self):
        hz = self.config.get("hazard") or {}
        return hz.get("statistic", "mean") if hz.get("mode", "ingest") == "ingest" else "mean"


def resolve_run(path):
    """The run folder ``path`` stands for: itself if it holds ``manifest.json``, else the
    run that ``LATEST`` names when ``path`` is an output folder.

    Raises
    ------
    InputError
        When ``path`` does not exist, is an unfinished (partial) run, or is neither a run
        folder nor an output folder with a valid ``LATEST``.
    """
    p = Path(path)
    if not p.exists():
        raise InputError(p, "no such run folder or output folder")
    if not p.is_dir():
        raise InputError(p, "expected a run folder (holding manifest.json) or an output folder (holding LATEST)")
    if p.name.startswith(PARTIAL_PREFIX):
        raise InputError(p, "an unfinished run (partial folder); compare finished runs only")
    if (p / "manifest.json").is_file():
        return p.resolve()
    if (p / "LATEST").is_file():
        run = latest_run(p)
        if run is None:
            named = (p / "LATEST").read_text(encoding="utf-8").strip()
            raise InputError(p / "LATEST", f"names run {named!r}, which is not in {p / 'runs'}")
        if not (run / "manifest.json").is_file():
            raise InputError(run, "missing manifest.json: not a finished run")
        return run.resolve()
    raise InputError(p, "not a run folder (no manifest.json) nor an output folder (no LATEST)")


def _load(path):
    run = _Run(resolve_run(path), path)
    if run.manifest.get("stages") == "hazard" or not run.has("asset_loss"):
        raise InputError(run.path, f"run {run.run_id} has hazard results only; compare needs runs with asset results")
    return run


# --- small helpers ---------------------------------------------------------------------------------

def _differs(a, b, rtol):
    """Elementwise: values differ beyond ``rtol`` (relative), or exactly one is missing."""
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    na, nb = np.isnan(a), np.isnan(b)
    with np.errstate(invalid="ignore"):
        far = np.abs(a - b) > rtol * np.maximum(np.abs(a), np.abs(b))
    return np.where(na | nb, na != nb, far)


def _relative(a, b):
    """(b - a) / a; NaN where a is zero or either side is missing."""
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(a != 0, (b - a) / a, np.nan)


def _strings(series):
    """Object column of str with None where missing (written as Arrow nulls)."""
    out = series.astype(object)
    return out.where(series.notna(), None)


def _flatten(cfg):
    """Resolved config as {(section, key): value}."""
    out = {}
    for sec, body in (cfg or {}).items():
        if isinstance(body, dict):
            for key, value in body.items():
                out[(sec, key)] = value
        else:
            out[(sec, "")] = body
    return out


def _setting_scope(section, key):
    return SETTING_SCOPES.get((section, key), SETTING_SCOPES.get((section, "*"), "assets"))


def _without_paths(section, key, value):
    """Compare source-model branches by id and weight only (their files by sha256)."""
    if (section, key) == ("hazard", "source_models") and isinstance(value, list):
        return [{k: v for k, v in b.items() if k != "file"} if isinstance(b, dict) else b for b in value]
    return value


def _settings_changes(run_a, run_b):
    """Settings that differ, with their scope; a section only one run has is one entry."""
    fa, fb = _flatten(run_a.config), _flatten(run_b.config)
    sections_a, sections_b = set(run_a.config), set(run_b.config)
    rows = []
    for sec in sorted(sections_a ^ sections_b):
        scope = _setting_scope(sec, "*")
        if scope != "none":
            rows.append({"setting": sec, "a": run_a.config.get(sec), "b": run_b.config.get(sec), "scope": scope})
    for sec, key in sorted(set(fa) | set(fb)):
        if sec not in sections_a or sec not in sections_b:
            continue
        scope = _setting_scope(sec, key)
        va = _without_paths(sec, key, fa.get((sec, key)))
        vb = _without_paths(sec, key, fb.get((sec, key)))
        if va != vb and scope != "none":
            rows.append({"setting": f"{sec}.{key}", "a": va, "b": vb, "scope": scope})
    return rows


# --- hazard ----------------------------------------------------------------------------------------

def _curves(run):
    """site_hazard of the statistic that drove the run's damage results, points in level order."""
    sh = run.table("site_hazard")
    stat = run.hazard_statistic()
    if "statistic" in sh.columns and stat in set(sh.statistic):
        sh = sh[sh.statistic == stat]
    sh = sh.sort_values(["site_id", "im", "im_level"], kind="stable")[["site_id", "im", "im_level", "annual_rate"]]
    sh = sh.reset_index(drop=True)
    sh["point"] = sh.groupby(["site_id", "im"], sort=False).cumcount()
    return sh


def _hazard_changes(run_a, run_b):
    """Per (site_id, im): whether the curve differs; and the tabulated IMs of each run."""
    ca, cb = _curves(run_a), _curves(run_b)
    m = ca.merge(cb, on=["site_id", "im", "point"], how="outer", suffixes=("_a", "_b"))
    point_differs = (_differs(m.im_level_a, m.im_level_b, HAZARD_RTOL)
                     | _differs(m.annual_rate_a, m.annual_rate_b, HAZARD_RTOL))
    per_curve = pd.Series(point_differs, index=m.index).groupby([m.site_id, m.im]).any()
    changed = {k for k, v in per_curve.items() if v}
    sites_a, sites_b = set(ca.site_id), set(cb.site_id)
    changed_sites = {s for s, _ in changed}
    summary = {
        "statistic_a": run_a.hazard_statistic(), "statistic_b": run_b.hazard_statistic(),
        "sites_a": len(sites_a), "sites_b": len(sites_b),
        "sites_added": sorted(sites_b - sites_a), "sites_removed": sorted(sites_a - sites_b),
        "sites_changed": sorted(changed_sites & sites_a & sites_b),
        "curves_changed": len(changed),
        "curves_changed_by_im": {im: sum(1 for _, i in changed if i == im) for im in sorted({i for _, i in changed})},
    }
    return changed, set(ca.im), set(cb.im), summary


def _ims_used(im, tabulated):
    """Tabulated IMs a class's IM was read from: itself, or its two neighbouring periods."""
    if im in tabulated:
        return [im]
    try:
        t = im_period(im)
        periods = sorted((im_period(n), n) for n in tabulated)
    except ValueError:
        return sorted(tabulated)
    below = [n for p, n in periods if p < t]
    above = [n for p, n in periods if p > t]
    if below and above:
        return [below[-1], above[0]]
    return sorted(tabulated)


# --- per asset -------------------------------------------------------------------------------------

def _asset_frame(run_a, run_b):
    cols = ["asset_id", "building_class", "site_id", "site_distance_km", "replacement_value", "eal", "eal_ratio",
            "annual_collapse_rate", "collapse_prob_in_horizon", "horizon_yr"]
    la, lb = run_a.table("asset_loss"), run_b.table("asset_loss")
    for run, frame in ((run_a, la), (run_b, lb)):
        missing = [c for c in cols if c not in frame.columns]
        if missing:
            raise InputError(run.path / "asset_loss.parquet", f"missing column(s) {', '.join(missing)}")
    la, lb = la[cols], lb[cols]
    m = la.merge(lb, on="asset_id", how="outer", suffixes=("_a", "_b"), indicator=True)
    # user-facing order: run B's asset order, then assets removed since A in A's order
    order_b = pd.Series(np.arange(len(lb)), index=lb.asset_id.to_numpy())
    order_a = pd.Series(np.arange(len(la)), index=la.asset_id.to_numpy()) + len(lb)
    key = m.asset_id.map(order_b).fillna(m.asset_id.map(order_a)).to_numpy()
    m = m.iloc[np.argsort(key, kind="stable")].reset_index(drop=True)
    m["status"] = m.pop("_merge").map({"both": "kept", "left_only": "removed", "right_only": "added"}).astype(object)
    return m


def _damage_frame(run_a, run_b, asset_order):
    cols = ["asset_id", "im", "damage_state", "damage_state_index", "annual_rate_exceed", "prob_exceed_in_horizon"]
    da, db = run_a.table("asset_damage")[cols], run_b.table("asset_damage")[cols]
    m = da.merge(db, on=["asset_id", "damage_state"], how="outer", suffixes=("_a", "_b"))
    m["damage_state_index"] = m.damage_state_index_b.fillna(m.damage_state_index_a).astype(np.int32)
    pos = pd.Series(np.arange(len(asset_order)), index=asset_order)
    m = m.iloc[np.lexsort((m.damage_state_index.to_numpy(), m.asset_id.map(pos).to_numpy()))].reset_index(drop=True)
    out = pd.DataFrame({"asset_id": m.asset_id, "damage_state": m.damage_state,
                        "damage_state_index": m.damage_state_index})
    for col in ("annual_rate_exceed", "prob_exceed_in_horizon"):
        a, b = m[f"{col}_a"].to_numpy(float), m[f"{col}_b"].to_numpy(float)
        out[f"{col}_a"], out[f"{col}_b"], out[f"{col}_change"] = a, b, b - a
        out[f"{col}_relative_change"] = _relative(a, b)
    ims = {"a": da.drop_duplicates("asset_id").set_index("asset_id").im,
           "b": db.drop_duplicates("asset_id").set_index("asset_id").im}
    changed = (_differs(out.annual_rate_exceed_a, out.annual_rate_exceed_b, RESULT_RTOL)
               | _differs(out.prob_exceed_in_horizon_a, out.prob_exceed_in_horizon_b, RESULT_RTOL))
    changed_assets = set(out.asset_id[changed])
    return out, ims, changed_assets


def _input_changed(run_a, run_b, role):
    a = (run_a.manifest.get("inputs") or {}).get(role)
    b = (run_b.manifest.get("inputs") or {}).get(role)
    if not a or not b:
        return True
    return a.get("sha256") != b.get("sha256")


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


# --- portfolio -------------------------------------------------------------------------------------

def _portfolio_rows(run_a, run_b, assets, notes):
    cur_a, cur_b = run_a.currency, run_b.currency
    cur = cur_b if cur_a == cur_b else f"{cur_a} (A) / {cur_b} (B)"
    rows = []

    def add(metric, basis, rp, unit, a, b, se_a=np.nan, se_b=np.nan):
        combined = float(np.hypot(se_a, se_b)) if np.isfinite(se_a) and np.isfinite(se_b) else np.nan
        change = b - a
        if np.isfinite(combined) and np.isfinite(change):
            versus = "exceeds" if abs(change) > combined else "within"
        else:
            versus = "n/a"
        rows.append({"metric": metric, "basis": basis, "return_period_yr": rp, "unit": unit, "value_a": a,
                     "value_b": b, "change": change, "relative_change": float(_relative(a, b)),
                     "standard_error_a": se_a, "standard_error_b": se_b, "combined_standard_error": combined,
                     "versus_standard_error": versus})

    ina = assets.status != "added"
    inb = assets.status != "removed"
    add("n_assets", "exposure", np.nan, "-", float(ina.sum()), float(inb.sum()))
    add("total_replacement_value", "exposure", np.nan, cur, float(assets.replacement_value_a[ina].sum()),
        float(assets.replacement_value_b[inb].sum()))
    add("eal", "classical", np.nan, f"{cur}/yr", float(assets.eal_a[ina].sum()), float(assets.eal_b[inb].sum()))

    has = {name: (run_a.has(name), run_b.has(name)) for name in ("portfolio_summary", "portfolio_ep")}
    for name, (ha, hb) in has.items():
        if ha != hb:
            notes.append(f"{name}.parquet only in run {'A' if ha else 'B'}: event-based results not compared")
    if all(has["portfolio_summary"]):
        sa, sb = run_a.table("portfolio_summary"), run_b.table("portfolio_summary")
        m = sa.merge(sb, on="basis", how="outer", suffixes=("_a", "_b"))
        for r in m.sort_values("basis").itertuples():
            add("aal", r.basis, np.nan, f"{cur}/yr", float(r.aal_a), float(r.aal_b),
                float(getattr(r, "aal_standard_error_a", np.nan)), float(getattr(r, "aal_standard_error_b", np.nan)))
    if all(has["portfolio_ep"]):
        ea, eb = run_a.table("portfolio_ep"), run_b.table("portfolio_ep")
        m = ea.merge(eb, on=["basis", "return_period_yr"], how="outer", suffixes=("_a", "_b"))
        m = m.sort_values(["basis", "return_period_yr"])
        for col, metric in _EP_METRICS:
            for r in m.itertuples():
                add(metric, r.basis, float(r.return_period_yr), cur, float(getattr(r, f"{col}_a")),
                    float(getattr(r, f"{col}_b")))
    frame = pd.DataFrame(rows)
    for col in ("metric", "basis", "unit", "versus_standard_error"):
        frame[col] = _strings(frame[col])
    return frame


# --- the comparison --------------------------------------------------------------------------------

def _event_settings(run):
    """Whether the run holds event-based results, and their seed and number of simulated years."""
    if not run.has("portfolio_summary"):
        return {"present": False, "seed": None, "years": None}
    summary = run.table("portfolio_summary")
    seed = run.manifest.get("seed")
    if seed is None and "seed" in summary.columns and len(summary):
        seed = int(summary.seed.iloc[0])
    years = int(summary.n_years.iloc[0]) if "n_years" in summary.columns and len(summary) else \
        (run.config.get("portfolio") or {}).get("years")
    return {"present": True, "seed": seed, "years": years}


def compare_runs(run_a, run_b):
    """Compare two finished runs; read only.

    Parameters
    ----------
    run_a, run_b : path-like
        Run folders, or output folders standing for their ``LATEST`` run.

    Returns
    -------
    dict
        ``change_assets``, ``change_asset_damage``, ``change_portfolio`` (DataFrames, long
        form, described in the module docstring and in :mod:`quakefolio.pipeline.tables`)
        and ``change_causes`` (a JSON-ready dict: the run-level cause summary).

    Raises
    ------
    InputError
        When an argument is not a finished run with asset results, or a table is missing.
    """
    a, b = _load(run_a), _load(run_b)
    notes = []
    if a.scenario != b.scenario:
        notes.append(f"runs are of different scenarios ({a.scenario!r} vs {b.scenario!r})")
    if a.currency != b.currency:
        notes.append(f"currencies differ ({a.currency} vs {b.currency}): money columns are not comparable")

    m = _asset_frame(a, b)
    damage, ims, dmg_changed = _damage_frame(a, b, m.asset_id.to_numpy())
    if not (m.status == "kept").any():
        notes.append("the runs share no asset: different portfolios, every asset is added or removed")
    elif (m.status != "kept").any():
        notes.append(f"portfolios differ: {int((m.status == 'added').sum())} assets added, "
                     f"{int((m.status == 'removed').sum())} removed")

    hazard_changed, tab_a, tab_b, hazard_summary = _hazard_changes(a, b)
    frag_changed, frag_known, frag_basis = _fragility_changed_classes(a, b)
    exposure_file_changed = _input_changed(a, b, "exposure")
    settings = _settings_changes(a, b)
    asset_settings = [s for s in settings if s["scope"] == "assets"]
    attribution = _attribute(m, dmg_changed, ims, hazard_changed, tab_a, tab_b, frag_changed, frag_known,
                             exposure_file_changed, asset_settings)
    assets = _assets_table(m, attribution)
    portfolio = _portfolio_rows(a, b, assets, notes)

    ia, ib = a.manifest.get("inputs") or {}, b.manifest.get("inputs") or {}
    inputs = {}
    for role in sorted(set(ia) | set(ib)):
        ra, rb = ia.get(role) or {}, ib.get(role) or {}
        status = ("added" if not ra else "removed" if not rb
                  else "same" if ra.get("sha256") == rb.get("sha256") else "changed")
        inputs[role] = {"status": status, "sha256_a": ra.get("sha256"), "sha256_b": rb.get("sha256"),
                        "path_a": ra.get("path"), "path_b": rb.get("path")}
    pa_, pb_ = a.manifest.get("packages") or {}, b.manifest.get("packages") or {}
    packages = {k: {"a": pa_.get(k), "b": pb_.get(k)} for k in sorted(set(pa_) | set(pb_)) if pa_.get(k) != pb_.get(k)}
    if "quakefolio" in packages:
        notes.append(f"quakefolio version differs ({packages['quakefolio']['a']} -> {packages['quakefolio']['b']}): "
                     "changes without an input cause may come from the code")
    ev_a, ev_b = _event_settings(a), _event_settings(b)
    if ev_a["present"] and ev_b["present"] and ev_a["seed"] is not None and ev_a["seed"] == ev_b["seed"]:
        notes.append("both simulations use seed "
                     f"{ev_a['seed']}: they share random draws, so the combined standard error overstates the "
                     "sampling noise of the AAL change")
    used_sites = set(assets.site_id_b.dropna()) | set(assets.site_id_a.dropna())
    da, dbg = a.manifest.get("fragility_classes") or {}, b.manifest.get("fragility_classes") or {}
    by_cause = assets.groupby("primary_cause", sort=True)
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
        "event_based": {"in_a": ev_a["present"], "in_b": ev_b["present"],
                        "seed_a": ev_a["seed"], "seed_b": ev_b["seed"], "seed_changed": ev_a["seed"] != ev_b["seed"],
                        "years_a": ev_a["years"], "years_b": ev_b["years"],
                        "years_changed": ev_a["years"] != ev_b["years"]},
        "packages_changed": packages,
        "assets": {
            "in_a": int((assets.status != "added").sum()), "in_b": int((assets.status != "removed").sum()),
            "added": int((assets.status == "added").sum()), "removed": int((assets.status == "removed").sum()),
            "kept": int((assets.status == "kept").sum()), "results_changed": int(assets.results_changed.sum()),
            "by_primary_cause": {k: int(v) for k, v in by_cause.size().items()},
            "eal_change_by_primary_cause": {k: float(v) for k, v in by_cause.eal_change.sum().items()},
            "flagged": {c: int(assets[f"cause_{c}"].sum()) for c in CAUSES},
        },
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


# --- writing ---------------------------------------------------------------------------------------

def _inside(path, folder):
    try:
        path.relative_to(folder)
        return True
    except ValueError:
        return False


def write_change_report(run_a, run_b, out_dir=None, *, result=None):
    """Compare two runs and write the report; return the report folder.

    The folder is ``<out_dir>/<run_a_id>__<run_b_id>/`` with ``out_dir`` defaulting to
    ``<output folder of run B>/comparisons``.  It holds ``change_assets.parquet``,
    ``change_asset_damage.parquet``, ``change_portfolio.parquet`` (explicit schemas, units
    and provenance in the schema metadata) and ``change_causes.json``.  It is written
    under a hidden partial name and renamed into place when complete; an earlier report of
    the same pair is replaced only then.  Neither run folder is written to.

    ``result``, when given, is :func:`compare_runs` of the same two runs (saves reading
    them twice).
    """
    if result is None:
        result = compare_runs(run_a, run_b)
    causes = result["change_causes"]
    path_a, path_b = Path(causes["run_a"]["path"]), Path(causes["run_b"]["path"])
    parent = (Path(out_dir) if out_dir is not None else path_b.parent.parent / "comparisons").resolve()
    for run in (path_a, path_b):
        if _inside(parent, run):
            raise InputError(parent, f"the report would be written inside run folder {run}; runs are never modified")
    name = f"{causes['run_a']['run_id']}__{causes['run_b']['run_id']}"
    parent.mkdir(parents=True, exist_ok=True)
    for stale in parent.glob(f"{PARTIAL_PREFIX}{name}-*"):
        shutil.rmtree(stale, ignore_errors=True)
    partial = parent / f"{PARTIAL_PREFIX}{name}-{os.getpid()}"
    final = parent / name
    partial.mkdir()
    try:
        currency = causes["run_b"]["currency"] if causes["run_a"]["currency"] == causes["run_b"]["currency"] \
            else f"{causes['run_a']['currency']} (A) / {causes['run_b']['currency']} (B)"
        provenance = {
            "run_a": causes["run_a"]["run_id"], "run_b": causes["run_b"]["run_id"],
            "inputs_sha256_a": causes["run_a"]["inputs_sha256"], "inputs_sha256_b": causes["run_b"]["inputs_sha256"],
            "created_utc": _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ"),
            "quakefolio_version": _version(), "currency": currency, "caution": CAUTION,
        }
        for table in ("change_assets", "change_asset_damage", "change_portfolio"):
            arrow = to_arrow(result[table], name=table, units=units_for(table, currency),
                             description=TABLES[table]["description"], provenance=provenance)
            pq.write_table(arrow, partial / f"{table}.parquet", compression="zstd")
        text = json.dumps(dict(causes, created_utc=provenance["created_utc"]), indent=2, sort_keys=True) + "\n"
        with open(partial / "change_causes.json", "w", encoding="utf-8") as fh:
            fh.write(text)
        for f in partial.iterdir():
            fsync_path(f)
        fsync_path(partial)
        old = None
        if final.exists():
            old = parent / f".replaced-{name}-{os.getpid()}"
            os.replace(final, old)
        try:
            os.replace(partial, final)
        except BaseException:
            if old is not None:
                os.replace(old, final)
            raise
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
        fsync_path(parent)
    except BaseException:
        shutil.rmtree(partial, ignore_errors=True)
        raise
    return final


def _version():
    from importlib import metadata

    try:
        return metadata.version("quakefolio")
    except metadata.PackageNotFoundError:
        return None


# --- printed summary -------------------------------------------------------------------------------

def _money(x):
    return "n/a" if x is None or not np.isfinite(x) else f"{x:,.0f}"


def _signed(x):
    return "n/a" if x is None or not np.isfinite(x) else f"{x:+,.0f}"


def _pct(x):
    return "n/a" if x is None or not np.isfinite(x) else f"{100 * x:+.2f}%"


def change_summary_text(result, report_folder=None, *, top_n=10):
    """The short printed change report (caution first) of a :func:`compare_runs` result."""
    causes, assets, port = result["change_causes"], result["change_assets"], result["change_portfolio"]
    cur = causes["run_b"]["currency"]
    lines = [CAUTION, "",
             f"quakefolio compare  A {causes['run_a']['run_id']} ({causes['run_a']['scenario']})  ->  "
             f"B {causes['run_b']['run_id']} ({causes['run_b']['scenario']})"]
    for note in causes["notes"]:
        lines.append(f"  note: {note}")
    changed = causes["inputs_changed"]
    lines.append(f"  input files changed: {', '.join(changed) if changed else 'none'}")
    frag = causes["fragility"]["classes_changed"]
    if frag:
        lines.append(f"  fragility changed for classes: {', '.join(frag)}")
    hz = causes["hazard"]
    lines.append(f"  hazard curves changed at {len(hz['sites_changed'])} of {hz['sites_b']} sites "
                 f"({hz['sites_changed_used_by_assets']} used by assets; {len(hz['sites_added'])} sites added, "
                 f"{len(hz['sites_removed'])} removed)")
    for s in causes["settings_changed"]:
        lines.append(f"  setting {s['setting']}: {s['a']} -> {s['b']}  ({s['scope']})")
    ev = causes["event_based"]
    if ev["in_a"] or ev["in_b"]:
        lines.append(f"  event-based: seed {ev['seed_a']} -> {ev['seed_b']}, years {ev['years_a']} -> {ev['years_b']}")
    lines.append("")
    eal = port[port.metric == "eal"].iloc[0]
    lines.append(f"  portfolio EAL (classical)  {_money(eal.value_a)} -> {_money(eal.value_b)} {cur}/yr  "
                 f"({_signed(eal.change)}, {_pct(eal.relative_change)})")
    for r in port[port.metric == "aal"].itertuples():
        lines.append(f"  AAL ({r.basis})  {_money(r.value_a)} -> {_money(r.value_b)} {cur}/yr  "
                     f"({_signed(r.change)}, {_pct(r.relative_change)}; {r.versus_standard_error} the combined "
                     f"standard error {_money(r.combined_standard_error)})")
    ep = port[port.metric.isin(["pml_aep", "pml_oep", "tvar"])]
    if len(ep):
        lines.append(f"  {'basis':<12}{'RP yr':>8}{'PML AEP A -> B':>28}{'PML OEP A -> B':>28}{'TVaR A -> B':>28}")
        wide = ep.pivot_table(index=["basis", "return_period_yr"], columns="metric",
                              values=["value_a", "value_b"], dropna=False, sort=True)
        for (basis, rp), r in wide.iterrows():
            cells = [f"{_money(r[('value_a', k)])} -> {_money(r[('value_b', k)])}" if ("value_a", k) in r.index
                     else "n/a" for k in ("pml_aep", "pml_oep", "tvar")]
            lines.append(f"  {basis:<12}{rp:>8g}" + "".join(f"{c:>28}" for c in cells))
        lines.append("")
    a = causes["assets"]
    lines.append(f"  assets: {a['in_a']} in A, {a['in_b']} in B ({a['added']} added, {a['removed']} removed); "
                 f"results changed for {a['results_changed']}")
    order = [c for c in ("unchanged",) + CAUSES + ("unexplained",) if c in a["by_primary_cause"]]
    lines.append("  by primary cause: " + ", ".join(
        f"{c} {a['by_primary_cause'][c]} ({_signed(a['eal_change_by_primary_cause'][c])} {cur}/yr)"
        if c != "unchanged" else f"{c} {a['by_primary_cause'][c]}" for c in order))
    moved = assets[assets.results_changed]
    if len(moved) and top_n > 0:
        top = moved.assign(_abs=moved.eal_change.abs()).sort_values(["_abs", "asset_id"], ascending=[False, True])
        top = top.head(top_n)
        lines.append("")
        lines.append(f"  {len(top)} asset{'s' if len(top) != 1 else ''} with the largest absolute EAL change:")
        lines.append(f"  {'asset_id':<12}{'status':<9}{'class':<10}{'site':<8}{'EAL A':>12}{'EAL B':>12}"
                     f"{'change':>12}{'':>3}causes")
        for r in top.itertuples():
            cls = r.building_class_b if r.building_class_b is not None else r.building_class_a
            site = r.site_id_b if r.site_id_b is not None else r.site_id_a
            lines.append(f"  {r.asset_id:<12}{r.status:<9}{cls:<10}{site:<8}{_money(r.eal_a):>12}"
                         f"{_money(r.eal_b):>12}{_signed(r.eal_change):>12}{'':>3}{r.causes or r.primary_cause}")
    if report_folder is not None:
        lines.append("")
        lines.append(f"  change report: {report_folder}")
    return "\n".join(lines)
