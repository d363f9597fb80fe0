r"""Hazard sites from asset locations: exact locations or nodes of a local square grid.

With a grid spacing :math:`s > 0`, asset positions are projected to a local
azimuthal-equidistant plane about a reference point (Snyder 1987, ch. 25;
:func:`quakefolio.core.sources.geometry.aeqd_forward`), snapped to the nearest node
:math:`(\mathrm{round}(x/s)\,s, \mathrm{round}(y/s)\,s)` and projected back.  The assets of
one node share a site whose Vs30 is the geometric mean of theirs,
:math:`\exp(\overline{\ln V_{S30}})` (common practice for gridded portfolio hazard: one
site condition per cell).  Sites are ordered by (latitude, longitude) of the node,
rounded to 1e-7 deg.

The mean of :math:`\ln V_{S30}` per node is a compensated (Kahan) sum over the node's
assets in exposure order divided by their number: the same operations, in the same
order, as the grouped mean of the tables library the pipeline used before, so site
conditions (and every hazard result) are reproduced bit for bit.

References
----------
Kahan, W. (1965). Further remarks on reducing truncation errors. Communications of the
ACM 8(1), 40.

Snyder, J. P. (1987). Map Projections: A Working Manual. U.S. Geological Survey
Professional Paper 1395.
"""
from __future__ import annotations

import numpy as np

from quakefolio.core.sources.geometry import aeqd_forward, aeqd_inverse, mean_position

__all__ = ["grid_reference", "group_rows", "compensated_group_mean", "snap_sites", "exact_sites"]

#: Decimals [deg] to which site coordinates are rounded before grouping (about 1 cm).
COORD_DECIMALS = 7


def grid_reference(lon, lat):
    """Reference point [deg] of the local projection: the portfolio's mean position, rounded to 0.01 deg.

    Parameters
    ----------
    lon, lat : array_like, shape (n_assets,) [deg]

    Returns
    -------
    (lon, lat) : tuple of float [deg]
        :func:`quakefolio.core.sources.geometry.mean_position` rounded to 2 decimals, so that small
        exposure edits keep it (and cached hazard of unchanged sites stays valid); the
        projection error of so small a shift is negligible.
    """
    return tuple(round(v, 2) for v in mean_position(lon, lat))


def group_rows(*keys):
    """Distinct rows of key columns, sorted lexicographically, and the group of each row.

    Parameters
    ----------
    *keys : ndarray, shape (n,)
        Key columns, most significant first (e.g. latitude, longitude).

    Returns
    -------
    first : ndarray of int, shape (n_groups,)
        Row of the first occurrence of each group, groups in ascending key order.
    group : ndarray of int, shape (n,)
        Group of each row.

    Notes
    -----
    Rows are equal when every key compares equal (so 0.0 and -0.0 are one key); the
    stable sort keeps rows of one group in input order, so ``first`` is each group's
    first row in input order.
    """
    n = len(keys[0])
    order = np.lexsort(keys[::-1])
    if n == 0:
        return np.zeros(0, dtype=np.intp), np.zeros(0, dtype=np.intp)
    new = np.zeros(n, dtype=bool)
    new[0] = True
    for k in keys:
        ks = k[order]
        new[1:] |= ks[1:] != ks[:-1]
    label = np.cumsum(new) - 1
    group = np.empty(n, dtype=np.intp)
    group[order] = label
    return order[new], group


