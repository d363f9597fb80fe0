"""The short printed summary of a finished run (read through :class:`~quakefolio.pipeline.io.store.RunFolder`)."""
from __future__ import annotations

from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.io.store import RunFolder
from quakefolio.pipeline.terminal import one_line

__all__ = ["summary_text", "loss_model_label", "correlation_effect_lines", "people_lines"]


def _money(x):
    return f"{x:,.0f}"


def _hazard_lines(run, manifest):
    """Range over sites of the mean uniform-hazard values, and disaggregation at the worst site."""
    uhs = run.table("hazard_at_return_periods")
    stat = "mean" if "mean" in set(uhs.statistic) else uhs.statistic.iloc[0]
    uhs = uhs[uhs.statistic == stat]
    tree = manifest.get("hazard_logic_tree")
    lines = [""]
    if tree:
        lines.append(f"  hazard computed at {manifest['hazard_sites']} sites: "
                     f"{len(tree['source_branches'])} source-model x {len(tree['gmm_branches'])} ground-motion "
                     f"branches ({sum(b['ruptures'] for b in tree['source_branches'])} ruptures in all)"
                     + "".join(f"; {region}: {', '.join(g['id'] for g in rows)}"
                               for region, rows in tree.get("region_gmm_branches", {}).items()))
    else:
        lines.append(f"  hazard tabulated at {manifest['hazard_sites']} sites")
    lines.append(f"  {stat} uniform-hazard IM [g] across sites (min / median / max):")
    for (im, rp), grp in uhs.groupby(["im", "return_period_yr"], sort=True):
        v = grp.im_level.dropna()
        if len(v):
            lines.append(f"    {im:<8} {rp:>6g} yr   {v.min():.3f} / {v.median():.3f} / {v.max():.3f}"
                         + ("" if len(v) == len(grp) else f"   ({len(grp) - len(v)} sites flagged)"))
        else:
            lines.append(f"    {im:<8} {rp:>6g} yr   not reported ({grp.flag.iloc[0]})")
    if run.has("disaggregation_summary"):
        dis = run.table("disaggregation_summary").dropna(subset=["mean_mag"])
        if len(dis):
            worst = dis.sort_values(["im_level", "site_id"], ascending=[False, True]).iloc[0]
            lines.append(f"  disaggregation at the highest {worst.im} ({worst.return_period_yr:g} yr, site "
                         f"{worst.site_id}): mean M {worst.mean_mag:.2f}, mean Rrup {worst.mean_dist_km:.1f} km, "
                         f"mean epsilon {worst.mean_eps:.2f}")
    return lines


def loss_model_label(row):
    """The loss model of a ``portfolio_summary`` row in words, with its correlation when sampled.

    Parameters
    ----------
    row : pandas.Series
        A ``portfolio_summary`` row (older runs may lack the correlation columns).

    Returns
    -------
    str
    """
    label = str(row.loss_model).replace("_", " ")
    rho = getattr(row, "secondary_correlation", float("nan"))
    if row.loss_model == "mean_damage_ratio" or rho != rho:
        return label
    group = str(getattr(row, "secondary_group", "building_class")).replace("_", " ")
    if rho == 0:
        return f"{label}, independent between buildings"
    return f"{label}, correlation {rho:g} within each {group} per event"


def correlation_effect_lines(run, basis="ground_up"):
    """Sentences: by how much PML, TVaR and AAL move against independent sampling.

    Parameters
    ----------
    run : RunFolder
        A finished run.
    basis : str
        ``"ground_up"`` or ``"net"``.

    Returns
    -------
    list of str
        Two lines, or none when the run has no ``portfolio_correlation_effect`` table.
    """
    if not run.has("portfolio_correlation_effect"):
        return []
    eff = run.table("portfolio_correlation_effect")
    eff = eff[eff.basis == basis]
    first = eff.iloc[0]
    def pct(r):
        if r.relative_change != r.relative_change:
            return "n/a"
        se = r.standard_error_of_change / r.value_independent if r.value_independent else float("nan")
        if se != se:
            return f"{100 * r.relative_change:+.1f}%"
        noise = " (within noise)" if abs(r.relative_change) < 2 * se else ""
        return f"{100 * r.relative_change:+.1f}% +- {100 * se:.1f}%{noise}"

    parts = []
    for metric, name in (("aep_loss", "PML AEP"), ("tvar_loss", "TVaR")):
        rows = eff[eff.metric == metric]
        parts.append(f"{name} " + "; ".join(f"{r.return_period_yr:g} yr {pct(r)}" for r in rows.itertuples()))
    aal = eff[eff.metric == "aal"].iloc[0]
    return [f"secondary uncertainty correlated within each {first.secondary_group.replace('_', ' ')} "
            f"(correlation {first.secondary_correlation:g}) against independent sampling on the same events and "
            f"ground motions, {basis.replace('_', '-')} (+- 1 standard error, batch means; within noise: under 2 "
            f"standard errors, more simulated years resolve it): " + "; ".join(parts) + ".",
            f"AAL {_money(aal.value_correlated)} vs {_money(aal.value_independent)} independent: change "
            f"{_money(aal.change)} +- {_money(aal.standard_error_of_change)} (paired standard error; "
            "the expected change is zero)."]


