"""Report section on portfolio results: event-based losses (screening and what-if: sections_retrofit)."""
from __future__ import annotations

from quakefolio.pipeline.report.figures import _ep_curve_figure, _figure_html
from quakefolio.pipeline.report.html import _cell, _money, _note, _p, _pct, _table
from quakefolio.pipeline.summary import loss_model_label
from quakefolio.pipeline.report.sections_programme import programme_html


def _section_portfolio(run):
    """Section: event-based portfolio loss: EP curves, AAL with its standard error, PML and TVaR, breakdown.

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    str
        HTML of the section body; a note when the run holds no such tables.
    """
    summ, ep = run.table("portfolio_summary"), run.table("portfolio_ep")
    if summ is None or ep is None:
        if run.manifest.get("stages") == "hazard":
            why = "this run is the hazard stage only"
        elif run.section("hazard").get("mode") != "compute":
            why = "hazard was tabulated from a file, and simulated events need a source model (computed hazard)"
        else:
            why = "the event-based stage is off ([portfolio] event_based = false)"
        return _note(f"No event-based tables in this run: {why}. Loss-exceedance curves, AAL, PML and TVaR of the "
                     "portfolio need the simulated event set; per-asset EAL above is classical.")
    cur = run.currency
    s = summ.set_index("basis")
    gu = s.loc["ground_up"] if "ground_up" in s.index else s.iloc[0]
    n_years = int(gu.n_years)
    branches = run.table("portfolio_branch_summary")
    scope = ("the whole logic tree: every source-model and ground-motion branch combination by weight, each "
             "simulated year one combination, so the curves below are the weighted-mean EP"
             if branches is not None else f"source branch '{gu.source_branch}' only (per-branch mode), ground-motion "
             "model drawn per event by weight")
    out = [_p(f"{n_years:,} simulated years, {int(gu.n_events):,} events covering {scope} (seed "
              f"{int(gu.seed)}, loss model: {loss_model_label(gu)}). Ground-up: before deductibles "
              f"and limits; net: after the per-asset policy terms.")]
    curve = run.table("portfolio_ep_curve")
    rps = sorted(set(ep.return_period_yr))
    if curve is not None and len(curve):
        out.append(_figure_html(
            _ep_curve_figure(curve, rps, n_years, cur), "portfolio loss exceedance curves",
            f"Figure: portfolio loss [million {cur}] against return period [yr], log x. AEP: aggregate loss of a year; "
            f"OEP (lighter, dashed): largest single event of a year; it runs close to AEP where one event "
            f"dominates the year's loss. Dotted lines: configured return periods. Grey: return periods "
            f"beyond {n_years / 10:,.0f} yr, where fewer than 10 simulated years exceed the loss."))
    rows = []
    for basis, r in s.iterrows():
        classical = r.get("classical_eal_same_branch", float("nan"))
        rows.append([basis.replace("_", "-"), _cell(_money(r.aal), r.aal),
                     _cell(_money(r.aal_standard_error), r.aal_standard_error),
                     _cell(_pct(r.aal_standard_error / r.aal) if r.aal else "n/a",
                           r.aal_standard_error / r.aal if r.aal else float("nan")),
                     _cell(_money(classical), classical)])
    out.append("<h3>Average annual loss</h3>")
    out.append(_table(["basis", f"AAL [{cur}/yr]#", f"± 1 standard error [{cur}/yr]#", "relative s.e.#",
                       f"classical EAL, {'all branches' if branches is not None else 'same branch'} [{cur}/yr]#"],
                      rows))
    if branches is not None:
        out.append(_branch_section(branches, run.table("portfolio_branch_fractiles"), cur))
    out.append("<h3>Probable maximum loss and TVaR</h3>")
    rows = []
    for r in ep.sort_values(["basis", "return_period_yr"], key=lambda c: c.map({"ground_up": 0, "net": 1})
                            if c.name == "basis" else c).itertuples():
        rows.append([r.basis.replace("_", "-"), _cell(f"{r.return_period_yr:,.0f}", r.return_period_yr),
                     _cell(_money(r.aep_loss), r.aep_loss), _cell(_money(r.oep_loss), r.oep_loss),
                     _cell(_money(r.tvar_loss), r.tvar_loss)])
    out.append(_table(["basis", "return period [yr]#", f"PML, aggregate (AEP) [{cur}]#",
                       f"PML, occurrence (OEP) [{cur}]#", f"TVaR, aggregate [{cur}]#"], rows))
    out.append(_p("PML: the loss exceeded with annual probability 1/T (empirical order statistic of the simulated "
                  "years). TVaR: the mean annual aggregate loss given that it exceeds the PML at T."))
    out += _correlation_effect_html(run, cur)
    brk = run.table("portfolio_breakdown")
    if brk is not None and len(brk):
        out.append("<h3>AAL by building class and by source</h3>")
        rows = [[r.dimension.replace("_", " "), r.key, _cell(_money(r.aal_ground_up), r.aal_ground_up),
                 _cell(_money(r.aal_net), r.aal_net)]
                for r in brk.sort_values(["dimension", "aal_ground_up"], ascending=[True, False]).itertuples()]
        out.append(_table(["by", "key", f"AAL ground-up [{cur}/yr]#", f"AAL net [{cur}/yr]#"], rows, sortable=True))
    out.append(programme_html(run))
    return "".join(out)


