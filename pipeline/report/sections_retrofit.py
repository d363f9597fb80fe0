"""Report sections of the collapse-risk screening (in tiers) and the retrofit what-if (readable money, a verdict
per alternative, per-building benefit-cost, the retrofit class's fragility beside the original one)."""
from __future__ import annotations

import numpy as np

from quakefolio.pipeline.report.context import SCREENING_ROWS, top_rows
from quakefolio.pipeline.report.figures import _figure_html
from quakefolio.pipeline.report.figures_retrofit import retrofit_fragility_figure
from quakefolio.pipeline.report.html import _cell, _esc, _g, _money, _note, _p, _pct, _prob, _rate, _table

__all__ = ["TIERS", "screening_tiers", "_section_screening", "_section_whatif", "BCR_ROWS"]

#: Screening tiers: (label, lower bound, upper bound) of the ratio of the collapse probability to the target;
#: a ratio equal to a bound falls in the lower tier, so "above" means exactly ``exceeds_target``.
TIERS = (
    ("well below the target", 0.0, 0.5),
    ("near the target, not above it", 0.5, 1.0),
    ("above the target, up to twice it", 1.0, 2.0),
    ("well above the target, more than twice it", 2.0, np.inf),
)

#: The what-if lists this many buildings of best and of worst benefit-cost ratio (all when there are at most twice).
BCR_ROWS = 10


def screening_tiers(ratio):
    """The screening tier of each building from its ratio of collapse probability to the target.

    Parameters
    ----------
    ratio : array_like of float [-]
        Collapse probability in the target period over the target probability (``ratio_to_target``).

    Returns
    -------
    numpy.ndarray of int
        Index into :data:`TIERS` (0: at most half the target, 1: above half and at most the
        target, 2: above the target and at most twice it, 3: more than twice); -1 for NaN
        (a class without damage states is not screened).

    Notes
    -----
    Bounds at 1/2, 1 and 2 times the target: a factor-of-two band either side of the
    target (a screening convention of this report, not taken from a standard); a tier's
    upper bound belongs to it, so tiers 2 and 3 hold exactly the buildings with
    probability > target.
    """
    r = np.asarray(ratio, dtype=float)
    upper = np.array([t[2] for t in TIERS[:-1]])
    out = np.searchsorted(upper, r, side="left").astype(np.int64)
    out[np.isnan(r)] = -1
    return out


def _target_basis(run, p, years):
    """What the target means, in words: the config's ``target_basis`` or what the default stands for."""
    basis = str(run.section("screening").get("target_basis") or "").strip()
    if basis:
        return f"Where the target comes from (as the run's config states it, [screening] target_basis): {basis}."
    if abs(p - 0.01) < 1e-12 and abs(years - 50) < 1e-9:
        return ("This is the collapse-risk target ASCE/SEI 7-16 Chapter 21 sets for new buildings (the basis of its "
                "risk-targeted ground motions); existing buildings are often judged against a looser threshold. "
                "The run's config does not state another basis ([screening] target_basis).")
    return ("The target is set in the run's config ([screening] collapse_target_prob, collapse_target_years) without "
            "a stated basis ([screening] target_basis is empty).")


def _tier_tables(scr, target_p, target_t):
    """Counts and shares per tier, then per class and tier."""
    tiers = screening_tiers(scr.ratio_to_target.to_numpy(float))
    screened = tiers >= 0
    n = int(screened.sum())
    rows = []
    for k, (label, lo, hi) in enumerate(TIERS):
        count = int((tiers == k).sum())
        lo_p, hi_p = lo * target_p, hi * target_p
        bound = (f"P ≤ {_pct(hi_p)}" if k == 0 else f"P > {_pct(lo_p)}" if not np.isfinite(hi)
                 else f"{_pct(lo_p)} < P ≤ {_pct(hi_p)}")
        rows.append([label, bound, _cell(f"{count:,}", count),
                     _cell(_pct(count / n) if n else "n/a", count / n if n else float("nan"))])
    out = [_table(["tier", f"P(collapse in {target_t:g} yr)", "buildings#", "share#"], rows,
                  caption=f"Buildings per screening tier (target {_pct(target_p)} in {target_t:g} years; tier bounds "
                          "at half, once and twice the target)")]
    import pandas as pd

    index, uniques = pd.factorize(scr.building_class, use_na_sentinel=False)  # the class codes once, not one Python string per building
    labels = [str(u) for u in uniques]
    per_class = np.bincount(index, minlength=len(labels))
    per_tier = np.zeros((len(labels), len(TIERS)), dtype=np.int64)  # buildings per class and tier
    for k in range(len(TIERS)):
        per_tier[:, k] = np.bincount(index[tiers == k], minlength=len(labels))
    rows = []
    for i in sorted(range(len(labels)), key=labels.__getitem__):
        code, counts = labels[i], [int(c) for c in per_tier[i]]
        m = sum(counts)  # screened: in a tier
        above = counts[2] + counts[3]
        rows.append([code, _cell(f"{int(per_class[i]):,}", int(per_class[i]))] + [_cell(f"{c:,}", c) for c in counts]
                    + [_cell(_pct(above / m) if m else "not screened", above / m if m else float("nan"))])
    out.append(_table(["class", "buildings#", "well below#", "near, not above#", "above, ≤ 2x#", "well above, > 2x#",
                       "share above the target#"], rows, sortable=True,
                      caption="Screening tiers by building class"))
    return out, n, int((tiers >= 2).sum())


