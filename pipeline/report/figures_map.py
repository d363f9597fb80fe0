"""The report's map: assets (or grid cells) coloured by a chosen figure, with the source model's faults,
the hazard sites and the portfolio's outline as layers."""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from quakefolio.pipeline.report.figures import _INK, _MUTED, _TEAL, _new_figure, _nice, _scale_bar

__all__ = ["MAP_COLOURINGS", "MapLayers", "portfolio_outline", "map_figure", "colour_values"]

#: The map's colourings: key -> (radio label, colour-bar label with ``{h}`` the horizon [yr] and ``{cur}``).
MAP_COLOURINGS = {
    "eal": ("EAL ratio", "expected annual loss ratio [‰ of value per yr]"),
    "collapse": ("collapse probability", "probability of collapse in {h:g} years [%]"),
    "value": ("replacement value", "replacement value [{cur}]"),
}


@dataclass(frozen=True)
class MapLayers:
    """What a map drew besides the assets: fault ids (in the frame and outside it), sites, outline vertices."""

    faults: tuple = ()
    faults_outside: tuple = ()
    sites: int = 0
    outline_vertices: int = 0


def portfolio_outline(lon, lat):
    """The convex hull of the asset positions, as the portfolio's outline on the map.

    Parameters
    ----------
    lon, lat : array_like of float [deg]
        Asset positions (WGS84).

    Returns
    -------
    numpy.ndarray, shape (k, 2)
        Hull vertices ``(lon, lat)`` [deg] counter-clockwise in the (lon, lat) plane, the first
        not repeated; fewer than 3 distinct or collinear positions give the distinct points
        themselves (k <= 2 for collinear ones: the two ends).

    Notes
    -----
    Computed in the (lon, lat) plane, which is what the map draws (its aspect only stretches
    x, and a hull is preserved by scaling an axis).  The positions strictly inside the polygon
    of the eight extreme points (of lon, lat, lon + lat, lon - lat, each way) are dropped
    first, as none of them can be a hull vertex (Akl & Toussaint 1978); the rest go to
    Quickhull through scipy's Qhull binding.

    References
    ----------
    Akl, S. G. and Toussaint, G. T. (1978). A fast convex hull algorithm. Information
    Processing Letters 7(5), 219-222.
    Barber, C. B., Dobkin, D. P. and Huhdanpaa, H. (1996). The Quickhull algorithm for convex
    hulls. ACM Transactions on Mathematical Software 22(4), 469-483.
    """
    pts = np.column_stack([np.asarray(lon, float), np.asarray(lat, float)])
    pts = pts[np.isfinite(pts).all(axis=1)]
    if len(pts) < 3:
        return np.unique(pts, axis=0)
    from scipy.spatial import ConvexHull, QhullError

    try:
        pts = _outside_octagon(pts, ConvexHull)
        hull = ConvexHull(pts)  # repeated positions are fine: a hull vertex is listed once
    except QhullError:  # fewer than 3 distinct or collinear positions: the two ends of the line
        pts = np.unique(pts, axis=0)
        if len(pts) < 3:
            return pts
        d = pts - pts[0]
        t = d @ (d[np.argmax(np.hypot(d[:, 0], d[:, 1]))])
        return pts[[int(np.argmin(t)), int(np.argmax(t))]]
    return pts[hull.vertices]  # counter-clockwise for 2-d input


def _outside_octagon(pts, hull_of):
    """The points not strictly inside the convex polygon of the eight extreme points (all when it is flat)."""
    x, y = pts[:, 0], pts[:, 1]
    idx = np.unique([f(v) for v in (x, y, x + y, x - y) for f in (np.argmin, np.argmax)])
    if len(idx) < 3 or len(pts) < 16:
        return pts
    try:
        ring = pts[idx][hull_of(pts[idx]).vertices]  # counter-clockwise
    except Exception:  # noqa: BLE001 - a flat set of extremes filters nothing
        return pts
    inside = np.ones(len(pts), dtype=bool)
    for a, b in zip(ring, np.roll(ring, -1, axis=0)):
        inside &= (b[0] - a[0]) * (y - a[1]) - (b[1] - a[1]) * (x - a[0]) > 0  # strictly left of each edge
    return pts[~inside]


