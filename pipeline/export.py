"""``quakefolio export``: a finished run's per-asset and per-site tables as GeoParquet, GeoJSON or CSV.

Every table of the run that holds ``lon`` and ``lat`` (the per-asset and per-site tables,
:mod:`quakefolio.pipeline.io.coordinates`) becomes one file ``<table>.<ext>`` of the
chosen format (:mod:`quakefolio.pipeline.io.geo_formats`).  Tables of a run written before
positions were stored get them from the run's stored assets (``run_assets``) or hazard
sites (``hazard_sites``); a table with no way to place its rows is left out and named.

The export writes only new files and never modifies a run: the files are written into a
hidden folder beside the target and published in one rename
(:func:`quakefolio.pipeline.io.atomic.atomic_publish_folder`), so the target folder
appears complete or not at all.  The target is ``<output folder>/exports/<run_id>-<format>``
or the folder named by ``--out``; it must not exist yet or be empty, and the rules of
output folders apply (not the root or home folder, not inside a run folder or a
``runs/`` folder, writable: :func:`quakefolio.pipeline.io.output_folder.output_folder_problem`).
"""
from __future__ import annotations

import os
import shutil
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from quakefolio.core.errors import InputError, OutputError
from quakefolio.pipeline.compare import resolve_run
from quakefolio.pipeline.io.atomic import atomic_publish_folder
from quakefolio.pipeline.io.coordinates import Positions, with_coordinates
from quakefolio.pipeline.io.geo_formats import write_csv, write_geojson, write_geoparquet
from quakefolio.pipeline.io.output_folder import output_folder_problem
from quakefolio.pipeline.io.store import RunFolder

__all__ = ["FORMATS", "export_run", "export_target"]

#: Export formats and the file suffix of each.
FORMATS = {"geoparquet": ".parquet", "geojson": ".geojson", "csv": ".csv"}
_BATCH_ROWS = 1 << 16
#: The run's tables of places (id column): where the rows of the other tables lie.
_PLACES = {"run_assets": "asset_id", "hazard_sites": "site_id"}
_NOWHERE = Positions.of([], [], [])


def export_target(run, fmt, out=None):
    """The folder an export of ``run`` goes to, checked: new (or empty) and allowed.

    Parameters
    ----------
    run : pathlib.Path
        The finished run folder.
    fmt : str
        A key of :data:`FORMATS`.
    out : path-like, optional
        The folder the user named; default ``<output folder>/exports/<run_id>-<fmt>``.

    Returns
    -------
    pathlib.Path
        The target folder (absolute; it does not exist yet or is empty).

    Raises
    ------
    OutputError
        When the target exists and is not empty, is not allowed (see the module notes), or
        the run has no output folder and ``out`` is not given.
    """
    if out is None:
        if run.parent.name != "runs":
            raise OutputError(run, "is not in the runs/ folder of an output folder; name the export folder with --out")
        out = run.parent.parent / "exports" / f"{run.name}-{fmt}"
    target = Path(os.path.abspath(out))
    if target.is_dir() and not target.is_symlink() and any(target.iterdir()):
        raise OutputError(target, "exists and is not empty; an export writes only new files: name a new folder "
                                  "with --out")
    if target.is_symlink():
        raise OutputError(target, "is a symbolic link; name a new folder with --out")
    problem = output_folder_problem(target)
    if problem:
        raise OutputError(target, f"export folder {problem}")
    return target


def _positions(folder):
    """(assets, sites) of the run as Positions, or None where the run does not store them."""
    out = []
    for name, key in _PLACES.items():
        if folder.has(name):
            t = pq.read_table(folder.path / f"{name}.parquet", columns=[key, "lon", "lat"])
            out.append(Positions.of(t[key], t["lon"].to_numpy(), t["lat"].to_numpy()))
        else:
            out.append(None)
    return tuple(out)


def _placeable(schema, assets, sites):
    names = schema.names
    if "lon" in names and "lat" in names:
        return True
    return ("asset_id" in names and assets is not None) or ("site_id" in names and sites is not None)


