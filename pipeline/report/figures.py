"""The report's figures: matplotlib (Agg, no pyplot) drawn into inline base64 PNGs."""
from __future__ import annotations

import base64
import io
import math

import numpy as np

from quakefolio.pipeline.report.context import _period_key
from quakefolio.pipeline.report.html import _esc

#: Resolution of the embedded PNG figures [dots per inch].
DPI = 100

# A restrained palette of our own: ink and greys for structure, four muted hues for data.
# A restrained palette of our own: ink and greys for structure, four muted hues for data.
_INK = "#1d2733"
_MUTED = "#5b6675"
_GRID = "#e4e7eb"
_TEAL = "#1f6f78"
_OCHRE = "#b7791f"
_PLUM = "#6a4c7d"
_BRICK = "#9b3b2f"
_OLIVE = "#5f6f2a"
_SERIES = (_TEAL, _OCHRE, _PLUM, _BRICK, _OLIVE)
#: damage-state colours, least to most severe
_STATES = ("#d9b44a", "#c97d2c", "#a8482f", "#4a1f1a", "#7d7d7d", "#2e3a48")


_RC = {
    "font.size": 8.5,
    "axes.titlesize": 9.5,
    "axes.labelsize": 8.5,
    "axes.edgecolor": _MUTED,
    "axes.labelcolor": _INK,
    "axes.titlecolor": _INK,
    "axes.linewidth": 0.7,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "axes.axisbelow": True,
    "grid.color": _GRID,
    "grid.linewidth": 0.6,
    "xtick.color": _MUTED,
    "ytick.color": _MUTED,
    "xtick.labelsize": 7.5,
    "ytick.labelsize": 7.5,
    "legend.frameon": False,
    "legend.fontsize": 7.5,
    "lines.linewidth": 1.5,
    "figure.facecolor": "white",
    "savefig.facecolor": "white",
}


def _new_figure(width_in, height_in):
    from matplotlib.figure import Figure

    return Figure(figsize=(width_in, height_in), dpi=DPI, layout="constrained")


def _figure_html(fig, alt, caption):
    """Embed a figure as a base64 PNG with a caption; returns HTML."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, metadata={"Software": None})
    data = base64.b64encode(buf.getvalue()).decode("ascii")
    return (f'<figure><img src="data:image/png;base64,{data}" alt="{_esc(alt)}">'
            f"<figcaption>{_esc(caption)}</figcaption></figure>")


def _money_axis(ax, axis, cur):
    """Axis in millions of the currency, with thousands separators."""
    from matplotlib.ticker import FuncFormatter

    lo, hi = ax.get_ylim() if axis == "y" else ax.get_xlim()
    digits = 0 if max(abs(lo), abs(hi)) >= 1e7 else 1 if max(abs(lo), abs(hi)) >= 1e6 else 2
    fmt = FuncFormatter(lambda v, _pos: f"{v / 1e6:,.{digits}f}")
    (ax.yaxis if axis == "y" else ax.xaxis).set_major_formatter(fmt)
    label = f"loss [million {cur}]"
    (ax.set_ylabel if axis == "y" else ax.set_xlabel)(label)


# --- hazard ----------------------------------------------------------------------------------------

def _positive(y):
    """Rates for a log axis: zero rates are not drawn (NaN), never clipped."""
    return np.where(y > 0, y, np.nan)


def _draw_site_curves(ax, g, stat, fractiles, colour):
    """One site's curve (and fractile band and p50) for one IM; returns (top rate, x min, x max)."""
    top, xmin, xmax = 0.0, np.inf, 0.0
    main = g[g.statistic == stat].sort_values("im_level")
    if len(main):
        y = main.annual_rate.to_numpy(float)
        x = main.im_level.to_numpy(float)
        ax.plot(x, _positive(y), color=colour)
        top, xmin, xmax = float(np.nanmax(y)), x.min(), x.max()
    if len(fractiles) >= 2:
        lo = g[g.statistic == fractiles[0]].sort_values("im_level")
        hi = g[g.statistic == fractiles[-1]].sort_values("im_level")
        if len(lo) and len(lo) == len(hi):
            ax.fill_between(lo.im_level.to_numpy(float), _positive(lo.annual_rate.to_numpy(float)),
                            _positive(hi.annual_rate.to_numpy(float)), color=colour, alpha=0.18, linewidth=0)
    if "p50" in fractiles:
        med = g[g.statistic == "p50"].sort_values("im_level")
        if len(med):
            ax.plot(med.im_level.to_numpy(float), _positive(med.annual_rate.to_numpy(float)), color=colour,
                    linestyle=(0, (4, 2)), linewidth=0.9)
    return top, xmin, xmax


