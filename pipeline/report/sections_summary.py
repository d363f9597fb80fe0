"""Report sections that sum the run up: the exposure and its annual loss by building class, the largest
simulated events, and breakdowns by the exposure columns the user names (``[output] breakdown_columns``)."""
from __future__ import annotations

import numpy as np
import pandas as pd

from quakefolio.pipeline.report.html import _cell, _money, _note, _p, _pct, _table

#: Rows of the largest-events table.
TOP_EVENTS = 20


def _share(x, total):
    return x / total if total else float("nan")


def class_summary(run):
    """Per building class: buildings, replacement value, occupants, classical EAL and event-based AAL.

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    pandas.DataFrame or None
        Indexed by ``building_class`` (sorted): ``n_assets``, ``replacement_value`` [currency],
        ``occupants`` [persons] (NaN where no asset gives them), ``eal``, ``eal_net`` [currency/yr]
        (classical, ``asset_loss``), ``aal_ground_up``, ``aal_net`` [currency/yr] (event-based,
        ``asset_event_loss``; NaN without the event stage); None without per-asset results.
    """
    loss = run.table("asset_loss")
    if loss is None or not len(loss):
        return None
    cols = ["asset_id", "building_class", "replacement_value", "eal"] + (["eal_net"] if "eal_net" in loss else [])
    d = loss[cols].copy()
    assets = run.table("run_assets")
    if assets is not None and "occupants" in assets:
        d = d.merge(assets[["asset_id", "occupants"]], on="asset_id", how="left")
    else:
        d["occupants"] = np.nan
    ev = run.table("asset_event_loss")
    if ev is not None and len(ev):
        d = d.merge(ev[["asset_id", "aal_ground_up", "aal_net"]], on="asset_id", how="left")
    else:
        d["aal_ground_up"] = d["aal_net"] = np.nan
    if "eal_net" not in d:
        d["eal_net"] = np.nan
    g = d.groupby("building_class", sort=True)
    out = pd.DataFrame({"n_assets": g.size(), "replacement_value": g.replacement_value.sum(),
                        "occupants": g.occupants.sum(min_count=1), "eal": g.eal.sum(),
                        "eal_net": g.eal_net.sum(min_count=1), "aal_ground_up": g.aal_ground_up.sum(min_count=1),
                        "aal_net": g.aal_net.sum(min_count=1)})
    return out


def _section_exposure(run):
    """Section: the exposure by building class (count, value, occupants) with its EAL and AAL and their shares.

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    str
        HTML of the section body; a note when the run holds no per-asset results.
    """
    s = class_summary(run)
    if s is None:
        return _note("This run holds no per-asset results (hazard stage only).")
    cur = run.currency
    tot = s.sum(min_count=1)
    has_aal = bool(np.isfinite(s.aal_ground_up).any())
    rows = []
    for code, r in list(s.iterrows()) + [("all classes", tot)]:
        row = [code, _cell(f"{int(r.n_assets):,}", r.n_assets), _cell(_money(r.replacement_value), r.replacement_value),
               _cell(_pct(_share(r.replacement_value, tot.replacement_value)), _share(r.replacement_value,
                                                                                      tot.replacement_value)),
               _cell("n/a" if r.occupants != r.occupants else f"{r.occupants:,.0f}", r.occupants),
               _cell(_money(r.eal), r.eal), _cell(_pct(_share(r.eal, tot.eal)), _share(r.eal, tot.eal)),
               _cell(f"{1000 * r.eal / r.replacement_value:.3f}", r.eal / r.replacement_value)]
        if has_aal:
            row += [_cell(_money(r.aal_ground_up), r.aal_ground_up),
                    _cell(_pct(_share(r.aal_ground_up, tot.aal_ground_up)), _share(r.aal_ground_up,
                                                                                   tot.aal_ground_up))]
        rows.append(row)
    headers = ["building class", "buildings#", f"replacement value [{cur}]#", "share of value#", "occupants#",
               f"EAL, classical [{cur}/yr]#", "share of EAL#", "EAL ratio [‰/yr]#"]
    if has_aal:
        headers += [f"AAL, event-based [{cur}/yr]#", "share of AAL#"]
    text = (f"The buildings of the run by class: how many, what they are worth (replacement value, {cur}), how many "
            "people they hold (occupants as given in the exposure; n/a where none are given), and where the expected "
            f"annual loss sits. EAL: classical, ground-up [{cur}/yr]; EAL ratio: EAL over value [‰ per year].")
    if has_aal:
        text += (f" AAL: the event-based average annual loss of the same buildings, ground-up [{cur}/yr]; it "
                 "estimates the same quantity as the EAL by simulation, so the two shares should agree within "
                 "sampling error.")
    return _p(text) + _table(headers, rows, sortable=False, fit=True)


