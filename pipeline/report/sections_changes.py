"""Report section on the changes since a previous run (the change report of
:mod:`quakefolio.pipeline.compare`)."""
from __future__ import annotations

import json

from quakefolio.core.errors import InputError
from quakefolio.pipeline.io.store import RunFolder
from quakefolio.pipeline.report.context import TOP_ASSETS
from quakefolio.pipeline.report.html import (
    _cell, _esc, _facts, _finite, _html, _money, _note, _p, _pct, _prob, _signed_money, _table,
)

_METRIC_LABELS = {"n_assets": "assets", "total_replacement_value": "total replacement value",
                  "eal": "EAL, classical", "aal": "AAL", "pml_aep": "PML aggregate (AEP)",
                  "pml_oep": "PML occurrence (OEP)", "tvar": "TVaR aggregate"}


def _setting_text(value, limit=160):
    """A config value as compact JSON, shortened for the page."""
    if value is None:
        return "not\u00a0set"
    text = json.dumps(value, sort_keys=True, default=str)
    return text if len(text) <= limit else text[: limit - 1] + "…"


def _change_facts(causes):
    """Inputs, classes, hazard sites, settings and simulation that changed, as (label, value) pairs."""
    facts = []
    changed = causes.get("inputs_changed") or []
    facts.append(("input files changed", ", ".join(changed) if changed else "none"))
    frag = causes["fragility"]["classes_changed"]
    facts.append(("fragility changed for classes", ", ".join(frag) if frag else "none"))
    hz = causes["hazard"]
    facts.append(("hazard curves changed", f"at {len(hz['sites_changed'])} of {hz['sites_b']} sites "
                                           f"({hz['sites_changed_used_by_assets']} used by assets)"))
    settings = causes.get("settings_changed") or []
    facts.append(("settings changed", f"{len(settings)} (listed below)" if settings else "none"))
    ev = causes["event_based"]
    if ev["in_a"] or ev["in_b"]:
        facts.append(("simulation", f"seed {ev['seed_a']} → {ev['seed_b']}, years {ev['years_a']} → {ev['years_b']}"))
    return facts


def _settings_table(settings):
    """Settings that differ between the runs, with what they act on."""
    scope = {"assets": "per-asset results", "event_based": "event-based tables", "other_tables": "other tables"}
    rows = [[st["setting"], _html(f'<span class="mono">{_esc(_setting_text(st["a"]))}</span>'),
             _html(f'<span class="mono">{_esc(_setting_text(st["b"]))}</span>'),
             scope.get(st["scope"], st["scope"])] for st in settings]
    return _table(["setting", "A", "B", "acts on"], rows, wide=True)


def _count(v):
    return f"{v:,.0f}" if _finite(v) else "n/a"


def _portfolio_table(port):
    """Portfolio metrics of both runs with their changes and the comparison with the standard error."""
    rows = []
    for r in port.itertuples():
        fmt = _money if r.metric != "n_assets" else _count
        rows.append([_METRIC_LABELS.get(r.metric, r.metric), str(r.basis).replace("_", "-"),
                     _cell(f"{r.return_period_yr:,.0f}" if _finite(r.return_period_yr) else "", r.return_period_yr),
                     r.unit, _cell(fmt(r.value_a), r.value_a), _cell(fmt(r.value_b), r.value_b),
                     _cell(_signed_money(r.change), r.change), _cell(_pct(r.relative_change, True), r.relative_change),
                     "" if r.versus_standard_error == "n/a" else
                     f"{r.versus_standard_error} ({_money(r.combined_standard_error)})"])
    return _table(["metric", "basis", "return period [yr]#", "unit", "A#", "B#", "change#", "relative#",
                   "change vs combined s.e."], rows)