def _decorate_hazard_axis(ax, im, floor, rps, top, xmin, xmax):
    """Log-log axes, the grey band below the rate floor and the return-period lines."""
    from matplotlib.ticker import FuncFormatter, NullLocator

    bottom = floor / 30.0
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.yaxis.set_minor_locator(NullLocator())  # a decade grid is enough; minor ticks cost time
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
    ax.set_xlim(xmin, xmax)
    ax.set_ylim(bottom, max(top, 1.0 / min(rps) if rps else top) * 2.0)
    ax.axhspan(bottom, floor, color="#9aa3ad", alpha=0.22, linewidth=0, zorder=0)
    ax.text(0.02, floor / math.sqrt(30.0), f"below the rate floor {floor:.0e}/yr: not for design use",
            transform=ax.get_yaxis_transform(), fontsize=7, color=_INK, va="center")
    for t in rps:
        ax.axhline(1.0 / t, color=_INK, linewidth=0.6, linestyle=(0, (1, 2)))
        ax.text(0.995, 1.0 / t, f"{t:,.0f} yr", transform=ax.get_yaxis_transform(), ha="right", va="bottom",
                fontsize=7, color=_INK)
    ax.set_title(im)
    ax.set_xlabel(f"{im} [g]")
    ax.set_ylabel("annual rate of exceedance [1/yr]")


def _hazard_legend(fig, chosen, stat, fractiles):
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    handles = [Line2D([], [], color=_SERIES[k % len(_SERIES)], label=f"{site}" + (f" ({tag})" if tag else ""))
               for k, (site, tag) in enumerate(chosen)]
    handles.append(Line2D([], [], color=_MUTED, label=f"{stat}"))
    if "p50" in fractiles:
        handles.append(Line2D([], [], color=_MUTED, linestyle=(0, (4, 2)), linewidth=0.9, label="p50"))
    if len(fractiles) >= 2:
        handles.append(Patch(color=_MUTED, alpha=0.25, linewidth=0, label=f"{fractiles[0]} to {fractiles[-1]}"))
    fig.legend(handles=handles, loc="outside upper center", ncol=len(handles))


def _hazard_curves_figure(run, curves, stat, fractiles, chosen, ims):
    """Hazard curves of the chosen sites, one panel per IM (log-log).

    Parameters
    ----------
    run : ReportRun
    curves : pandas.DataFrame
        ``site_hazard`` rows (site_id, im, im_level [g], annual_rate [1/yr], statistic).
    stat : str
        The statistic drawn as the main curve.
    fractiles : list of str
        Fractile statistics in increasing order (band from first to last; p50 dashed).
    chosen : list of (site_id, tag)
    ims : list of str

    Returns
    -------
    matplotlib.figure.Figure
    """
    floor = float(run.section("hazard").get("rate_floor", 1e-6))
    rps = sorted(float(t) for t in run.section("hazard").get("return_periods_yr") or [])
    n = len(ims)
    ncols = 2 if n > 1 else 1
    nrows = math.ceil(n / ncols)
    fig = _new_figure(9.6 if ncols == 2 else 6.2, 3.3 * nrows + 0.3)
    axes = fig.subplots(nrows, ncols, squeeze=False).ravel()
    for ax in axes[n:]:
        ax.set_visible(False)
    for ax, im in zip(axes, ims):
        top, xmin, xmax = 0.0, np.inf, 0.0
        for k, (site, _tag) in enumerate(chosen):
            g = curves[(curves.site_id == site) & (curves.im == im)]
            t, lo, hi = _draw_site_curves(ax, g, stat, fractiles, _SERIES[k % len(_SERIES)])
            top, xmin, xmax = max(top, t), min(xmin, lo), max(xmax, hi)
        if not np.isfinite(xmin):
            ax.set_visible(False)
            continue
        _decorate_hazard_axis(ax, im, floor, rps, top, xmin, xmax)
    _hazard_legend(fig, chosen, stat, fractiles)
    return fig


