"""Report sections per building class and per asset: fragility curves, damage table, riskiest assets, map."""
from __future__ import annotations

import numpy as np
import pandas as pd

from quakefolio.core.errors import InputError
from quakefolio.pipeline.report.context import MAX_TABLE_ROWS, PREDATES_NOTE, TOP_ASSETS, state_catalogue, top_rows
from quakefolio.pipeline.report.figures import (
    MAP_MAX_MARKERS, _figure_html, _fragility_figure, _vulnerability_figure, map_cells,
)
from quakefolio.pipeline.report.figures_map import MAP_COLOURINGS, map_figure, portfolio_outline
from quakefolio.pipeline.report.html import _cell, _esc, _g, _money, _note, _p, _pct, _prob, _rate, _table, _toggle


# --- fragility ---------------------------------------------------------------------------------------

def _fragility_rows(lib, codes):
    """Table rows: class, IM, damage state, median [g], beta, mean damage ratio and CoV per state."""
    rows = []
    for code in codes:
        dss = lib[code]
        for j, name in enumerate(dss.names):
            marked = j == dss.collapse_index and name.lower() != "collapse"
            rows.append([code if j == 0 else "", dss.im if j == 0 else "", name + (" (collapse state)" if marked else ""),
                         _cell(f"{dss.medians[j]:.3f}", dss.medians[j]), _cell(f"{dss.betas[j]:.2f}", dss.betas[j]),
                         _cell(f"{dss.mean_damage_ratio[j]:.3f}", dss.mean_damage_ratio[j]),
                         _cell(_g(dss.cov[j], 2), dss.cov[j])])
    return rows


def _section_fragility(run):
    """Section 3: fragility curves and parameters of the classes the run used (from ``run_fragility``).

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    str
        HTML of the section body; a one-line note for runs that predate stored inputs.
    """
    lib = run.fragility()
    if lib is None:
        return _note(PREDATES_NOTE.format(what="fragility curves"))
    loss = run.table("asset_loss", columns=["building_class"])
    used = sorted(set(loss.building_class.unique())) if loss is not None and len(loss) else sorted(lib.classes)
    every = [c for c in used if c in lib.classes]
    if not every:
        return _note("No building class of the run can be drawn.")
    codes = [c for c in every if lib[c].has_damage_states]
    counts = loss.building_class.value_counts() if loss is not None else pd.Series(dtype=int)
    out = [] if not codes else [
        _figure_html(_fragility_figure(lib, codes, counts), "fragility curves per building class",
                     "Figure: lognormal fragility functions, probability of reaching or exceeding each "
                     "damage state [-] against the class's intensity measure [g] on a log axis (from the "
                     "first state's median / exp(2.5 beta) to the last state's median x exp(2.5 beta))."),
        "<h3>Parameters</h3>",
        _table(["class", "IM", "damage state", "median [g]#", "beta [-]#", "mean damage ratio [-]#",
                "loss-ratio CoV [-]#"], _fragility_rows(lib, codes))]
    out += _vulnerability_part(lib, [c for c in every if not lib[c].has_damage_states], counts)
    codes = every
    descr = [(c, lib[c].description) for c in codes if getattr(lib[c], "description", "")]
    if descr:
        out.append("<p>" + "; ".join(f"<b>{_esc(c)}</b>: {_esc(d)}" for c, d in descr) + ".</p>")
    return "".join(out)


def _vulnerability_part(lib, codes, counts):
    """Figure, table and note of the classes given by a vulnerability table (none: nothing)."""
    if not codes:
        return []
    rows = [[code if i == 0 else "", lib[code].im if i == 0 else "", _cell(f"{x:g}", x), _cell(f"{m:.3f}", m),
             _cell(_g(c, 2), c)]
            for code in codes for i, (x, m, c) in enumerate(zip(lib[code].levels, lib[code].mean_loss_ratio,
                                                                  lib[code].cov))]
    return [
        "<h3>Classes given by a vulnerability table</h3>",
        _figure_html(_vulnerability_figure(lib, codes, counts), "vulnerability functions per building class",
                     "Figure: mean loss ratio (repair cost / replacement value) [-] against the class's intensity "
                     "measure [g] on a log axis, linear in ln IM between the table's rows (points), 0 below the "
                     "first row and held above the last; the band is the mean ± one standard deviation of the "
                     "beta-distributed loss ratio."),
        _table(["class", "IM", "IM level [g]#", "mean loss ratio [-]#", "loss-ratio CoV [-]#"], rows),
        _note("These classes have no damage states: their assets have no damage-state rates (no rows in the "
              "damage table and asset_damage), no collapse figures (n/a, NaN in asset_loss) and are not "
              "screened for collapse; their EAL, loss curves and event losses come from the table."),
    ]