def _section_screening(run):
    """Section: collapse-risk screening in tiers, the target's meaning, and the risk-targeted IM at the used sites.

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    str
        HTML of the section body; a note when the run holds no such tables.
    """
    scr = run.table("collapse_screening")
    if scr is None or not len(scr):
        return _note("This run holds no screening table (hazard stage only).")
    target_p, target_t = float(scr.target_prob.iloc[0]), float(scr.target_years.iloc[0])
    rate = -np.log1p(-target_p) / target_t
    tables, n, above = _tier_tables(scr, target_p, target_t)
    unscreened = len(scr) - n
    out = [_p(f"Each building's annual collapse rate from this run, as a probability of collapse in {target_t:g} years "
              f"(Poisson: P = 1 - exp(-rate x {target_t:g})), against a target of {_pct(target_p)} in {target_t:g} "
              f"years (an annual collapse rate of {_rate(rate)} per year). {above:,} of {n:,} buildings "
              f"({_pct(above / n) if n else 'n/a'}) are above it."
              + (f" {unscreened} buildings of classes given by a vulnerability table have no damage states and are "
                 "not screened." if unscreened else "")),
           _p(_target_basis(run, target_p, target_t))]
    out += tables
    out += _whatif_moves(run)
    flagged = scr[scr.exceeds_target]
    shown = top_rows(flagged, "ratio_to_target", SCREENING_ROWS)
    rows = [[r.asset_id, r.building_class, r.site_id, _cell(_rate(r.annual_collapse_rate), r.annual_collapse_rate),
             _cell(_prob(r.collapse_prob_in_target_years), r.collapse_prob_in_target_years),
             _cell(f"{r.ratio_to_target:.2f}", r.ratio_to_target)] for r in shown.itertuples()]
    if rows:
        out.append(_table(["asset", "class", "site", "collapse rate [1/yr]#",
                           f"P(collapse in {target_t:g} yr)#", "ratio to target#"], rows, sortable=True,
                          caption="Buildings above the collapse-risk target, highest first" +
                                  (f" (first {len(shown)} of {len(flagged)}; all are in collapse_screening.parquet)"
                                   if len(flagged) > len(shown) else "")))
    out += _risk_targeted_html(run, target_p, target_t)
    return "".join(out)


def _whatif_moves(run):
    """One sentence per retrofit alternative: how many of its buildings it brings below the target."""
    assets = run.table("whatif_assets")
    if assets is None or not len(assets) or "exceeds_collapse_target_after" not in assets:
        return []
    parts = []
    for alt, g in assets.groupby("alternative_id", sort=False):
        before, after = int(g.exceeds_collapse_target_before.sum()), int(g.exceeds_collapse_target_after.sum())
        parts.append(f"'{alt}' brings {before - after:,} of its {before:,} buildings above the target below it "
                     f"({after:,} stay above)")
    return [_p("Retrofit what-if (next section): " + "; ".join(parts) + ".")]


