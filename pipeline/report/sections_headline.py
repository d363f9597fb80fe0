"""What each key figure of the report is and which one to quote for what: one plain sentence per figure,
naming the hazard branches and the loss model the run used (from its manifest and tables)."""
from __future__ import annotations

from quakefolio.pipeline.report.html import _esc, _money
from quakefolio.pipeline.summary import loss_model_label


def branches_used(run, summary_row=None):
    """The hazard branches behind the classical and the event-based figures, as two phrases.

    Parameters
    ----------
    run : ReportRun
    summary_row : pandas.Series, optional
        The ground-up row of ``portfolio_summary`` (None without the event stage).

    Returns
    -------
    classical : str
    event_based : str or None
    """
    tree = run.manifest.get("hazard_logic_tree") or {}
    src = [b.get("id", "") for b in tree.get("source_branches", [])]
    gmm = [g.get("id", "") for g in tree.get("gmm_branches", [])]
    regions = "".join(f"; {region.replace('_', ' ')} sources: {', '.join(g.get('id', '') for g in branches)}"
                      for region, branches in (tree.get("region_gmm_branches") or {}).items())
    if tree:
        classical = (f"the weighted mean hazard of all {len(src) * len(gmm)} end branches of the logic tree "
                     f"(source models {', '.join(src)}; ground-motion models {', '.join(gmm)}{regions})")
    else:
        hz = run.section("hazard")
        classical = f"the tabulated hazard curves of the input file (statistic '{hz.get('statistic', 'mean')}')"
    if summary_row is None:
        return classical, None
    branch = str(summary_row.get("source_branch", "all"))
    if branch == "all":
        event = (f"the whole logic tree by weight: each simulated year draws one combination of source model "
                 f"({', '.join(src)}) and ground-motion model ({', '.join(gmm)}{regions})")
    else:
        event = (f"source-model branch '{branch}' only (per-branch mode), the ground-motion model "
                 f"({', '.join(gmm)}{regions}) drawn per event by weight")
    return classical, event


def _loss_model_sentence(row):
    """How the event losses were drawn, in words."""
    if row is None:
        return ""
    if row.loss_model == "mean_damage_ratio":
        return ("each building's loss in an event is its mean loss given the event's ground motion (mean damage "
                "ratio; no secondary uncertainty)")
    return (f"each building's damage state and loss ratio are sampled in every event ({loss_model_label(row)}; "
            "one-factor Gaussian copula on the draws)")


def headline_notes(run, figures):
    """One sentence per key figure shown: what it is and what to quote it for.

    Parameters
    ----------
    run : ReportRun
    figures : set of str
        The key figures shown: ``eal``, ``eal_net``, ``aal``, ``pml``, ``tvar``, ``collapse``.

    Returns
    -------
    str
        HTML: a short list under the key figures (empty when none applies).
    """
    cur = run.currency
    summ = run.table("portfolio_summary")
    gu = None
    if summ is not None and "ground_up" in set(summ.basis):
        gu = summ.set_index("basis").loc["ground_up"]
    classical, event = branches_used(run, gu)
    items = []
    if "eal" in figures:
        items.append((f"Expected annual loss (EAL), classical [{cur}/yr]", f"quote this as the portfolio's "
                     f"expected annual loss. It is the mean ground-up loss per year (before deductibles and limits), "
                     f"integrated exactly over {classical}, with each damage state's mean damage ratio."))
    if "eal_net" in figures:
        items.append((f"Net EAL [{cur}/yr]", f"the same expectation of the loss after each building's deductible "
                     "and up to its limit, per event, taken over the loss distribution (not the terms applied to a "
                     "mean); quote it for what the per-building cover pays, the ground-up EAL for the whole loss."))
    if "aal" in figures and gu is not None:
        items.append((f"Average annual loss (AAL), event-based [{cur}/yr]", f"the mean of {int(gu.n_years):,} "
                     f"simulated years over {event}; {_loss_model_sentence(gu)}. It is the simulation's check on "
                     f"the classical EAL (they differ by sampling error, "
                     f"± {_money(gu.aal_standard_error, cur + '/yr')}"
                     " at one standard error) and the basis of PML and TVaR; do not quote it in place of the EAL."))
    if "pml" in figures:
        items.append((f"PML [{cur}]", f"the aggregate ground-up loss of one year exceeded with annual probability "
                     "1/T (once in T years on average), from the same simulated years; quote it for capital, "
                     "reinsurance or a loss scenario of that rarity. It is a loss in a year, not per year."))
    if "tvar" in figures:
        items.append((f"TVaR [{cur}]", f"the mean annual loss of the years whose loss exceeds the PML at the "
                     "same return period; quote it where the size of the tail matters, not only its threshold."))
    if "collapse" in figures:
        items.append(("Highest collapse probability", f"of one building, over the report's horizon (Poisson from "
                     "its annual collapse rate); see the riskiest buildings and the screening sections."))
    if not items:
        return ""
    return ('<details open class="explain" id="key-notes">'
            "<summary>What these figures are and which to quote</summary><ul>"
            + "".join(f"<li><b>{_esc(k)}</b>: {_esc(t)}</li>" for k, t in items) + "</ul></details>")


