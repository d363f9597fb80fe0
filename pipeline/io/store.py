"""The run store: one folder per finished run, written atomically.

Layout::

    <output>/.quakefolio-output        marks the folder as ours (io.output_folder)
    <output>/runs/<run_id>/            complete runs, never modified afterwards
    <output>/runs/.partial-<run_id>/   a run being written (invisible to readers), holding
                                       its writer's owner record (io.claims)
    <output>/LATEST                    the id of the newest complete run

A run claims its id when it starts writing: the partial folder, created with its owner
record (host, boot id, process id and start time), is renamed to ``.partial-<run_id>``,
which fails if another writer holds that id; a taken id, or one that names a finished run,
gets the next suffix (``-2``, ``-3``, ...), so two identical runs started in the same
second get two run folders (:func:`quakefolio.pipeline.io.claims.claim_run`).  The partial
folder is renamed into place only when every table and the manifest are on disk
(``os.replace`` of a folder within one file system is atomic), never over an existing
run; ``LATEST`` is then replaced atomically by :func:`atomic_write_text`.  A crash at any
point leaves earlier runs and ``LATEST`` intact.  A partial folder whose writer is proven
dead (same host and boot, process gone) is removed by the next run; partial folders of
other hosts, boots or containers, and those without an owner record, are never removed.

``LATEST`` is read as a run id of our own form (:data:`RUN_ID`) naming a folder in
``runs/``, never as a path.  Every Parquet file carries units and provenance in its schema
metadata under the key ``quakefolio``.  Atomic file and folder writes live in
:mod:`quakefolio.pipeline.io.atomic` (re-exported here).  Finished runs are read through
:class:`RunFolder` (manifest, tables, table metadata, and the assets and fragility classes
the run used).
"""
from __future__ import annotations

import datetime as _dt
import errno
import json
import os
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from quakefolio.core.errors import InputError, OutputError
from quakefolio.pipeline.io.atomic import atomic_publish_folder, atomic_write_bytes, atomic_write_text, fsync_path
from quakefolio.pipeline.io.chunked import ChunkedTable
from quakefolio.pipeline.io.claims import OWNER_FILE, PARTIAL_PREFIX, RUN_ID, claim_run, discard, process_alive
from quakefolio.pipeline.io.output_folder import prepare_output_folder

__all__ = ["RunWriter", "RunFolder", "latest_run", "read_table", "table_metadata", "atomic_write_bytes",
           "atomic_write_text", "atomic_publish_folder", "fsync_path", "process_alive", "PARTIAL_PREFIX", "RUN_ID",
           "denied"]

METADATA_KEY = b"quakefolio"
_DENIED = (errno.EACCES, errno.EPERM, errno.EROFS)


def denied(exc, path, attempted):
    """``exc`` as an :class:`OutputError` when the system refused access, else None.

    Parameters
    ----------
    exc : OSError
        The error raised while writing.
    path : path-like
        Where the write was attempted (named when ``exc`` names no file).
    attempted : str
        What was attempted, e.g. ``"cannot write the run folder"``.

    Returns
    -------
    OutputError or None
        An OutputError naming the path, what was attempted and the reason (permission
        denied, read-only file system); None for other errors (raise those as they are).
    """
    if isinstance(exc, OSError) and exc.errno in _DENIED:
        where = exc.filename if exc.filename else path
        return OutputError(where, f"{attempted}: {(exc.strerror or 'permission denied').lower()}")
    return None


def _arrow_type(series):
    if pd.api.types.is_bool_dtype(series):
        return pa.bool_()
    if pd.api.types.is_integer_dtype(series):
        return pa.int64() if series.dtype.itemsize == 8 else pa.int32()
    if pd.api.types.is_float_dtype(series):
        return pa.float64()
    return pa.string()


