"""Report section on the seismic hazard: curves at representative sites, uniform-hazard spectra,
conditional mean spectra, disaggregation."""
from __future__ import annotations

import numpy as np
import pandas as pd

from quakefolio.core.curves import rate_at_im
from quakefolio.pipeline.report.context import _fractile_stats, _period_key, state_catalogue
from quakefolio.pipeline.report.figures import (
    UHS_DENSE_PERIODS, _disagg_figure, _figure_html, _hazard_curves_figure, _uhs_figure,
)
from quakefolio.pipeline.report.html import _cell, _finite, _note, _p, _table
from quakefolio.pipeline.report.sections_spectrum import _cms_part


def _asset_ims(run):
    """The IM of every asset's fragility (exposure order), or None without damage results."""
    cat = state_catalogue(run)
    if cat is None or "im" not in cat.columns:
        return None
    if run.has("run_fragility"):  # the class's IM, per asset of asset_loss (the same assets and order)
        class_im = dict(zip(cat.building_class, cat.im))
        return run.table("asset_loss", columns=["building_class"]).building_class.map(class_im)
    return run.table("asset_damage", columns=["asset_id", "im"]).drop_duplicates("asset_id").im


def _ranking_im(run, ims):
    """The IM that ranks the sites: the one most assets' fragility uses, else the shortest period."""
    per_asset = _asset_ims(run)
    if per_asset is not None and len(per_asset):
        counts = per_asset.value_counts()
        for im in counts.index:
            if im in ims:
                return im, "the IM the fragility of most assets uses"
    return sorted(ims, key=_period_key)[0], "the shortest-period IM"


def _rate_at_level(g, level):
    """Annual rate [1/yr] of one curve at ``level`` [g] by log-log interpolation (core); NaN outside it.

    Parameters
    ----------
    g : pandas.DataFrame
        One curve: ``im_level`` [g] and ``annual_rate`` [1/yr].
    level : float
        Intensity [g].

    Returns
    -------
    float
        NaN where ``level`` lies outside the tabulated range or the curve is not a valid
        hazard curve (:func:`quakefolio.core.curves.rate_at_im`): not available, never clipped.
    """
    g = g.sort_values("im_level")
    try:
        return float(rate_at_im(level, g.im_level.to_numpy(float), g.annual_rate.to_numpy(float)))
    except ValueError:
        return float("nan")


def _uhs_score(run, candidates, stat, im):
    """Uniform-hazard IM at the largest return period with a value at every candidate site, or (None, None)."""
    uhs = run.table("hazard_at_return_periods")
    if uhs is None or not len(uhs):
        return None, None
    u = uhs[(uhs.im == im) & (uhs.statistic == stat) & uhs.site_id.isin(candidates)]
    for rp in sorted(set(u.return_period_yr), reverse=True):
        v = u[u.return_period_yr == rp].set_index("site_id").im_level
        if len(v) == len(candidates) and np.isfinite(v.to_numpy(float)).all():
            return v, f"{im} at {rp:,.0f} yr"
    return None, None


def _rate_score(curves, candidates, im):
    """Annual rate of each candidate site's curve at the middle level of the IM grid (NaN: not available)."""
    c = curves[(curves.im == im) & curves.site_id.isin(candidates)]
    mid = float(np.exp(np.median(np.log(c.im_level[c.im_level > 0]))))
    vals = {site: _rate_at_level(g, mid) for site, g in c.groupby("site_id")}
    score = pd.Series(vals, dtype=float)
    basis = f"annual rate of {im} exceeding {mid:.3g} g"
    missing = int(score.isna().sum())
    if missing:
        basis += f" ({missing} site(s) without a value at that level, outside their curve: not ranked)"
    return score.dropna(), basis