def compensated_group_mean(values, group, n_groups):
    r"""Mean of ``values`` per group by compensated (Kahan) summation in input order.

    Parameters
    ----------
    values : ndarray, shape (n,)
    group : ndarray of int, shape (n,)
        Group of each value, in ``0..n_groups - 1``; every group non-empty.
    n_groups : int

    Returns
    -------
    ndarray, shape (n_groups,)
        :math:`\frac{1}{n_g}\sum_{i \in g} v_i`.

    Notes
    -----
    Per group, in input order: :math:`y = v - c`, :math:`t = s + y`,
    :math:`c = (t - s) - y` (reset to 0 when NaN), :math:`s = t` (Kahan 1965); then
    :math:`s / n_g`.  Vectorised over groups: the r-th value of every group is added in
    round r, so the cost is one pass per value of the largest group.
    """
    values = np.asarray(values, dtype=np.float64)
    group = np.asarray(group)
    counts = np.bincount(group, minlength=n_groups)
    order = np.argsort(group, kind="stable")
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    rank = np.empty(len(group), dtype=np.int64)
    rank[order] = np.arange(len(group)) - starts[group[order]]
    rounds = np.lexsort((group, rank))  # by rank, then group: one slice per round
    bounds = np.searchsorted(rank[rounds], np.arange(counts.max() + 1 if len(group) else 1))
    total = np.zeros(n_groups)
    comp = np.zeros(n_groups)
    for lo, hi in zip(bounds[:-1], bounds[1:]):
        g = group[rounds[lo:hi]]
        y = values[rounds[lo:hi]] - comp[g]
        t = total[g] + y
        c = t - total[g] - y
        comp[g] = np.where(np.isnan(c), 0.0, c)
        total[g] = t
    return total / counts


def snap_sites(lon, lat, vs30, spacing_km, ref):
    """Sites at the nodes of a square grid, the node of each asset and its distance to it.

    Parameters
    ----------
    lon, lat : ndarray, shape (n_assets,) [deg]
    vs30 : ndarray, shape (n_assets,) [m/s], positive
    spacing_km : float [km], > 0
        Grid spacing in the local azimuthal-equidistant plane.
    ref : (lon, lat) [deg]
        Projection centre (:func:`grid_reference`).

    Returns
    -------
    site_lon, site_lat : ndarray, shape (n_sites,) [deg]
        Node positions rounded to 1e-7 deg, sorted by (lat, lon).
    site_vs30 : ndarray, shape (n_sites,) [m/s]
        Geometric mean of the Vs30 of the node's assets (:func:`compensated_group_mean`).
    site_index : ndarray of int, shape (n_assets,)
        Site of each asset.
    distance_km : ndarray, shape (n_assets,) [km]
        Distance from the asset to its node in the projection plane.
    """
    if not spacing_km > 0:
        raise ValueError(f"spacing_km must be positive, got {spacing_km!r}")
    x, y = aeqd_forward(lon, lat, *ref)
    gx, gy = np.round(x / spacing_km) * spacing_km, np.round(y / spacing_km) * spacing_km
    slon, slat = aeqd_inverse(gx, gy, *ref)
    dist = np.sqrt((x - gx) ** 2 + (y - gy) ** 2)
    key_lat, key_lon = np.round(slat, COORD_DECIMALS), np.round(slon, COORD_DECIMALS)
    first, group = group_rows(key_lat, key_lon)
    ln_vs30 = compensated_group_mean(np.log(vs30), group, len(first))
    return key_lon[first], key_lat[first], np.exp(ln_vs30), group, dist


def exact_sites(lon, lat, vs30):
    """One site per distinct (location, Vs30) of the assets.

    Parameters
    ----------
    lon, lat : ndarray, shape (n_assets,) [deg]
    vs30 : ndarray, shape (n_assets,) [m/s]

    Returns
    -------
    site_lon, site_lat, site_vs30 : ndarray, shape (n_sites,)
        Positions rounded to 1e-7 deg [deg] and Vs30 [m/s], sorted by (lat, lon, vs30).
    site_index : ndarray of int, shape (n_assets,)
        Site of each asset.
    distance_km : ndarray, shape (n_assets,) [km]
        Zeros.
    """
    key_lat, key_lon = np.round(lat, COORD_DECIMALS), np.round(lon, COORD_DECIMALS)
    first, group = group_rows(key_lat, key_lon, vs30)
    return key_lon[first], key_lat[first], vs30[first], group, np.zeros(len(lon))