#: From this many computed periods on, a spectrum's markers are joined by a faint line (dense enough to read
#: as a curve); below it they stand alone: the spectrum between computed periods is not known.
UHS_DENSE_PERIODS = 8


def uhs_style(n_periods):
    """Plot options of a uniform-hazard spectrum: markers at the computed periods, a faint line only if dense.

    Parameters
    ----------
    n_periods : int
        Periods at which the spectrum was computed.

    Returns
    -------
    dict
        Keyword arguments of ``Axes.plot``: markers without a line below :data:`UHS_DENSE_PERIODS`
        periods, markers joined by a thin line from there on.
    """
    if n_periods >= UHS_DENSE_PERIODS:
        return {"marker": "o", "markersize": 4, "linewidth": 0.6, "alpha": 0.9}
    return {"marker": "o", "markersize": 5, "linestyle": "none"}


def _uhs_figure(run, uhs, stat, chosen):
    """Uniform-hazard spectra of the chosen sites, one panel per site: the computed periods as markers."""
    from matplotlib.ticker import FuncFormatter

    rps = sorted(set(uhs.return_period_yr))
    n = len(chosen)
    fig = _new_figure(min(3.4 * n + 0.6, 10.2), 3.1)
    axes = fig.subplots(1, n, squeeze=False, sharey=True).ravel()
    shades = ["#9cc5c9", "#5e9ea5", _TEAL, "#123f45", "#0a2326"]
    for ax, (site, tag) in zip(axes, chosen):
        g = uhs[(uhs.site_id == site) & (uhs.statistic == stat)].copy()
        g["period"] = g.im.map(_period_key)
        for k, rp in enumerate(rps):
            r = g[g.return_period_yr == rp].sort_values("period")
            colour = shades[min(k, len(shades) - 1)] if len(rps) <= len(shades) else None
            ax.plot(r.period, r.im_level, color=colour, label=f"{rp:,.0f} yr", **uhs_style(len(r)))
        ax.set_xscale("log")
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
        ax.set_xlabel("oscillator period [s] (PGA at 0.01 s)")
        ax.set_title(f"{site}" + (f" ({tag} hazard)" if tag else ""))
        ax.set_ylim(bottom=0)
    axes[0].set_ylabel(f"uniform-hazard IM, {stat} [g]")
    axes[-1].legend(title="return period", title_fontsize=7.5)
    return fig


def _bin_label(lo, hi, digits):
    if not np.isfinite(lo):
        return f"< {hi:.{digits}f}"
    if not np.isfinite(hi):
        return f"> {lo:.{digits}f}"
    return f"{lo:.{digits}f}–{hi:.{digits}f}"


def _disagg_figure(d, every):
    """Marginal shares of one disaggregation; ``every``: the rows whose bins define the axes."""
    fig = _new_figure(9.6, 2.9)
    axes = fig.subplots(1, 3)
    spec = (("mag_lo", "mag_hi", 1, "magnitude Mw", _TEAL),
            ("dist_lo_km", "dist_hi_km", 0, "distance Rrup [km]", _OCHRE),
            ("eps_lo", "eps_hi", 1, "epsilon [-]", _PLUM))
    for ax, (lo, hi, digits, label, colour) in zip(axes, spec):
        bins = every[[lo, hi]].drop_duplicates().sort_values(lo)
        m = bins.merge(d.groupby([lo, hi]).share.sum().reset_index(), on=[lo, hi], how="left").fillna({"share": 0.0})
        labels = [_bin_label(a, b, digits) for a, b in zip(m[lo], m[hi])]
        ax.bar(range(len(m)), 100 * m.share.to_numpy(float), color=colour, width=0.8)
        ax.set_xticks(range(len(m)), labels, rotation=45, ha="right", rotation_mode="anchor")
        ax.set_xlabel(label)
        ax.grid(axis="x", visible=False)
    axes[0].set_ylabel("share of exceedance rate [%]")
    return fig


# --- fragility ---------------------------------------------------------------------------------------

