"""Positions on the run's tables: ``lon`` and ``lat`` [deg, WGS84] appended to every per-asset and per-site table.

A table with an ``asset_id`` column gets the asset's position (from the exposure); a
table with a ``site_id`` column and no ``asset_id`` gets the hazard site's position.  A
table that already holds ``lon`` or ``lat`` (the stored exposure, the site table) is left
as it is.  The columns are appended after the existing ones, so every earlier column keeps
its place.

Positions are gathered by index: each row's id is looked up once in Arrow
(:func:`pyarrow.compute.index_in`, a hash lookup) and the coordinates taken by that
position, never through a Python loop over rows.  A chunked per-asset table
(:class:`~quakefolio.pipeline.io.chunked.ChunkedTable`) gets them per chunk, looked up
among that chunk's assets only.
"""
from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from quakefolio.pipeline.io.arrow_columns import text_array
from quakefolio.pipeline.io.chunked import ChunkedTable

__all__ = ["Positions", "with_coordinates", "COORDINATE_COLUMNS"]

#: The appended columns and their unit.
COORDINATE_COLUMNS = {"lon": "deg", "lat": "deg"}


@dataclass(frozen=True)
class Positions:
    """Ids and WGS84 positions of one kind of place (assets or hazard sites).

    Attributes
    ----------
    ids : pyarrow.StringArray (n,)
    lon, lat : ndarray (n,) [deg]
    """

    ids: pa.Array
    lon: np.ndarray
    lat: np.ndarray

    @classmethod
    def of(cls, ids, lon, lat):
        """Positions from any id column and coordinate arrays.

        Parameters
        ----------
        ids : sequence of str, pandas.Series or pyarrow array (n,)
        lon, lat : array_like (n,) [deg]

        Returns
        -------
        Positions
        """
        return cls(text_array(ids), np.asarray(lon, dtype=float), np.asarray(lat, dtype=float))

    def lookup(self, ids, among=None):
        """Longitude and latitude [deg] of each id (NaN for an id not among these places).

        Parameters
        ----------
        ids : pyarrow array or pandas.Series of str (m,)
        among : ndarray of int, optional
            Positions of the only places the ids can name (a chunk's assets): the lookup
            hashes these alone.

        Returns
        -------
        (ndarray, ndarray) of shape (m,) [deg]
        """
        ids = text_array(ids)
        if among is None and len(ids) == len(self.ids) and ids.equals(self.ids):  # one row per place, in order
            return self.lon.copy(), self.lat.copy()
        index = np.arange(len(self.ids), dtype=np.int64) if among is None else np.asarray(among, dtype=np.int64)
        choices = self.ids if among is None else self.ids.take(pa.array(index))
        pos = pc.index_in(ids, value_set=choices)
        found = np.asarray(pos.is_valid().to_numpy(zero_copy_only=False), dtype=bool)
        at = np.asarray(pos.fill_null(0).to_numpy(zero_copy_only=False), dtype=np.int64)
        rows = index[at] if len(index) else np.zeros(len(at), dtype=np.int64)
        lon = np.where(found, self.lon[rows] if len(self.lon) else np.nan, np.nan)
        lat = np.where(found, self.lat[rows] if len(self.lat) else np.nan, np.nan)
        return lon, lat


@dataclass(frozen=True)
class _ChunkWithCoordinates:
    """A chunked table's row builder with the assets' positions appended."""

    build: object
    assets: Positions

    def __call__(self, index):
        table = self.build(index)
        lon, lat = self.assets.lookup(table["asset_id"], among=index)
        return table.append_column("lon", pa.array(lon)).append_column("lat", pa.array(lat))


def _columns(frame):
    if isinstance(frame, ChunkedTable):
        return list(frame.schema.names)
    if isinstance(frame, pa.Table):
        return list(frame.column_names)
    return [str(c) for c in frame.columns]


def _append(frame, lon, lat):
    if isinstance(frame, pa.Table):
        return frame.append_column("lon", pa.array(lon)).append_column("lat", pa.array(lat))
    return frame.assign(lon=lon, lat=lat)  # a new frame (copy on write): the stage's product is unchanged


def with_coordinates(frame, assets, sites):
    """``frame`` with ``lon`` and ``lat`` [deg] of its asset or hazard site appended (see the module notes).

    Parameters
    ----------
    frame : pandas.DataFrame, pyarrow.Table or ChunkedTable
        A run table.
    assets : Positions
        The run's assets (exposure order).
    sites : Positions
        The run's hazard sites.

    Returns
    -------
    pandas.DataFrame, pyarrow.Table or ChunkedTable
        A new table of the same kind (``frame`` itself when it holds neither id or
        already has a position column).
    """
    columns = _columns(frame)
    if "lon" in columns or "lat" in columns:
        return frame
    if "asset_id" in columns:
        if isinstance(frame, ChunkedTable):
            return replace(frame, build=_ChunkWithCoordinates(frame.build, assets))
        return _append(frame, *assets.lookup(_id_column(frame, "asset_id")))
    if "site_id" in columns and not isinstance(frame, ChunkedTable):
        return _append(frame, *sites.lookup(_id_column(frame, "site_id")))
    return frame


def _id_column(frame, name):
    col = frame[name]
    if isinstance(col, pd.Series) and not (isinstance(col.dtype, pd.StringDtype) or col.dtype == object):
        col = col.astype(str)
    return col
