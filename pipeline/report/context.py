"""The run as the report sees it: a :class:`~quakefolio.pipeline.io.store.RunFolder` whose missing
tables read as None, and small helpers shared by the sections."""
from __future__ import annotations

import datetime as _dt
import re
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from quakefolio.core.errors import InputError
from quakefolio.core.ims import im_period
from quakefolio.pipeline.io.chunked import ChunkedTable
from quakefolio.pipeline.io.store import RunFolder, to_arrow

#: The screening section lists at most this many flagged assets (the table holds them all).
SCREENING_ROWS = 50

#: The per-asset table lists at most this many assets (highest collapse probability first).
MAX_TABLE_ROWS = 500

#: Number of assets in the "riskiest assets" table.
TOP_ASSETS = 20


#: One line said wherever a section needs the inputs a run stores and the run has none.
PREDATES_NOTE = ("This run predates stored inputs (no run_assets.parquet / run_fragility.parquet): {what} not "
                 "shown; the report does not re-read the user's input files.")


#: Tables that some section reads whole: a section's column subset is cut from the whole frame (converted
#: once) instead of being converted on its own, which at 10^6 buildings would hold the building ids twice.
READ_WHOLE = frozenset({"asset_loss"})


class ReportRun(RunFolder):
    """One run folder (finished or partial) for the report; a table the run lacks reads as None.

    Parameters
    ----------
    run_dir : path-like
        The folder holding ``manifest.json``.
    tables : Mapping name -> DataFrame, pyarrow.Table or ChunkedTable, optional
        Tables of this run still in memory (the run writing its own report): read from
        there instead of the folder, with the same result.

    Raises
    ------
    InputError
        When ``run_dir`` is not a folder or holds no readable ``manifest.json``.
    """

    def __init__(self, run_dir, tables=None):
        path = Path(run_dir)
        if not path.is_dir():
            raise InputError(path, "no such run folder")
        if not (path / "manifest.json").is_file():
            raise InputError(path / "manifest.json", "missing manifest.json: the report needs the run manifest")
        super().__init__(path)
        self._memory = dict(tables or {})

    def has(self, name):
        """Whether the run holds the table (in memory or in the folder).

        Parameters
        ----------
        name : str
            Table name without ``.parquet``.

        Returns
        -------
        bool
        """
        return name in self._memory or super().has(name)

    def table(self, name, columns=None):
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
        if not self.has(name):
            return None
        key = name if columns is None else (name, tuple(columns))
        if key not in self._tables:
            whole = self._tables.get(name)
            if whole is None and columns is not None and name in READ_WHOLE:
                whole = self.table(name)
            if whole is not None:  # converted once: its columns are not converted (nor held) a second time
                missing = [c for c in columns if c not in whole.columns]
                if missing:
                    raise InputError(self.path / f"{name}.parquet", f"unreadable table (no column {missing[0]!r})")
                self._tables[key] = whole[list(columns)]
            elif name in self._memory:
                self._tables[key] = memory_frame(name, self._memory[name], columns)
            elif columns is None:
                return super().table(name)
            else:
                self._tables[key] = self._read(name, columns=list(columns))
        return self._tables[key]

    def asset_rows(self, name, asset_ids):
        """The rows of the named assets in a per-asset table (table order), or None without the table.

        Parameters
        ----------
        name : str
            Table name without ``.parquet`` (with an ``asset_id`` column).
        asset_ids : sequence of str

        Returns
        -------
        pandas.DataFrame or None
        """
        if not self.has(name):
            return None
        ids = [str(a) for a in asset_ids]
        table = self._memory.get(name)
        if isinstance(table, ChunkedTable):
            return table.rows_of(ids).to_pandas()
        if table is not None:
            frame = memory_frame(name, table)
            return frame[frame.asset_id.isin(ids)].reset_index(drop=True)
        if not ids:
            return pq.read_schema(self.path / f"{name}.parquet").empty_table().to_pandas()
        return self._read(name, filters=[("asset_id", "in", ids)])

    def _read(self, name, **options):
        file = self.path / f"{name}.parquet"
        try:
            return pq.read_table(file, **options).to_pandas()
        except (OSError, ValueError) as exc:  # pyarrow's errors derive from these
            raise InputError(file, f"unreadable table ({exc})") from None

    def hazard_statistic(self, available):
        """The statistic the run's damage used, if among ``available``; else ``mean`` or the first one.

        An ingest run's damage uses the configured ``[hazard] statistic``; a compute run's
        the logic-tree mean.

        Parameters
        ----------
        available : collection of str
            Statistics present in the run's hazard tables (``mean``, ``p16`` ...).

        Returns
        -------
        str
        """
        hz = self.section("hazard")
        wanted = hz.get("statistic", "mean") if hz.get("mode") == "ingest" else "mean"
        if wanted in available:
            return wanted
        return "mean" if "mean" in available else sorted(available)[0]


