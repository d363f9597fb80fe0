"""The short printed summary of a finished run (read through :class:`~quakefolio.pipeline.io.store.RunFolder`)."""
from __future__ import annotations

from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.io.store import RunFolder

__all__ = ["summary_text"]


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
                     f"branches ({sum(b['ruptures'] for b in tree['source_branches'])} ruptures in all)")
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


def _portfolio_lines(run, manifest, cur):
    """AAL with its standard error, PML (AEP and OEP) and TVaR, and the built-in cross-checks."""
    summ = run.table("portfolio_summary").set_index("basis")
    ep = run.table("portfolio_ep")
    gu = summ.loc["ground_up"]
    lines = ["", f"  event-based portfolio: {int(gu.n_years)} simulated years, {int(gu.n_events)} events "
                 f"(source branch '{gu.source_branch}', seed {int(gu.seed)}, {gu.loss_model.replace('_', ' ')})"]
    for basis in ("ground_up", "net"):
        row = summ.loc[basis]
        lines.append(f"  AAL {basis.replace('_', '-'):<10} {_money(row.aal):>14} {cur}/yr  +- {_money(row.aal_standard_error)}"
                     " (1 standard error)")
    lines.append(f"  {'return period':>15} {'PML AEP':>16} {'PML OEP':>16} {'TVaR (AEP)':>16}   basis")
    for r in ep.itertuples():
        fmt = lambda v: "n/a" if v != v else _money(v)
        lines.append(f"  {r.return_period_yr:>12g} yr {fmt(r.aep_loss):>16} {fmt(r.oep_loss):>16} "
                     f"{fmt(r.tvar_loss):>16}   {r.basis.replace('_', '-')}")
    checks = manifest.get("cross_checks") or {}
    a = checks.get("asset_aal_vs_classical_eal")
    p = checks.get("portfolio_aal_vs_classical_eal")
    h = checks.get("event_hazard_vs_classical")
    if p:
        lines.append(f"  cross-check, portfolio: event-based AAL {_money(p['event_based_aal'])} vs classical EAL of the "
                     f"same branch {_money(p['classical_eal'])} {cur}/yr, z = {p['z']:+.2f} "
                     f"({'within' if p['passed'] else 'OUTSIDE'} 3 standard errors)")
    n = checks.get("portfolio_net_aal_vs_classical_net_eal")
    if n:
        lines.append(f"  cross-check, net: event-based net AAL {_money(n['event_based_aal'])} vs classical net EAL of the same branch "
                     f"{_money(n['classical_eal'])} {cur}/yr, z = {n['z']:+.2f} "
                     f"({'within' if n['passed'] else 'OUTSIDE'} 3 standard errors)")
    if a:
        lines.append(f"  cross-check, assets: {a['within_3_standard_errors']} of {a['assets']} within 3 standard "
                     f"errors of their classical EAL (max |z| {a['max_abs_z']:.2f})")
    if h:
        lines.append(f"  cross-check, hazard: {h['within_3_standard_errors']} of {h['compared_points']} event-based "
                     f"exceedance rates above {h['rate_threshold_per_yr']:.1e}/yr within 3 standard errors of the "
                     f"classical curves (max |z| {h['max_abs_z']:.2f})")
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
    lines = ["", f"  collapse-risk screening: {len(flagged)} of {len(scr)} assets exceed the target of "
                 f"{target_p:.2%} collapse probability in {target_t:g} years"]
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
        return "\n".join(head + hazard + ["", f"  run folder (hazard stage only){timing}: {run_dir}"])
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
    top = loss.sort_values(["collapse_prob_in_horizon", "asset_id"], ascending=[False, True]).head(top_n)
    for r in top.itertuples():
        lines.append(f"  {r.asset_id:<12}{r.building_class:<10}{r.site_id:<8}{r.annual_collapse_rate:>13.3e}"
                     f"{r.collapse_prob_in_horizon:>12.4f}{_money(r.eal):>14}")
    for w in manifest.get("warnings", []):
        lines.append(f"  note: {w}")
    lines += _screening_lines(run, cfg, top_n)
    lines += hazard
    if run.has("portfolio_summary"):
        lines += _portfolio_lines(run, manifest, cur)
    lines += _whatif_lines(run, cur)
    lines += _cache_lines(manifest)
    lines.append("")
    lines.append(f"  run folder{timing}: {run_dir}")
    return "\n".join(lines)