def _portfolio_lines(run, manifest, cur):
    """AAL with its standard error, PML (AEP and OEP) and TVaR, and the built-in cross-checks."""
    summ = run.table("portfolio_summary").set_index("basis")
    ep = run.table("portfolio_ep")
    gu = summ.loc["ground_up"]
    tree = run.has("portfolio_branch_summary")
    scope = (f"whole logic tree, {run.table('portfolio_branch_summary').source_branch.size // 2} branch combinations "
             "by weight" if tree else f"source branch '{gu.source_branch}' only")
    lines = ["", f"  event-based portfolio: {int(gu.n_years)} simulated years, {int(gu.n_events)} events "
                 f"({scope}, seed {int(gu.seed)}, {loss_model_label(gu)})"]
    for basis in ("ground_up", "net"):
        row = summ.loc[basis]
        lines.append(f"  AAL {basis.replace('_', '-'):<10} {_money(row.aal):>14} {cur}/yr  +- {_money(row.aal_standard_error)}"
                     " (1 standard error)")
    lines.append(f"  {'return period':>15} {'PML AEP':>16} {'PML OEP':>16} {'TVaR (AEP)':>16}   basis")
    for r in ep.itertuples():
        fmt = lambda v: "n/a" if v != v else _money(v)
        lines.append(f"  {r.return_period_yr:>12g} yr {fmt(r.aep_loss):>16} {fmt(r.oep_loss):>16} "
                     f"{fmt(r.tvar_loss):>16}   {r.basis.replace('_', '-')}")
    if tree:
        lines += _branch_fractile_lines(run.table("portfolio_branch_fractiles"), cur)
    lines += [f"  {line}" for line in correlation_effect_lines(run)]
    checks = manifest.get("cross_checks") or {}
    a = checks.get("asset_aal_vs_classical_eal")
    p = checks.get("portfolio_aal_vs_classical_eal")
    h = checks.get("event_hazard_vs_classical")
    if p:
        lines.append(f"  cross-check, portfolio: event-based AAL {_money(p['event_based_aal'])} vs classical EAL of "
                     f"{'all branches' if tree else 'the same branch'} {_money(p['classical_eal'])} {cur}/yr, "
                     f"z = {p['z']:+.2f} "
                     f"({'within' if p['passed'] else 'OUTSIDE'} 3 standard errors)")
    n = checks.get("portfolio_net_aal_vs_classical_net_eal")
    if n:
        lines.append(f"  cross-check, net: event-based net AAL {_money(n['event_based_aal'])} vs classical net EAL of "
                     f"{'all branches' if tree else 'the same branch'} {_money(n['classical_eal'])} {cur}/yr, "
                     f"z = {n['z']:+.2f} "
                     f"({'within' if n['passed'] else 'OUTSIDE'} 3 standard errors)")
    if a:
        lines.append(f"  cross-check, assets: {a['within_3_standard_errors']} of {a['assets']} within 3 standard "
                     f"errors of their classical EAL (max |z| {a['max_abs_z']:.2f})")
    if h:
        lines.append(f"  cross-check, hazard: {h['within_3_standard_errors']} of {h['compared_points']} event-based "
                     f"exceedance rates above {h['rate_threshold_per_yr']:.1e}/yr within 3 standard errors of the "
                     f"classical curves (max |z| {h['max_abs_z']:.2f})")
    return lines


def _branch_fractile_lines(frac, cur):
    """Ground-up AAL and PML (AEP) fractiles across logic-tree branch combinations."""
    gu = frac[frac.basis == "ground_up"]
    qs = sorted(set(gu.fractile))
    head = "/".join(f"{q * 100:g}" for q in qs)
    aal = gu[gu.metric == "aal"].sort_values("fractile")
    fmt = lambda v: "n/a" if v != v else _money(v)
    lines = [f"  across branches ({head}% fractiles): AAL ground-up {' / '.join(fmt(v) for v in aal.value)} {cur}/yr"]
    pml = gu[gu.metric == "aep_loss"]
    for rp, grp in pml.groupby("return_period_yr"):
        lines.append(f"  {'':>14}PML AEP {rp:>6g} yr {' / '.join(fmt(v) for v in grp.sort_values('fractile').value)}")
    return lines


