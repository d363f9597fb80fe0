"""Report of a scenario-earthquake run: one section with the loss distribution, a histogram and a map."""
from __future__ import annotations

import numpy as np

from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.report.figures import _RC, _figure_html, _new_figure
from quakefolio.pipeline.report.html import _CSS, _cell, _esc, _facts, _money, _note, _p, _table

__all__ = ["scenario_section", "scenario_report"]


def _num(x, fmt="{:,.0f}"):
    return _cell("n/a" if x != x else fmt.format(x), x)


def _histogram(real, rid, cur):
    fig = _new_figure(6.4, 2.6)
    ax = fig.add_subplot(1, 1, 1)
    loss = real.loc[real.rupture_id == rid, "ground_up_loss"].to_numpy(dtype=float)
    ax.hist(loss / 1e6, bins=40, color="#1f6f78", alpha=0.85)
    ax.set_xlabel(f"portfolio ground-up loss [million {cur}]")
    ax.set_ylabel("realisations")
    return _figure_html(fig, f"Histogram of the portfolio loss of rupture {rid}",
                        f"Portfolio ground-up loss over the {loss.size} realisations of rupture {rid}.")


def _map(sites, ruptures, stations, rid):
    from matplotlib.ticker import MaxNLocator

    im = sites.im.iloc[0]
    s = sites[(sites.rupture_id == rid) & (sites.im == im)]
    fig = _new_figure(5.2, 4.0)
    ax = fig.add_subplot(1, 1, 1)
    pts = ax.scatter(s.lon, s.lat, c=s.median_g, cmap="viridis", s=28, edgecolors="none")
    fig.colorbar(pts, ax=ax, label=f"median {im} [g]")
    r = ruptures[ruptures.rupture_id == rid].iloc[0]
    corners = ("top_start", "top_end", "bottom_end", "bottom_start", "top_start")
    ax.plot([getattr(r, f"{c}_lon") for c in corners], [getattr(r, f"{c}_lat") for c in corners], color="#9b3b2f",
            linewidth=1.0, linestyle="--", label="rupture plane (surface projection)")
    ax.plot([r.top_start_lon, r.top_end_lon], [r.top_start_lat, r.top_end_lat], color="#9b3b2f", linewidth=2.2,
            label="top edge")
    if stations is not None and len(stations):
        st = stations.drop_duplicates("station_id")
        ax.scatter(st.lon, st.lat, marker="^", s=46, facecolors="white", edgecolors="#1d2733", label="stations")
    ax.set_xlabel("lon [deg]")
    ax.set_ylabel("lat [deg]")
    ax.xaxis.set_major_locator(MaxNLocator(4))
    ax.set_aspect(1.0 / max(np.cos(np.radians(float(s.lat.mean()))), 0.1), adjustable="datalim")
    ax.legend(loc="best", fontsize=7)
    return _figure_html(fig, f"Map of the median {im} of rupture {rid}",
                        f"Median {im} over realisations at the portfolio's hazard sites; dashed: the rupture plane "
                        f"projected to the surface, thick: its top edge; triangles: stations.")


def scenario_section(tables, cur):
    """Body of the scenario section: ruptures, portfolio loss distribution by class, histogram, map, stations.

    Parameters
    ----------
    tables : dict of str -> pandas.DataFrame
        The scenario tables (:func:`quakefolio.pipeline.stages.scenario_tables.scenario_tables`).
    cur : str
        Currency.

    Returns
    -------
    str
        HTML.
    """
    rup, pf = tables["scenario_ruptures"], tables["scenario_portfolio_loss"]
    out = [_p("Each rupture is run with many realisations of the spatially correlated ground-motion field (the "
              "run's ground-motion models drawn by branch weight). Losses are summed over the portfolio in each "
              "realisation; the table gives the mean (with its standard error), median, 90th and 99th percentile "
              "of that sum, for the portfolio and by building class.")]
    rows = [[r.rupture_id, r.source_id, _num(r.magnitude, "{:.2f}"), _num(r.length_km, "{:.1f}"),
             _num(r.width_km, "{:.1f}"), _num(r.realisations)] for r in rup.itertuples()]
    out.append(_table(["rupture", "source", "magnitude [Mw]#", "length [km]#", "width [km]#", "realisations#"], rows))
    for rid in rup.rupture_id:
        part = pf[pf.rupture_id == rid]
        out.append(f"<h3>Rupture {_esc(rid)}</h3>")
        rows = [[r.key, r.metric.replace("_", " "), _cell(_money(r.mean), r.mean), _cell(_money(r.p50), r.p50),
                 _cell(_money(r.p90), r.p90), _cell(_money(r.p99), r.p99)] for r in part.itertuples()]
        unit = f"[{cur} or persons]"
        out.append(_table(["portfolio or class", "metric", f"mean {unit}#", f"median {unit}#", f"90 % {unit}#",
                           f"99 % {unit}#"], rows, sortable=True, scroll=True))
        out.append('<div class="pair">' + _histogram(tables["scenario_realisation_loss"], rid, cur)
                   + _map(tables["scenario_site_motion"], rup, tables.get("scenario_stations"), rid)
                   + "</div>")
    st = tables.get("scenario_stations")
    if st is not None and len(st):
        out.append(_p("Fields conditioned on station records (Worden et al. 2018: between-event residual estimated "
                      "from the stations, within-event residuals by the conditional multivariate normal)."))
        rows = [[r.rupture_id, r.gmm, r.station_id, r.im, _num(r.observed_g, "{:.3g}"),
                 _num(r.model_median_g, "{:.3g}"), _num(r.total_residual_ln, "{:+.2f}"),
                 _num(r.between_event_mean, "{:+.2f}"), "yes" if r.used else "no"] for r in st.itertuples()]
        out.append(_table(["rupture", "model", "station", "IM", "observed [g]#", "model median [g]#",
                           "residual [ln]#", "between-event#", "used"], rows, sortable=True, scroll=True))
    else:
        out.append(_note("Unconditioned fields: no station records were given."))
    return "".join(out)


def scenario_report(tables, *, title, run_id, currency, facts):
    """A self-contained HTML document holding the scenario section.

    Parameters
    ----------
    tables : dict of str -> pandas.DataFrame
    title : str
        The scenario's name.
    run_id : str
    currency : str
    facts : list of (str, str)
        Labelled facts shown under the title (config, scenario file, seed ...).

    Returns
    -------
    str
        HTML5 with the caution first; plots inline.
    """
    import matplotlib

    with matplotlib.rc_context(_RC):
        body = scenario_section(tables, currency)
    return ('<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
            '<meta name="generator" content="quakefolio scenario report">'
            f"<title>quakefolio scenario: {_esc(title)} ({_esc(run_id)})</title><style>{_CSS}</style></head><body>"
            f'<p class="caution" id="caution" role="note">{_esc(CAUTION)}</p><main><header>'
            f"<h1>{_esc(title)}</h1><p>Scenario earthquakes. Run {_esc(run_id)}; amounts in {_esc(currency)}.</p>"
            f"{_facts(facts)}</header>"
            f'<section id="scenario"><h2>Scenario earthquakes</h2>{body}</section>'
            f"<footer>{_esc(CAUTION)}</footer></main></body></html>\n")
