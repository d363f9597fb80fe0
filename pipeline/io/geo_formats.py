"""Point tables in open geospatial formats: GeoParquet 1.0, GeoJSON (RFC 7946) and CSV.

Every writer takes a table with ``lon`` and ``lat`` columns [deg, WGS84] as a stream of
Arrow record batches and writes one file, batch by batch (memory stays bounded whatever
the table's size).

- **GeoParquet** (GeoParquet specification 1.0.0): the table's columns plus a
  ``geometry`` column holding each row's point as OGC Simple Features Well-Known Binary
  (little-endian: byte order 1, geometry type 1 = Point, then x = longitude and
  y = latitude as IEEE 754 doubles: 21 bytes), null where a position is missing.  The
  file metadata key ``geo`` holds ``version``, ``primary_column`` and, for the geometry
  column, ``encoding`` ``WKB``, ``geometry_types`` ``["Point"]`` and ``bbox``
  [min lon, min lat, max lon, max lat].  ``crs`` is omitted, which the specification
  defines as OGC:CRS84 (WGS84, longitude first), the coordinates' system.
- **GeoJSON** (RFC 7946): one FeatureCollection, one Feature per row with a Point
  geometry ``[lon, lat]`` (WGS84, the only system the RFC allows) and every other column
  as a property; NaN and infinities (an open bin edge), which JSON cannot hold, are
  written as null; a row without position has a null geometry.
- **CSV**: every column, header first (RFC 4180 quoting by pyarrow).
"""
from __future__ import annotations

import json
import math

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

__all__ = ["point_wkb", "geoparquet_metadata", "write_geoparquet", "write_geojson", "write_csv",
           "GEOPARQUET_VERSION", "GEOMETRY_COLUMN"]

#: The GeoParquet specification version written.
GEOPARQUET_VERSION = "1.0.0"
#: Name of the geometry column of a GeoParquet file.
GEOMETRY_COLUMN = "geometry"
_WKB_POINT = np.dtype([("order", "u1"), ("kind", "<u4"), ("x", "<f8"), ("y", "<f8")])  # 21 bytes, packed


def point_wkb(lon, lat):
    """Points as Well-Known Binary, one 21-byte value per row; null where lon or lat is NaN.

    Parameters
    ----------
    lon, lat : array_like (n,) [deg]

    Returns
    -------
    pyarrow.BinaryArray (n,)

    Notes
    -----
    OGC Simple Features (06-103r4) WKB of a 2-D point: byte order (1: little endian),
    ``uint32`` geometry type 1, then the two coordinates as ``float64``, x first.
    """
    lon, lat = np.asarray(lon, dtype=float), np.asarray(lat, dtype=float)
    n = len(lon)
    rec = np.empty(n, dtype=_WKB_POINT)
    rec["order"], rec["kind"], rec["x"], rec["y"] = 1, 1, lon, lat
    offsets = np.arange(n + 1, dtype=np.int64) * _WKB_POINT.itemsize
    missing = np.isnan(lon) | np.isnan(lat)
    validity = None if not missing.any() else pa.array(~missing).buffers()[1]
    if offsets[-1] >= 2 ** 31:
        return pa.Array.from_buffers(pa.large_binary(), n, [validity, pa.py_buffer(offsets),
                                                            pa.py_buffer(rec.tobytes())], int(missing.sum()))
    return pa.Array.from_buffers(pa.binary(), n, [validity, pa.py_buffer(offsets.astype(np.int32)),
                                                  pa.py_buffer(rec.tobytes())], int(missing.sum()))


def _bbox(lon, lat):
    ok = ~(np.isnan(lon) | np.isnan(lat))
    if not ok.any():
        return None
    return [float(lon[ok].min()), float(lat[ok].min()), float(lon[ok].max()), float(lat[ok].max())]


def geoparquet_metadata(lon, lat):
    """The GeoParquet 1.0 ``geo`` file metadata of a table of points.

    Parameters
    ----------
    lon, lat : ndarray (n,) [deg]
        Every position of the table (for the bounding box).

    Returns
    -------
    dict
        ``version``, ``primary_column`` and ``columns`` -> ``geometry`` -> ``encoding``,
        ``geometry_types`` and (when any position is known) ``bbox``; no ``crs``: OGC:CRS84.
    """
    column = {"encoding": "WKB", "geometry_types": ["Point"]}
    box = _bbox(np.asarray(lon, dtype=float), np.asarray(lat, dtype=float))
    if box is not None:
        column["bbox"] = box
    return {"version": GEOPARQUET_VERSION, "primary_column": GEOMETRY_COLUMN, "columns": {GEOMETRY_COLUMN: column}}