def _fragility_figure(lib, codes, counts):
    """Lognormal fragility curves of ``codes``, one panel per class.

    Parameters
    ----------
    lib : FragilityLibrary
        The classes the run used.
    codes : list of str
    counts : pandas.Series
        Number of assets per class.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.ticker import FuncFormatter

    ncols = min(4, len(codes))
    nrows = math.ceil(len(codes) / ncols)
    fig = _new_figure(2.45 * ncols + 0.4, 2.2 * nrows + 0.5)
    axes = fig.subplots(nrows, ncols, squeeze=False).ravel()
    for ax in axes[len(codes):]:
        ax.set_visible(False)
    for ax, code in zip(axes, codes):
        dss = lib[code]
        xmin = float(dss.medians[0] * np.exp(-2.5 * dss.betas[0]))
        xmax = float(dss.medians[-1] * np.exp(2.5 * dss.betas[-1]))
        x = np.geomspace(xmin, xmax, 300)
        p = dss.probabilities(x)
        for j, name in enumerate(dss.names):
            colour = _STATES[j] if dss.n_states <= len(_STATES) else None
            ax.plot(x, p[:, j], color=colour, label=name)
        ax.set_xscale("log")
        ax.set_xlim(xmin, xmax)
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
        ax.set_ylim(0, 1.0)
        ax.set_title(f"{code}  ({counts.get(code, 0)} assets)")
        ax.set_xlabel(f"{dss.im} [g]")
        if ax.get_subplotspec().is_first_col():
            ax.set_ylabel("P(DS ≥ ds | IM) [-]")
    if len({lib[c].names for c in codes}) == 1:
        fig.legend(handles=axes[0].get_lines(), loc="outside upper center", ncol=lib[codes[0]].n_states,
                   title="damage state (reached or exceeded)", title_fontsize=7.5)
    else:
        for ax in axes[:len(codes)]:
            ax.legend(loc="upper left", fontsize=6.5, handlelength=1.4)
    return fig


def _vulnerability_figure(lib, codes, counts):
    """Mean loss ratio against IM of classes given by a vulnerability table, one panel per class.

    Parameters
    ----------
    lib : FragilityLibrary
        The classes the run used.
    codes : list of str
        Classes given by a vulnerability table.
    counts : pandas.Series
        Number of assets per class.

    Returns
    -------
    matplotlib.figure.Figure
        The mean (interpolation rule of :mod:`quakefolio.core.vulnerability`: linear in ln IM, 0
        below the first level, held above the last), the band mean x (1 +- CoV) clipped to
        [0, 1] and the table's rows as points.
    """
    from matplotlib.ticker import FuncFormatter

    from quakefolio.core.vulnerability import cov_at

    ncols = min(4, len(codes))
    nrows = math.ceil(len(codes) / ncols)
    fig = _new_figure(2.45 * ncols + 0.4, 2.2 * nrows + 0.5)
    axes = fig.subplots(nrows, ncols, squeeze=False).ravel()
    for ax in axes[len(codes):]:
        ax.set_visible(False)
    for ax, code in zip(axes, codes):
        vf = lib[code]
        xmin, xmax = float(vf.levels[0]) / 2.0, float(vf.levels[-1]) * 1.5
        x = np.geomspace(xmin, xmax, 300)
        mu = vf.mean_at(x)
        sd = mu * cov_at(x, vf.levels, vf.mean_loss_ratio, vf.cov)
        ax.fill_between(x, np.clip(mu - sd, 0, 1), np.clip(mu + sd, 0, 1), color=_TEAL, alpha=0.2, lw=0,
                        label="mean ± 1 standard deviation")
        ax.plot(x, mu, color=_TEAL, label="mean loss ratio")
        ax.plot(vf.levels, vf.mean_loss_ratio, "o", color=_TEAL, ms=3, label="table rows")
        ax.set_xscale("log")
        ax.set_xlim(xmin, xmax)
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
        ax.set_ylim(0, 1.0)
        ax.set_title(f"{code}  ({counts.get(code, 0)} assets)")
        ax.set_xlabel(f"{vf.im} [g]")
        if ax.get_subplotspec().is_first_col():
            ax.set_ylabel("loss ratio [-]")
    axes[0].legend(loc="upper left", fontsize=6.5, handlelength=1.4)
    return fig


# --- map ---------------------------------------------------------------------------------------------

def _nice(x):
    """A round number near ``x`` (1, 2 or 5 times a power of ten)."""
    if x <= 0:
        return x
    e = math.floor(math.log10(x))
    base = x / 10 ** e
    step = 1 if base < 1.5 else 2 if base < 3.5 else 5 if base < 7.5 else 10
    return step * 10 ** e


def _scale_bar(ax, lat0):
    """A scale bar in a strip added below the assets: about a fifth of the width; returns its length [km]."""
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    y0 -= 0.12 * (y1 - y0)
    ax.set_ylim(y0, y1)
    km_per_deg = 111.32 * math.cos(lat0)
    width_km = (x1 - x0) * km_per_deg
    bar_km = _nice(width_km / 5.0) if width_km > 0 else 1.0
    bar_deg = bar_km / km_per_deg
    bx, by = x0 + 0.04 * (x1 - x0), y0 + 0.05 * (y1 - y0)
    ax.plot([bx, bx + bar_deg], [by, by], color=_INK, linewidth=2.5, solid_capstyle="butt")
    ax.text(bx + bar_deg / 2, by + 0.015 * (y1 - y0), f"{bar_km:g} km", ha="center", va="bottom", fontsize=7.5)
    return bar_km


#: Above this many assets the map draws grid cells (value-weighted centres, summed values) instead of assets.
MAP_MAX_MARKERS = 5000
#: Cells along the longer side of the map's extent when it is aggregated.
MAP_CELLS_ACROSS = 80


def map_cells(d, cells_across=MAP_CELLS_ACROSS):
    """Assets aggregated on a square grid of equal ground distance, for the map of a large portfolio.

    Parameters
    ----------
    d : pandas.DataFrame
        ``lon``, ``lat`` [deg], ``replacement_value`` [currency], ``eal_ratio`` [1/yr].
    cells_across : int
        Cells along the longer side of the assets' extent (the cell size is rounded to a
        1-2-5 number of km).

    Returns
    -------
    cells : pandas.DataFrame
        One row per occupied cell: ``lon``, ``lat`` [deg] (value-weighted mean position of
        its assets), ``replacement_value`` [currency] (sum), ``eal_ratio`` [1/yr] (sum of
        EAL / sum of value: the cell's own EAL ratio) and ``n_assets``; with
        ``collapse_prob_in_horizon`` [-] in ``d``, its mean over the cell's assets (expected
        collapses per building).
    cell_km : float
        Side of a cell [km].

    Notes
    -----
    Positions are projected with an equirectangular approximation about the mean latitude
    (x = lon cos(lat0) 111.32 km/deg, y = lat 111.32 km/deg; common practice for a city-size
    extent), so cells are squares on the ground as the map's axes are.
    """
    import pandas as pd

    lat0 = math.radians(float(d.lat.mean()))
    x = d.lon.to_numpy(float) * 111.32 * math.cos(lat0)
    y = d.lat.to_numpy(float) * 111.32
    extent = max(float(np.ptp(x)), float(np.ptp(y)), 1e-3)
    cell_km = _nice(extent / cells_across)
    ix = np.floor((x - x.min()) / cell_km).astype(np.int64)
    iy = np.floor((y - y.min()) / cell_km).astype(np.int64)
    keys, cell = np.unique(iy * (int(ix.max()) + 1) + ix, return_inverse=True)
    value = d.replacement_value.to_numpy(float)
    total = np.bincount(cell, weights=value, minlength=len(keys))
    weight = np.where(total > 0, total, 1.0)
    cells = pd.DataFrame({
        "lon": np.bincount(cell, weights=value * d.lon.to_numpy(float), minlength=len(keys)) / weight,
        "lat": np.bincount(cell, weights=value * d.lat.to_numpy(float), minlength=len(keys)) / weight,
        "replacement_value": total,
        "eal_ratio": np.bincount(cell, weights=value * d.eal_ratio.to_numpy(float), minlength=len(keys)) / weight,
        "n_assets": np.bincount(cell, minlength=len(keys)),
    })
    if "collapse_prob_in_horizon" in d:  # the mean over the cell's buildings: its expected collapses per building
        cells["collapse_prob_in_horizon"] = (np.bincount(cell, weights=d.collapse_prob_in_horizon.to_numpy(float),
                                                         minlength=len(keys)) / cells.n_assets.to_numpy())
    return cells, cell_km


# --- portfolio ---------------------------------------------------------------------------------------

def _thin_curve(c, n=600):
    """Points of an empirical EP curve at about ``n`` log-spaced return periods (plotting only)."""
    c = c.sort_values("return_period_yr")
    rp = c.return_period_yr.to_numpy(float)
    if len(rp) <= n:
        return c
    grid = np.geomspace(rp[0], rp[-1], n)
    pick = np.unique(np.clip(np.searchsorted(rp, grid), 0, len(rp) - 1))
    return c.iloc[pick]


def _ep_curve_figure(curve, rps, n_years, cur):
    """Portfolio AEP and OEP curves (ground-up and net) against return period.

    Parameters
    ----------
    curve : pandas.DataFrame
        ``portfolio_ep_curve`` rows (basis, metric, loss [currency], return_period_yr [yr]).
    rps : list of float
        Configured return periods [yr] (dotted lines).
    n_years : int
        Number of simulated years (return periods beyond ``n_years / 10`` are shaded).
    cur : str

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.ticker import FuncFormatter

    fig = _new_figure(7.6, 3.8)
    ax = fig.subplots()
    styles = {("ground_up", "aep"): (_TEAL, "-"), ("ground_up", "oep"): ("#7fb9bf", (0, (3, 2))),
              ("net", "aep"): (_OCHRE, "-"), ("net", "oep"): ("#e2bb6e", (0, (3, 2)))}
    for (basis, metric), g in curve.groupby(["basis", "metric"], sort=True):
        g = _thin_curve(g[g.loss > 0])
        colour, ls = styles.get((basis, metric), (_PLUM, "-"))
        ax.plot(g.return_period_yr, g.loss, color=colour, linestyle=ls, drawstyle="steps-post",
                label=f"{metric.upper()} {basis.replace('_', '-')}")
    for t in rps:
        ax.axvline(t, color=_INK, linewidth=0.6, linestyle=(0, (1, 2)))
        ax.text(t, 1.005, f"{t:,.0f} yr", transform=ax.get_xaxis_transform(), ha="center", va="bottom",
                fontsize=6.5, color=_INK)
    ax.axvspan(n_years / 10.0, curve.return_period_yr.max(), color="#9aa3ad", alpha=0.18, linewidth=0)
    ax.text(n_years / 10.0 * 1.1, 0.97, "fewer than 10\nsimulated years\nexceed: rough",
            transform=ax.get_xaxis_transform(), va="top", fontsize=7, color=_MUTED)
    ax.set_xscale("log")
    ax.set_xlim(1.0, curve.return_period_yr.max())
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:,.0f}"))
    ax.set_ylim(bottom=0)
    ax.set_xlabel("return period [yr] (1 / annual exceedance probability)")
    _money_axis(ax, "y", cur)
    ax.legend(loc="upper left")
    return fig


