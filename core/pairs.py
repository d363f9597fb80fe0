"""(Site, rupture) pairs of the classical engine: cut-off, distances and ground-motion model input.

The pairs of a block of sites are those within the integration distance on Rjb (the
bounding-circle test of :func:`quakefolio.core.sources.geometry.site_rupture_mask`, then
the exact distances, computed once), sorted by site.  The ground-motion model input is one
scenario per pair, or, where the pairs fill most of the grid of the block's sites and
ruptures that have pairs, that grid (site fields per site, rupture fields per rupture,
distances per cell), so that models compute terms of the site or the rupture alone once;
the values are the same element-wise expressions either way, so every result is bit for
bit the same.  Used by :mod:`quakefolio.core.hazard` (curves, disaggregation, event
ground motion).
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np

from quakefolio.core.gmm import TECTONIC_REGIONS, GmmInput
from quakefolio.core.sources.geometry import aeqd_forward, mean_position, pair_distances, rupture_distances, site_rupture_mask

__all__ = ["DENSE_SHARE", "pair_segments", "block_pairs", "pair_blocks", "pair_values", "model_values",
           "hypocentres_km", "extra_fields", "region_parts", "model_input", "check_event_model"]

#: Index of the intraslab region in :data:`quakefolio.core.gmm.TECTONIC_REGIONS`.
_INTRASLAB = TECTONIC_REGIONS.index("subduction_intraslab")
_SUBDUCTION = (TECTONIC_REGIONS.index("subduction_interface"), _INTRASLAB)


def hypocentres_km(ruptures, ref):
    r"""Hypocentre of each rupture in the local projection: east, north [km] and depth [km].

    The hypocentre lies on the rupture plane at the depth ``zhyp_km``, midway along strike:
    on the segment from the midpoint of the top edge to the midpoint of the bottom edge
    (corners projected azimuthal-equidistantly about ``ref``, as the distance code does),
    at the fraction :math:`(z_{hyp} - z_{tor}) / (z_{bot} - z_{tor})` of it. For a point
    source this is the source's position at its hypocentral depth.

    Parameters
    ----------
    ruptures : quakefolio.core.sources.ruptures.RuptureSet
    ref : (lon, lat) [deg]

    Returns
    -------
    x_km, y_km, z_km : ndarray, shape (n_ruptures,)
    """
    c = ruptures.corners
    x, y = aeqd_forward(c[:, :, 0], c[:, :, 1], ref[0], ref[1])
    f = (ruptures.zhyp_km - ruptures.ztor_km) / (ruptures.zbot_km - ruptures.ztor_km)
    top_x, top_y = 0.5 * (x[:, 0] + x[:, 1]), 0.5 * (y[:, 0] + y[:, 1])
    bot_x, bot_y = 0.5 * (x[:, 2] + x[:, 3]), 0.5 * (y[:, 2] + y[:, 3])
    return top_x + f * (bot_x - top_x), top_y + f * (bot_y - top_y), ruptures.zhyp_km


def extra_fields(site_lon, site_lat, ruptures, site, rup, ref, site_fields):
    r"""Ground-motion input fields beyond the crustal ones, one value per pair.

    Parameters
    ----------
    site_lon, site_lat : ndarray, shape (n_sites,) [deg]
    ruptures : quakefolio.core.sources.ruptures.RuptureSet
    site, rup : ndarray of int, shape (n_pairs,)
    ref : (lon, lat) [deg]
    site_fields : dict of str to ndarray, shape (n_sites,)
        Optional per-site fields: ``backarc`` (0 or 1), ``z1p0_km``, ``z2p5_km`` [km].

    Returns
    -------
    dict of str to ndarray, shape (n_pairs,)
        The given site fields per pair (``backarc`` only for subduction ruptures'
        pairs' use), and, where any rupture is a subduction one, ``rhyp_km`` (the
        hypocentral distance :math:`\sqrt{R_{epi}^2 + z_{hyp}^2}` [km], epicentral
        distance in the local projection, :func:`hypocentres_km`) and ``intraslab``
        (1 for the intraslab region, else 0).
    """
    out = {key: np.asarray(value)[site] for key, value in (site_fields or {}).items() if value is not None}
    code = ruptures.region_code[rup]
    if np.isin(code, _SUBDUCTION).any():
        hx, hy, hz = hypocentres_km(ruptures, ref)
        sx, sy = aeqd_forward(np.asarray(site_lon)[site], np.asarray(site_lat)[site], ref[0], ref[1])
        out["rhyp_km"] = np.sqrt((sx - hx[rup]) ** 2 + (sy - hy[rup]) ** 2 + hz[rup] ** 2)
        out["intraslab"] = (code == _INTRASLAB).astype(float)
    else:
        out.pop("backarc", None)
    return out



def pair_segments(site, rup):
    """Pairs sorted by site with the first pair and the owner of each site's segment.

    Parameters
    ----------
    site, rup : ndarray of int, shape (n_pairs,)
        Pairs sorted by site.

    Returns
    -------
    site, rup : ndarray of int
    starts : ndarray of int
        First pair of each site that has pairs.
    owners : ndarray of int
        The sites the segments belong to.
    """
    if site.size == 0:
        return site, rup, np.zeros(0, dtype=np.intp), np.zeros(0, dtype=np.intp)
    change = np.flatnonzero(np.diff(site)) + 1
    starts = np.concatenate([[0], change])
    return site, rup, starts, site[starts]


#: Share of a site block's (site, rupture) grid passing the bounding test above which the
#: distances are computed on the whole grid (broadcast) rather than per pair (gathered),
#: and share of the grid of the sites and ruptures that have pairs above which the
#: ground-motion models are evaluated on that grid; the values are the same either way
#: (the same element-wise expressions).
DENSE_SHARE = 0.5


class _GridPairs(dict):
    """Per-pair distances [km] read from the block grid on first use (row-major: the pairs' order)."""

    def __init__(self, grid, cells):
        super().__init__()
        self._grid, self._cells = grid, cells

    def __missing__(self, key):
        value = self[key] = self._grid[key][self._cells]
        return value


def _surviving_pairs(site_lon, site_lat, ruptures, max_distance_km, ref):
    """Pairs within the cut-off, sorted by site: (site, rupture, starts, owners, distances, grid).

    Candidates of the bounding-circle test, then the exact cut-off on their distances,
    computed once (the same pairs and values as ``site_rupture_mask(exact=True)``);
    ``grid`` holds the distances of the whole block grid when they were computed that way,
    and under ``"pairs"`` the boolean grid of the pairs.
    """
    mask = site_rupture_mask(site_lon, site_lat, ruptures, max_distance_km, metric="rjb", exact=False,
                             ref_lon=ref[0], ref_lat=ref[1])
    n_candidates = int(np.count_nonzero(mask))
    d = grid = None
    if n_candidates >= DENSE_SHARE * mask.size and n_candidates:  # most of the grid: broadcast, no gathers
        grid = rupture_distances(site_lon, site_lat, ruptures, ref_lon=ref[0], ref_lat=ref[1])
        mask &= ~(grid["rjb_km"] > max_distance_km)
        grid["pairs"] = mask
        site, rup = np.nonzero(mask)  # row-major: sorted by site
        d = _GridPairs(grid, mask)
    else:
        site, rup = np.nonzero(mask)
        if site.size:
            d = pair_distances(site_lon, site_lat, ruptures, site, rup, ref_lon=ref[0], ref_lat=ref[1])
            near = ~(d["rjb_km"] > max_distance_km)
            if not near.all():
                site, rup = site[near], rup[near]
                d = {key: value[near] for key, value in d.items()}
    site, rup, starts, owners = pair_segments(site, rup)
    return site, rup, starts, owners, d, grid


def block_pairs(site_lon, site_lat, site_vs30, ruptures, max_distance_km, ref, region, z1p0_km=None,
                 z2p5_km=None, backarc=None):
    """Surviving (site, rupture) pairs of a block of sites and their GMM input, one scenario per pair.

    Parameters
    ----------
    site_lon, site_lat, site_vs30 : ndarray, shape (n_sites,) [deg], [deg], [m/s]
    ruptures : quakefolio.core.sources.ruptures.RuptureSet
    max_distance_km : float
        Integration distance on Rjb [km].
    ref : (lon, lat) [deg]
        Reference point of the local projection.
    region : str
    z1p0_km, z2p5_km : ndarray, shape (n_sites,) [km], or None
    backarc : ndarray of {0, 1}, shape (n_sites,), or None
        Sites in the backarc of a subduction zone (used with subduction ruptures,
        :func:`extra_fields`).

    Returns
    -------
    site, rup, starts, owners : ndarray of int
        The pairs sorted by site and their segments (:func:`pair_segments`).
    inp : GmmInput or None
        None where no pair survives.
    distances : dict of str to ndarray, shape (n_pairs,) [km], or None
    """
    site, rup, starts, owners, d, _ = _surviving_pairs(site_lon, site_lat, ruptures, max_distance_km, ref)
    if site.size == 0:
        return site, rup, starts, owners, None, None
    extra = extra_fields(site_lon, site_lat, ruptures, site, rup, ref,
                         {"z1p0_km": z1p0_km, "z2p5_km": z2p5_km, "backarc": backarc})
    inp = GmmInput(
        mag=ruptures.mag[rup], vs30_mps=site_vs30[site], rrup_km=d["rrup_km"], rjb_km=d["rjb_km"],
        rx_km=d["rx_km"], ry0_km=d["ry0_km"], ztor_km=ruptures.ztor_km[rup], zhyp_km=ruptures.zhyp_km[rup],
        dip_deg=ruptures.dip_deg[rup], rake_deg=ruptures.rake_deg[rup], width_km=ruptures.width_km[rup],
        region=region, **extra,
    )
    return site, rup, starts, owners, inp, d


def _grid_input(site_vs30, ruptures, site, owners, grid, region):
    """GMM input on the grid of the sites and ruptures that have pairs, and the pairs' cells in it.

    Returns (input, cells) or None where the pairs fill less than :data:`DENSE_SHARE` of
    that grid.  Site fields have shape (n_sites, 1), rupture fields (1, n_ruptures), the
    distances (n_sites, n_ruptures); ``cells`` is the boolean grid of the pairs, whose
    row-major order is the pairs' order.
    """
    if grid is None:
        return None
    cells = grid["pairs"]
    cols = np.flatnonzero(cells.any(axis=0))
    if site.size < DENSE_SHARE * len(owners) * len(cols):
        return None
    if len(owners) < cells.shape[0] or len(cols) < cells.shape[1]:
        cut = np.ix_(owners, cols)
        cells = cells[cut]
        dist = {key: grid[key][cut] for key in ("rrup_km", "rjb_km", "rx_km", "ry0_km")}
    else:
        dist = grid
    r = lambda a: a[cols][None, :]  # noqa: E731
    inp = GmmInput(
        mag=r(ruptures.mag), vs30_mps=site_vs30[owners][:, None], rrup_km=dist["rrup_km"], rjb_km=dist["rjb_km"],
        rx_km=dist["rx_km"], ry0_km=dist["ry0_km"], ztor_km=r(ruptures.ztor_km), zhyp_km=r(ruptures.zhyp_km),
        dip_deg=r(ruptures.dip_deg), rake_deg=r(ruptures.rake_deg), width_km=r(ruptures.width_km), region=region,
    )
    return inp, cells


def pair_values(result, cells):
    """Ln median [ln g] and sigma [ln units] per IM and pair from a model result.

    Parameters
    ----------
    result : GmmResult
        Of an input from :func:`pair_blocks`.
    cells : ndarray of bool or None
        The pairs' cells where the input was a grid (None: one scenario per pair).

    Returns
    -------
    ln_median, sigma : ndarray, shape (n_ims, n_pairs)
    """
    if cells is None:
        return result.ln_median, result.sigma
    if cells.all():
        n = result.ln_median.shape[0]
        return result.ln_median.reshape(n, -1), result.sigma.reshape(n, -1)
    return result.ln_median[:, cells], result.sigma[:, cells]


def model_values(gmm, inp, cells, ims, memo=None, key=None):
    """Ln median [ln g] and sigma [ln units] per IM and pair of model ``gmm``, reused from ``memo`` when there.

    Parameters
    ----------
    gmm : ground-motion model
    inp : GmmInput
        Of :func:`pair_blocks` or :func:`block_pairs` (Vs30 clamped here, :func:`model_input`).
    cells : ndarray of bool or None
        As :func:`pair_values`.
    ims : sequence of str
    memo : object with ``get(key)`` and ``memo[key] = values``, or None
        Values of earlier evaluations in this process (e.g. the hazard curves' for the
        disaggregation and the conditional mean spectrum); it may decline to keep new ones.
    key : hashable
        Identifies the pairs, the model and ``ims`` in ``memo`` (the caller's duty: the same
        key only for the same sites, ruptures, model and IMs).

    Returns
    -------
    ln_median, sigma : ndarray, shape (n_ims, n_pairs)

    Notes
    -----
    The model's evaluation (its paper's equations, :mod:`quakefolio.core.gmm`), computed
    once: a value taken from ``memo`` is the array computed before, so every result is bit
    for bit the one of a new evaluation on the same pairs.
    """
    if memo is not None:
        hit = memo.get(key)
        if hit is not None:
            return hit
    values = pair_values(gmm.evaluate(model_input(inp, gmm), list(ims)), cells)
    if memo is not None:
        memo[key] = values
    return values


def pair_blocks(site_lon, site_lat, site_vs30, ruptures, max_distance_km, region, site_block, ref,
                site_fields=None):
    """Blocks of sites with their surviving pairs; blocks without any pair are skipped.

    Parameters
    ----------
    site_lon, site_lat, site_vs30 : array_like, shape (n_sites,) [deg], [deg], [m/s]
    ruptures : quakefolio.core.sources.ruptures.RuptureSet
    max_distance_km : float
        Integration distance on Rjb [km].
    region : str
    site_block : int
        Sites per block.
    ref : (lon, lat) or None
        Reference point of the local projection; default the mean site position, fixed
        for all blocks so results do not depend on the blocking.
    site_fields : dict of str to array_like, shape (n_sites,), or None
        Optional per-site ground-motion inputs (``backarc``, ``z1p0_km``, ``z2p5_km``);
        with them, or with subduction ruptures (hypocentral distance, event type), the
        input is one scenario per pair (:func:`extra_fields`).

    Yields
    ------
    (slice, site, rupture, starts, owners, inp, cells, distances, pair_rate)
        The block, its pairs (:func:`block_pairs`), the GMM input (per pair, ``cells``
        None, or on the grid of the block's sites and ruptures with pairs,
        :func:`_grid_input`; :func:`pair_values` reads per-pair values from either),
        per-pair distances [km] and annual rates [1/yr].
    """
    lon = np.asarray(site_lon, dtype=float)
    lat = np.asarray(site_lat, dtype=float)
    vs30 = np.asarray(site_vs30, dtype=float)
    ref = ref if ref is not None else mean_position(lon, lat)
    fields = {k: np.asarray(v, dtype=float) for k, v in (site_fields or {}).items() if v is not None}
    # backarc enters only with subduction ruptures (:func:`extra_fields` drops it for the others)
    plain = not set(fields) - {"backarc"} and not np.isin(ruptures.region_code, _SUBDUCTION).any()
    for lo in range(0, len(lon), site_block):
        blk = slice(lo, min(len(lon), lo + site_block))
        site, rup, starts, owners, d, grid = _surviving_pairs(lon[blk], lat[blk], ruptures, max_distance_km, ref)
        if site.size == 0:
            continue
        dense = _grid_input(vs30[blk], ruptures, site, owners, grid, region) if plain else None
        if dense is None:
            extra = {} if plain else extra_fields(lon[blk], lat[blk], ruptures, site, rup, ref,
                                                  {k: v[blk] for k, v in fields.items()})
            inp, cells = GmmInput(
                mag=ruptures.mag[rup], vs30_mps=vs30[blk][site], rrup_km=d["rrup_km"], rjb_km=d["rjb_km"],
                rx_km=d["rx_km"], ry0_km=d["ry0_km"], ztor_km=ruptures.ztor_km[rup],
                zhyp_km=ruptures.zhyp_km[rup], dip_deg=ruptures.dip_deg[rup], rake_deg=ruptures.rake_deg[rup],
                width_km=ruptures.width_km[rup], region=region, **extra), None
        else:
            inp, cells = dense
        yield blk, site, rup, starts, owners, inp, cells, d, ruptures.rate[rup]


def region_parts(ruptures, region_branches):
    """Ruptures of each tectonic region with the models that evaluate them.

    Parameters
    ----------
    ruptures : quakefolio.core.sources.ruptures.RuptureSet
    region_branches : mapping of str to sequence of (weight, model), or None
        Ground-motion branches of the regions other than ``active_crustal``
        (:data:`quakefolio.core.gmm.TECTONIC_REGIONS` names), weights summing to 1.

    Returns
    -------
    list of (RuptureSet, branches)
        First the active-crustal ruptures with ``branches`` None (the caller's branch
        models), then each other region present with its ``(weight, model)`` list; a set
        of active-crustal ruptures only is returned whole (the same object).

    Raises
    ------
    ValueError
        If ruptures of a region have no branches.
    """
    codes = ruptures.region_code
    if not codes.any():
        return [(ruptures, None)]
    parts = [(ruptures.subset(codes == 0), None)] if (codes == 0).any() else []
    for code in np.unique(codes[codes > 0]):
        name = TECTONIC_REGIONS[code]
        branches = (region_branches or {}).get(name)
        if not branches:
            raise ValueError(f"ruptures of the {name} region have no ground-motion branches")
        weights = np.array([w for w, _ in branches], dtype=float)
        if np.any(weights < 0) or abs(weights.sum() - 1.0) > 1e-9:
            raise ValueError(f"{name} branch weights must be non-negative and sum to 1, got {weights.tolist()}")
        parts.append((ruptures.subset(codes == code), list(branches)))
    return parts


def model_input(inp, gmm):
    """The ground-motion input as model ``gmm`` takes it: Vs30 clamped to the model's range.

    The stated rule of the engine for a Vs30 outside a model's range of applicability
    (``gmm.applicability["vs30_mps"]``, [m/s], from the model's paper): each model takes
    the nearest end of its own range (other models of the run see the site's own Vs30),
    rather than extrapolating its site term; the run warns about such sites
    (:mod:`quakefolio.pipeline.stages.plausibility`) and records the rule in its manifest.

    Parameters
    ----------
    inp : GmmInput
    gmm : ground-motion model
        With ``applicability`` (a model without a Vs30 range takes ``inp`` as it is).

    Returns
    -------
    GmmInput
        ``inp`` itself when every Vs30 lies within the range, else a copy with
        ``vs30_mps`` clipped to it.
    """
    span = getattr(gmm, "applicability", {}).get("vs30_mps")
    if span is None or inp.vs30_mps is None:
        return inp
    vs30 = np.asarray(inp.vs30_mps, dtype=float)
    lo, hi = float(span[0]), float(span[1])
    if vs30.min(initial=lo) >= lo and vs30.max(initial=hi) <= hi:
        return inp
    return replace(inp, vs30_mps=np.clip(vs30, lo, hi))


def check_event_model(gmm, region_name):
    """Refuse a model for the event ground motion of ruptures of the tectonic region ``region_name``.

    Parameters
    ----------
    gmm : ground-motion model
    region_name : str
        A name of :data:`quakefolio.core.gmm.TECTONIC_REGIONS`.

    Raises
    ------
    ValueError
        If the model gives only a total sigma (``has_tau_phi`` False: the fields need its
        between- and within-event parts), or is not made for the region
        (``tectonic_regions``; a model without it is an active-crustal one).
    """
    if not gmm.has_tau_phi:
        raise ValueError(f"{gmm.name}: the model gives only a total sigma; event ground motion needs "
                         "its between- and within-event parts (tau, phi)")
    if region_name not in getattr(gmm, "tectonic_regions", TECTONIC_REGIONS[:1]):
        raise ValueError(f"{gmm.name} is not a model of the {region_name} region of the ruptures it is to evaluate")