def _string_array(col):
    """A pandas column as an Arrow ``string`` array; missing values (None, NaN) as nulls.

    Columns already held by Arrow (pandas' ``str`` dtype) are cast without passing
    through Python objects; any other column is converted cell by cell.
    """
    dtype = col.dtype
    if isinstance(dtype, pd.StringDtype) and dtype.storage == "pyarrow":
        arr = pa.array(col.array)
        if isinstance(arr, pa.ChunkedArray):
            arr = arr.combine_chunks()
        return arr.cast(pa.string())
    values = col.astype(object)
    values = values.where(col.notna(), None)  # missing strings (None or NaN) are nulls
    return pa.array(values.to_numpy(), type=pa.string())


def _schema_metadata(name, units, description, provenance):
    meta = {"table": name, "description": description, "units": units, **provenance}
    return {METADATA_KEY: json.dumps(meta, sort_keys=True).encode()}


def to_arrow(frame, *, name, units, description, provenance):
    """DataFrame (or Arrow table) to an Arrow table with an explicit schema and quakefolio metadata.

    Strings are written as ``string`` (not ``large_string``) so readers and later
    concatenations agree whatever the pandas version; booleans, integers (int64 or int32)
    and floats (float64) keep their kind, everything else becomes a string.  An Arrow
    table built by a stage keeps its types (``large_string`` becomes ``string``).

    Parameters
    ----------
    frame : pandas.DataFrame or pyarrow.Table
        The table.
    name : str
        Table name (stored in the metadata).
    units : dict of str -> str
        Unit of each column.
    description : str
        What one row means.
    provenance : dict
        Run id, input digests and the like, merged into the metadata.

    Returns
    -------
    pyarrow.Table
        Schema metadata under the key ``quakefolio``: JSON with ``table``,
        ``description``, ``units`` and the provenance entries.
    """
    metadata = _schema_metadata(name, units, description, provenance)
    if isinstance(frame, pa.Table):
        fields = [pa.field(f.name, pa.string() if f.type == pa.large_string() else f.type) for f in frame.schema]
        return frame.cast(pa.schema(fields)).replace_schema_metadata(metadata)
    fields = [pa.field(c, _arrow_type(frame[c])) for c in frame.columns]
    schema = pa.schema(fields, metadata=metadata)
    arrays = []
    for f in fields:
        col = frame[f.name]
        if f.type == pa.string():
            arrays.append(_string_array(col))
        else:
            arrays.append(pa.array(col.to_numpy(), type=f.type))
    return pa.Table.from_arrays(arrays, schema=schema)


def _reraise(exc, path, attempted):
    """Raise :func:`denied` of ``exc`` if it is an access error, else ``exc`` itself."""
    out = denied(exc, path, attempted)
    if out is not None:
        raise out from None
    raise exc