# --- damage table ------------------------------------------------------------------------------------

def _damage_rows(dmg, loss, shown, idx):
    """Table rows: asset, class, site, IM, then rates [1/yr] and probabilities per damage state.

    ``dmg`` holds the ``asset_damage`` rows of the ``shown`` assets, ``loss`` their ``asset_loss`` rows.
    """
    rate = dmg.pivot_table(index="asset_id", columns="damage_state_index", values="annual_rate_exceed", aggfunc="first")
    prob = dmg.pivot_table(index="asset_id", columns="damage_state_index", values="prob_exceed_in_horizon",
                           aggfunc="first")
    meta = loss.set_index("asset_id")
    ims = dmg.drop_duplicates("asset_id").set_index("asset_id").im
    rows = []
    for a in shown:
        r = meta.loc[a]
        row = [a, r.building_class, r.site_id, ims.get(a, "")]
        for table, fmt in ((rate, _rate), (prob, _prob)):
            for i in idx:
                v = table.at[a, i] if a in table.index and i in table.columns else float("nan")
                row.append(_cell(fmt(v), v))
        rows.append(row)
    return rows


def _state_names_note(dmg, names):
    """A note when damage-state names differ between classes (columns are then numbered), else ''."""
    if not (len(names) and any(len(v) > 1 for v in names)):
        return ""
    per_class = dmg.drop_duplicates(["building_class", "damage_state_index"]).sort_values(
        ["building_class", "damage_state_index"])
    legend = "; ".join(f"{c}: " + ", ".join(f"DS{int(i)} = {n}" for i, n in zip(g.damage_state_index, g.damage_state))
                       for c, g in per_class.groupby("building_class"))
    return _note(f"Damage-state names differ between classes; columns are numbered by severity ({legend}).")


def _section_damage(run):
    """Section 4: per asset and damage state, annual rate and probability in the horizon (sortable table).

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    str
        HTML of the section body.
    """
    cat = state_catalogue(run)
    loss = run.table("asset_loss")
    if cat is None or not len(cat) or loss is None or not len(loss):
        return _note("This run holds no per-asset results (hazard stage only).")
    horizon = run.horizon
    idx = sorted(set(cat.damage_state_index))
    names = cat.groupby("damage_state_index").damage_state.agg(lambda s: sorted(set(s)))
    labels = {i: (names[i][0] if len(names[i]) == 1 else f"DS{i}") for i in idx}
    shown = top_rows(loss, "collapse_prob_in_horizon", MAX_TABLE_ROWS)
    dmg = run.asset_rows("asset_damage", list(shown.asset_id))
    rows = _damage_rows(dmg, shown, list(shown.asset_id), idx)
    headers = ["asset", "class", "site", "IM"] + [f"{labels[i]}#" for i in idx] * 2
    groups = [("", 4), ("annual rate of reaching or exceeding [1/yr]", len(idx)),
              (f"probability in {horizon:g} yr [-]", len(idx))]
    out = [_p(f"Per asset and damage state: the annual rate of reaching or exceeding the state [1/yr] and the "
              f"probability of that in {horizon:g} years (Poisson, P = 1 - exp(-rate x {horizon:g})). Click a column "
              "header to sort."), _state_names_note(cat, names)]
    if len(loss) > MAX_TABLE_ROWS:
        out.append(_note(f"Showing {MAX_TABLE_ROWS:,} of {len(loss):,} assets (highest collapse probability first); "
                         "every asset is in asset_damage.parquet of the run folder."))
    out.append(_table(headers, rows, sortable=True, scroll=True, groups=groups, wide=True))
    return "".join(out)


# --- riskiest assets ---------------------------------------------------------------------------------

def _riskiest_rows(top, horizon):
    """Rows: building, class, site, value, EAL, EAL ratio, collapse rate and probability in the horizon."""
    return [[r.asset_id, r.building_class, r.site_id, _cell(_money(r.replacement_value), r.replacement_value),
             _cell(_money(r.eal), r.eal), _cell(f"{1000 * r.eal_ratio:.3f}", r.eal_ratio),
             _cell(_rate(r.annual_collapse_rate), r.annual_collapse_rate),
             _cell(_prob(r.collapse_prob_in_horizon), r.collapse_prob_in_horizon)]
            for r in top.itertuples()]