def _programme_lines(run, cur):
    """Programme AAL after group terms and the layer table (only when [programme] was set)."""
    if not run.has("programme_summary"):
        return []
    ps = run.table("programme_summary").set_index("basis")
    lines = ["", f"  programme: AAL net of building terms {_money(ps.loc['net', 'aal'])}, after group terms "
                 f"{_money(ps.loc['programme', 'aal'])} {cur}/yr ({int(ps.loc['programme', 'n_groups'])} terms groups);"
                 " the layers take the latter, event by event"]
    if ps.loc["programme", "loss_model"] == "mean_damage_ratio":
        lines.append("  note: mean-damage-ratio loss model: group terms and layers see the ground-motion variability "
                     "but not the damage and loss-ratio uncertainty given the shaking")
    if run.has("layer_summary"):
        ls, ep = run.table("layer_summary"), run.table("layer_ep")
        lines.append(f"  {'layer':<12}{'kind':<11}{'attachment':>14}{'limit':>14}{'reinst.':>8}{'E[loss]/yr':>13}"
                     f"{'P(attach)':>11}{'P(exhaust)':>11}")
        for r in ls.itertuples():
            lim = "unlimited" if r.limit == float("inf") else _money(r.limit)
            rein = "-" if r.layer_kind == "aggregate" else ("unl." if r.reinstatements != r.reinstatements
                                                            else f"{r.reinstatements:g}")
            lines.append(f"  {r.layer_id:<12}{r.layer_kind:<11}{_money(r.attachment):>14}{lim:>14}{rein:>8}"
                         f"{_money(r.expected_annual_loss):>13}{r.prob_attachment:>11.4f}{r.prob_exhaustion:>11.4f}")
        top = ep[ep.return_period_yr == ep.return_period_yr.max()]
        if len(top):
            lines.append(f"  layer loss at {top.return_period_yr.iloc[0]:g} yr (AEP): " + ", ".join(
                f"{r.layer_id} {'n/a' if r.aep_layer_loss != r.aep_layer_loss else _money(r.aep_layer_loss)}"
                for r in top.itertuples()) + f" {cur}")
    return lines


def _cache_lines(manifest):
    """One line saying what was recomputed and what came from the content cache."""
    stats = manifest.get("cache") or {}
    if not stats:
        return []
    parts = [f"{name.replace('_', ' ')} {v['computed']} computed / {v['from_cache']} from cache"
             for name, v in stats.items()]
    if all(v["computed"] == 0 for v in stats.values()):
        return ["", "  inputs unchanged for every stage: nothing recomputed (" + "; ".join(parts) + ")"]
    return ["", "  cache: " + "; ".join(parts)]


def _screening_lines(run, cfg, top_n):
    """Assets above the collapse target (count and the worst few) and the risk-targeted IM range."""
    if not run.has("collapse_screening"):
        return []
    scr = run.table("collapse_screening")
    sc = cfg.get("screening") or {}
    target_p = scr.target_prob.iloc[0] if len(scr) else sc.get("collapse_target_prob", float("nan"))
    target_t = scr.target_years.iloc[0] if len(scr) else sc.get("collapse_target_years", float("nan"))
    flagged = scr[scr.exceeds_target].sort_values(["ratio_to_target", "asset_id"], ascending=[False, True])
    unscreened = int(scr.collapse_prob_in_target_years.isna().sum())  # vulnerability classes: no collapse figure
    lines = ["", f"  collapse-risk screening: {len(flagged)} of {len(scr) - unscreened} assets exceed the target of "
                 f"{target_p:.2%} collapse probability in {target_t:g} years"
             + (f" ({unscreened} assets without damage states not screened)" if unscreened else "")]
    for r in flagged.head(min(3, top_n)).itertuples():
        lines.append(f"    {r.asset_id:<12}{r.building_class:<10}{r.site_id:<8}P({target_t:g} yr) "
                     f"{r.collapse_prob_in_target_years:.4f}  {r.ratio_to_target:.1f} x target")
    if run.has("site_risk_targeted_im"):
        rt = run.table("site_risk_targeted_im")
        lines.append(f"  risk-targeted IM [g] across sites (min / median / max; generic collapse fragility beta "
                     f"{sc.get('rt_beta', float('nan')):g}, {sc.get('rt_prob_at_im', float('nan')):.0%} at the IM), "
                     "risk coefficient vs 2% in 50 yr:")
        for im, grp in rt.groupby("im", sort=True):
            v, c = grp.risk_targeted_im_g.dropna(), grp.risk_coefficient.dropna()
            text = f"{v.min():.3f} / {v.median():.3f} / {v.max():.3f}" if len(v) else "not bracketed"
            coef = f"   coefficient {c.min():.2f} - {c.max():.2f}" if len(c) else ""
            flagged_sites = int((grp.flag != "ok").sum())
            lines.append(f"    {im:<8} {text}{coef}" + (f"   ({flagged_sites} sites flagged)" if flagged_sites else ""))
    return lines


