"""``[output] breakdown_columns``: the exposure columns results are broken down by (district, account,
occupancy ...): the key's constraint and its check against the exposure."""
from __future__ import annotations

from quakefolio.core.errors import InputError, did_you_mean, locate_toml_line
from quakefolio.core.validation import ListOf, Rule, Text

__all__ = ["BREAKDOWN_COLUMNS", "MAX_BREAKDOWN_GROUPS", "check_breakdown_columns"]

#: At most this many distinct values in a breakdown column: a breakdown is a short table per column
#: (and the event stage keeps the per-event loss of every group).
MAX_BREAKDOWN_GROUPS = 200

#: The key's rules: a list of column names, each named once.
BREAKDOWN_COLUMNS = (ListOf(Text(non_empty=True), "expected a list of exposure column names", show_value=False),
                     Rule(lambda v: len(set(v)) == len(v), "each column may be named once"))


def check_breakdown_columns(config, exposure):
    """Every column named by ``[output] breakdown_columns`` exists in the exposure and has few values.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config
    exposure : pandas.DataFrame
        From :func:`quakefolio.pipeline.io.ingest.read_exposure` with ``keep`` the named columns.

    Raises
    ------
    InputError
        Naming the config file, the line of the key and ``output.breakdown_columns``: a column the
        exposure file does not have (with the nearest name), or one with more than
        :data:`MAX_BREAKDOWN_GROUPS` distinct values.
    """
    columns = config.output.breakdown_columns
    if not columns:
        return
    text = config.path.read_text(encoding="utf-8")
    row = locate_toml_line(text, ("output",), "breakdown_columns")
    file_columns = exposure.attrs.get("file_columns") or list(exposure.columns)
    name = config.exposure.file.name
    for col in columns:
        if col not in exposure.columns:
            hint = did_you_mean(col, file_columns, cutoff=0.6,
                                otherwise=f"; its columns are {', '.join(file_columns)}")
            raise InputError(config.path, f"the exposure file {name} has no column {col!r} to break results down "
                                          f"by{hint}", row=row, column="output.breakdown_columns")
        n = int(exposure[col].nunique())
        if n > MAX_BREAKDOWN_GROUPS:
            raise InputError(config.path, f"column {col!r} of {name} has {n:,} distinct values; a breakdown takes a "
                                          f"column of at most {MAX_BREAKDOWN_GROUPS} groups (district, account, "
                                          "occupancy ...)", row=row, column="output.breakdown_columns")
