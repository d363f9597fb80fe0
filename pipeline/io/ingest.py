"""Reading and validating user files: exposure, tabulated hazard curves.

Every problem is an :class:`~quakefolio.core.errors.InputError` naming file, row and
column.  CSV rows are file line numbers (the header is row 1, the first asset row 2);
Parquet rows are 1-based record numbers.  Files are data only: CSV is parsed as text,
Parquet with pyarrow; nothing is executed or unpickled.
"""
from __future__ import annotations

import csv
import io
import re
import warnings
from dataclasses import dataclass, field, replace
from pathlib import Path
from types import MappingProxyType
from typing import Mapping

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from quakefolio.core.curves import NoCommonRates, interpolate_period
from quakefolio.core.errors import InputError, did_you_mean
from quakefolio.core.geo import nearest_site
from quakefolio.core.ims import im_period, parse_im
from quakefolio.core.plausibility import VS30_ERROR_ABOVE_MPS, VS30_ERROR_BELOW_MPS, vs30_problem
from quakefolio.core.validation import Interval, MaxMagnitude, Real, WholeNumber
from quakefolio.pipeline.io.config import IM_UNITS_TO_G
from quakefolio.pipeline.io.csv_fast import (
    check_unique_columns, first_line, identifier_problems, parse_numbers, read_regular_csv,
)
from quakefolio.pipeline.io.hazard_checks import check_flat_curves, check_levels, statistic_rows, zero_curve_warning

__all__ = ["UnavailableIM", "read_table", "read_exposure", "read_hazard_curves", "HazardCurves", "map_assets_to_sites",
           "curves_for_im", "EXPOSURE_COLUMNS"]

EXPOSURE_COLUMNS = {  # name: required
    "asset_id": True, "lon": True, "lat": True, "building_class": True, "replacement_value": True,
    "vs30_mps": False, "occupants": False, "deductible": False, "limit": False,
    "contents_value": False, "interruption_value_per_day": False,
    "terms_group": False,  # programme terms group (policy or account), pipeline/io/group_terms.py
    "z1p0_km": False, "z2p5_km": False, "backarc": False,  # site inputs of the ground-motion models (compute mode)
}
HAZARD_COLUMNS = {"site_id": True, "lon": True, "lat": True, "im": True, "im_level": True, "annual_rate": True,
                  "statistic": False}
_FORMULA_START = ("=", "+", "@", "\t", "\r")
_MAX_ABS = 1e15


def _read_parquet(path):
    """Frame of a Parquet file and its 1-based record numbers."""
    try:
        frame = pq.read_table(path).to_pandas()
    except (pa.ArrowException, OSError) as exc:
        raise InputError(path, f"not a readable Parquet file ({type(exc).__name__})") from None
    return frame, np.arange(1, len(frame) + 1)


def _check_delimiter(path, text):
    """Refuse a spreadsheet ``sep=`` line and a header delimited by ``;``, tab or ``|`` (no comma)."""
    head = first_line(text.lstrip("\ufeff"))
    if head is None:
        return
    if re.fullmatch(r"sep=.", head):
        raise InputError(path, f"first line {head!r} is a spreadsheet delimiter hint; remove it and save the file "
                               "as comma-separated values", row=1)
    if "," not in head:
        for sep, name in ((";", "semicolon"), ("\t", "tab"), ("|", "'|'")):
            if sep in head:
                raise InputError(path, f"the header is {name}-delimited ({head.count(sep) + 1} fields, no comma); "
                                       "save the file as comma-separated values", row=1)