def _coords(batch):
    return (batch.column("lon").to_numpy(zero_copy_only=False).astype(float),
            batch.column("lat").to_numpy(zero_copy_only=False).astype(float))


def write_geoparquet(path, schema, batches, lon, lat):
    """Write a GeoParquet 1.0 file of points (see the module notes).

    Parameters
    ----------
    path : path-like
        A new file.
    schema : pyarrow.Schema
        The batches' schema (its metadata is kept, the ``geo`` key added).
    batches : iterable of pyarrow.RecordBatch
        The rows, with ``lon`` and ``lat`` columns [deg].
    lon, lat : ndarray [deg]
        Every position of the table (the bounding box is written before the rows).

    Returns
    -------
    int
        Rows written.
    """
    meta = dict(schema.metadata or {})
    meta[b"geo"] = json.dumps(geoparquet_metadata(lon, lat)).encode()
    out_schema = schema.append(pa.field(GEOMETRY_COLUMN, pa.binary())).with_metadata(meta)
    rows = 0
    with pq.ParquetWriter(path, out_schema, compression="zstd") as writer:
        for batch in batches:
            wkb = point_wkb(*_coords(batch)).cast(pa.binary())
            writer.write_table(pa.Table.from_batches([batch]).append_column(GEOMETRY_COLUMN, wkb)
                               .cast(out_schema))
            rows += batch.num_rows
    return rows


def _json_value(v):
    if isinstance(v, float) and not math.isfinite(v):
        return None
    if isinstance(v, (bytes, bytearray)):
        return v.hex()
    return v if isinstance(v, (str, int, float, bool, type(None), list, dict)) else str(v)


def write_geojson(path, batches, *, name=None):
    """Write an RFC 7946 GeoJSON FeatureCollection of points (see the module notes).

    Parameters
    ----------
    path : path-like
        A new file (UTF-8).
    batches : iterable of pyarrow.RecordBatch
        The rows, with ``lon`` and ``lat`` columns [deg].
    name : str, optional
        Written as the collection's ``name`` member.

    Returns
    -------
    int
        Features written.
    """
    rows = 0
    lo = [math.inf, math.inf, -math.inf, -math.inf]
    with open(path, "w", encoding="utf-8", newline="\n") as fh:
        fh.write('{"type": "FeatureCollection"')
        if name:
            fh.write(f', "name": {json.dumps(name)}')
        fh.write(', "features": [')
        for batch in batches:
            lon, lat = _coords(batch)
            props = [c for c in batch.schema.names if c not in ("lon", "lat")]
            columns = {c: batch.column(c).to_pylist() for c in props}
            for i in range(batch.num_rows):
                if math.isnan(lon[i]) or math.isnan(lat[i]):
                    geometry = None
                else:
                    geometry = {"type": "Point", "coordinates": [float(lon[i]), float(lat[i])]}
                    lo = [min(lo[0], lon[i]), min(lo[1], lat[i]), max(lo[2], lon[i]), max(lo[3], lat[i])]
                feature = {"type": "Feature", "geometry": geometry,
                           "properties": {c: _json_value(columns[c][i]) for c in props}}
                fh.write(("\n" if rows == 0 else ",\n") + json.dumps(feature, allow_nan=False))
                rows += 1
        fh.write("\n]")
        if rows and math.isfinite(lo[0]):
            fh.write(f', "bbox": {json.dumps([float(v) for v in lo])}')
        fh.write("}\n")
    return rows


def write_csv(path, schema, batches):
    """Write the rows as CSV with a header line.

    Parameters
    ----------
    path : path-like
        A new file (UTF-8).
    schema : pyarrow.Schema
    batches : iterable of pyarrow.RecordBatch

    Returns
    -------
    int
        Rows written.
    """
    rows = 0
    with pacsv.CSVWriter(str(path), schema.remove_metadata()) as writer:
        for batch in batches:
            writer.write_batch(batch.replace_schema_metadata(None))
            rows += batch.num_rows
    return rows