def _risk_targeted_html(run, target_p, target_t):
    """The risk-targeted IM at the sites the portfolio uses (one row per IM)."""
    rt = run.table("site_risk_targeted_im")
    if rt is None or not len(rt):
        return []
    rt = rt[rt.statistic == ("mean" if "mean" in set(rt.statistic) else rt.statistic.iloc[0])]
    loss = run.table("asset_loss", columns=["site_id"])
    used = set(loss.site_id.unique()) if loss is not None else set(rt.site_id)
    rt = rt[rt.site_id.isin(used)]
    rows = []
    for im, grp in rt.groupby("im", sort=True):
        v, c = grp.risk_targeted_im_g.dropna(), grp.risk_coefficient.dropna()
        rows.append([im, len(grp), _g(v.min()) if len(v) else "n/a", _g(v.median()) if len(v) else "n/a",
                     _g(v.max()) if len(v) else "n/a", f"{c.min():.2f} to {c.max():.2f}" if len(c) else "n/a"])
    return [_table(["IM", "sites", "risk-targeted IM, min [g]", "median [g]", "max [g]",
                    "risk coefficient (to the 2%-in-50-yr IM)"], rows,
                   caption=f"Risk-targeted IM at the sites used by the portfolio: the IM at which a generic collapse "
                           f"fragility (ASCE/SEI 7-16 Section 21.2.1.2 form: 10% collapse probability at the IM, "
                           f"dispersion as configured) gives the target of {_pct(target_p)} in {target_t:g} years")]


# --- what-if -----------------------------------------------------------------------------------------

#: Plain names of the what-if's portfolio metrics (``whatif_portfolio.metric``).
_METRICS = {
    "eal": "Expected annual loss, classical",
    "expected_collapses_in_horizon": "Expected collapses in the horizon (sum of probabilities)",
    "assets_exceeding_collapse_target": "Buildings above the collapse target",
    "aal": "Average annual loss, event-based",
    "aep_loss": "Probable maximum loss, aggregate (AEP)",
    "oep_loss": "Probable maximum loss, occurrence (OEP)",
    "tvar_loss": "TVaR, aggregate",
}
_BASES = {"ground_up": "ground-up", "net": "net of policy terms", "classical": ""}


def metric_label(metric, basis, return_period_yr, unit):
    """A what-if metric's plain name with its basis, return period and unit.

    Parameters
    ----------
    metric : str
        ``whatif_portfolio.metric`` (e.g. ``aep_loss``).
    basis : str or None
        ``ground_up``, ``net``, ``classical`` or empty.
    return_period_yr : float
        NaN for metrics without one [yr].
    unit : str
        The row's unit (``USD/yr``, ``-`` ...).

    Returns
    -------
    str
        E.g. ``"Probable maximum loss, aggregate (AEP), ground-up, 475-year [USD]"``.
    """
    label = _METRICS.get(metric, str(metric).replace("_", " ").capitalize())
    b = _BASES.get(str(basis), str(basis).replace("_", " ")) if isinstance(basis, str) else ""
    if b:
        label += f", {b}"
    if return_period_yr == return_period_yr and return_period_yr is not None:
        label += f", {return_period_yr:,.0f}-year"
    return label + ("" if unit in ("-", "", None) else f" [{unit}]")


def _amount(value, unit, metric, cur):
    """A what-if value in plain figures: whole currency units with separators, counts as counts."""
    if value != value:
        return "n/a"
    if cur and cur in str(unit):
        return _money(value)
    if metric == "assets_exceeding_collapse_target":
        return f"{value:,.0f}"
    return f"{value:,.2f}"


def _portfolio_table(grp, cur, alt_id):
    rows = []
    for r in grp.itertuples():
        se = r.standard_error_of_change
        change = _amount(r.change, r.unit, r.metric, cur)
        if se == se:
            change += f" (± {_amount(se, r.unit, r.metric, cur)})"
        rows.append([metric_label(r.metric, r.basis, r.return_period_yr, r.unit),
                     _cell(_amount(r.value_before, r.unit, r.metric, cur), r.value_before),
                     _cell(_amount(r.value_after, r.unit, r.metric, cur), r.value_after),
                     _cell(change, r.change), _cell(_pct(r.relative_change, signed=True), r.relative_change)])
    return _table(["measure", "before#", "after#", "change (± 1 s.e.)#", "relative#"], rows,
                  caption=f"Alternative '{alt_id}': the portfolio before and after", wide=True)