def _read_csv(path, fast=True):
    """Frame of a CSV file (all cells as text) and the file line where each record starts.

    A regular file (no quotes, one record per non-empty line) is read by the vectorised
    reader (:func:`quakefolio.pipeline.io.csv_fast.read_regular_csv`); any other file, or
    every file with ``fast=False``, by the general reader below.  Both give the same frame
    and rows.
    """
    raw = path.read_bytes()
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise InputError(path, f"not valid UTF-8 text (byte 0x{raw[exc.start]:02x})", row=line,
                         column=_column_at_byte(raw, exc.start)) from None
    _check_delimiter(path, text)
    del text
    regular = read_regular_csv(path, raw) if fast else None
    if regular is not None:
        return regular
    text = raw.decode("utf-8")
    _, starts = _csv_records(path, text)
    try:
        # index_col=False: a trailing delimiter on data rows must not turn the first column into an index;
        # the fields it drops were checked empty above, so its warning is noise
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", pd.errors.ParserWarning)
            frame = pd.read_csv(path, dtype=str, keep_default_na=False, skip_blank_lines=True,
                                encoding="utf-8", comment=None, index_col=False)
    except pd.errors.EmptyDataError:
        raise InputError(path, "file is empty") from None
    except pd.errors.ParserError as exc:
        msg = str(exc)
        m = re.search(r"line (\d+)", msg)
        raise InputError(path, f"malformed CSV: {msg.splitlines()[0]}", row=int(m.group(1)) if m else None) \
            from None
    # line numbers where records start (quoted fields may span lines; blank lines are skipped)
    if starts is not None and len(starts) == len(frame):
        rows = np.array(starts, dtype=np.int64)
    else:  # the two parsers disagree: fall back to counting non-blank lines
        nonblank = [i + 1 for i, ln in enumerate(text.splitlines()) if ln.strip()]
        rows = np.array(nonblank[1:1 + len(frame)] + [0] * max(0, len(frame) - len(nonblank) + 1))[: len(frame)]
    return frame, rows


def _check_columns(path, frame, columns):
    """Header: unique names, no misspelt known column, every required column present."""
    frame.columns = [str(c).strip() for c in frame.columns]
    present = list(frame.columns)
    check_unique_columns(path, present)
    for col in present:
        if col not in columns:
            hint = did_you_mean(col, columns, cutoff=0.8, skip=present)
            if hint:
                raise InputError(path, f"unknown column{hint}", row=1, column=col)
    for col, required in columns.items():
        if required and col not in present:
            raise InputError(path, "missing required column", row=1, column=col)


def read_table(path, columns):
    """Read a CSV or Parquet file as strings-or-values plus the row numbers of its records.

    Checks: file exists, not empty, UTF-8 (CSV), required columns present, unknown
    columns that look like misspelt known ones.

    Parameters
    ----------
    path : str or Path
        A ``.csv`` (or ``.txt``) or ``.parquet`` file.
    columns : dict
        Column name -> whether it is required.

    Returns
    -------
    (DataFrame, ndarray of int (n_records,))
        The frame (CSV cells as text) and ``rows[i]``, the user-facing row of record
        ``i`` (file line for CSV, 1-based record number for Parquet).
    """
    path = Path(path)
    if not path.exists():
        raise InputError(path, "file not found")
    if not path.is_file():
        raise InputError(path, "not a regular file")
    try:
        with open(path, "rb"):
            pass
    except OSError as exc:
        raise InputError(path, f"cannot read file: {exc.strerror}") from None
    if path.stat().st_size == 0:
        raise InputError(path, "file is empty")
    suffix = path.suffix.lower()
    if suffix == ".parquet":
        (frame, rows), first_data_row = _read_parquet(path), 1
    elif suffix in (".csv", ".txt"):
        (frame, rows), first_data_row = _read_csv(path), 2
    else:
        raise InputError(path, f"unsupported file type {suffix!r}: expected .csv or .parquet")
    _check_columns(path, frame, columns)
    if len(frame) == 0:
        raise InputError(path, "no data rows", row=first_data_row)
    return frame, rows


def _csv_records(path, text):
    """Header names and the start line (1-based) of every non-blank data record of CSV ``text``.

    Quoted fields may span lines, so record ``i`` does not sit on line ``i + 2`` in general.
    A record with more non-empty fields than the header is an error (a trailing empty
    field, as some spreadsheets write, is tolerated).  Returns ``(None, None)`` when the
    text is not well-formed CSV; the reader then reports it.
    """
    reader = csv.reader(io.StringIO(text, newline=""))
    header, starts, end = None, [], 0
    try:
        for fields in reader:
            start, end = end + 1, reader.line_num
            if not (len(fields) > 1 or (fields and fields[0].strip())):
                continue
            if header is None:
                header = [f.strip().lstrip("\ufeff") for f in fields]
                check_unique_columns(path, header)
                continue
            if len(fields) > len(header) and any(f.strip() for f in fields[len(header):]):
                raise InputError(path, f"record has {len(fields)} fields but the header has {len(header)}",
                                 row=start)
            starts.append(start)
    except csv.Error:
        return None, None
    return header, starts