def _branch_section(branches, frac, cur):
    """Per branch combination: weight, years, AAL against its classical EAL; fractiles across branches."""
    rows = [[r.source_branch, r.gmm, _cell(f"{r.weight:.3g}", r.weight), _cell(f"{r.n_years:,}", r.n_years),
             _cell(_money(r.aal), r.aal), _cell(_money(r.aal_standard_error), r.aal_standard_error),
             _cell(_money(r.classical_eal), r.classical_eal), _cell(f"{r.z_score:+.2f}", r.z_score)]
            for r in branches[branches.basis == "ground_up"].itertuples()]
    out = ["<h3>Logic-tree branches</h3>",
           _table(["source model", "ground-motion model", "weight#", "years#", f"AAL ground-up [{cur}/yr]#",
                   f"± 1 s.e. [{cur}/yr]#", f"classical EAL [{cur}/yr]#", "z#"], rows)]
    gu = frac[frac.basis == "ground_up"]
    qs = sorted(set(gu.fractile))
    rows = []
    for (metric, rp), grp in gu.groupby(["metric", "return_period_yr"], dropna=False, sort=False):
        vals = grp.sort_values("fractile").value.tolist()
        label = {"aal": "AAL", "aep_loss": "PML, aggregate", "oep_loss": "PML, occurrence", "tvar_loss": "TVaR"}[metric]
        rows.append([label, _cell("" if rp != rp else f"{rp:,.0f}", rp)]
                    + [_cell("n/a" if v != v else _money(v), v) for v in vals])
    out.append(_table(["ground-up", "return period [yr]#"] + [f"{q * 100:g}% [{cur}; AAL {cur}/yr]#" for q in qs],
                      rows))
    out.append(_p("Fractiles across the branch combinations by weight (the smallest branch value whose cumulative "
                  "weight reaches the fractile), each branch from its own years; n/a where a branch has fewer "
                  "years than the return period."))
    return "".join(out)


def _correlation_effect_html(run, cur):
    """Subsection: PML, TVaR and AAL with correlated secondary uncertainty against independent sampling."""
    eff = run.table("portfolio_correlation_effect")
    if eff is None or not len(eff):
        return []
    first = eff.iloc[0]
    group = str(first.secondary_group).replace("_", " ")
    names = {"aal": f"AAL [{cur}/yr]", "aep_loss": f"PML AEP [{cur}]", "oep_loss": f"PML OEP [{cur}]",
             "tvar_loss": f"TVaR [{cur}]"}
    rows = []
    for r in eff.itertuples():
        rp = "" if r.return_period_yr != r.return_period_yr else f"{r.return_period_yr:,.0f}"
        se = "" if r.standard_error_of_change != r.standard_error_of_change else _money(r.standard_error_of_change)
        rows.append([r.basis.replace("_", "-"), names[r.metric], _cell(rp, r.return_period_yr),
                     _cell(_money(r.value_correlated), r.value_correlated),
                     _cell(_money(r.value_independent), r.value_independent),
                     _cell(_pct(r.relative_change, signed=True), r.relative_change),
                     _cell(se, r.standard_error_of_change)])
    return ["<h3>Correlated secondary uncertainty</h3>",
            _p(f"The headline numbers above sample damage states and loss ratios with a correlation of "
               f"{first.secondary_correlation:g} between the buildings of one {group} in each event (one-factor "
               f"Gaussian copula on the damage-state and loss-ratio draws; the default of 0.3 is an assumption, not a "
               f"published calibration). Below, the same events and ground motions with independent draws (the "
               f"same random numbers for each building, the shared group factor left out): the correlation leaves "
               f"each building's mean loss, hence the AAL, unchanged in expectation and widens the tail. The "
               f"standard error of each change comes from batch means of the paired simulated years; a change "
               f"smaller than two standard errors is not distinguishable from zero at this number of years."),
            _table(["basis", "metric", "return period [yr]#", "correlated#", "independent#", "relative change#",
                    f"paired s.e. of the change [{cur}, AAL {cur}/yr]#"], rows)]