def _verdict(alt, total, moved, people, cur):
    """One paragraph per alternative: what it costs, what it saves, whether it pays, what it does to screening."""
    bcr = float(total.benefit_cost_ratio)
    pays = ("pays for itself on avoided repair losses alone" if bcr >= 1 else
            "does not pay for itself on avoided repair losses alone")
    text = (f"Verdict for '{alt}': retrofitting {int(total.n_assets):,} buildings costs {_money(total.retrofit_cost, cur)}"
            f" and avoids {_money(total.avoided_eal, cur)} of expected loss per year, worth "
            f"{_money(total.pv_avoided_loss, cur)} over {total.benefit_horizon_yr:g} years at "
            f"{100 * total.discount_rate:.1f}% a year: benefit-cost ratio {bcr:.2f}, so it {pays}.")
    if people is not None and people.benefit_cost_ratio_all == people.benefit_cost_ratio_all:
        with_all = float(people.benefit_cost_ratio_all)
        text += (f" Counting {people.benefits_counted}, the ratio is {with_all:.2f}"
                 f" ({'at least' if with_all >= 1 else 'below'} 1).")
    if moved is not None:
        before, after, n = moved
        text += (f" Buildings above the collapse target among them: {before:,} before, {after:,} after"
                 f" ({before - after:,} move below it).")
    return _p(text)


def _benefit_cost_table(total, cur):
    rows = [["buildings retrofitted", _cell(f"{int(total.n_assets):,}", total.n_assets)],
            [f"retrofit cost [{cur}]", _cell(_money(total.retrofit_cost), total.retrofit_cost)],
            [f"expected annual loss before [{cur}/yr]", _cell(_money(total.eal_before), total.eal_before)],
            [f"expected annual loss after [{cur}/yr]", _cell(_money(total.eal_after), total.eal_after)],
            [f"avoided expected annual loss [{cur}/yr]", _cell(_money(total.avoided_eal), total.avoided_eal)],
            ["discount rate, benefit horizon", f"{100 * total.discount_rate:.1f}% a year, {total.benefit_horizon_yr:g} "
                                               "years"],
            ["annuity factor (1 - (1 + r)^-T) / r [yr]", _cell(f"{total.annuity_factor_yr:.2f}",
                                                               total.annuity_factor_yr)],
            [f"present value of the avoided loss [{cur}]", _cell(_money(total.pv_avoided_loss), total.pv_avoided_loss)],
            [f"net present value [{cur}]", _cell(_money(total.net_present_value), total.net_present_value)],
            ["benefit-cost ratio (repair losses only)", _cell(f"{total.benefit_cost_ratio:.2f}",
                                                              total.benefit_cost_ratio)],
            ["expected collapses avoided per year", _cell(f"{total.avoided_annual_collapse_prob:.4f}",
                                                          total.avoided_annual_collapse_prob)]]
    return _table(["", "value#"], rows, caption="Benefit-cost of the alternative (sums over its buildings)")


def _per_building(bc, assets, cur):
    """The buildings of best and of worst benefit-cost ratio (all of them when few)."""
    per = bc[bc.scope == "asset"]
    if not len(per):
        return []
    if assets is not None and len(assets):
        keep = ["asset_id", "building_class", "new_class", "replacement_value", "collapse_prob_in_horizon_before",
                "collapse_prob_in_horizon_after", "exceeds_collapse_target_after"]
        per = per.merge(assets[[c for c in keep if c in assets]], on="asset_id", how="left")
    order = per.sort_values(["benefit_cost_ratio", "asset_id"], ascending=[False, True])
    if len(order) > 2 * BCR_ROWS:
        parts = [("best", order.head(BCR_ROWS)), ("worst", order.tail(BCR_ROWS).iloc[::-1])]
    else:
        parts = [("all", order)]
    out = []
    for which, frame in parts:
        rows = []
        for r in frame.itertuples():
            cls = f"{getattr(r, 'building_class', '')} → {getattr(r, 'new_class', '')}".strip(" →")
            p0 = getattr(r, "collapse_prob_in_horizon_before", float("nan"))
            p1 = getattr(r, "collapse_prob_in_horizon_after", float("nan"))
            verdict = getattr(r, "exceeds_collapse_target_after", None)
            rows.append([r.asset_id, cls, _cell(_money(getattr(r, "replacement_value", float("nan"))),
                                                getattr(r, "replacement_value", float("nan"))),
                         _cell(_money(r.retrofit_cost), r.retrofit_cost), _cell(_money(r.avoided_eal), r.avoided_eal),
                         _cell(_money(r.pv_avoided_loss), r.pv_avoided_loss),
                         _cell(f"{r.benefit_cost_ratio:.2f}", r.benefit_cost_ratio),
                         _cell(f"{_prob(p0)} → {_prob(p1)}", p1),
                         "" if verdict is None else ("above" if verdict else "below")])
        what = {"best": f"The {len(frame)} buildings of highest benefit-cost ratio",
                "worst": f"The {len(frame)} buildings of lowest benefit-cost ratio, lowest first",
                "all": "Every building of the alternative, highest benefit-cost ratio first"}[which]
        out.append(_table(["asset", "class", f"value [{cur}]#", f"retrofit cost [{cur}]#",
                           f"avoided EAL [{cur}/yr]#", f"PV avoided [{cur}]#", "benefit-cost ratio#",
                           "P(collapse in horizon), before → after#", "after, against the target"], rows, sortable=True, fit=True,
                          caption=f"{what} (all {len(per):,} in whatif_benefit_cost.parquet, scope 'asset')"))
    return out


