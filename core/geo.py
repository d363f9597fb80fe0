r"""Geodesy helpers for mapping assets to hazard sites.

Great-circle distances on a sphere of mean Earth radius :math:`R = 6371.0088` km
(IUGG mean radius, Moritz 2000).  The nearest site is found with a k-d tree on unit
vectors: the chord length is monotone in the great-circle angle, so the nearest by
chord is the nearest by arc, and :math:`d = 2R\arcsin(c/2)`.
"""
from __future__ import annotations

import numpy as np

from quakefolio.core.lazy import lazy_module

spatial = lazy_module("scipy.spatial")

__all__ = ["EARTH_RADIUS_KM", "unit_vectors", "great_circle_km", "nearest_site"]

EARTH_RADIUS_KM = 6371.0088


def unit_vectors(lon_deg, lat_deg):
    """Cartesian unit vectors, shape (..., 3), of WGS84 longitudes/latitudes [deg] on a sphere."""
    lon = np.radians(np.asarray(lon_deg, dtype=float))
    lat = np.radians(np.asarray(lat_deg, dtype=float))
    cl = np.cos(lat)
    return np.stack([cl * np.cos(lon), cl * np.sin(lon), np.sin(lat)], axis=-1)


def great_circle_km(lon1, lat1, lon2, lat2):
    """Great-circle distance [km] (haversine formula, Sinnott 1984), broadcasting."""
    p1, p2 = np.radians(lat1), np.radians(lat2)
    dphi = p2 - p1
    dl = np.radians(np.asarray(lon2, dtype=float) - np.asarray(lon1, dtype=float))
    h = np.sin(dphi / 2) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(dl / 2) ** 2
    return 2 * EARTH_RADIUS_KM * np.arcsin(np.sqrt(np.clip(h, 0.0, 1.0)))


def nearest_site(lon_assets, lat_assets, lon_sites, lat_sites):
    """Index of the nearest site for each asset and its distance [km].

    Returns
    -------
    index : ndarray of int, shape (n_assets,)
    distance_km : ndarray, shape (n_assets,)
    """
    sites = unit_vectors(lon_sites, lat_sites)
    if sites.shape[0] == 0:
        raise ValueError("no sites given")
    tree = spatial.cKDTree(sites)
    chord, idx = tree.query(unit_vectors(lon_assets, lat_assets), k=1)
    dist = 2 * EARTH_RADIUS_KM * np.arcsin(np.clip(chord / 2, 0.0, 1.0))
    return idx.astype(np.int64), dist