def riskiest(loss, n):
    """The ``n`` buildings of largest EAL and the ``n`` of largest collapse probability in the horizon.

    Parameters
    ----------
    loss : pandas.DataFrame
        ``asset_loss``.
    n : int

    Returns
    -------
    by_eal, by_collapse : pandas.DataFrame
        Largest ``eal`` first (ties by ``asset_id``); largest ``collapse_prob_in_horizon`` first, ties
        (buildings of one class at one hazard site share it) by larger EAL, then ``asset_id``; buildings
        without a collapse probability (vulnerability classes) are left out of the second.
    """
    by_eal = top_rows(loss, "eal", n)
    p = loss.collapse_prob_in_horizon.to_numpy(dtype=float)
    keep = ~np.isnan(p)
    if int(keep.sum()) > n > 0:  # only rows at or above the n-th largest probability can rank (as in top_rows)
        finite = p[keep]
        keep &= p >= np.partition(finite, len(finite) - n)[len(finite) - n]
    by_collapse = loss[keep].sort_values(["collapse_prob_in_horizon", "eal", "asset_id"],
                                         ascending=[False, False, True]).head(n)
    return by_eal, by_collapse


def _section_riskiest(run):
    """Section 5: the riskiest buildings, ranked by expected annual loss and by collapse probability.

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    str
        HTML of the section body; a note when the run holds no such tables.
    """
    loss = run.table("asset_loss")
    if loss is None or not len(loss):
        return _note("This run holds no per-asset results (hazard stage only).")
    cur, h = run.currency, run.horizon
    by_eal, by_collapse = riskiest(loss, TOP_ASSETS)
    total = loss.eal.sum()
    share = by_eal.eal.sum() / total if total > 0 else float("nan")
    headers = ["building", "class", "site", f"value [{cur}]#", f"EAL [{cur}/yr]#", "EAL ratio [‰/yr]#",
               "collapse rate [1/yr]#", f"P(collapse in {h:g} yr)#"]
    out = [_p(f"Two rankings of the buildings: by expected annual loss (classical, ground-up; what the portfolio "
              f"loses to each building on average per year) and by probability of collapse in {h:g} years (life "
              "safety). A large building of moderate vulnerability leads the first, a small fragile one the second."),
           "<h3>By expected annual loss</h3>",
           _p(f"The {len(by_eal)} buildings of largest EAL carry {_pct(share)} of the portfolio EAL "
              f"({_money(total, cur + '/yr')})."),
           _table(headers, _riskiest_rows(by_eal, h), sortable=True),
           "<h3>By probability of collapse</h3>"]
    if not len(by_collapse):
        out.append(_note("No building of the run has damage states (every class is given by a vulnerability "
                         "table): no collapse probability."))
        return "".join(out)
    tied = int(by_collapse.duplicated(["building_class", "site_id"]).sum())
    one = by_collapse.building_class.iloc[0] if by_collapse.building_class.nunique() == 1 else None
    out.append(_p(f"The {len(by_collapse)} buildings of highest collapse probability in {h:g} years (Poisson, "
                  f"1 - exp(-rate x {h:g}))."
                  + (f" Buildings of one class at one hazard site share the probability ({tied} rows here repeat a "
                     "class and site); ties are listed by larger EAL." if tied else "")
                  + (f" All are of class {one}: its fragility leads the collapse ranking." if one else "")))
    out.append(_table(headers, _riskiest_rows(by_collapse, h), sortable=True))
    return "".join(out)


# --- map ---------------------------------------------------------------------------------------------

def _map_frame(run):
    """The assets with positions (or a note): (frame, missing count) or (None, note HTML)."""
    base = ["asset_id", "replacement_value", "eal_ratio"]
    try:
        loss = run.table("asset_loss", columns=base + ["collapse_prob_in_horizon"])
    except InputError:  # a table without the collapse column: no collapse colouring
        loss = run.table("asset_loss", columns=base)
        loss = loss.assign(collapse_prob_in_horizon=np.nan)
    if loss is None or not len(loss):
        return None, _note("This run holds no per-asset results (hazard stage only).")
    if not run.has("run_assets"):
        return None, _note(PREDATES_NOTE.format(what="asset positions"))
    assets = run.table("run_assets", columns=["asset_id", "lon", "lat"])
    if len(assets) == len(loss) and assets.asset_id.equals(loss.asset_id):  # the same assets in the same order
        d = loss.assign(lon=assets.lon.to_numpy(), lat=assets.lat.to_numpy())
    else:
        d = loss.merge(assets, on="asset_id", how="left")
    missing = int(d.lon.isna().sum())
    d = d.dropna(subset=["lon", "lat"])
    if not len(d):
        return None, _note("No asset of the run has a position in the stored assets.")
    return d, missing