def _column_at_byte(raw, offset):
    """Header name of the CSV field holding byte ``offset`` of ``raw`` (None on the header line)."""
    line_start = raw.rfind(b"\n", 0, offset) + 1
    if line_start == 0:
        return None
    try:
        header = next(csv.reader([raw.split(b"\n", 1)[0].decode("utf-8", "replace")]), [])
        index = len(next(csv.reader([raw[line_start:offset].decode("utf-8", "replace") + "x"]))) - 1
    except csv.Error:
        return None
    return header[index].strip().lstrip("\ufeff") if index < len(header) else None


#: Declared per-cell checks of numeric columns (each a constraint with a column-wise test).
POSITIVE = Interval(0, None, closed="neither")
NON_NEGATIVE = Interval(0, None)
LONGITUDE = Interval(-180.0, 180.0)
LATITUDE = Interval(-90.0, 90.0)
WHOLE = WholeNumber()
#: Checked on every numeric column before its own rules.
_ALWAYS = (Real(finite=True), MaxMagnitude(_MAX_ABS))
#: Optional exposure columns and their rules.
_OPTIONAL_EXPOSURE = {"vs30_mps": (POSITIVE,), "occupants": (NON_NEGATIVE, WHOLE), "deductible": (NON_NEGATIVE,),
                      "limit": (POSITIVE,), "contents_value": (NON_NEGATIVE,),
                      "interruption_value_per_day": (NON_NEGATIVE,),
                      "z1p0_km": (Interval(0.0, 3.0, message="expected a depth in [0, 3] km (a value in metres?)"),),
                      "z2p5_km": (Interval(0.0, 15.0, message="expected a depth in [0, 15] km (a value in metres?)"),),
                      "backarc": (Interval(0, 1), WHOLE)}
#: Optional money columns -> the per-state consequence their class must give.
_NEEDS_CONSEQUENCE = {"contents_value": "contents_damage_ratio", "interruption_value_per_day": "downtime_days"}


def _numbers(frame, rows, path, column, rules=(), *, required=True):
    """Column as float64 with per-cell checks; errors name the row and cell text.

    Parameters
    ----------
    frame : DataFrame
        From :func:`read_table`.
    rows : ndarray of int (n,)
        User-facing row of each record.
    path : str or Path
        The file, for errors.
    column : str
        The column to read.
    rules : sequence of quakefolio.core.validation.Constraint
        Checked in order on the non-empty cells (after "finite" and "not absurdly large").
    required : bool
        Whether empty cells (or NaN) are errors.

    Returns
    -------
    ndarray of float (n,)
        The values, NaN where a cell is empty.
    """
    raw = frame[column]
    values, empty, text = _parse_cells(raw)
    bad_parse = np.isnan(values) & ~empty
    if bad_parse.any():
        i = int(np.argmax(bad_parse))
        raise InputError(path, f"expected a number, got {text().iloc[i]!r}", row=int(rows[i]), column=column)
    if required and empty.any():
        i = int(np.argmax(empty))
        raise InputError(path, "missing value (empty or NaN)", row=int(rows[i]), column=column)
    for rule in _ALWAYS + tuple(rules):
        mask = ~empty & rule.violations(values)
        if mask.any():
            i = int(np.argmax(mask))
            raise InputError(path, f"{rule.describe()}, got {text().iloc[i]!r}", row=int(rows[i]), column=column)
    return values