def colour_values(d, colouring):
    """The number each marker is coloured by, in the unit of its colour bar.

    Parameters
    ----------
    d : pandas.DataFrame
        Assets or cells: ``eal_ratio`` [1/yr], ``collapse_prob_in_horizon`` [-],
        ``replacement_value`` [currency].
    colouring : {"eal", "collapse", "value"}

    Returns
    -------
    numpy.ndarray
        ``eal``: 1000 x EAL ratio [‰/yr]; ``collapse``: 100 x probability [%]; ``value``:
        replacement value [currency].
    """
    if colouring == "eal":
        return 1000.0 * d.eal_ratio.to_numpy(float)
    if colouring == "collapse":
        return 100.0 * d.collapse_prob_in_horizon.to_numpy(float)
    return d.replacement_value.to_numpy(float)


#: Fault traces within this distance of the assets' and sites' box, or half its size if larger, widen the frame [km].
NEAR_FAULT_KM = 10.0


def _near_fault_points(faults, lon, lat):
    """Points of the fault traces (sampled along each segment) near the box of ``lon``, ``lat`` [deg]."""
    if faults is None or not len(faults):
        return np.empty(0), np.empty(0)
    km_lat = 111.32
    km_lon = km_lat * max(math.cos(math.radians(float(np.mean(lat)))), 1e-3)
    reach = max(NEAR_FAULT_KM, 0.5 * max(float(np.ptp(lon)) * km_lon, float(np.ptp(lat)) * km_lat))
    t = np.linspace(0.0, 1.0, 32)[:, None]
    xs, ys = [], []
    for _sid, _region, x, y in _traces(faults):
        xs.append((x[:-1] + t * np.diff(x)).T.ravel())
        ys.append((y[:-1] + t * np.diff(y)).T.ravel())
    x, y = np.concatenate(xs), np.concatenate(ys)
    near = ((x >= lon.min() - reach / km_lon) & (x <= lon.max() + reach / km_lon)
            & (y >= lat.min() - reach / km_lat) & (y <= lat.max() + reach / km_lat))
    return x[near], y[near]


def _frame_extent(d, sites, faults=None):
    """The map's frame: assets, hazard sites and the parts of faults near them (:data:`NEAR_FAULT_KM`), padded
    by 6% and at least 1 km each side [deg]."""
    lon = [d.lon.to_numpy(float)] + ([] if sites is None else [sites.lon.to_numpy(float)])
    lat = [d.lat.to_numpy(float)] + ([] if sites is None else [sites.lat.to_numpy(float)])
    lon, lat = np.concatenate(lon), np.concatenate(lat)
    fx, fy = _near_fault_points(faults, lon, lat)
    lon, lat = np.concatenate([lon, fx]), np.concatenate([lat, fy])
    lat0 = math.radians(float(np.mean(lat)))
    pad_lat = max(0.06 * float(np.ptp(lat)), 1.0 / 111.32)
    pad_lon = max(0.06 * float(np.ptp(lon)), 1.0 / (111.32 * max(math.cos(lat0), 1e-3)))
    return (float(lon.min()) - pad_lon, float(lon.max()) + pad_lon), (float(lat.min()) - pad_lat,
                                                                     float(lat.max()) + pad_lat)


def _traces(faults):
    """Distinct fault traces, (source_id, region, lon array, lat array): a fault of several branches once."""
    out, seen = [], set()
    if faults is None or not len(faults):
        return out
    for (sid, _branch), g in faults.groupby(["source_id", "source_branch"], sort=False):
        g = g.sort_values("point_index")
        key = (sid, tuple(np.round(g.lon.to_numpy(float), 7)), tuple(np.round(g.lat.to_numpy(float), 7)))
        if key in seen:
            continue
        seen.add(key)
        out.append((str(sid), str(g.region.iloc[0]), g.lon.to_numpy(float), g.lat.to_numpy(float)))
    return out