def _map_layers_text(layers, faults_stored):
    """What the caption says of the layers drawn."""
    parts = [f"triangles: the {layers.sites} hazard sites" if layers.sites else "no hazard-site table in this run",
             "dashed grey line: the portfolio's outline (convex hull of the asset positions)"]
    if layers.faults:
        parts.append("black lines: the source model's fault traces (" + ", ".join(layers.faults) +
                     "; the legend tells crustal from other tectonic regions)")
    elif not faults_stored:
        parts.append("no fault traces (the hazard was tabulated from a file, or the run stored no source_faults table)")
    if layers.faults_outside:
        parts.append("faults outside the frame: " + ", ".join(layers.faults_outside))
    text = "; ".join(parts)
    return text[:1].upper() + text[1:]


def _section_map(run):
    """Section: map of the assets, faults, hazard sites and the portfolio's outline; colour chosen by a toggle.

    One figure per colouring (:data:`~quakefolio.pipeline.report.figures_map.MAP_COLOURINGS`: EAL
    ratio, the default, collapse probability in the horizon, replacement value), shown one at a
    time by radio buttons.  Above :data:`MAP_MAX_MARKERS` assets the markers are grid cells, so
    the drawing's cost does not grow with the number of buildings.

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    str
        HTML of the section body; a one-line note for runs that predate stored inputs.
    """
    d, missing = _map_frame(run)
    if d is None:
        return missing
    cur, h = run.currency, run.horizon
    cells = None
    if len(d) > MAP_MAX_MARKERS:
        cells, cell_km = map_cells(d)
    sites = run.table("hazard_sites", columns=["site_id", "lon", "lat"]) if run.has("hazard_sites") else None
    faults = run.table("source_faults")
    outline = portfolio_outline(d.lon, d.lat)
    if cells is None:
        what = (f"{len(d):,} assets at their positions in the exposure the run used (WGS84 degrees); marker area "
                f"grows with replacement value [{cur}]")
    else:
        what = (f"{len(d):,} assets of the exposure the run used, aggregated on a grid of {cell_km:g} km cells "
                f"(more than {MAP_MAX_MARKERS:,} assets are not drawn one by one): one marker per occupied cell "
                f"({len(cells):,}) at the value-weighted mean position of its assets (WGS84 degrees); marker area "
                f"grows with the cell's total replacement value [{cur}]")
    colour = {"eal": "colour: expected annual loss ratio [‰ of value per year, classical]" +
                     ("" if cells is None else " (the cell's EAL over its value)"),
              "collapse": f"colour: probability of collapse in {h:g} years [%, classical]" +
                          ("" if cells is None else " (mean over the cell's buildings)"),
              "value": f"colour: replacement value [{cur}]" + ("" if cells is None else " (the cell's total)")}
    views = []
    for key, (label, _bar) in MAP_COLOURINGS.items():
        if key == "collapse" and d.collapse_prob_in_horizon.isna().all():
            continue
        fig, capped, bar_km, layers = map_figure(d if cells is None else cells, cur, key, horizon=h, faults=faults,
                                                 sites=sites, outline=outline)
        caption = (f"Figure: {what}; {colour[key]}{' (colour scale capped at the 99th percentile)' if capped else ''}"
                   f". {_map_layers_text(layers, faults is not None)}. Axes are drawn with equal ground distance per "
                   f"degree at the frame's mean latitude (x stretched by 1/cos(lat)); the scale bar is {bar_km:g} km.")
        alt = f"map of assets coloured by {label}" + ("" if cells is None else " (grid cells)")
        body = (f'<div class="map" data-colour="{key}" data-faults="{len(layers.faults)}" '
                f'data-sites="{layers.sites}" data-outline="{layers.outline_vertices}">'
                f"{_figure_html(fig, alt, caption)}</div>")
        views.append((key, label, body))
    out = [_p("The assets with the source model's faults, the hazard sites their hazard was computed or read at, "
              "and the outline of the portfolio. Choose what the colour shows:"),
           _toggle("map-colour", "Colour the map by", views, "eal")]
    if missing:
        out.append(_note(f"{missing} asset(s) of the run have no position in the stored assets and are not drawn."))
    return "".join(out)
