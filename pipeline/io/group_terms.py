"""The group terms file of ``[programme] group_terms_file`` and its checks against the exposure.

One row per terms group (a policy or an account) named in the exposure's optional
``terms_group`` column::

    terms_group,deductible,limit
    ACC-NORTH,250000,8000000
    ACC-PORT,,12000000

``deductible`` and ``limit`` [currency] apply per event to the sum of the group's
building net losses (after each building's own deductible and limit); an empty cell (or
an absent column) means none.  Every group of the exposure has exactly one row and every
row names a group of the exposure; errors name file, row and column.
"""
from __future__ import annotations

import numpy as np

from quakefolio.core.errors import InputError, locate_toml_line
from quakefolio.core.events.programme import GroupTerms
from quakefolio.pipeline.io.ingest import NON_NEGATIVE, POSITIVE, _identifiers, _numbers, read_table

__all__ = ["GROUP_TERMS_COLUMNS", "read_group_terms", "group_terms_for"]

GROUP_TERMS_COLUMNS = {"terms_group": True, "deductible": False, "limit": False}


def read_group_terms(path, exposure, exposure_path):
    """Validated group terms for the exposure's ``terms_group`` column.

    Parameters
    ----------
    path : Path
        The group terms file (CSV or Parquet).
    exposure : pandas.DataFrame
        The validated exposure with a ``terms_group`` column.
    exposure_path : Path
        For errors about exposure rows.

    Returns
    -------
    GroupTerms
        Groups in sorted order; NaN terms where a cell is empty.

    Raises
    ------
    InputError
        Duplicate or unknown groups, bad amounts, deductible not below the limit, or an
        exposure group without a row.
    """
    frame, rows = read_table(path, GROUP_TERMS_COLUMNS)
    groups = _identifiers(frame, rows, path, "terms_group", unique=True)
    ded = _numbers(frame, rows, path, "deductible", (NON_NEGATIVE,), required=False) \
        if "deductible" in frame.columns else np.full(len(groups), np.nan)
    lim = _numbers(frame, rows, path, "limit", (POSITIVE,), required=False) \
        if "limit" in frame.columns else np.full(len(groups), np.nan)
    bad = ded >= lim
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(path, f"deductible {ded[i]:g} is not below the limit {lim[i]:g}", row=int(rows[i]),
                         column="deductible")
    used = exposure.terms_group.to_numpy(dtype=str)
    unused = ~np.isin(groups, used)
    if unused.any():
        i = int(np.argmax(unused))
        raise InputError(path, f"terms group {groups[i]!r} has no asset in the exposure", row=int(rows[i]),
                         column="terms_group")
    missing = ~np.isin(used, groups)
    if missing.any():
        i = int(np.argmax(missing))
        raise InputError(exposure_path, f"terms group {used[i]!r} has no row in the group terms file {path.name}",
                         row=int(exposure.row.iloc[i]), column="terms_group")
    order = np.argsort(groups, kind="stable")
    ids = groups[order]
    return GroupTerms(ids=tuple(str(g) for g in ids), group_of_asset=np.searchsorted(ids, used).astype(np.int64),
                      deductible=ded[order], limit=lim[order])


def group_terms_for(config, exposure, text=None):
    """The run's group terms (or None), after the checks between config and exposure.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config
    exposure : pandas.DataFrame
        The validated exposure.
    text : str, optional
        The config file's text (to locate the key's line); read when not given.

    Returns
    -------
    terms : GroupTerms or None
        None without ``group_terms_file``.
    warning : str or None
        When the exposure names terms groups but no terms file is set in an event-based
        run (the column is then not used; without the event-based stage it never is).

    Raises
    ------
    InputError
        The file without the column (located at the config key), or any problem of the file.
    """
    file = config.programme.group_terms_file
    has_column = "terms_group" in exposure.columns
    if file is None:
        used = has_column and config.portfolio.event_based
        return None, "exposure column terms_group not used: no [programme] group_terms_file" if used else None
    if not has_column:
        if text is None:
            text = config.path.read_text(encoding="utf-8") if config.path.exists() else ""
        raise InputError(config.path, "group_terms_file needs a terms_group column in the exposure",
                         row=locate_toml_line(text, ("programme",), "group_terms_file"),
                         column="programme.group_terms_file")
    return read_group_terms(file, exposure, config.exposure.file), None
