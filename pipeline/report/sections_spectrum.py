"""Report part on the conditional mean spectrum (inside the hazard section): figure beside the
uniform-hazard spectrum and the mean-disaggregation scenario of each target."""
from __future__ import annotations

import numpy as np

from quakefolio.core.curves import im_at_rate
from quakefolio.pipeline.report.context import _period_key
from quakefolio.pipeline.report.figures import _cms_figure, _figure_html
from quakefolio.pipeline.report.html import _cell, _note, _table


def _uhs_from_curves(curves, site, stat):
    """``rp -> (periods [s], IM [g])``: the site's uniform-hazard spectrum read off its curves.

    Log-log interpolation at rate 1/T (:func:`quakefolio.core.curves.im_at_rate`), the
    values of ``hazard_at_return_periods`` at its return periods; IMs whose curve does
    not reach 1/T are left out.
    """
    g = curves[(curves.site_id == site) & (curves.statistic == stat)]
    ims = sorted(set(g.im), key=_period_key)

    def at(rp):
        t, u = [], []
        for im in ims:
            c = g[g.im == im].sort_values("im_level")
            x = float(im_at_rate(1.0 / rp, c.im_level.to_numpy(float), c.annual_rate.to_numpy(float)))
            if np.isfinite(x):
                t.append(_period_key(im))
                u.append(x)
        return np.array(t), np.array(u)

    return at


def _cms_part(run, curves, chosen):
    """Conditional mean spectra at the highest-hazard site shown (or the first site with one).

    Parameters
    ----------
    run : ReportRun
    curves : pandas.DataFrame
        ``site_hazard`` rows.
    chosen : list of (site_id, tag)
        Sites of the hazard section, highest hazard first.

    Returns
    -------
    list of str
        HTML fragments (nothing when the run has no conditional mean spectrum).
    """
    cms = run.table("conditional_mean_spectrum")
    if cms is None or not len(cms):
        return []
    out = ["<h3>Conditional mean spectrum</h3>"]
    ok = cms[cms.flag == "ok"]
    sites = [s for s, _ in chosen if s in set(ok.site_id)] or sorted(set(ok.site_id))
    if not sites:
        out.append(_note("No conditional mean spectrum could be computed (every target lies outside the hazard "
                         "curves or below the rate floor; see the flag column of conditional_mean_spectrum)."))
        return out
    site = sites[0]
    c = ok[ok.site_id == site]
    fig = _cms_figure(c, _uhs_from_curves(curves, site, "mean"), site)  # targets: the mean curves
    out.append(_figure_html(
        fig, "conditional mean spectra",
        f"Figure: conditional mean spectra (CMS, Baker 2011) at site {site}, beside the mean uniform-hazard spectrum "
        "(black points: computed at those periods only, not joined unless dense) of the same return period. Each "
        "CMS is the expected spectrum of a record that reaches "
        "the uniform-hazard value at its conditioning period (diamond), for the mean-disaggregation scenario at "
        "that level, with the Baker & Jayaram (2008) correlation; shaded: plus and minus one conditional "
        "standard deviation (zero at the conditioning period). The uniform-hazard spectrum is an envelope of "
        "different events at each period; a CMS is one scenario's spectrum, lower away from its period."))
    rows = []
    for (im, rp), g in c.groupby(["conditioning_im", "return_period_yr"], sort=False):
        r = g.iloc[0]
        rows.append([im, _cell(f"{rp:,.0f}", rp), _cell(f"{r.target_g:.3f}", r.target_g),
                     _cell(f"{r.mean_mag:.2f}", r.mean_mag), _cell(f"{r.mean_dist_km:.1f}", r.mean_dist_km),
                     _cell(f"{r.mean_eps:.2f}", r.mean_eps), _cell(f"{r.scenario_eps:.2f}", r.scenario_eps)])
    out.append(_table(["conditioning IM", "return period [yr]#", "target [g]#", "mean M#", "mean Rrup [km]#",
                       "mean epsilon#", "scenario epsilon#"], rows))
    return out