def _cause_part(ac, cur):
    """Asset counts and EAL change per primary cause."""
    rows = [[c, _cell(f"{ac['by_primary_cause'][c]:,}", ac["by_primary_cause"][c]),
             _cell(_signed_money(ac["eal_change_by_primary_cause"].get(c)), ac["eal_change_by_primary_cause"].get(c))]
            for c in ("hazard", "fragility", "exposure", "settings", "unexplained", "unchanged")
            if c in ac["by_primary_cause"]]
    return [_p(f"{ac['in_a']:,} assets in A, {ac['in_b']:,} in B ({ac['added']:,} added, "
               f"{ac['removed']:,} removed); "
               f"results changed for {ac['results_changed']:,}."),
            _table(["primary cause", "assets#", f"EAL change [{cur}/yr]#"], rows)]


def _top_changes(moved, cur, horizon):
    """The assets with the largest absolute EAL change, with their causes."""
    top = moved.assign(_abs=moved.eal_change.abs()).sort_values(["_abs", "asset_id"], ascending=[False, True])
    top = top.head(TOP_ASSETS)
    rows = []
    for r in top.itertuples():
        cls = r.building_class_b if r.building_class_b is not None else r.building_class_a
        site = r.site_id_b if r.site_id_b is not None else r.site_id_a
        rows.append([r.asset_id, r.status, cls, site, _cell(_money(r.eal_a), r.eal_a), _cell(_money(r.eal_b), r.eal_b),
                     _cell(_signed_money(r.eal_change), r.eal_change),
                     _cell(_pct(r.eal_relative_change, True), r.eal_relative_change),
                     _cell(f"{_prob(r.collapse_prob_in_horizon_a)} → {_prob(r.collapse_prob_in_horizon_b)}",
                           r.collapse_prob_in_horizon_change),
                     (r.causes or r.primary_cause).replace(",", ", ")])
    return [_table(["asset", "status", "class", "site", f"EAL A [{cur}/yr]#", f"EAL B [{cur}/yr]#", "change#",
                    "relative#", f"P(collapse in {horizon:g} yr) A → B#", "causes"], rows, sortable=True),
            _p(f"The {len(top)} assets with the largest absolute EAL change; causes in order of weight "
               "(hazard at the asset's site, its class's fragility, its exposure record, settings acting on "
               "per-asset results).")]


def _section_changes(run, previous_run):
    """Section: the change report between ``previous_run`` (A) and this run (B).

    Parameters
    ----------
    run : ReportRun
        This run (finished or partial; read as it is).
    previous_run : path-like or None
        A finished run or an output folder standing for its ``LATEST`` run.

    Returns
    -------
    str
        HTML of the section body; a note when no previous run is given or the comparison fails.
    """
    from quakefolio.pipeline.compare import compare_runs

    if previous_run is None:
        return _note("No previous run was given, so no change report. Rebuild this report with "
                     "`quakefolio report RUN --previous EARLIER_RUN` to see what moved and why.")
    try:
        res = compare_runs(previous_run, RunFolder(run.path))
    except (InputError, OSError) as exc:
        return _note(f"No change report: {exc}")
    causes, port, assets = res["change_causes"], res["change_portfolio"], res["change_assets"]
    cur = run.currency
    a, b = causes["run_a"], causes["run_b"]
    out = [_p(f"Run A (previous) {a['run_id']} ({a['scenario']}) compared with run B (this run) {b['run_id']}.")]
    out += [_note(n) for n in causes.get("notes", [])]
    out.append(_facts(_change_facts(causes)))
    settings = causes.get("settings_changed") or []
    if settings:
        out.append(_settings_table(settings))
    out += ["<h3>Portfolio</h3>", _portfolio_table(port), "<h3>Assets by primary cause</h3>"]
    out += _cause_part(causes["assets"], cur)
    moved = assets[assets.results_changed]
    out.append("<h3>Largest changes per asset</h3>")
    if not len(moved):
        out.append(_p("No asset's results changed."))
        return "".join(out)
    out += _top_changes(moved, cur, run.horizon)
    return "".join(out)