def _parse_cells(raw):
    """Values of a column, its empty cells and a function giving the cells' text (for errors).

    Text cells: empty, ``nan``, ``none``, ``null``, ``na`` and ``n/a`` (any case, after
    stripping) are empty; the rest parse as numbers, NaN where they do not.  Columns of
    plain numbers are parsed by Arrow at once
    (:func:`quakefolio.pipeline.io.csv_fast.parse_numbers`); others by pandas, with the
    same result.

    Returns
    -------
    values : ndarray of float (n,)
    empty : ndarray of bool (n,)
    text : callable returning pandas.Series of str
        The stripped text of every cell (built only when an error needs it).
    """
    if raw.dtype == object or pd.api.types.is_string_dtype(raw):
        def text():
            return raw.astype(str).str.strip().fillna("")

        quick = parse_numbers(raw)
        if quick is not None:
            return quick[0], quick[1], text
        cells = text()
        empty = cells.eq("") | cells.str.lower().isin(["nan", "none", "null", "na", "n/a"])
        values = pd.to_numeric(cells.where(~empty, None), errors="coerce").to_numpy(dtype=float)
        return values, empty.to_numpy(dtype=bool), lambda: cells
    values = raw.to_numpy(dtype=float, na_value=np.nan)
    return values, np.isnan(values), lambda: raw.astype(str)


def _identifiers(frame, rows, path, column, *, unique=False, series=False):
    """Identifier column, stripped; the first bad cell is an error naming its row.

    Checks, in this order for each cell: not empty (nor ``nan``/``none``); no formula
    character first and no control character; at most 128 characters; with ``unique``,
    not seen before.  The checks are vectorised; the error names the first bad row.

    Returns
    -------
    ndarray of str, or pandas.Series of str (``series``)
    """
    ids = frame[column].astype(str).str.strip().fillna("")
    missing, formula, long = identifier_problems(ids, _FORMULA_START)
    bad = missing | formula | long
    if bad.any():
        i = int(np.argmax(bad))
        v = str(ids.iloc[i])
        if missing[i]:
            raise InputError(path, "missing identifier", row=int(rows[i]), column=column)
        if formula[i]:
            raise InputError(path, f"identifier {v[:40]!r} starts with a formula character or holds control "
                                   "characters", row=int(rows[i]), column=column)
        raise InputError(path, "identifier longer than 128 characters", row=int(rows[i]), column=column)
    if unique and pc.count_distinct(pa.array(ids, type=pa.string())).as_py() < len(ids):
        dup = ids.duplicated().to_numpy()
        if dup.any():
            i = int(np.argmax(dup))
            first = int(np.argmax((ids == ids.iloc[i]).to_numpy()))
            raise InputError(path, f"duplicate id {str(ids.iloc[i])!r} (first seen at row {int(rows[first])})",
                             row=int(rows[i]), column=column)
    if series:
        return ids.reset_index(drop=True)
    return ids.to_numpy(dtype=object).astype(str)


