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

import numpy as np

from quakefolio.core.gmm import GmmInput
from quakefolio.core.sources.geometry import mean_position, pair_distances, rupture_distances, site_rupture_mask

__all__ = ["DENSE_SHARE", "pair_segments", "block_pairs", "pair_blocks", "pair_values"]


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
                 z2p5_km=None):
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
    inp = GmmInput(
        mag=ruptures.mag[rup], vs30_mps=site_vs30[site], rrup_km=d["rrup_km"], rjb_km=d["rjb_km"],
        rx_km=d["rx_km"], ry0_km=d["ry0_km"], ztor_km=ruptures.ztor_km[rup], zhyp_km=ruptures.zhyp_km[rup],
        dip_deg=ruptures.dip_deg[rup], rake_deg=ruptures.rake_deg[rup], width_km=ruptures.width_km[rup],
        z1p0_km=None if z1p0_km is None else z1p0_km[site], z2p5_km=None if z2p5_km is None else z2p5_km[site],
        region=region,
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


def pair_blocks(site_lon, site_lat, site_vs30, ruptures, max_distance_km, region, site_block, ref):
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
    for lo in range(0, len(lon), site_block):
        blk = slice(lo, min(len(lon), lo + site_block))
        site, rup, starts, owners, d, grid = _surviving_pairs(lon[blk], lat[blk], ruptures, max_distance_km, ref)
        if site.size == 0:
            continue
        dense = _grid_input(vs30[blk], ruptures, site, owners, grid, region)
        if dense is None:
            inp, cells = GmmInput(
                mag=ruptures.mag[rup], vs30_mps=vs30[blk][site], rrup_km=d["rrup_km"], rjb_km=d["rjb_km"],
                rx_km=d["rx_km"], ry0_km=d["ry0_km"], ztor_km=ruptures.ztor_km[rup],
                zhyp_km=ruptures.zhyp_km[rup], dip_deg=ruptures.dip_deg[rup], rake_deg=ruptures.rake_deg[rup],
                width_km=ruptures.width_km[rup], region=region), None
        else:
            inp, cells = dense
        yield blk, site, rup, starts, owners, inp, cells, d, ruptures.rate[rup]