def _whatif_lines(run, cur):
    """One short block per retrofit alternative: EAL, collapses, event-based change, benefit-cost."""
    if not run.has("whatif_benefit_cost"):
        return []
    bc = run.table("whatif_benefit_cost")
    port = run.table("whatif_portfolio")
    assets = run.table("whatif_assets")
    lines = ["", "  retrofit what-if (each alternative against this run):"]
    for r in bc[bc.scope == "alternative"].itertuples():
        sel = assets[assets.alternative_id == r.alternative_id]
        p = port[port.alternative_id == r.alternative_id].set_index(["metric", "basis"], drop=False)
        eal = p.loc[("eal", "classical")]
        col = p.loc[("expected_collapses_in_horizon", "classical")]
        flag = p.loc[("assets_exceeding_collapse_target", "classical")]
        moves = ", ".join(f"{a} -> {b}" for a, b in sorted(set(zip(sel.building_class, sel.new_class))))
        lines.append(f"  '{r.alternative_id}': {int(r.n_assets)} assets ({moves}); "
                     f"{int((~sel.fragility_changed).sum())} unchanged")
        lines.append(f"    classical EAL {_money(eal.value_before)} -> {_money(eal.value_after)} {cur}/yr "
                     f"({eal.relative_change:+.1%}); expected collapses in the horizon {col.value_before:.2f} -> "
                     f"{col.value_after:.2f}; assets above the collapse target {int(flag.value_before)} -> "
                     f"{int(flag.value_after)}")
        if ("aal", "ground_up") in p.index:
            aal = p.loc[("aal", "ground_up")]
            ep = p[(p.metric == "aep_loss") & (p.basis == "ground_up")].sort_values("return_period_yr")
            pml = "; ".join(f"{row.return_period_yr:g} yr {row.relative_change:+.1%}" for row in ep.itertuples())
            lines.append(f"    event-based AAL ground-up {_money(aal.change)} {cur}/yr +- "
                         f"{_money(aal.standard_error_of_change)} (same events); PML AEP change: {pml}")
        bcr = "n/a" if r.benefit_cost_ratio != r.benefit_cost_ratio else f"{r.benefit_cost_ratio:.2f}"
        lines.append(f"    benefit-cost over {r.benefit_horizon_yr:g} yr at {r.discount_rate:.1%}: PV of avoided loss "
                     f"{_money(r.pv_avoided_loss)} vs retrofit cost {_money(r.retrofit_cost)} {cur}: BCR {bcr}")
    return lines


def _net_eal_line(loss, cur):
    """Portfolio EAL net of the per-event deductibles and limits (older runs lack the column)."""
    if "eal_net" not in loss:
        return []
    return [f"  portfolio EAL net of deductibles and limits (classical) {_money(loss.eal_net.sum())} {cur}/yr"]