def read_exposure(path, library, group_column="building_class", keep=()):
    """Validated exposure as a DataFrame with columns of :data:`EXPOSURE_COLUMNS` and ``row``.

    Checks: unique ids, WGS84 ranges, known building classes (against ``library``),
    positive replacement values, optional columns non-negative, Vs30 of real ground
    (:func:`quakefolio.core.plausibility.vs30_problem`), deductible below limit.

    Parameters
    ----------
    path : str or Path
        Exposure file (CSV or Parquet), columns as in :data:`EXPOSURE_COLUMNS`.
    library : quakefolio.fragility.FragilityLibrary
        The building classes an asset may name.
    group_column : str
        Column grouping assets that share secondary uncertainty (``[portfolio] secondary_group``);
        another column than those of :data:`EXPOSURE_COLUMNS` is kept as identifiers (text,
        every row non-empty).
    keep : sequence of str
        Further columns to keep as identifiers (``[output] breakdown_columns``), where the
        file has them; the file's column names are in ``attrs["file_columns"]`` so that a
        caller can say which named column is missing.

    Returns
    -------
    pandas.DataFrame, n_assets rows
        ``asset_id``, ``lon``, ``lat`` [deg], ``building_class``, ``replacement_value``
        [currency], ``vs30_mps`` [m/s], ``occupants`` [-], ``deductible`` and ``limit``
        [currency] (building coverage), ``contents_value`` [currency],
        ``interruption_value_per_day`` [currency/day], ``z1p0_km`` and ``z2p5_km`` [km]
        (basin depths) and ``backarc`` (1: site in the backarc of a subduction zone) (NaN
        where the optional column is absent or empty) and ``row``, the user-facing row of each asset (see
        :func:`read_table`); ``terms_group`` (only where
        the file has the column; every asset then names its group); and ``group_column`` if
        it is none of these.

    Raises
    ------
    InputError
        On the first problem, naming file, row and column.
    """
    frame, rows = read_table(path, EXPOSURE_COLUMNS)
    out = pd.DataFrame({"asset_id": _identifiers(frame, rows, path, "asset_id", unique=True, series=True)})
    out["lon"] = _numbers(frame, rows, path, "lon", (LONGITUDE,))
    out["lat"] = _numbers(frame, rows, path, "lat", (LATITUDE,))
    classes = _identifiers(frame, rows, path, "building_class", series=True)
    unknown = ~classes.isin(list(library.classes)).to_numpy(dtype=bool)
    if unknown.any():
        i = int(np.argmax(unknown))
        hint = did_you_mean(str(classes.iloc[i]), library.classes, cutoff=0.6,
                            otherwise=f"; the library defines {sorted(library.classes)}")
        raise InputError(path, f"unknown building class {str(classes.iloc[i])!r}{hint}", row=int(rows[i]),
                         column="building_class")
    out["building_class"] = classes
    out["replacement_value"] = _numbers(frame, rows, path, "replacement_value", (POSITIVE,))
    for col, rules in _OPTIONAL_EXPOSURE.items():
        out[col] = _numbers(frame, rows, path, col, rules, required=False) if col in frame.columns else np.nan
    vs30 = out["vs30_mps"].to_numpy(dtype=float)
    bad = (vs30 < VS30_ERROR_BELOW_MPS) | (vs30 > VS30_ERROR_ABOVE_MPS)
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(path, vs30_problem(vs30[i]), row=int(rows[i]), column="vs30_mps")
    bad = (out["deductible"] >= out["limit"]).to_numpy()
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(path, f"deductible {out['deductible'].iloc[i]:g} is not below the limit "
                               f"{out['limit'].iloc[i]:g}", row=int(rows[i]), column="deductible")
    if group_column not in out.columns:
        if group_column not in frame.columns:
            raise InputError(path, "missing column named by [portfolio] secondary_group (assets sharing secondary "
                                   "uncertainty)", row=1, column=group_column)
        out[group_column] = _identifiers(frame, rows, path, group_column, series=True)
    if "terms_group" in frame.columns:
        out["terms_group"] = _identifiers(frame, rows, path, "terms_group", series=True)
    for col in keep:
        if col not in out.columns and col in frame.columns:
            out[col] = _identifiers(frame, rows, path, col, series=True)
    out.attrs["file_columns"] = [str(c) for c in frame.columns]
    for col, key in _NEEDS_CONSEQUENCE.items():
        lacking = [c for c in library.classes
                   if not library[c].has_damage_states or not np.isfinite(getattr(library[c], key)).all()]
        bad = (out[col].to_numpy() > 0) & classes.isin(lacking).to_numpy(dtype=bool)
        if bad.any():
            i = int(np.argmax(bad))
            code = str(classes.iloc[i])
            why = (" (it is given by a vulnerability table, without damage states)"
                   if not library[code].has_damage_states else "")
            raise InputError(path, f"{col} is given but class {code!r} has no {key} in the fragility "
                                   f"library{why}", row=int(rows[i]), column=col)
    out["row"] = rows
    return out


class UnavailableIM(ValueError):
    """The hazard file cannot provide curves for an IM a fragility class needs."""