def _cms_figure(cms, uhs_of, site):
    """Conditional mean spectra of one site beside its uniform-hazard spectra, one panel per return period.

    Parameters
    ----------
    cms : pandas.DataFrame
        ``conditional_mean_spectrum`` rows of the site with flag ``ok``.
    uhs_of : callable(return_period_yr) -> (periods [s], values [g])
        The site's mean uniform-hazard spectrum at a return period (PGA at 0.01 s).
    site : str

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.ticker import FuncFormatter

    rps = sorted(set(cms.return_period_yr))
    conds = sorted(set(cms.conditioning_im), key=_period_key)
    fig = _new_figure(min(4.2 * len(rps) + 0.6, 10.2), 3.3)
    axes = fig.subplots(1, len(rps), squeeze=False).ravel()  # own scale per return period
    for ax, rp in zip(axes, rps):
        t, u = uhs_of(rp)
        ax.plot(t, u, color=_INK, label="uniform-hazard spectrum", **uhs_style(len(t)))
        for k, im in enumerate(conds):
            c = cms[(cms.return_period_yr == rp) & (cms.conditioning_im == im)].copy()
            c["period"] = c.im.map(_period_key)
            c = c.sort_values("period")
            colour = _SERIES[k % len(_SERIES)]
            mid = c.cms_g.to_numpy(float)
            spread = np.exp(c.conditional_sigma.to_numpy(float))
            ax.fill_between(c.period, mid / spread, mid * spread, color=colour, alpha=0.15, linewidth=0)
            ax.plot(c.period, mid, color=colour, label=f"CMS | {im}")
            ax.plot([_period_key(im)], [c.target_g.iloc[0]], marker="D", markersize=5, color=colour, linestyle="none")
        ax.set_xscale("log")
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
        ax.set_xlabel("oscillator period [s] (PGA at 0.01 s)")
        ax.set_title(f"{site}, {rp:,.0f} yr")
        ax.set_ylim(bottom=0)
    axes[0].set_ylabel("spectral acceleration [g]")
    axes[-1].legend()
    return fig
