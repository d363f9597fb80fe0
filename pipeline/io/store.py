"""The run store: one folder per finished run, written atomically.

Layout::

    <output>/runs/<run_id>/          complete runs, never modified afterwards
    <output>/runs/.partial-<run_id>.<pid>/ a run being written (invisible to readers)
    <output>/LATEST                  the id of the newest complete run

A run is written under its ``.partial-`` name and renamed into place only when every
table and the manifest are on disk (``os.replace`` of a folder within one file system
is atomic); ``LATEST`` is then replaced atomically by :func:`atomic_write_text`.  A crash at any point leaves earlier runs and ``LATEST`` intact; a stale
partial folder (its process gone) is removed by the next run.  Every Parquet file carries units and
provenance in its schema metadata under the key ``quakefolio``.

Every file the pipeline replaces in place (the ``LATEST`` pointer, a report) goes through
:func:`atomic_write_bytes` or :func:`atomic_write_text`: a temporary file in the target
folder, flushed and fsynced, then renamed over the target.  Finished runs are read through
:class:`RunFolder` (manifest, tables, table metadata, and the assets and fragility classes
the run used).
"""
from __future__ import annotations

import datetime as _dt
import json
import os
import shutil
import tempfile
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

__all__ = ["RunWriter", "RunFolder", "latest_run", "read_table", "table_metadata", "atomic_write_bytes",
           "atomic_write_text", "atomic_publish_folder", "PARTIAL_PREFIX"]

PARTIAL_PREFIX = ".partial-"
METADATA_KEY = b"quakefolio"


def process_alive(pid):
    """Whether another process with this id exists (POSIX signal 0 probe; this process: False).

    Parameters
    ----------
    pid : int
        Process id, e.g. the suffix of a partial run folder.

    Returns
    -------
    bool
        True if the process exists (also when it belongs to another user), False if it
        does not or if ``pid`` is this process.
    """
    if pid == os.getpid():
        return False  # e.g. a leftover of an earlier run that had this very process id
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def fsync_path(path):
    """fsync a file or folder by path (best effort: ignored where the OS refuses).

    Parameters
    ----------
    path : path-like
        File or folder whose data and metadata are flushed to disk.
    """
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def atomic_write_bytes(path, data, *, mode=None):
    """Write ``data`` to ``path`` atomically: readers see the old file or the new one, never a part.

    The bytes go to a temporary file in the target folder (``.<name>.<random>.tmp``), are
    flushed and fsynced, then the file is renamed over ``path`` (``os.replace``) and the
    folder is fsynced.  The temporary file is removed if anything fails.

    Parameters
    ----------
    path : path-like
        The target file; its folder must exist.
    data : bytes
        The whole new content.
    mode : int, optional
        Permission bits of the new file; default ``0o666`` less the process umask (as for
        a file created with ``open``).

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        if mode is None:
            mask = os.umask(0)
            os.umask(mask)
            mode = 0o666 & ~mask
        os.chmod(tmp, mode)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    fsync_path(folder)
    return path


def atomic_write_text(path, text, *, mode=None):
    """Write ``text`` (UTF-8, newlines as given) to ``path`` atomically; see :func:`atomic_write_bytes`.

    Parameters
    ----------
    path : path-like
        The target file; its folder must exist.
    text : str
        The whole new content.
    mode : int, optional
        Permission bits of the new file (default: ``0o666`` less the umask).

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    return atomic_write_bytes(path, text.encode("utf-8"), mode=mode)


def atomic_publish_folder(partial, final, *, replace=False):
    """Rename a completely written folder into place: readers see no folder, the old one or the new one.

    Every file of ``partial`` and the folder itself are fsynced, then ``partial`` is renamed
    to ``final`` (``os.replace`` of a folder within one file system is atomic) and the
    parent folder is fsynced.  ``os.replace`` cannot rename over a non-empty folder: with
    ``replace=True`` an existing ``final`` is first moved aside (``.replaced-<name>-<pid>``
    beside it), put back if the rename fails, and removed once the new folder is in place.

    Parameters
    ----------
    partial : path-like
        The written folder (same parent file system as ``final``).
    final : path-like
        Its name once complete.
    replace : bool, default False
        Whether an existing ``final`` is replaced; without it an existing non-empty
        ``final`` makes the rename fail (``OSError``) and nothing changes.

    Returns
    -------
    pathlib.Path
        ``final``.
    """
    partial, final = Path(partial), Path(final)
    for f in partial.iterdir():
        fsync_path(f)
    fsync_path(partial)
    old = None
    if replace and final.exists():
        old = final.with_name(f".replaced-{final.name}-{os.getpid()}")
        os.replace(final, old)
    try:
        os.replace(partial, final)
    except BaseException:
        if old is not None:
            os.replace(old, final)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
    fsync_path(final.parent)
    return final


def _arrow_type(series):
    if pd.api.types.is_bool_dtype(series):
        return pa.bool_()
    if pd.api.types.is_integer_dtype(series):
        return pa.int64() if series.dtype.itemsize == 8 else pa.int32()
    if pd.api.types.is_float_dtype(series):
        return pa.float64()
    return pa.string()