class RunWriter:
    """Writes one run under a partial name, then commits it atomically.

    Parameters
    ----------
    output_folder : path-like
        The output folder (checked, created and marked as ours:
        :func:`quakefolio.pipeline.io.output_folder.prepare_output_folder`).
    run_id : str
        The preferred run id (:data:`RUN_ID` form); when it is taken the next free suffix
        is used, so read the id actually claimed from :attr:`run_id`.

    Attributes
    ----------
    run_id : str
        The claimed run id.
    partial : pathlib.Path
        The partial folder being written.
    final : pathlib.Path
        The run folder once committed.
    left_alone : list of pathlib.Path
        Partial folders of other hosts, boots or versions found (never removed).

    Raises
    ------
    OutputError
        When the output folder must not or cannot be written into.
    ValueError
        When ``run_id`` is not of the :data:`RUN_ID` form.
    """

    def __init__(self, output_folder, run_id):
        if not RUN_ID.fullmatch(str(run_id)):
            raise ValueError(f"run id {run_id!r} is not of the form YYYYmmddTHHMMSSZ-<8 hex digits>[-n]")
        self.output, self.left_alone = prepare_output_folder(output_folder)
        self.runs = self.output / "runs"
        try:
            self.run_id, self.partial = claim_run(self.runs, run_id)
        except OSError as exc:
            out = denied(exc, self.runs, "cannot create a run folder")
            if out is None:
                raise
            raise OutputError(self.runs, out.message) from None  # the folder, not the hidden claim inside it
        self.final = self.runs / self.run_id
        self.row_counts = {}

    def _inside(self, name):
        target = (self.partial / name).resolve()
        if target.parent != self.partial.resolve():
            raise ValueError(f"refusing to write outside the run folder: {name!r}")
        return target

    def write_table(self, name, frame, *, units, description, provenance):
        """Write ``<name>.parquet`` with units and provenance in its schema metadata.

        Parameters
        ----------
        name : str
            Table name without ``.parquet``; must stay inside the run folder.
        frame : pandas.DataFrame, pyarrow.Table or ChunkedTable
            The table; a :class:`~quakefolio.pipeline.io.chunked.ChunkedTable` is built and
            written one chunk of assets at a time.
        units : dict of str -> str
            Unit of each column.
        description : str
            What one row means.
        provenance : dict
            Run id, input digests and the like.

        Returns
        -------
        pathlib.Path
            The written file inside the partial folder (zstd-compressed Parquet).

        Raises
        ------
        OutputError
            When the system refuses the write (permission denied, read-only file system).
        """
        def arrow(part):
            return to_arrow(part, name=name, units=units, description=description, provenance=provenance)

        path = self._inside(f"{name}.parquet")
        try:
            if isinstance(frame, ChunkedTable):
                with pq.ParquetWriter(path, arrow(frame.build(np.zeros(0, dtype=np.int64))).schema,
                                      compression="zstd") as out:
                    for part in frame.chunks():
                        out.write_table(arrow(part))
                rows = frame.num_rows
            else:
                table = arrow(frame)
                pq.write_table(table, path, compression="zstd")
                rows = table.num_rows
        except OSError as exc:
            _reraise(exc, path, "cannot write the run table")
        self.row_counts[name] = rows
        return path

    def write_text(self, name, text):
        """Write a text file (UTF-8, fsynced) into the partial run folder.

        Parameters
        ----------
        name : str
            File name; must stay inside the run folder.
        text : str
            The whole content.

        Returns
        -------
        pathlib.Path
            The written file inside the partial folder.

        Raises
        ------
        OutputError
            When the system refuses the write (permission denied, read-only file system).
        """
        path = self._inside(name)
        try:
            with open(path, "w", encoding="utf-8") as fh:
                fh.write(text)
                fh.flush()
                os.fsync(fh.fileno())
        except OSError as exc:
            _reraise(exc, path, "cannot write the run file")
        return path

    def commit(self):
        """Rename the partial folder into place, then point ``LATEST`` at it.

        Every file and the folder are fsynced and the rename is atomic within one file
        system (:func:`atomic_publish_folder`); an existing run folder of the same id is
        never replaced.  The owner record is removed from the published folder and
        ``LATEST`` is replaced by :func:`atomic_write_text`.

        Returns
        -------
        pathlib.Path
            The final run folder ``<output>/runs/<run_id>``.

        Raises
        ------
        OutputError
            When a run folder of this id appeared meanwhile (written by something that
            does not claim its ids), or the system refuses the rename or the pointer.
        """
        if os.path.lexists(self.final):
            raise OutputError(self.final, "exists already (not written by this run); a finished run is never "
                                          "replaced")
        try:
            atomic_publish_folder(self.partial, self.final)
            (self.final / OWNER_FILE).unlink(missing_ok=True)
            fsync_path(self.final)
            atomic_write_text(self.output / "LATEST", self.run_id + "\n")
        except OSError as exc:
            _reraise(exc, self.output, "cannot publish the run")
        return self.final

    def abort(self):
        """Remove the partial folder (the run leaves nothing behind)."""
        if self.partial.exists():
            discard(self.partial)


def new_run_id(output_folder, digest):
    """``YYYYmmddTHHMMSSZ-<8 hex of the inputs digest>``: the preferred id of a new run.

    The time stamp is UTC.  The id is only a wish: :class:`RunWriter` claims it, or the
    next free suffix ``-2``, ``-3``, ... when another run holds it or a finished run has it.

    Parameters
    ----------
    output_folder : path-like
        The output folder holding ``runs/`` (not read: the claim decides).
    digest : str
        Hex digest of the run's inputs (its first 8 characters are used).

    Returns
    -------
    str
    """
    stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    return f"{stamp}-{digest[:8]}"


