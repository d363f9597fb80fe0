"""Reading two runs and the differences between them: settings, hazard curves, assets, damage, portfolio.

Part of the change report (:mod:`quakefolio.pipeline.compare`); runs are read through
:class:`quakefolio.pipeline.io.store.RunFolder` only.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from quakefolio.core.errors import InputError
from quakefolio.core.ims import im_period
from quakefolio.pipeline.io.store import PARTIAL_PREFIX, RunFolder, latest_run

__all__ = ["CAUSES", "HAZARD_RTOL", "RESULT_RTOL", "SETTING_SCOPES", "resolve_run", "load_run"]

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
    ("hazard", "fractile_combinations_max"): "other_tables",
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

def resolve_run(path):
    """The run folder ``path`` stands for: itself if it holds ``manifest.json``, else the
    run that ``LATEST`` names when ``path`` is an output folder.

    Parameters
    ----------
    path : path-like
        A run folder or an output folder.

    Returns
    -------
    pathlib.Path
        The resolved run folder.

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


def load_run(path):
    """A finished run with asset results, read through :class:`~quakefolio.pipeline.io.store.RunFolder`.

    Parameters
    ----------
    path : path-like or RunFolder
        A run folder or an output folder (see :func:`resolve_run`); a RunFolder is used
        as it is (the report passes its own, possibly partial, run).

    Returns
    -------
    RunFolder

    Raises
    ------
    InputError
        When ``path`` is not a finished run, or the run has hazard results only.
    """
    run = path if isinstance(path, RunFolder) else RunFolder(resolve_run(path), given=path)
    if run.manifest.get("stages") == "hazard" or not run.has("asset_loss"):
        raise InputError(run.path, f"run {run.run_id} has hazard results only; compare needs runs with asset results")
    return run


def _hazard_statistic(run):
    """The hazard statistic that drove the run's damage results (``mean`` for computed hazard)."""
    hz = run.section("hazard")
    return hz.get("statistic", "mean") if hz.get("mode", "ingest") == "ingest" else "mean"


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
    stat = _hazard_statistic(run)
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
        "statistic_a": _hazard_statistic(run_a), "statistic_b": _hazard_statistic(run_b),
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