@dataclass(frozen=True)
class HazardCurves:
    """Tabulated hazard curves per IM for a set of sites (read-only).

    Curves at untabulated periods are added once, at input time, by :meth:`with_im`
    (a new object); nothing changes an existing one.

    Attributes
    ----------
    site_id : ndarray of str (n_sites,)
    lon, lat : ndarray (n_sites,) [deg]
    curves : Mapping IM name -> (levels (n_sites, n_levels) [g], rates (n_sites, n_levels) [1/yr])
        Read-only.
    source : str
        File the curves came from.
    interpolated : frozenset of IM names built by period interpolation
    rows : Mapping IM name -> ndarray of int (n_sites, n_levels)
        File row of every tabulated point (read-only; empty for computed curves), to locate
        problems found after reading.
    warnings : tuple of quakefolio.core.errors.InputWarning
        Doubts about the file found while reading it (e.g. IM levels above recorded motion).
    """

    site_id: np.ndarray
    lon: np.ndarray
    lat: np.ndarray
    curves: Mapping
    source: str
    interpolated: frozenset = frozenset()
    rows: Mapping = field(default_factory=dict)
    warnings: tuple = ()

    def __post_init__(self):
        object.__setattr__(self, "curves", MappingProxyType(dict(self.curves)))
        object.__setattr__(self, "interpolated", frozenset(self.interpolated))
        object.__setattr__(self, "rows", MappingProxyType(dict(self.rows)))
        object.__setattr__(self, "warnings", tuple(self.warnings))

    def with_im(self, im, *, allow_interpolation=True):
        """These curves with ``im`` available: ``self`` if it is there, else a new object with its
        curves interpolated across periods (:func:`curves_for_im`) and ``im`` in ``interpolated``.

        Parameters
        ----------
        im : str
            Canonical IM name.
        allow_interpolation : bool
            ``[hazard] period_interpolation``.

        Returns
        -------
        HazardCurves

        Raises
        ------
        UnavailableIM
            As :func:`curves_for_im`.
        """
        if im in self.curves:
            return self
        curves = dict(self.curves)
        levels, rates = curves_for_im(self, im, allow_interpolation=allow_interpolation)
        curves[im] = (levels, rates)
        return replace(self, curves=curves, interpolated=self.interpolated | {im})