def memory_frame(name, table, columns=None):
    """A table held in memory as the DataFrame reading its Parquet file would give.

    Parameters
    ----------
    name : str
        Table name.
    table : pandas.DataFrame, pyarrow.Table or ChunkedTable
        As the stage built it (a DataFrame is converted as the run store writes it).
    columns : sequence of str, optional
        Only these columns.

    Returns
    -------
    pandas.DataFrame
    """
    if isinstance(table, ChunkedTable):
        table = table.to_table()
    if columns is not None:
        table = table.select(list(columns)) if isinstance(table, pa.Table) else table[list(columns)]
    # split_blocks: each column its own block, so that numeric columns without nulls share the Arrow buffers
    # (read-only) instead of being copied into one 2-d block; the frame is the same
    return to_arrow(table, name=name, units={}, description="", provenance={}).to_pandas(split_blocks=True)


def top_rows(frame, column, n):
    """The ``n`` rows of largest ``column``, ties by ``asset_id``: ``frame.sort_values([column, "asset_id"],
    ascending=[False, True]).head(n)`` without sorting every row.

    Parameters
    ----------
    frame : pandas.DataFrame
        With ``asset_id`` and ``column``.
    column : str
    n : int

    Returns
    -------
    pandas.DataFrame
        The same rows, in the same order, as the full sort would give (NaN last).
    """
    values = frame[column].to_numpy(dtype=float)
    finite = values[~np.isnan(values)]
    if len(finite) > n > 0:
        threshold = np.partition(finite, len(finite) - n)[len(finite) - n]  # the n-th largest
        frame = frame[values >= threshold]
    return frame.sort_values([column, "asset_id"], ascending=[False, True]).head(n)


def state_catalogue(run):
    """The damage states of the run's classes: one row per class and state, 1-based index as in ``asset_damage``.

    Read from ``run_fragility`` (the classes of the run's assets); runs that predate it
    read the distinct rows of ``asset_damage``.

    Parameters
    ----------
    run : ReportRun

    Returns
    -------
    pandas.DataFrame or None
        ``building_class``, ``damage_state_index``, ``damage_state``, ``im``; None without
        damage results.
    """
    if not run.has("asset_damage"):
        return None
    frag = run.table("run_fragility")
    if frag is not None and len(frag):
        cat = frag[["building_class", "damage_state_index", "damage_state", "im"]].copy()
        cat["damage_state_index"] = cat.damage_state_index.to_numpy() + 1
        return cat.reset_index(drop=True)
    present = set(pq.read_schema(run.path / "asset_damage.parquet").names)
    cols = [c for c in ("building_class", "damage_state_index", "damage_state", "im") if c in present]
    return run.table("asset_damage", columns=cols).drop_duplicates(cols).reset_index(drop=True)


def _fractile_stats(stats):
    """Fractile statistics (``p16``, ``p50``, ...) in increasing order."""
    out = []
    for s in stats:
        m = re.fullmatch(r"p(\d+(?:\.\d+)?)", str(s))
        if m:
            out.append((float(m.group(1)), s))
    return [s for _, s in sorted(out)]


def _period_key(im):
    try:
        return im_period(im)
    except ValueError:
        return float("inf")


def _created(run):
    stamp = run.manifest.get("created_utc") or ""
    try:
        return _dt.datetime.strptime(stamp, "%Y%m%dT%H%M%SZ").strftime("%Y-%m-%d %H:%M:%S UTC")
    except ValueError:
        return stamp or "n/a"