def _alternative_html(run, alt_id, grp, cur):
    bc, assets = run.table("whatif_benefit_cost"), run.table("whatif_assets")
    people = run.table("whatif_people")
    configured = {a.get("id"): a for a in (run.section("scenario").get("alternatives") or [])}
    desc = str((configured.get(alt_id) or {}).get("description") or "")
    out = [f"<h3>Alternative '{_esc(alt_id)}'{': ' + _esc(desc) if desc else ''}</h3>"]
    mine = None if assets is None else assets[assets.alternative_id == alt_id]
    moved = None
    if mine is not None and "exceeds_collapse_target_after" in mine:
        moved = (int(mine.exceeds_collapse_target_before.sum()), int(mine.exceeds_collapse_target_after.sum()),
                 len(mine))
    total = None if bc is None else bc[(bc.alternative_id == alt_id) & (bc.scope == "alternative")]
    if total is not None and len(total):
        pp = None if people is None else people[(people.alternative_id == alt_id) & (people.scope == "alternative")]
        out.append(_verdict(alt_id, total.iloc[0], moved, pp.iloc[0] if pp is not None and len(pp) else None, cur))
    out.append(_portfolio_table(grp, cur, alt_id))
    if total is not None and len(total):
        out.append(_benefit_cost_table(total.iloc[0], cur))
        out += _per_building(bc[bc.alternative_id == alt_id], mine, cur)
    out += _fragility_html(run, alt_id, mine)
    return "".join(out)


def _fragility_html(run, alt_id, mine):
    """The new class's fragility curves beside the original class's (from run_fragility and whatif_fragility)."""
    new = run.table("whatif_fragility")
    old = run.table("run_fragility")
    if new is None or old is None or mine is None or not len(mine):
        return [_note("This run does not store the retrofit class's parameters (whatif_fragility): its curves are "
                      "not drawn.")] if new is None and mine is not None and len(mine) else []
    from quakefolio.pipeline.io.run_inputs import library_from_frame

    new = new[new.alternative_id == alt_id].drop(columns=["alternative_id"])
    if not len(new):
        return []
    originals = sorted(set(mine.building_class.astype(str)))
    before = library_from_frame(old[old.building_class.isin(originals)])
    after = library_from_frame(new)
    code = str(new.building_class.iloc[0])
    fig = retrofit_fragility_figure([before[c] for c in originals if c in before], after[code])
    cap = (f"Figure: fragility curves of the retrofit class {code} (solid) beside the class(es) it replaces "
           f"({', '.join(originals)}; dashed), P(damage state reached or exceeded | IM), one colour per damage "
           f"state; the horizontal gap is the gain in capacity at each state.")
    return [_figure_html(fig, f"fragility of {code} against {', '.join(originals)}", cap)]


def _section_whatif(run):
    """Section: retrofit alternatives, a verdict each, the portfolio before and after, benefit-cost per building.

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    str
        HTML of the section body; a note when the run holds no such tables.
    """
    port = run.table("whatif_portfolio")
    if port is None or not len(port):
        return _note("No retrofit alternative is configured for this run ([[scenario.alternatives]]).")
    cur = run.currency
    out = [_p("Each alternative assigns other building classes (retrofit designs) to a set of buildings and "
              "recomputes their damage and loss with the same hazard and, for the event-based results, the same "
              f"simulated events and ground motions. Money in {cur}: per year where the unit says /yr, else once. "
              "The benefit-cost ratio is the present value of the avoided expected annual loss over the benefit "
              "horizon (annuity factor (1 - (1 + r)^-T) / r) over the retrofit cost.")]
    for alt_id, grp in port.groupby("alternative_id", sort=False):
        out.append(_alternative_html(run, alt_id, grp, cur))
    return "".join(out)