def read_hazard_curves(path, *, im_unit="g", statistic="mean"):
    """Read a long-form hazard-curve table and validate every curve.

    Checks: known IM names, positive levels, non-negative rates, one coordinate pair
    per site, no duplicated level within a curve, rates non-increasing with level,
    every site tabulated for every IM with the same number of levels per IM, at least
    two levels; the statistic asked for present for every site and IM; no flat curve;
    levels within reach of real ground motion; a warning for curves 0 at every level
    (:mod:`quakefolio.pipeline.io.hazard_checks`).
    Levels are converted from ``im_unit`` to g.

    Parameters
    ----------
    path : str or Path
        Hazard-curve file (CSV or Parquet), columns as in ``HAZARD_COLUMNS``.
    im_unit : {"g", "m/s2", "cm/s2"}
        Unit of the ``im_level`` column.
    statistic : str
        Rows of this ``statistic`` are kept (e.g. ``"mean"``); a file without a
        ``statistic`` column holds unlabelled curves, read for ``"mean"`` only.

    Returns
    -------
    HazardCurves
        Sites sorted by id; per tabulated IM (none interpolated), levels [g] and annual
        rates [1/yr] of shape (n_sites, n_levels), the file row of every point, and the
        warnings about the levels and about curves that are 0 everywhere.

    Raises
    ------
    InputError
        On the first problem, naming file, row and column.
    """
    frame, rows = read_table(path, HAZARD_COLUMNS)
    site = _identifiers(frame, rows, path, "site_id")
    lon = _numbers(frame, rows, path, "lon", (LONGITUDE,))
    lat = _numbers(frame, rows, path, "lat", (LATITUDE,))
    ims = frame["im"].astype(str).str.strip().to_numpy(dtype=object)
    canon = {}
    for i, name in enumerate(ims):
        if name not in canon:
            try:
                canon[name] = parse_im(name)
            except ValueError as exc:
                raise InputError(path, str(exc), row=int(rows[i]), column="im") from None
    ims = np.array([canon[v] for v in ims], dtype=object)
    level = _numbers(frame, rows, path, "im_level", (POSITIVE,)) * IM_UNITS_TO_G[im_unit]
    rate = _numbers(frame, rows, path, "annual_rate", (NON_NEGATIVE,))
    keep = statistic_rows(path, frame, rows, site, ims, statistic)
    df = pd.DataFrame({"site_id": site, "lon": lon, "lat": lat, "im": ims, "level": level, "rate": rate,
                       "row": rows})[keep]
    # one coordinate pair per site
    coords = df.groupby("site_id", sort=False)[["lon", "lat"]].agg(["min", "max"])
    spread = np.maximum(coords[("lon", "max")] - coords[("lon", "min")], coords[("lat", "max")] - coords[("lat", "min")])
    if (spread > 1e-9).any():
        sid = spread.index[np.argmax((spread > 1e-9).to_numpy())]
        sub = df[df.site_id == sid]
        r = sub[(sub.lon != sub.lon.iloc[0]) | (sub.lat != sub.lat.iloc[0])].row.iloc[0]
        raise InputError(path, f"site {sid!r} has more than one lon/lat pair", row=int(r), column="lon")
    df = df.sort_values(["im", "site_id", "level"], kind="stable")
    dup = df.duplicated(["im", "site_id", "level"]).to_numpy()
    if dup.any():
        r = df.row.to_numpy()[np.argmax(dup)]
        raise InputError(path, "duplicated im_level for this site and IM", row=int(r), column="im_level")
    same_curve = (df.im.to_numpy()[1:] == df.im.to_numpy()[:-1]) & (df.site_id.to_numpy()[1:] == df.site_id.to_numpy()[:-1])
    up = same_curve & (df.rate.to_numpy()[1:] > df.rate.to_numpy()[:-1])
    if up.any():
        i = int(np.argmax(up)) + 1
        r = df.row.to_numpy()[i]
        raise InputError(path, f"hazard curve of site {df.site_id.iloc[i]!r}, {df.im.iloc[i]} increases with "
                               f"im_level (rate {df.rate.iloc[i - 1]:g} then {df.rate.iloc[i]:g}); rates must be "
                               "non-increasing", row=int(r), column="annual_rate")
    sites = df.drop_duplicates("site_id").sort_values("site_id", kind="stable")
    site_ids = sites.site_id.to_numpy().astype(str)
    curves, curve_rows = {}, {}
    for im, sub in df.groupby("im", sort=True):
        counts = sub.groupby("site_id").size().reindex(site_ids)
        if counts.isna().any():
            missing = counts.index[counts.isna().to_numpy()][0]
            r = df[df.site_id == missing].row.iloc[0]
            raise InputError(path, f"site {missing!r} has no curve for {im} (every site needs every IM)",
                             row=int(r), column="im")
        n = int(counts.iloc[0])
        if (counts != n).any():
            sid = counts.index[(counts != n).to_numpy()][0]
            r = sub[sub.site_id == sid].row.iloc[0]
            raise InputError(path, f"site {sid!r} has {int(counts[sid])} levels for {im}, other sites have {n} "
                                   "(use the same number of levels per IM)", row=int(r), column="im_level")
        if n < 2:
            raise InputError(path, f"{im} needs at least 2 levels per site", row=int(sub.row.iloc[0]),
                             column="im_level")
        sub = sub.set_index("site_id").loc[site_ids]
        curves[im] = (sub.level.to_numpy().reshape(-1, n), sub.rate.to_numpy().reshape(-1, n))
        curve_rows[im] = sub.row.to_numpy().reshape(-1, n)
    check_flat_curves(path, site_ids, curves, curve_rows)
    notes = check_levels(path, site_ids, curves, curve_rows, im_unit, IM_UNITS_TO_G)
    notes += [w for w in [zero_curve_warning(path, site_ids, curves, curve_rows)] if w is not None]
    return HazardCurves(site_id=site_ids, lon=sites.lon.to_numpy(), lat=sites.lat.to_numpy(), curves=curves,
                        source=str(path), interpolated=frozenset(), rows=curve_rows, warnings=tuple(notes))


