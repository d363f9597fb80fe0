"""Report sections about the run itself: key figures, inputs and provenance, cross-checks and logic tree."""
from __future__ import annotations

from quakefolio.pipeline.report.context import _created, top_rows
from quakefolio.pipeline.report.sections_headline import headline_notes
from quakefolio.pipeline.report.html import (
    _cell, _esc, _facts, _finite, _g, _html, _money, _note, _p, _pct, _prob, _table,
)


def _key_figures(run):
    """The key figures (value and label, money with its currency and ``/yr`` where per year) and, under them,
    what each is and which to quote (:func:`quakefolio.pipeline.report.sections_headline.headline_notes`)."""
    cur = run.currency
    keys, shown = [], set()
    loss = run.table("asset_loss")
    if loss is not None and len(loss):
        total = loss.replacement_value.sum()
        eal = loss.eal.sum()
        keys.append((f"{len(loss):,}", f"buildings in {loss.building_class.nunique()} classes, "
                                       f"{loss.site_id.nunique()} hazard sites"))
        keys.append((_money(total, cur), "total replacement value"))
        keys.append((_money(eal, cur + "/yr"),
                     f"expected annual loss (EAL), classical, ground-up ({1000 * eal / total:.3f} ‰ of value per "
                     "year): the figure to quote"))
        shown.add("eal")
        if "eal_net" in loss:
            keys.append((_money(loss.eal_net.sum(), cur + "/yr"),
                         "EAL net of deductibles and limits, classical"))
            shown.add("eal_net")
        worst = top_rows(loss, "collapse_prob_in_horizon", 1).iloc[0]
        if _finite(worst.collapse_prob_in_horizon):
            keys.append((_prob(worst.collapse_prob_in_horizon),
                         f"highest probability of collapse in {run.horizon:g} yr (building {worst.asset_id})"))
            shown.add("collapse")
    summ = run.table("portfolio_summary")
    if summ is not None and "ground_up" in set(summ.basis):
        gu = summ.set_index("basis").loc["ground_up"]
        keys.append((_money(gu.aal, cur + "/yr"), f"average annual loss (AAL), event-based, ground-up "
                                                  f"(± {_money(gu.aal_standard_error, cur + '/yr')} 1 s.e.): "
                                                  "the check of the EAL"))
        shown.add("aal")
    ep = run.table("portfolio_ep")
    if ep is not None and len(ep):
        gu = ep[(ep.basis == "ground_up") & ep.aep_loss.notna()].sort_values("return_period_yr")
        if len(gu):  # the largest return period the simulated years reach
            top = gu.iloc[-1]
            keys.append((_money(top.aep_loss, cur), f"PML {top.return_period_yr:,.0f} yr, ground-up aggregate "
                                                    "(loss in one year)"))
            keys.append((_money(top.tvar_loss, cur), f"TVaR {top.return_period_yr:,.0f} yr, ground-up aggregate "
                                                     "(mean loss of the years beyond that PML)"))
            shown.update({"pml", "tvar"})
    if not keys:
        keys.append((f"{run.manifest.get('hazard_sites', 'n/a')}", "hazard sites (hazard stage only)"))
    return ('<div class="keys" id="key-figures">'
            + "".join(f'<div class="key"><b>{_esc(v)}</b><span>{_esc(t)}</span></div>' for v, t in keys)
            + "</div>" + headline_notes(run, shown))


# --- inputs and provenance -------------------------------------------------------------------------

def _stored_as(run, role):
    """What the run folder keeps of an input file (the report never reads the file itself)."""
    if role == "exposure":
        return "the assets as used: run_assets.parquet" if run.has("run_assets") else "not stored (older run)"
    if role == "fragility_library":
        return ("the classes as used: run_fragility.parquet" if run.has("run_fragility")
                else "not stored (older run)")
    if role == "config":
        return "the resolved config: manifest.json"
    if role == "hazard_curves":
        return "the curves as used: site_hazard.parquet"
    if role.startswith("source_model"):
        return "source summary: manifest.json (hazard logic tree)"
    return ""