def _section_events(run):
    """Section: the largest simulated events of the event set (from ``event_loss``).

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    str
        HTML of the section body; a note without the event stage.
    """
    ev = run.table("event_loss")
    if ev is None or not len(ev):
        return _note("No event-based tables in this run, hence no simulated events to list.")
    cur = run.currency
    summ = run.table("portfolio_summary")
    n_years = int(summ.n_years.iloc[0]) if summ is not None and len(summ) else None
    top = ev.sort_values(["ground_up_loss", "event_id"], ascending=[False, True]).head(TOP_EVENTS)
    branch = "source_branch" in top.columns
    rows = []
    for r in top.itertuples():
        row = [_cell(f"{int(r.event_id)}", r.event_id), _cell(f"{int(r.year):,}", r.year)]
        row += [r.source_branch] if branch else []
        row += [r.source_id, _cell(f"{int(r.rupture_id)}", r.rupture_id), _cell(f"{r.magnitude:.2f}", r.magnitude),
                r.gmm, _cell(_money(r.ground_up_loss), r.ground_up_loss), _cell(_money(r.net_loss), r.net_loss)]
        rows.append(row)
    headers = (["event#", "year#"] + (["source-model branch"] if branch else [])
               + ["source", "rupture#", "magnitude [Mw]#", "ground-motion model", f"ground-up loss [{cur}]#",
                  f"net loss [{cur}]#"])
    scope = f" of {n_years:,} simulated years" if n_years else ""
    return (_p(f"The {len(top)} events with the largest ground-up portfolio loss among the {len(ev):,} events{scope} "
               f"(each a sampled occurrence of one rupture with one ground-motion field). Ground-up: before "
               f"deductibles and limits; net: after each building's deductible and limit, before the programme's "
               f"group terms and layers. Losses in {cur} per event. Rupture: its index within the source model "
               "of its branch. All events are in event_loss.parquet of the run folder.")
            + _table(headers, rows, sortable=True, fit=True))


def _breakdown_rows(col, assets, loss, bep, rps):
    """Table rows of one breakdown column: group, buildings, value, EAL, AAL, PML per return period."""
    d = loss[["asset_id", "replacement_value", "eal"]].merge(assets[["asset_id", col]], on="asset_id", how="left")
    g = d.groupby(col, sort=True)
    by = pd.DataFrame({"n": g.size(), "value": g.replacement_value.sum(), "eal": g.eal.sum()})
    tot_eal = by.eal.sum()
    ep = None
    if bep is not None:
        ep = bep[(bep.breakdown_column == col) & (bep.basis == "ground_up")]
        aal_net = bep[(bep.breakdown_column == col) & (bep.basis == "net")].drop_duplicates("group").set_index(
            "group").aal
    rows = []
    for key, r in by.iterrows():
        row = [key, _cell(f"{int(r.n):,}", r.n), _cell(_money(r.value), r.value), _cell(_money(r.eal), r.eal),
               _cell(_pct(_share(r.eal, tot_eal)), _share(r.eal, tot_eal))]
        if ep is not None:
            e = ep[ep.group == str(key)].set_index("return_period_yr")
            aal = float(e.aal.iloc[0]) if len(e) else float("nan")
            net = float(aal_net.get(str(key), float("nan")))
            row += [_cell(_money(aal), aal), _cell(_money(net), net)]
            row += [_cell(_money(e.aep_loss.get(rp, float("nan"))), e.aep_loss.get(rp, float("nan"))) for rp in rps]
        rows.append(row)
    return rows


def _section_breakdowns(run):
    """Section: EAL, AAL and PML by each exposure column of ``[output] breakdown_columns``.

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    str
        HTML of the section body; a note saying how to ask for breakdowns when none is configured.
    """
    columns = list(run.section("output").get("breakdown_columns") or [])
    if not columns:
        return _note("No breakdown by exposure column was asked for. Name exposure columns in [output] "
                     "breakdown_columns (for example [\"district\"]) to see EAL, AAL and PML per group.")
    loss, assets = run.table("asset_loss"), run.table("run_assets")
    if loss is None or not len(loss):
        return _note("This run holds no per-asset results (hazard stage only).")
    cur = run.currency
    bep = run.table("breakdown_ep")
    rps = sorted(set(bep.return_period_yr)) if bep is not None and len(bep) else []
    out = [_p(f"Per group of each named exposure column: buildings, replacement value [{cur}], classical EAL "
              f"[{cur}/yr] with its share"
              + (f"; event-based AAL ground-up and net [{cur}/yr] and the group's own PML, aggregate (AEP), "
                 f"ground-up [{cur}], at each configured return period. The EALs and AALs of the groups add up to "
                 "the portfolio's; the PMLs do not (a group's bad year is not the portfolio's bad year)."
                 if rps else ". No event-based stage: no AAL or PML by group."))]
    for col in columns:
        out.append(f"<h3>By {col.replace('_', ' ')}</h3>")
        if assets is None or col not in assets.columns:
            out.append(_note(f"The run's stored assets have no column {col!r}; this breakdown cannot be drawn."))
            continue
        headers = [col.replace("_", " "), "buildings#", f"replacement value [{cur}]#", f"EAL, classical [{cur}/yr]#",
                   "share of EAL#"]
        if rps:
            headers += [f"AAL ground-up [{cur}/yr]#", f"AAL net [{cur}/yr]#"]
            headers += [f"PML {rp:,.0f} yr [{cur}]#" for rp in rps]
        out.append(_table(headers, _breakdown_rows(col, assets, loss, bep if rps else None, rps),
                          sortable=True, fit=True))
    return "".join(out)