def to_arrow(frame, *, name, units, description, provenance):
    """DataFrame to an Arrow table with an explicit schema and quakefolio metadata.

    Strings are written as ``string`` (not ``large_string``) so readers and later
    concatenations agree whatever the pandas version; booleans, integers (int64 or int32)
    and floats (float64) keep their kind, everything else becomes a string.

    Parameters
    ----------
    frame : pandas.DataFrame
        The table, long form.
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
    fields = [pa.field(c, _arrow_type(frame[c])) for c in frame.columns]
    meta = {"table": name, "description": description, "units": units, **provenance}
    schema = pa.schema(fields, metadata={METADATA_KEY: json.dumps(meta, sort_keys=True).encode()})
    arrays = []
    for f in fields:
        col = frame[f.name]
        if f.type == pa.string():
            values = col.astype(object)
            values = values.where(col.notna(), None)  # missing strings (None or NaN) are nulls
            arrays.append(pa.array(values.to_numpy(), type=pa.string()))
        else:
            arrays.append(pa.array(col.to_numpy(), type=f.type))
    return pa.Table.from_arrays(arrays, schema=schema)


class RunWriter:
    """Writes one run under a partial name, then commits it atomically."""

    def __init__(self, output_folder, run_id):
        self.output = Path(output_folder).resolve()
        self.runs = self.output / "runs"
        self.runs.mkdir(parents=True, exist_ok=True)
        self._clean_stale_partials()
        self.run_id = run_id
        self.final = self.runs / run_id
        if self.final.exists():
            raise FileExistsError(f"run folder {self.final} already exists")
        self.partial = self.runs / f"{PARTIAL_PREFIX}{run_id}.{os.getpid()}"
        self.partial.mkdir()
        self.row_counts = {}

    def _clean_stale_partials(self):
        """Remove partial folders left by runs that died (their process no longer exists)."""
        for p in self.runs.glob(f"{PARTIAL_PREFIX}*"):
            pid = p.name.rsplit(".", 1)[-1]
            if pid.isdigit() and process_alive(int(pid)):
                continue  # another run writing into the same output folder right now
            shutil.rmtree(p, ignore_errors=True)

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
        frame : pandas.DataFrame
            The table.
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
        """
        table = to_arrow(frame, name=name, units=units, description=description, provenance=provenance)
        path = self._inside(f"{name}.parquet")
        pq.write_table(table, path, compression="zstd")
        self.row_counts[name] = table.num_rows
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
        """
        path = self._inside(name)
        with open(path, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        return path

    def commit(self):
        """Rename the partial folder into place, then point ``LATEST`` at it.

        Every file and the folder are fsynced and the rename is atomic within one file
        system (:func:`atomic_publish_folder`); ``LATEST`` is replaced by
        :func:`atomic_write_text`.

        Returns
        -------
        pathlib.Path
            The final run folder ``<output>/runs/<run_id>``.
        """
        atomic_publish_folder(self.partial, self.final)
        atomic_write_text(self.output / "LATEST", self.run_id + "\n")
        return self.final

    def abort(self):
        """Remove the partial folder (the run leaves nothing behind)."""
        shutil.rmtree(self.partial, ignore_errors=True)


def new_run_id(output_folder, digest):
    """``YYYYmmddTHHMMSSZ-<8 hex of the inputs digest>``, suffixed if already taken.

    The time stamp is UTC; an id that exists as a run folder or a partial folder gets the
    suffix ``-2``, ``-3``, ... until it is free.

    Parameters
    ----------
    output_folder : path-like
        The output folder holding ``runs/``.
    digest : str
        Hex digest of the run's inputs (its first 8 characters are used).

    Returns
    -------
    str
    """
    stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    base = f"{stamp}-{digest[:8]}"
    runs = Path(output_folder) / "runs"
    run_id, n = base, 1
    while (runs / run_id).exists() or any(runs.glob(f"{PARTIAL_PREFIX}{run_id}.*")):
        n += 1
        run_id = f"{base}-{n}"
    return run_id


def latest_run(output_folder):
    """Path of the run ``LATEST`` points to, or None.

    Parameters
    ----------
    output_folder : path-like
        The output folder holding ``LATEST`` and ``runs/``.

    Returns
    -------
    pathlib.Path or None
        None when there is no pointer or the run folder it names does not exist.
    """
    pointer = Path(output_folder) / "LATEST"
    if not pointer.exists():
        return None
    run_id = pointer.read_text(encoding="utf-8").strip()
    path = Path(output_folder) / "runs" / run_id
    return path if path.is_dir() else None


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
    from quakefolio.core.errors import InputError

    manifest_path = Path(run_dir) / "manifest.json"
    try:
        manifest = json.loads(manifest_path.read_text(encoding="utf-8"))
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

    def table(self, name):
        """A run table as a DataFrame (read once, then kept).

        Parameters
        ----------
        name : str
            Table name without ``.parquet``.

        Returns
        -------
        pandas.DataFrame

        Raises
        ------
        InputError
            When the table is missing or unreadable (naming the file).
        """
        from quakefolio.core.errors import InputError

        if name not in self._tables:
            file = self.path / f"{name}.parquet"
            if not file.exists():
                raise InputError(file, f"missing table: run {self.run_id} has no {name}.parquet")
            try:
                self._tables[name] = read_table(self.path, name)
            except (OSError, ValueError) as exc:  # pyarrow's errors derive from these
                raise InputError(file, f"unreadable table ({exc})") from None
        return self._tables[name]

    def optional_table(self, name):
        """The table as a DataFrame, or None when the run has no such table.

        Parameters
        ----------
        name : str
            Table name without ``.parquet``.

        Returns
        -------
        pandas.DataFrame or None
        """
        return self.table(name) if self.has(name) else None

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
            Rebuilt from ``run_fragility``
            (:func:`quakefolio.pipeline.io.run_inputs.library_from_frame`).
        """
        from quakefolio.pipeline.io.run_inputs import library_from_frame

        frame = self.optional_table("run_fragility")
        return None if frame is None else library_from_frame(frame)