def _choose_sites(run, curves, stat, im):
    """Highest-, median- and lowest-hazard site (or all if three or fewer).

    Ranked by the uniform-hazard IM at the largest return period with a value at every
    candidate site; else by the annual rate at the middle level of the IM grid (log-log
    interpolation of :mod:`quakefolio.core.curves`; sites whose curve does not reach that
    level have no value and are not ranked).  Candidates are the sites assets use, when
    the run has asset results.

    Parameters
    ----------
    run : ReportRun
    curves : pandas.DataFrame
        ``site_hazard`` rows of the statistic ``stat``.
    stat : str
    im : str
        The ranking IM.

    Returns
    -------
    chosen : list of (site_id, tag)
    how : str
        The candidates and the ranking basis, for the text.
    """
    sites = sorted(set(curves.site_id))
    loss = run.table("asset_loss", columns=["site_id"])
    used = sorted(set(loss.site_id.unique()) & set(sites)) if loss is not None and len(loss) else []
    candidates = used or sites
    scope = "sites used by assets" if used else "hazard sites"
    score, basis = _uhs_score(run, candidates, stat, im)
    if score is None:
        score, basis = _rate_score(curves, candidates, im)
    score = score.sort_values(kind="stable")
    if len(score) <= 3:
        tags = {0: [], 1: [""], 2: ["highest", "lowest"], 3: ["highest", "median", "lowest"]}[len(score)]
        chosen = list(zip(score.index[::-1], tags))
    else:
        chosen = [(score.index[-1], "highest"), (score.index[(len(score) - 1) // 2], "median"),
                  (score.index[0], "lowest")]
    return chosen, f"{len(candidates)} {scope} ranked by {basis}"


def _uhs_rows(u, chosen_ids, ims, rps):
    """Table rows: site, IM and the uniform-hazard IM [g] per return period ("—" with the flag where NaN)."""
    rows = []
    for site in chosen_ids:
        for im in ims:
            r = u[(u.site_id == site) & (u.im == im)].set_index("return_period_yr")
            if not len(r):
                continue
            cells = []
            for rp in rps:
                if rp in r.index and _finite(r.im_level.loc[rp]):
                    cells.append(_cell(f"{r.im_level.loc[rp]:.3f}", r.im_level.loc[rp]))
                else:
                    flag = str(r.flag.loc[rp]).replace("_", " ") if rp in r.index and "flag" in r.columns else ""
                    cells.append(_cell(f"— ({flag})" if flag else "—", float("nan")))
            rows.append([site, im] + cells)
    return rows


def _uhs_part(run, stat, chosen, ims):
    """Uniform-hazard spectra of the chosen sites: figure and table."""
    uhs = run.table("hazard_at_return_periods")
    out = ["<h3>Uniform-hazard spectra</h3>"]
    if uhs is None or not len(uhs):
        out.append(_note("This run holds no uniform-hazard table (hazard_at_return_periods.parquet)."))
        return out
    fig = _uhs_figure(run, uhs, stat, chosen)
    chosen_ids = [s for s, _ in chosen]
    flagged = uhs[(uhs.statistic == stat) & uhs.site_id.isin(chosen_ids) & uhs.im_level.isna()]
    extra = (f" {len(flagged)} value(s) at these sites are not reported (outside the tabulated curve or below "
             "the rate floor) and are not drawn." if len(flagged) else "")
    n_periods = len(set(uhs.im))
    how = (f"the {n_periods} computed periods as points joined by a faint line (dense enough to read as a curve)"
           if n_periods >= UHS_DENSE_PERIODS else
           f"the {n_periods} computed periods as points, not joined: the spectrum between them was not computed")
    out.append(_figure_html(
        fig, "uniform-hazard spectra",
        f"Figure: uniform-hazard spectra ({stat}): the IM [g] with annual exceedance rate 1/T, against "
        f"oscillator period [s] on a log axis; {how}; PGA is plotted at 0.01 s.{extra}"))
    u = uhs[(uhs.statistic == stat) & uhs.site_id.isin(chosen_ids)]
    rps = sorted(set(u.return_period_yr))
    out.append(_table(["site", "IM"] + [f"{rp:,.0f} yr [g]#" for rp in rps], _uhs_rows(u, chosen_ids, ims, rps)))
    return out


def _disagg_means(run, site, im, rp):
    """Sentence with the mean and modal M, Rrup and epsilon of one disaggregation (empty if not stored)."""
    summ = run.table("disaggregation_summary")
    if summ is None:
        return ""
    s = summ[(summ.site_id == site) & (summ.im == im) & (summ.return_period_yr == rp)]
    if not len(s):
        return ""
    s = s.iloc[0]
    return (f" Means: M {s.mean_mag:.2f}, Rrup {s.mean_dist_km:.1f} km, epsilon {s.mean_eps:.2f}; "
            f"modes: M {s.mode_mag:.2f}, Rrup {s.mode_dist_km:.0f} km, epsilon {s.mode_eps:.2f}.")


def _disagg_part(run, chosen, rank_im):
    """Disaggregation at the highest-hazard site for the ranking IM at the largest return period."""
    out = ["<h3>Disaggregation</h3>"]
    dis = run.table("disaggregation")
    if dis is None or not len(dis):
        out.append(_note("No disaggregation in this run (it is computed for computed hazard only, "
                         "with hazard.disaggregation on)."))
        return out
    site = chosen[0][0]
    d = dis[dis.site_id == site]
    im = rank_im if rank_im in set(d.im) else (sorted(set(d.im), key=_period_key)[0] if len(d) else None)
    if im is None:
        out.append(_note(f"No disaggregation rows for site {site}."))
        return out
    d = d[d.im == im]
    rp = max(set(d.return_period_yr))
    d = d[d.return_period_yr == rp]
    text = _disagg_means(run, site, im, rp)
    fig = _disagg_figure(d, dis)
    out.append(_figure_html(
        fig, "disaggregation marginals",
        f"Figure: disaggregation of the mean exceedance rate of {im} = {d.im_level.iloc[0]:.3f} g "
        f"({rp:,.0f} yr) at site {site}: share [%] per magnitude, distance (Rrup, km) and epsilon bin "
        f"(bins of unequal width; shares below 1e-6 are not stored).{text}"))
    return out


def _section_hazard(run):
    """Section 2: hazard curves at the highest-, median- and lowest-hazard sites, spectra (uniform-hazard and
    conditional mean), disaggregation.

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    str
        HTML of the section body.
    """
    curves = run.table("site_hazard")
    if curves is None or not len(curves):
        return _note("This run holds no site hazard table (site_hazard.parquet).")
    if "statistic" not in curves.columns:
        curves = curves.assign(statistic="mean")
    stats = set(curves.statistic)
    stat = run.hazard_statistic(stats)
    fractiles = _fractile_stats(stats)
    ims = sorted(set(curves.im), key=_period_key)
    rank_im, why = _ranking_im(run, ims)
    chosen, how = _choose_sites(run, curves[curves.statistic == stat], stat, rank_im)
    if not chosen:
        return _note(f"No site can be ranked ({how}); hazard curves not drawn.")
    floor = float(run.section("hazard").get("rate_floor", 1e-6))
    out = [_p(
        f"Hazard curves are tabulated at {curves.site_id.nunique():,} sites for {len(ims)} intensity measures "
        f"({', '.join(ims)}; values in g). The sites shown: "
        + ", ".join(f"{s}" + (f" ({t})" if t else "") for s, t in chosen)
        + f"; chosen among {how} ({rank_im} being {why}).")]
    band = (f"; shaded band: {fractiles[0]} to {fractiles[-1]} of the logic tree, dashed: p50"
            if len(fractiles) >= 2 else "")
    fig = _hazard_curves_figure(run, curves, stat, fractiles, chosen, ims)
    out.append(_figure_html(
        fig, "hazard curves per intensity measure",
        f"Figure: annual rate of exceedance [1/yr] against intensity [g], log-log, {stat} curve{band}. "
        f"Dotted lines: configured return periods T at 1/T. Grey region: rates below the rate floor "
        f"{floor:.0e}/yr, not reported as design values (not for design use)."))
    out += _uhs_part(run, stat, chosen, ims)
    out += _cms_part(run, curves, chosen)
    out += _disagg_part(run, chosen, rank_im)
    return "".join(out)