def summary_text(run_dir, *, elapsed_s=None):
    """The printed summary of a run: caution, assets, EAL, riskiest assets, hazard, portfolio, what-if, cache.

    Parameters
    ----------
    run_dir : path-like
        The run folder.
    elapsed_s : float, optional
        Wall time of the run [s], printed with the folder.

    Returns
    -------
    str
        Lines of plain text, amounts in the run's currency.
    """
    run = RunFolder(run_dir)
    run_dir = run.path
    manifest = run.manifest
    cfg = manifest["config"]
    cur = cfg["scenario"]["currency"]
    horizon = cfg["scenario"]["horizon_yr"]
    top_n = cfg["output"]["top_assets"]
    head = [CAUTION, "", f"quakefolio run {manifest['run_id']}  scenario: {manifest['scenario']}"]
    hazard = _hazard_lines(run, manifest)
    timing = f" in {elapsed_s:.1f} s" if elapsed_s is not None else ""
    if manifest.get("stages") == "hazard":
        return _text(head + hazard + ["", f"  run folder (hazard stage only){timing}: {run_dir}"])
    loss = run.table("asset_loss")
    total_value = loss.replacement_value.sum()
    eal = loss.eal.sum()
    lines = head + [
        f"  assets {len(loss)}   classes {loss.building_class.nunique()}   hazard sites used "
        f"{loss.site_id.nunique()}   total replacement value {_money(total_value)} {cur}",
        f"  portfolio EAL (classical, sum of per-asset EAL) {_money(eal)} {cur}/yr  "
        f"({1000 * eal / total_value:.3f} per mille of value)",
        *_net_eal_line(loss, cur),
        "",
        f"  {top_n} assets with the highest collapse probability in {horizon:g} years:",
        f"  {'asset_id':<12}{'class':<10}{'site':<8}{'collapse/yr':>13}{'P(' + format(horizon, 'g') + ' yr)':>12}"
        f"{'EAL ' + cur:>14}",
    ]
    with_states = loss[loss.collapse_prob_in_horizon.notna()]  # NaN: a class without damage states
    top = with_states.sort_values(["collapse_prob_in_horizon", "asset_id"], ascending=[False, True]).head(top_n)
    for r in top.itertuples():
        lines.append(f"  {r.asset_id:<12}{r.building_class:<10}{r.site_id:<8}{r.annual_collapse_rate:>13.3e}"
                     f"{r.collapse_prob_in_horizon:>12.4f}{_money(r.eal):>14}")
    if len(with_states) < len(loss):
        lines.append(f"  ({len(loss) - len(with_states)} assets of classes given by a vulnerability table have no "
                     "damage states, hence no collapse figures)")
    for w in manifest.get("warnings", []):
        lines.append(f"  note: {w}")
    lines += _screening_lines(run, cfg, top_n)
    lines += hazard
    if run.has("portfolio_summary"):
        lines += _portfolio_lines(run, manifest, cur)
        lines += _programme_lines(run, cur)
    lines += _whatif_lines(run, cur)
    lines += people_lines(run, cur)
    lines += _cache_lines(manifest)
    lines.append("")
    lines.append(f"  run folder{timing}: {run_dir}")
    return _text(lines)


def _text(lines):
    """The lines joined; a control character inside a line (from a name in the inputs) is shown escaped."""
    return "\n".join(one_line(line) for line in lines)


def people_lines(run, cur):
    """Casualties, downtime and losses by coverage (classical; event-based and what-if where present).

    Parameters
    ----------
    run : RunFolder
    cur : str
        Currency of the run.

    Returns
    -------
    list of str
    """
    if not run.has("portfolio_consequences"):
        return []
    t = run.table("portfolio_consequences").set_index("metric")
    cas, down = t.loc["casualties"], t.loc["downtime_days"]
    fraction = run.table("asset_consequences").mean_present_fraction.iloc[0]
    lines = ["", f"  people and time (classical; mean share of occupants present {fraction:.3f}):",
             f"    expected casualties {cas.classical_annual_mean:.4g} persons/yr ({int(cas.assets_left_out)} assets "
             f"without occupants or casualty rates left out); expected downtime {down.classical_annual_mean:,.1f} "
             f"building-days/yr",
             "    EAL by coverage (" + "; ".join(f"{m.split('_')[0]} {_money(t.loc[m, 'classical_annual_mean'])}"
                                           for m in ("building_loss", "contents_loss", "interruption_loss"))
             + f" {cur}/yr); deductible and limit apply to the building coverage only"]
    if run.has("consequence_event_summary"):
        scope = "all branches" if run.has("portfolio_branch_summary") else "same branch"
        ev = run.table("consequence_event_summary").set_index("metric")
        ep = run.table("consequence_ep")
        for metric, unit in (("casualties", "persons"), ("downtime_days", "building-days")):
            r = ev.loc[metric]
            pml = ep[ep.metric == metric].dropna(subset=["aep_value"])
            at = ", ".join(f"{p.return_period_yr:g} yr {p.aep_value:,.1f}" for p in pml.itertuples())
            lines.append(f"    event-based {metric.replace('_days', '')}: {r.annual_average:.4g} {unit}/yr +- "
                         f"{r.standard_error:.2g} (classical, {scope} {r.classical_same_branch:.4g}); "
                         f"annual total at {at or 'no return period within the simulated years'}")
    if run.has("whatif_people"):
        for r in run.table("whatif_people").query("scope == 'alternative'").itertuples():
            lines.append(f"    what-if '{r.alternative_id}': avoided casualties {r.avoided_casualties:.4g} persons/yr, "
                         f"downtime {r.avoided_downtime_days:,.1f} building-days/yr; benefit-cost with every "
                         f"benefit {r.benefit_cost_ratio_all:.2f} ({r.benefits_counted})")
    return lines