def _run_folder(run):
    """The run folder as the config names it (``output/runs/<run_id>``, relative to the config's folder).

    The final name, also while the run is being written; no local folder of the machine that ran it
    (a manifest written before paths were stored relative keeps its absolute output folder).
    """
    folder = str(run.section("output").get("folder") or "").rstrip("/")
    return f"{folder}/runs/{run.run_id}" if folder else f"runs/{run.run_id}"


def _run_facts(run):
    """Scenario, run id, stages, hazard mode, horizon, currency, seed and digest as (label, value) pairs."""
    m = run.manifest
    sc = run.section("scenario")
    hz = run.section("hazard")
    facts = [
        ("scenario", m.get("scenario", sc.get("name", ""))),
        ("description", sc.get("description", "")),
        ("run id", run.run_id),
        ("created", _created(run)),
        ("stages run", "hazard only" if m.get("stages") == "hazard" else "hazard, damage and loss"
         + (", event-based portfolio" if run.has("portfolio_summary") else "")),
        ("hazard", "computed from the source model (logic tree)" if hz.get("mode") == "compute"
         else f"tabulated curves from file (statistic '{hz.get('statistic', 'mean')}')"),
        ("horizon", f"{run.horizon:g} yr (probabilities in this horizon assume Poisson occurrence)"),
        ("currency", run.currency),
        ("seed", m.get("seed") if m.get("seed") is not None else "none (no simulation)"),
        ("inputs digest (sha256)", m.get("inputs_sha256", "n/a")),
        ("run folder", _run_folder(run)),
    ]
    interp = m.get("hazard_ims_interpolated") or []
    if interp:
        facts.append(("IMs interpolated across periods", ", ".join(interp)))
    return facts


def _section_inputs(run):
    """Section 1: run facts, input files (path, sha256, what the run folder keeps), software, timings, warnings.

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    str
        HTML of the section body.
    """
    m = run.manifest
    out = [_facts(_run_facts(run)), "<h3>Input files</h3>"]
    rows = []
    for role, info in sorted((m.get("inputs") or {}).items()):
        info = info or {}
        rows.append([role, _html(f'<span class="mono">{_esc(info.get("path", ""))}</span>'),
                     _html(f'<span class="mono">{_esc(info.get("sha256", ""))}</span>'), _stored_as(run, role)])
    out.append(_table(["role", "path", "sha256 at run time", "kept in the run folder"], rows, wide=True) if rows
               else _note("The manifest lists no input files."))

    out.append("<h3>Software, timings and warnings</h3>")
    pk = m.get("packages") or {}
    tm = m.get("timings_s") or {}
    left = _table(["package", "version"], [[k, v if v is not None else "not installed"] for k, v in sorted(pk.items())])
    right = _table(["stage", "time [s]#"], [[k.removesuffix("_s").replace("_", " "), _cell(f"{v:,.2f}", v)]
                                            for k, v in tm.items()])
    out.append(f'<div class="pair">{left}{right}</div>')
    warnings = m.get("warnings") or []
    if warnings:
        out.append("<ul>" + "".join(f"<li>{_esc(w)}</li>" for w in warnings) + "</ul>")
    else:
        out.append(_p("Warnings raised while reading the inputs: none."))
    return "".join(out)


# --- cross-checks and logic tree -------------------------------------------------------------------

def _verdict(ok):
    return _html('<span class="ok">passed</span>' if ok else '<span class="bad">not passed</span>')