def _draw_faults(ax, faults, xlim, ylim):
    """Fault traces (clipped to the frame), labelled at their first point inside it; returns (drawn, outside)."""
    drawn, outside = [], []
    for sid, region, lon, lat in _traces(faults):
        # a trace may cross the frame without a point inside it: test its segments' bounding boxes
        crosses = any(min(lon[i], lon[i + 1]) <= xlim[1] and max(lon[i], lon[i + 1]) >= xlim[0]
                      and min(lat[i], lat[i + 1]) <= ylim[1] and max(lat[i], lat[i + 1]) >= ylim[0]
                      for i in range(len(lon) - 1))
        if not crosses:
            outside.append(sid)
            continue
        dashed = region != "active_crustal"
        line, = ax.plot(lon, lat, color=_INK, linewidth=2.0, linestyle=(0, (5, 2)) if dashed else "-",
                        solid_capstyle="round", zorder=4)
        line.set_gid(f"fault:{sid}")
        # the label sits at the middle of the trace's part inside the frame (segments sampled at 64 points)
        t = np.linspace(0.0, 1.0, 64)[:, None]
        px = (lon[:-1] + t * np.diff(lon)).T.ravel()
        py = (lat[:-1] + t * np.diff(lat)).T.ravel()
        within = np.flatnonzero((px >= xlim[0]) & (px <= xlim[1]) & (py >= ylim[0]) & (py <= ylim[1]))
        k = int(within[len(within) // 2]) if len(within) else 0
        x, y = float(np.clip(px[k], *xlim)), float(np.clip(py[k], *ylim))
        ax.annotate(sid.replace("_", " "), (x, y), xytext=(4, 4), textcoords="offset points", fontsize=7,
                    color=_INK, zorder=5, bbox=dict(boxstyle="round,pad=0.15", fc="white", ec="none", alpha=0.75))
        drawn.append(sid)
    return tuple(drawn), tuple(outside)


def _colour_scale(values, colouring, capped):
    """(norm, extend) of the colour bar: log scale for values, the 99th percentile cap for many markers."""
    from matplotlib.colors import LogNorm, Normalize

    finite = values[np.isfinite(values)]
    if colouring == "value":
        lo, hi = float(finite[finite > 0].min()) if (finite > 0).any() else 1.0, float(finite.max(initial=1.0))
        if hi > 20 * lo:
            return LogNorm(lo, hi), "neither"
        return Normalize(0, hi), "neither"
    vmax = float(np.nanpercentile(finite, 99 if capped else 100)) if len(finite) else 1.0
    vmax = vmax or 1.0
    return Normalize(0, vmax), "max" if finite.max(initial=0) > vmax else "neither"


def map_figure(d, cur, colouring, *, horizon, faults=None, sites=None, outline=None):
    """The map: assets (or grid cells) by value and a chosen colouring, with faults, sites and outline.

    Parameters
    ----------
    d : pandas.DataFrame
        Assets or grid cells (:func:`quakefolio.pipeline.report.figures.map_cells`): ``lon``,
        ``lat`` [deg], ``replacement_value`` [currency], ``eal_ratio`` [1/yr] and
        ``collapse_prob_in_horizon`` [-].
    cur : str
        Currency code.
    colouring : {"eal", "collapse", "value"}
        What the marker colour shows (:data:`MAP_COLOURINGS`).
    horizon : float
        The run's horizon [yr] (collapse probability label).
    faults : pandas.DataFrame, optional
        ``source_faults`` rows (source_branch, source_id, region, point_index, lon, lat).
    sites : pandas.DataFrame, optional
        ``hazard_sites`` rows (site_id, lon, lat).
    outline : numpy.ndarray, optional
        The portfolio's outline (:func:`portfolio_outline`), (k, 2) [deg].

    Returns
    -------
    fig : matplotlib.figure.Figure
    capped : bool
        Whether the colour scale is capped at the 99th percentile (100 or more markers).
    bar_km : float
        Length of the scale bar [km].
    layers : MapLayers
        The faults drawn and those outside the frame, the sites and outline vertices drawn.
    """
    from matplotlib.colors import LinearSegmentedColormap
    from matplotlib.lines import Line2D

    xlim, ylim = _frame_extent(d, sites, faults)
    lat0 = math.radians(0.5 * (ylim[0] + ylim[1]))
    fig = _new_figure(7.4, 6.6)
    ax = fig.subplots()
    ramp = (["#e6eef0", "#9cc5c9", "#5e9ea5", _TEAL, "#123f45"] if colouring == "value"
            else ["#e9e2c8", "#d9b44a", "#c97d2c", "#9b3b2f", "#3d1712"])
    cmap = LinearSegmentedColormap.from_list(f"qf_{colouring}", ramp)
    values = colour_values(d, colouring)
    capped = len(d) >= 100 and colouring != "value"
    norm, extend = _colour_scale(values, colouring, capped)
    vmax_value = float(d.replacement_value.max()) or 1.0
    size = 6.0 + 220.0 * np.sqrt(d.replacement_value.to_numpy(float) / vmax_value)
    order = np.argsort(-d.replacement_value.to_numpy(float), kind="stable")
    handles = []
    if outline is not None and len(outline) >= 2:
        closed = np.vstack([outline, outline[:1]]) if len(outline) >= 3 else outline
        line, = ax.plot(closed[:, 0], closed[:, 1], color=_MUTED, linewidth=1.0, linestyle=(0, (3, 2)), zorder=1)
        line.set_gid("outline")
        handles.append(Line2D([], [], color=_MUTED, linewidth=1.0, linestyle=(0, (3, 2)),
                              label="portfolio outline (convex hull)"))
    sc = ax.scatter(d.lon.to_numpy(float)[order], d.lat.to_numpy(float)[order], s=size[order], c=values[order],
                    cmap=cmap, norm=norm, edgecolors=_INK, linewidths=0.35, alpha=0.9, zorder=2)
    n_sites = 0
    if sites is not None and len(sites):
        pts = ax.scatter(sites.lon.to_numpy(float), sites.lat.to_numpy(float), marker="^", s=26, facecolor="white",
                         edgecolors=_INK, linewidths=0.9, zorder=3)
        pts.set_gid("sites")
        n_sites = len(sites)
        handles.append(Line2D([], [], marker="^", linestyle="none", markerfacecolor="white", markeredgecolor=_INK,
                              label=f"hazard site ({n_sites})"))
    ax.set_xlim(*xlim)
    ax.set_ylim(*ylim)
    ax.set_autoscale_on(False)  # the faults are clipped to the frame of the assets and sites
    bar_km = _scale_bar(ax, lat0)  # adds a strip below the frame
    drawn, outside = _draw_faults(ax, faults, ax.get_xlim(), ax.get_ylim())
    if drawn:
        handles.append(Line2D([], [], color=_INK, linewidth=2.0, label="fault trace (crustal)"))
        if any(r != "active_crustal" for s, r, _, _ in _traces(faults) if s in drawn):
            handles.append(Line2D([], [], color=_INK, linewidth=2.0, linestyle=(0, (5, 2)),
                                  label="fault trace (other tectonic region)"))
    cb = fig.colorbar(sc, ax=ax, shrink=0.75, pad=0.02, extend=extend)
    cb.set_label(MAP_COLOURINGS[colouring][1].format(h=horizon, cur=cur))
    if colouring == "value":  # money in plain figures, not powers of ten
        from matplotlib.ticker import FuncFormatter, NullFormatter

        cb.ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:,.0f}"))
        cb.ax.yaxis.set_minor_formatter(NullFormatter())
    ax.set_aspect(1.0 / math.cos(lat0))
    ax.set_xlabel("longitude [°]")
    ax.set_ylabel("latitude [°]")
    ax.ticklabel_format(useOffset=False, style="plain")
    if handles:
        fig.legend(handles=handles, loc="outside upper center", ncol=min(len(handles), 4), fontsize=7.5)
    refs = sorted({_nice(v) for v in np.quantile(d.replacement_value, [0.5, 0.9, 1.0])})
    sizes = [ax.scatter([], [], s=6.0 + 220.0 * np.sqrt(v / vmax_value), facecolor="none", edgecolors=_INK,
                        linewidths=0.6) for v in refs]
    fig.legend(sizes, [f"{v:,.0f}" for v in refs], title=f"marker area: replacement value [{cur}]",
               title_fontsize=7.5, loc="outside lower center", ncol=len(refs), columnspacing=2.5, fontsize=7.5)
    layers = MapLayers(faults=drawn, faults_outside=outside, sites=n_sites,
                       outline_vertices=0 if outline is None else len(outline))
    return fig, capped, bar_km, layers
