"""Report subsection on the programme terms above the building: group terms and layers."""
from __future__ import annotations

from quakefolio.pipeline.report.html import _cell, _money, _p, _prob, _table

__all__ = ["programme_html"]


def _limit(x):
    return "unlimited" if x == float("inf") else _money(x)


def programme_html(run):
    """HTML of the programme subsection of the portfolio section ("" without ``[programme]``).

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    str
        AAL after building and after group terms, the layer table (terms, expected annual
        layer loss, probabilities of attachment and exhaustion) and layer EP values.
    """
    ps = run.table("programme_summary")
    if ps is None or not len(ps):
        return ""
    cur = run.currency
    s = ps.set_index("basis")
    out = ["<h3>Programme terms and layers</h3>",
           _p(f"AAL net of building terms {_money(s.loc['net', 'aal'])} {cur}/yr; after the group terms of "
              f"{int(s.loc['programme', 'n_groups'])} terms groups {_money(s.loc['programme', 'aal'])} {cur}/yr. "
              "The layers take this programme loss event by event (occurrence layers, with the annual cap of "
              "limit x (1 + reinstatements)) or its annual sum (aggregate layers)." +
              (" Loss model: mean damage ratio, so terms and layers see the ground-motion variability but not "
               "the damage and loss-ratio uncertainty given the shaking." if s.loc["programme", "loss_model"]
               == "mean_damage_ratio" else ""))]
    ls = run.table("layer_summary")
    if ls is not None and len(ls):
        rows = [[r.layer_id, r.layer_kind, _cell(_money(r.attachment), r.attachment), _cell(_limit(r.limit), r.limit),
                 "-" if r.layer_kind == "aggregate" else ("unlimited" if r.reinstatements != r.reinstatements
                                                          else f"{r.reinstatements:g}"),
                 _cell(_money(r.expected_annual_loss), r.expected_annual_loss),
                 _cell(_money(r.expected_annual_loss_standard_error), r.expected_annual_loss_standard_error),
                 _cell(_prob(r.prob_attachment), r.prob_attachment), _cell(_prob(r.prob_exhaustion), r.prob_exhaustion),
                 _cell(_prob(r.prob_annual_cap_used), r.prob_annual_cap_used)] for r in ls.itertuples()]
        out.append(_table(["layer", "kind", f"attachment [{cur}]#", f"limit [{cur}]#", "reinstatements",
                           f"expected layer loss [{cur}/yr]#", f"± 1 s.e. [{cur}/yr]#", "P(attach) per yr#",
                           "P(exhaust) per yr#", "P(annual cap used) per yr#"], rows, caption="Layers", fit=True))
        ep = run.table("layer_ep")
        rows = [[r.layer_id, _cell(f"{r.return_period_yr:,.0f}", r.return_period_yr),
                 _cell(_money(r.aep_layer_loss), r.aep_layer_loss), _cell(_money(r.oep_layer_loss), r.oep_layer_loss),
                 _cell(_money(r.tvar_layer_loss), r.tvar_layer_loss)] for r in ep.itertuples()]
        out.append(_table(["layer", "return period [yr]#", f"annual layer loss (AEP) [{cur}]#",
                           f"largest event layer loss (OEP) [{cur}]#", f"TVaR, annual [{cur}]#"], rows,
                          caption="Layer loss at the configured return periods", fit=True))
    return "".join(out)