def _tables(folder):
    """(name, file) of every run table with positions or a way to place its rows, and the names left out."""
    assets, sites = _positions(folder)
    chosen, left = [], []
    for file in sorted(folder.path.glob("*.parquet")):
        schema = pq.read_schema(file)
        if not ({"asset_id", "site_id", "lon"} & set(schema.names)):
            continue  # portfolio-level tables: nothing to place
        if file.stem in _PLACES or _placeable(schema, assets, sites):
            chosen.append((file.stem, file))
        else:
            left.append(file.stem)
    return chosen, left, (assets, sites)


def _batches(file, assets, sites):
    """The table's rows in record batches, with positions appended where the run stored none."""
    for batch in pq.ParquetFile(file).iter_batches(batch_size=_BATCH_ROWS):
        yield from with_coordinates(pa.Table.from_batches([batch]), assets or _NOWHERE,
                                    sites or _NOWHERE).to_batches()


def _all_positions(file, assets, sites):
    """Every row's lon and lat [deg] (for the bounding box written before the rows)."""
    lon, lat = [np.zeros(0)], [np.zeros(0)]
    for batch in _batches(file, assets, sites):
        lon.append(batch.column("lon").to_numpy(zero_copy_only=False))
        lat.append(batch.column("lat").to_numpy(zero_copy_only=False))
    return np.concatenate(lon), np.concatenate(lat)


def _write_one(fmt, file, target, assets, sites):
    """Write one table in ``fmt`` into ``target``; return the file written and its rows."""
    dest = target / f"{file.stem}{FORMATS[fmt]}"
    stored = pq.read_schema(file)
    schema = with_coordinates(stored.empty_table(), assets or _NOWHERE, sites or _NOWHERE).schema
    batches = (b.replace_schema_metadata(stored.metadata) for b in _batches(file, assets, sites))
    if fmt == "geoparquet":
        rows = write_geoparquet(dest, schema.with_metadata(stored.metadata), batches,
                                *_all_positions(file, assets, sites))
    elif fmt == "geojson":
        rows = write_geojson(dest, batches, name=file.stem)
    else:
        rows = write_csv(dest, schema, batches)
    return dest, rows


def export_run(run, fmt="geoparquet", out=None):
    """Export the per-asset and per-site tables of a finished run (see the module notes).

    Parameters
    ----------
    run : path-like
        A run folder, or an output folder standing for its ``LATEST`` run.
    fmt : {"geoparquet", "geojson", "csv"}
        The file format.
    out : path-like, optional
        The folder to create; default ``<output folder>/exports/<run_id>-<fmt>``.

    Returns
    -------
    (pathlib.Path, list of (str, int), list of str)
        The folder written, (file name, rows) of every file, and the tables left out
        (no positions stored and no way to place their rows).

    Raises
    ------
    InputError
        When ``run`` is not a finished run or ``fmt`` is unknown.
    OutputError
        When the target folder is refused or cannot be written.
    """
    if fmt not in FORMATS:
        raise InputError("--format", f"expected one of {', '.join(FORMATS)}, got {fmt!r}")
    run = resolve_run(run)
    folder = RunFolder(run)
    target = export_target(run, fmt, out)
    chosen, left, (assets, sites) = _tables(folder)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(target.parent, f"cannot create the folder: {(exc.strerror or '').lower()}") from None
    partial = target.parent / f".partial-export-{target.name}-{os.getpid()}"
    written = []
    try:
        partial.mkdir()
        for _, file in chosen:
            dest, rows = _write_one(fmt, file, partial, assets, sites)
            written.append((dest.name, rows))
        if target.is_dir():
            target.rmdir()  # empty (checked): the rename puts the complete folder in its place
        atomic_publish_folder(partial, target)
    except OSError as exc:
        shutil.rmtree(partial, ignore_errors=True)
        if exc.errno is not None and exc.strerror:
            raise OutputError(exc.filename or target, f"cannot write the export: {exc.strerror.lower()}") from None
        raise
    except BaseException:
        shutil.rmtree(partial, ignore_errors=True)
        raise
    return target, written, left
