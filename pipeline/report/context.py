"""The run as the report sees it: a :class:`~quakefolio.pipeline.io.store.RunFolder` whose missing
tables read as None, and small helpers shared by the sections."""
from __future__ import annotations

import datetime as _dt
import re
from pathlib import Path

from quakefolio.core.errors import InputError
from quakefolio.core.ims import im_period
from quakefolio.pipeline.io.store import RunFolder

#: The screening section lists at most this many flagged assets (the table holds them all).
SCREENING_ROWS = 50

#: The per-asset table lists at most this many assets (highest collapse probability first).
MAX_TABLE_ROWS = 500

#: Number of assets in the "riskiest assets" table.
TOP_ASSETS = 20


#: One line said wherever a section needs the inputs a run stores and the run has none.
PREDATES_NOTE = ("This run predates stored inputs (no run_assets.parquet / run_fragility.parquet): {what} not "
                 "shown; the report does not re-read the user's input files.")


class ReportRun(RunFolder):
    """One run folder (finished or partial) for the report; a table the run lacks reads as None.

    Parameters
    ----------
    run_dir : path-like
        The folder holding ``manifest.json``.

    Raises
    ------
    InputError
        When ``run_dir`` is not a folder or holds no readable ``manifest.json``.
    """

    def __init__(self, run_dir):
        path = Path(run_dir)
        if not path.is_dir():
            raise InputError(path, "no such run folder")
        if not (path / "manifest.json").is_file():
            raise InputError(path / "manifest.json", "missing manifest.json: the report needs the run manifest")
        super().__init__(path)

    def table(self, name):
        """The table as a DataFrame, or None when the run has no such table.

        Parameters
        ----------
        name : str
            Table name without ``.parquet``.

        Returns
        -------
        pandas.DataFrame or None
        """
        return super().table(name) if self.has(name) else None

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