def latest_run(output_folder):
    """Path of the run ``LATEST`` points to, or None.

    ``LATEST`` must hold one run id of the :data:`RUN_ID` form: it is never read as a
    path (``..``, slashes and anything else are refused).

    Parameters
    ----------
    output_folder : path-like
        The output folder holding ``LATEST`` and ``runs/``.

    Returns
    -------
    pathlib.Path or None
        None when there is no pointer or the run folder it names does not exist.

    Raises
    ------
    InputError
        When ``LATEST`` is unreadable or does not hold a run id of our form (naming the
        file and line 1).
    """
    pointer = Path(output_folder) / "LATEST"
    if not pointer.exists():
        return None
    try:
        text = pointer.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        reason = exc.strerror if isinstance(exc, OSError) else "not UTF-8 text"
        raise InputError(pointer, f"unreadable run pointer: {reason}") from None
    run_id = text.strip()
    if not RUN_ID.fullmatch(run_id):
        shown = run_id if len(run_id) <= 60 else run_id[:57] + "..."
        raise InputError(pointer, f"expected one run id such as 20260101T120000Z-0123abcd, got {shown!r}; the "
                                  "pointer names a run in runs/, never a path", row=1)
    path = Path(output_folder) / "runs" / run_id
    return path if path.is_dir() and not path.is_symlink() else None