def curves_for_im(hazard, im, *, allow_interpolation=True):
    """Curves for ``im``; if not among ``hazard.curves``, interpolated across the neighbouring periods.

    A pure look-up: interpolated curves are returned, not stored
    (:meth:`HazardCurves.with_im` keeps them).  Between periods the interpolation is
    log-log at equal rates (:func:`quakefolio.core.curves.interpolate_period`).

    Parameters
    ----------
    hazard : HazardCurves
        Curves read by :func:`read_hazard_curves` (not modified).
    im : str
        IM name (``PGA`` or ``SA_<period in s>``).
    allow_interpolation : bool
        If False, only tabulated IMs are returned.

    Returns
    -------
    levels : ndarray, shape (n_sites, n_levels) [g]
    rates : ndarray, shape (n_sites, n_levels) [1/yr]

    Raises
    ------
    UnavailableIM
        When the IM is not tabulated and cannot be interpolated (no neighbour on one
        side, or interpolation disabled).
    InputError
        When a site's neighbouring curves share no range of positive rates (naming the
        file, the site and the first row of the curve to blame).
    """
    if im in hazard.curves:
        return hazard.curves[im]
    available = sorted(hazard.curves, key=im_period)
    if not allow_interpolation:
        raise UnavailableIM(f"{im} is not tabulated in {hazard.source} (tabulated: {', '.join(available)}) and "
                         "period interpolation is off")
    t = im_period(im)
    below = [n for n in available if im_period(n) < t]
    above = [n for n in available if im_period(n) > t]
    if not below or not above:
        raise UnavailableIM(f"{im} is outside the tabulated periods of {hazard.source} ({', '.join(available)}); "
                         "it can be interpolated between periods, not extrapolated")
    lo, hi = below[-1], above[0]
    (x1, l1), (x2, l2) = hazard.curves[lo], hazard.curves[hi]
    try:
        return interpolate_period(t, im_period(lo), x1, l1, im_period(hi), x2, l2)
    except NoCommonRates as exc:
        site = exc.index[0] if exc.index else 0
        blame = (lo, hi)[exc.neighbour - 1]
        row = int(hazard.rows[blame][site, 0]) if blame in hazard.rows else None
        raise InputError(hazard.source, f"site {str(hazard.site_id[site])!r}: {im} cannot be interpolated between "
                                        f"{lo} and {hi}, whose curves share no range of positive rates "
                                        f"({exc.ranges}); {_overlap_hint(exc)}",
                         row=row, column="annual_rate") from None



def _overlap_hint(exc):
    if "0 at every level" in exc.ranges:
        return "a site without hazard has rates of 0 at every period"
    return "the curves of one site must overlap in rate to be interpolated between: check both"


def map_assets_to_sites(exposure, hazard, *, max_distance_km, exposure_path):
    """Nearest hazard site of every asset (great circle); beyond the limit is an error.

    Parameters
    ----------
    exposure : pandas.DataFrame
        Validated exposure (:func:`read_exposure`): ``asset_id``, ``lon``, ``lat`` [deg],
        ``row``.
    hazard : HazardCurves
        Sites with ``lon``, ``lat`` [deg].
    max_distance_km : float
        Largest allowed asset-to-site distance [km].
    exposure_path : str or Path
        Named in the error for an asset too far away.

    Returns
    -------
    site_index : ndarray of int, shape (n_assets,)
        Index into ``hazard.site_id`` of each asset's site.
    distance_km : ndarray, shape (n_assets,) [km]
        Great-circle distance (:func:`quakefolio.core.geo.nearest_site`).

    Raises
    ------
    InputError
        Naming the first asset beyond ``max_distance_km``.
    """
    idx, dist = nearest_site(exposure.lon.to_numpy(), exposure.lat.to_numpy(), hazard.lon, hazard.lat)
    far = dist > max_distance_km
    if far.any():
        i = int(np.argmax(far))
        raise InputError(exposure_path, f"asset {exposure.asset_id.iloc[i]!r} is {dist[i]:.2f} km from the nearest "
                                        f"hazard site {str(hazard.site_id[idx[i]])!r} (limit {max_distance_km:g} km, "
                                        "[hazard] max_site_distance_km)",
                         row=int(exposure.row.iloc[i]), column="lon")
    return idx, dist
