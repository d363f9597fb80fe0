"""Report section on people and time: casualties, downtime, losses by coverage, avoided by the what-if."""
from __future__ import annotations

from quakefolio.pipeline.report.html import _cell, _money, _note, _p, _table

__all__ = ["_section_people"]


def _num(x, fmt="{:,.4g}"):
    return _cell("n/a" if x != x else fmt.format(x), x)


def _section_people(run):
    """Section: expected casualties and downtime, losses by coverage, event-based EP, what-if benefits.

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    str
        HTML of the section body; a note when the run holds no such tables.
    """
    totals = run.table("portfolio_consequences")
    if totals is None:
        return _note("This run holds no people-and-time tables (hazard stage only, or written before they existed).")
    cur = run.currency
    assets = run.table("asset_consequences", columns=["mean_present_fraction"])
    fraction = float(assets.mean_present_fraction.iloc[0]) if assets is not None and len(assets) else 1.0
    out = [_p(f"Classical annual expectations of the same model as the EAL (rate of being in each damage state "
              f"times its consequence). Casualties count the occupants present: mean share {fraction:.3f} over the "
              f"day ([exposure] occupancy_periods; 1 when not given). Deductible and limit apply to the building "
              f"coverage only; contents and interruption losses are ground-up.")]
    rows = [[r.metric.replace("_", " "), r.unit, _num(r.classical_annual_mean), _cell(f"{r.assets_counted}",
             r.assets_counted), _cell(f"{r.assets_left_out}", r.assets_left_out)] for r in totals.itertuples()]
    out.append(_table(["metric", "unit", "expected per year#", "assets counted#", "assets left out#"], rows))
    ev, ep = run.table("consequence_event_summary"), run.table("consequence_ep")
    if ev is not None and ep is not None:
        rows = [[r.metric.replace("_", " "), r.unit, _num(r.annual_average), _num(r.standard_error, "{:,.2g}"),
                 _num(r.classical_same_branch), _num(r.z, "{:+.2f}")] for r in ev.itertuples()]
        tree = run.table("portfolio_branch_summary") is not None
        out.append(_p("Event-based annual averages against the classical expectation of "
                      f"{'every logic-tree branch by weight' if tree else 'the same source branch'}."))
        out.append(_table(["metric", "unit", "event-based#", "standard error#",
                           f"classical, {'all branches' if tree else 'same branch'}#", "z#"], rows))
        rows = [[r.metric.replace("_", " "), r.unit, _cell(f"{r.return_period_yr:,.0f}", r.return_period_yr),
                 _num(r.aep_value), _num(r.oep_value), _num(r.tvar_value)] for r in ep.itertuples()]
        out.append(_table(["metric", "unit", "return period [yr]#", "annual total (AEP)#", "largest event (OEP)#",
                           "TVaR (AEP)#"], rows, sortable=True, scroll=True))
    people = run.table("whatif_people")
    if people is not None:
        rows = [[r.alternative_id, _num(r.avoided_casualties), _num(r.avoided_downtime_days, "{:,.1f}"),
                 _cell(_money(r.avoided_contents_eal + r.avoided_interruption_eal),
                       r.avoided_contents_eal + r.avoided_interruption_eal),
                 _num(r.pv_life_safety_benefit, "{:,.0f}"), _num(r.benefit_cost_ratio_all, "{:.2f}"),
                 r.benefits_counted] for r in people[people.scope == "alternative"].itertuples()]
        out.append(_p("Retrofit what-if: avoided per year, and the benefit-cost ratio with every benefit counted "
                      "(the ratio in the what-if section counts building repair cost only)."))
        out.append(_table(["alternative", "avoided casualties [persons/yr]#", "avoided downtime [building-days/yr]#",
                           f"avoided contents + interruption [{cur}/yr]#", f"PV life safety [{cur}]#",
                           "benefit-cost, all#", "counts"], rows, fit=True))
    return "".join(out)