def read_manifest(run_dir):
    """The run's manifest as a dict; InputError naming the file if it is not a readable JSON object.

    Parameters
    ----------
    run_dir : path-like
        A run folder holding ``manifest.json``.

    Returns
    -------
    dict

    Raises
    ------
    InputError
        When the manifest is not valid JSON (naming the line) or not a JSON object.
    """
    manifest_path = Path(run_dir) / "manifest.json"
    try:
        manifest = json.loads(manifest_path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise InputError(manifest_path, f"cannot read file: {exc.strerror}") from None
    except UnicodeDecodeError:
        raise InputError(manifest_path, "not a readable run manifest (not UTF-8 text)") from None
    except json.JSONDecodeError as exc:
        raise InputError(manifest_path, f"not a readable run manifest ({exc.msg})", row=exc.lineno) from None
    if not isinstance(manifest, dict):
        raise InputError(manifest_path, "not a readable run manifest (expected a JSON object)")
    return manifest


def read_table(run_dir, name):
    """A run table as a DataFrame.

    Parameters
    ----------
    run_dir : path-like
        A run folder.
    name : str
        Table name without ``.parquet``.

    Returns
    -------
    pandas.DataFrame
    """
    return pq.read_table(Path(run_dir) / f"{name}.parquet").to_pandas()


def _read_columns(file, columns):
    """Some columns of one Parquet file as a DataFrame (read with the file reader: no dataset machinery)."""
    with pq.ParquetFile(file) as handle:
        return handle.read(columns=list(columns)).to_pandas()


def table_metadata(run_dir, name):
    """The quakefolio schema metadata (units, provenance) of a run table.

    Parameters
    ----------
    run_dir : path-like
        A run folder.
    name : str
        Table name without ``.parquet``.

    Returns
    -------
    dict
        ``table``, ``description``, ``units`` (column -> unit) and the provenance
        entries (see :func:`to_arrow`).
    """
    schema = pq.read_schema(Path(run_dir) / f"{name}.parquet")
    return json.loads(schema.metadata[METADATA_KEY])


class RunFolder:
    """One run folder, read only: its manifest, tables, table metadata and stored inputs.

    The one reader of run folders for the report, the change report and the printed
    summary; none of them opens the user's input files (config, exposure, library):
    the run holds what they need (the resolved config in the manifest, the assets in
    ``run_assets`` and the fragility classes in ``run_fragility``).

    Parameters
    ----------
    path : path-like
        A folder holding ``manifest.json`` (a finished run or a partial folder being
        written; only this folder is read).
    given : path-like, optional
        The argument the user gave for it (e.g. an output folder standing for its
        ``LATEST`` run); defaults to ``path``.

    Raises
    ------
    InputError
        When ``manifest.json`` is not a readable JSON object.
    """

    def __init__(self, path, given=None):
        self.path = Path(path)
        self.given = Path(given) if given is not None else self.path
        self.manifest = read_manifest(self.path)
        self.config = self.manifest.get("config") or {}
        self.run_id = self.manifest.get("run_id") or self.path.name
        self._tables = {}

    def section(self, name):
        """One section of the resolved config as a dict (empty when absent).

        Parameters
        ----------
        name : str
            Section name, e.g. ``"scenario"``.

        Returns
        -------
        dict
        """
        return self.config.get(name) or {}

    @property
    def currency(self):
        """The run's currency code (empty when the manifest has no config)."""
        return self.section("scenario").get("currency", "")

    @property
    def scenario(self):
        """The scenario name recorded in the manifest."""
        return self.manifest.get("scenario", "")

    @property
    def horizon(self):
        """The probability horizon [yr] (NaN when not configured)."""
        return float(self.section("scenario").get("horizon_yr", float("nan")))

    def has(self, name):
        """Whether the run holds ``<name>.parquet``.

        Parameters
        ----------
        name : str
            Table name without ``.parquet``.

        Returns
        -------
        bool
        """
        return (self.path / f"{name}.parquet").is_file()

    def table(self, name, columns=None):
        """A run table (or some of its columns) as a DataFrame (read once, then kept).

        Parameters
        ----------
        name : str
            Table name without ``.parquet``.
        columns : list of str, optional
            Only these columns (read from the file alone).

        Returns
        -------
        pandas.DataFrame

        Raises
        ------
        InputError
            When the table is missing or unreadable (naming the file).
        """
        key = name if columns is None else (name, tuple(columns))
        if key not in self._tables:
            file = self.path / f"{name}.parquet"
            if not file.exists():
                raise InputError(file, f"missing table: run {self.run_id} has no {name}.parquet")
            try:
                self._tables[key] = read_table(self.path, name) if columns is None else _read_columns(file, columns)
            except (OSError, ValueError, KeyError) as exc:  # pyarrow's errors derive from these
                raise InputError(file, f"unreadable table ({exc})") from None
        return self._tables[key]

    def optional_table(self, name, columns=None):
        """The table (or some of its columns) as a DataFrame, or None when the run has no such table.

        Parameters
        ----------
        name : str
            Table name without ``.parquet``.
        columns : list of str, optional
            Only these columns.

        Returns
        -------
        pandas.DataFrame or None
        """
        return self.table(name, columns) if self.has(name) else None

    def metadata(self, name):
        """The quakefolio schema metadata (units, description, provenance) of a run table.

        Parameters
        ----------
        name : str
            Table name without ``.parquet``.

        Returns
        -------
        dict
            As :func:`table_metadata`.
        """
        return table_metadata(self.path, name)

    @property
    def has_stored_inputs(self):
        """Whether the run stores the assets and fragility classes it used (newer runs)."""
        return self.has("run_assets") and self.has("run_fragility")

    def assets(self):
        """The validated exposure the run used (``run_assets``), or None for older runs.

        Returns
        -------
        pandas.DataFrame or None
        """
        return self.optional_table("run_assets")

    def fragility(self):
        """The fragility classes the run used as a FragilityLibrary, or None for older runs.

        Returns
        -------
        quakefolio.fragility.FragilityLibrary or None
            Rebuilt from ``run_fragility`` and, when the run used a vulnerability class,
            ``run_vulnerability`` (:func:`quakefolio.pipeline.io.run_inputs.library_from_frame`).
        """
        from quakefolio.pipeline.io.run_inputs import library_from_frame

        frame = self.optional_table("run_fragility")
        return None if frame is None else library_from_frame(frame, self.optional_table("run_vulnerability"))