def _check_rows(checks, cur):
    """One table row per cross-check recorded in the manifest."""
    rows = []
    scope = "all branches" if checks.get("source_branch") == "all" else "the same branch"
    p = checks.get("portfolio_aal_vs_classical_eal")
    if p:
        rows.append([f"portfolio AAL vs classical EAL of {scope}",
                     f"event-based {_money(p['event_based_aal'], cur + '/yr')} vs classical "
                     f"{_money(p['classical_eal'], cur + '/yr')}; z = {p['z']:+.2f} "
                     f"(1 s.e. {_money(p['standard_error'], cur + '/yr')})", "|z| ≤ 3", _verdict(p.get("passed"))])
    n = checks.get("portfolio_net_aal_vs_classical_net_eal")
    if n:
        rows.append([f"portfolio net AAL vs classical net EAL of {scope}",
                     f"event-based {_money(n['event_based_aal'], cur + '/yr')} vs classical "
                     f"{_money(n['classical_eal'], cur + '/yr')}; z = {n['z']:+.2f} "
                     f"(1 s.e. {_money(n['standard_error'], cur + '/yr')})", "|z| ≤ 3", _verdict(n.get("passed"))])
    a = checks.get("asset_aal_vs_classical_eal")
    if a:
        share = a["share_within_3_standard_errors"]
        rows.append(["assets within 3 standard errors of their classical EAL",
                     f"{a['within_3_standard_errors']:,} of {a['assets']:,} ({_pct(share)}); max |z| "
                     f"{a['max_abs_z']:.2f}", "99.7% if the errors were independent", "for review"])
    h = checks.get("event_hazard_vs_classical")
    if h:
        share = h["share_within_3_standard_errors"]
        rows.append(["event-based hazard vs classical curves",
                     f"{h['within_3_standard_errors']:,} of {h['compared_points']:,} exceedance rates above "
                     f"{h['rate_threshold_per_yr']:.1e}/yr within 3 s.e. ({_pct(share)}); max |z| "
                     f"{h['max_abs_z']:.2f}", "99.7% if the errors were independent", "for review"])
    return rows


def _cross_checks(run):
    """The cross-checks between event-based and classical results, or a note when there are none."""
    checks = run.manifest.get("cross_checks")
    if not checks:
        return [_note("No cross-checks: this run has no event-based simulation.")]
    out = [_table(["check", "result", "expectation", "verdict"], _check_rows(checks, run.currency))]
    if checks.get("note"):
        out.append(_p(f"Note: {checks['note']}."))
    out.append(_p("z = (event-based - classical) / standard error of the event-based estimate. The portfolio "
                  "check passes when |z| <= 3. The per-asset and per-hazard-point comparisons share the same "
                  "simulated events, so their errors are correlated: when the portfolio z is large, many assets "
                  "move together and fewer than 99.7% can lie within 3 standard errors without any defect. "
                  "They carry no pass mark here: read them together with the portfolio z."))
    return out


def _logic_tree(run, tree):
    """Source-model and ground-motion branches of a computed-hazard run, and the hazard settings."""
    hz = run.section("hazard")
    rows = []
    for br in tree.get("source_branches", []):
        for k, s in enumerate(br.get("sources", [])):
            rows.append([br["id"] if k == 0 else "", _cell(f"{br['weight']:.3g}", br["weight"]) if k == 0 else "",
                         _cell(f"{br['ruptures']:,}", br["ruptures"]) if k == 0 else "", s.get("source_id", ""),
                         s.get("kind", ""), s.get("region", "active_crustal"), _cell(f"{s.get('n_ruptures', 0):,}", s.get("n_ruptures")),
                         _cell(_g(s.get("total_rate"), 4), s.get("total_rate")),
                         ", ".join(f"{m:g}" for m in s.get("mags_capped", []))])
    out = [_table(["source-model branch", "weight#", "ruptures#", "source", "kind", "tectonic region", "ruptures#",
                   "total rate [1/yr]#", "ruptures capped at the fault (M)"], rows)]
    if any(s.get("mags_capped") for br in tree.get("source_branches", []) for s in br.get("sources", [])):
        out.append(_p("Ruptures capped at the fault: the Wells & Coppersmith (1994) rupture of these magnitudes is "
                      "longer than the fault; it is cut to the fault length and keeps its rate, so the fault releases "
                      "the magnitude over less area than the scaling relation gives."))
    rows = [[g["id"], "active_crustal", _cell(f"{g['weight']:.3g}", g["weight"])] for g in tree.get("gmm_branches", [])]
    rows += [[g["id"], region, _cell(f"{g['weight']:.3g}", g["weight"])]
             for region, branches in tree.get("region_gmm_branches", {}).items() for g in branches]
    out.append(_table(["ground-motion branch", "tectonic region", "weight#"], rows))
    combos = tree.get("fractile_combinations")
    if tree.get("region_gmm_branches"):
        out.append(_p("Each tectonic region's sources take that region's models. The end branches are the "
                      "combinations of one source-model branch and one model per tectonic region with ruptures in "
                      "that branch, weighted by the product of their branch weights; a combination's hazard is the "
                      "sum of its regions' hazard. The mean curve is the mean over every combination"
                      + ("; the fractiles are taken over " + _combination_set(combos) if combos else "") + "."))
    facts = _tree_facts(hz, tree, combos)
    facts += _site_input_facts(run.manifest.get("site_inputs"))
    out.append(_facts(facts))
    return out


def _tree_facts(hz, tree, combos):
    """Facts of the hazard logic tree: IMs, end branches, truncation, distance, fractiles, curves for damage."""
    trunc = hz.get("truncation_sigma")
    n_src, n_gmm = len(tree.get("source_branches", [])), len(tree.get("gmm_branches", []))
    ends = (f"{combos['combinations']:,} end branches (source model x one ground-motion model per tectonic region)"
            if combos else f"{n_src} source model x {n_gmm} ground-motion = {n_src * n_gmm} end branches")
    return [("IMs computed", ", ".join(tree.get("ims", []))),
            ("branches", ends),
            ("ground-motion truncation", f"{trunc:g} sigma" if _finite(trunc) else "none"),
            ("integration distance", f"{hz.get('integration_distance_km', float('nan')):g} km"),
            ("fractiles", (", ".join(f"{f:g}" for f in hz.get("fractiles") or []) or "none")
             + (f" over {_combination_set(combos)}" if combos and hz.get("fractiles") else "")),
            ("curves used for damage", "weighted mean over the end branches"
             + ("; the end branches of the fractiles are also carried through the damage and loss (fractile tables)"
                if hz.get("propagate_branches") else ""))]


def _combination_set(record):
    """The end branches the fractiles were taken over, in words (the manifest's ``fractile_combinations``)."""
    if record.get("sampled"):
        return (f"a sample of {record['used']:,} of the {record['combinations']:,} combinations, drawn by weight "
                f"(seed {record.get('seed')}; more than fractile_combinations_max = {record.get('max'):,})")
    return f"all {record['combinations']:,} combinations"


def _site_input_facts(record):
    """Facts of the manifest's ``site_inputs``: the Vs30 rule with the clamped sites, the basin depths given."""
    if not record:
        return []
    n = record.get("hazard_sites", 0)
    clamped = ", ".join(f"{g} {k} sites" for g, k in record.get("vs30_clamped_sites", {}).items() if k) or "none"
    given = ", ".join(f"{c} at {k} of {n} sites" for c, k in record.get("basin_depth_sites", {}).items() if k)
    return [("Vs30 outside a model's range", f"{record.get('vs30_rule', '')}; clamped: {clamped}"),
            ("basin depths", (given + "; elsewhere" if given else "none given:") + " each model's own Vs30 relation")]


def _section_checks(run):
    """Section: built-in cross-checks and the hazard logic tree.

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    str
        HTML of the section body.
    """
    out = ["<h3>Cross-checks between the event-based and the classical results</h3>"]
    out += _cross_checks(run)
    out.append("<h3>Hazard logic tree</h3>")
    tree = run.manifest.get("hazard_logic_tree")
    if not tree:
        hz = run.section("hazard")
        src = ((run.manifest.get("inputs") or {}).get("hazard_curves") or {}).get("path") or hz.get("curves_file")
        out.append(_note(f"Hazard was tabulated from a file ({src}); the run holds no logic tree of its own."))
        return "".join(out)
    out += _logic_tree(run, tree)
    return "".join(out)
